"""PSA draws, the resumable outer loop on its backends, one-way sensitivity and summaries.

Statistical checks use fixed seeds and |z| < 4 with standard errors from the sample:
mean SE = sd/sqrt(n), variance SE = sqrt((m4 - s^4)/n) (common practice). References
are scipy.stats (beta, gamma, dirichlet, spearmanr) and published formulas named beside
each check.
"""
import functools
import math
import sys
import uuid

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.decision import economics
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import DistributionSpec, ParameterSpec
from microsim.uncertainty import one_way, parameter_draws, run_draws, summarise_draws
from support import assert_moments_match

SEED = 20261201
N_LARGE = 20_000
FINGERPRINT = {"scenario_sha256": "invented", "seed": SEED, "patients_per_draw": 1, "n_draws": 12}


def beta(name, value, alpha, b, **ranges):
    return ParameterSpec(name, value, DistributionSpec("beta", {"alpha": alpha, "beta": b}), **ranges)


def gamma(name, value, shape, scale, **ranges):
    return ParameterSpec(name, value, DistributionSpec("gamma", {"shape": shape, "scale": scale}), **ranges)


PARAMETERS = {
    "a": beta("a", 0.3, 3.0, 7.0),
    "b": gamma("b", 2.0, 4.0, 0.5),
    "c": ParameterSpec("c", 1.5),  # no distribution: stays at its value
}


# --- toy models: module level, so that process and dask workers can unpickle them -------

def toy_model(draw, values):
    """Invented demo model: two strategies, cost from `a` plus draw-seeded noise, effect from `b`."""
    noise = np.random.default_rng(draw).normal(0.0, 10.0, size=2)
    return pd.DataFrame({
        "strategy": ["usual care", "new drug"],
        "costs_discounted": [1000 * values["a"] + noise[0], 1000 * values["a"] + 400 + noise[1]],
        "qalys_discounted": [values["b"], values["b"] + 0.3 * values["c"]],
    })


class StopHere(Exception):
    """Raised by the logging model to interrupt a run at a chosen draw."""


def logging_model(draw, values, *, log_dir, stop_at=None, interrupt=StopHere):
    """toy_model that leaves one file per call in log_dir (works across processes)."""
    (log_dir / f"{draw}-{uuid.uuid4().hex}").touch()
    if draw == stop_at:
        raise interrupt(f"stopped at draw {draw}")
    return toy_model(draw, values)


def calls(log_dir):
    """Draw index of every call logged so far, sorted."""
    return sorted(int(p.name.split("-")[0]) for p in log_dir.iterdir())


# --- parameter draws ---------------------------------------------------------------------

def test_a_draw_does_not_depend_on_how_many_draws_are_asked_for():
    few, many = parameter_draws(PARAMETERS, SEED, 20), parameter_draws(PARAMETERS, SEED, 200)
    assert list(few.columns) == ["draw", "a", "b", "c"]
    pd.testing.assert_frame_equal(few, many.iloc[:20])
    pd.testing.assert_series_equal(few.loc[17], many.loc[17])
    pd.testing.assert_frame_equal(few, parameter_draws(PARAMETERS, SEED, 20))
    assert not np.allclose(few["a"], parameter_draws(PARAMETERS, SEED + 1, 20)["a"])
    # Adding a parameter or fixing one leaves the other parameters' draws alone.
    more = parameter_draws({**PARAMETERS, "d": gamma("d", 1.0, 2.0, 0.5)}, SEED, 20)
    pd.testing.assert_frame_equal(few, more[few.columns])
    fixed_b = parameter_draws({**PARAMETERS, "b": ParameterSpec("b", 2.0)}, SEED, 20)
    pd.testing.assert_series_equal(few["a"], fixed_b["a"])


def test_parameters_without_uncertainty_stay_at_their_value():
    table = parameter_draws({**PARAMETERS, "f": ParameterSpec("f", 4.2, DistributionSpec("fixed", {}))}, SEED, 50)
    assert (table["c"] == 1.5).all() and (table["f"] == 4.2).all()


def test_beta_and_gamma_draws_match_scipy_moments():
    # Reference: scipy.stats.beta(3, 7) and scipy.stats.gamma(4, scale=0.5) mean and variance.
    table = parameter_draws(PARAMETERS, SEED, N_LARGE)
    reference_a, reference_b = stats.beta(3.0, 7.0), stats.gamma(4.0, scale=0.5)
    assert_moments_match(table["a"].to_numpy(), reference_a.mean(), reference_a.var())
    assert_moments_match(table["b"].to_numpy(), reference_b.mean(), reference_b.var())


def test_method_of_moments_parameters_are_accepted():
    # Reference: a gamma with mean m and sd s has shape m^2/s^2 (Briggs, Claxton & Sculpher 2006, ch. 4).
    spec = ParameterSpec("cost", 500.0, DistributionSpec("gamma", {"mean": 500.0, "sd": 100.0}))
    sample = parameter_draws({"cost": spec}, SEED, N_LARGE)["cost"].to_numpy()
    reference = stats.gamma(25.0, scale=20.0)
    assert_moments_match(sample, reference.mean(), reference.var())


def test_dirichlet_group_sums_to_one_and_matches_scipy_mean():
    # Reference: scipy.stats.dirichlet mean and variance for alphas (30, 12, 8).
    alphas = (30.0, 12.0, 8.0)
    rows = {name: ParameterSpec(name, share) for name, share in zip(("stay", "worse", "die"), (0.6, 0.24, 0.16))}
    table = parameter_draws({**PARAMETERS, **rows}, SEED, N_LARGE, dirichlets=[(("stay", "worse", "die"), alphas)])
    shares = table[["stay", "worse", "die"]].to_numpy()
    np.testing.assert_allclose(shares.sum(axis=1), 1.0, rtol=1e-12)  # a probability row by definition
    for k in range(3):
        assert_moments_match(shares[:, k], stats.dirichlet.mean(alphas)[k], stats.dirichlet.var(alphas)[k])
    # The group does not disturb the other parameters' draws.
    pd.testing.assert_frame_equal(table[["draw", "a", "b", "c"]], parameter_draws(PARAMETERS, SEED, N_LARGE))


def test_copula_reaches_the_target_rank_correlation():
    # Reference: the Spearman correlation of a Gaussian copula with correlation rho is
    # (6/pi) asin(rho/2) (Pearson 1907, from memory); the Fisher z of a Spearman
    # coefficient has SE sqrt(1.06/(n-3)) (Fieller, Hartley & Pearson 1957).
    rho = 0.7
    parameters = {**PARAMETERS, "d": gamma("d", 1.0, 2.0, 0.5)}
    table = parameter_draws(parameters, SEED, N_LARGE, correlation=(["b", "a"], [[1.0, rho], [rho, 1.0]]))
    standard_error = math.sqrt(1.06 / (N_LARGE - 3))
    target = 6 / math.pi * math.asin(rho / 2)
    for pair, expected in ((("a", "b"), target), (("a", "d"), 0.0), (("b", "d"), 0.0)):
        observed = stats.spearmanr(table[pair[0]], table[pair[1]]).statistic
        z = (math.atanh(observed) - math.atanh(expected)) / standard_error
        assert abs(z) < 4, (pair, observed, expected)
    # Marginals keep their family: reference scipy.stats.beta(3, 7).
    assert_moments_match(table["a"].to_numpy(), stats.beta(3, 7).mean(), stats.beta(3, 7).var())


@pytest.mark.parametrize("change, path", [
    (dict(parameters={"a": ParameterSpec("a", 0.3, DistributionSpec("triangle", {"low": 0.0}))}),
     "parameters.a.distribution"),
    (dict(parameters={"a": beta("a", 0.3, -1.0, 7.0)}), "parameters.a.distribution"),
    (dict(parameters={"a": ParameterSpec("a", 0.3, DistributionSpec("beta", {"alpha": 3.0}))}),
     "parameters.a.distribution"),
    (dict(correlation=(["a", "zz"], np.eye(2))), "correlation"),
    (dict(correlation=(["a", "c"], np.eye(2))), "correlation"),
    (dict(correlation=(["a", "b"], [[1.0, 1.5], [1.5, 1.0]])), "correlation"),
    (dict(correlation=(["a", "b"], np.eye(3))), "correlation"),
    (dict(dirichlets=[(("a", "c"), (1.0, 2.0))]), "parameters.a.distribution"),
    (dict(dirichlets=[(("c", "zz"), (1.0, 2.0))]), "dirichlets[0]"),
    (dict(dirichlets=[(("c",), (1.0, 2.0))]), "dirichlets[0].alphas"),
    (dict(dirichlets=[(("c", "e"), (1.0, 0.0))]), "dirichlets[0].alphas"),
    (dict(n_draws=0), "n_draws"),
    (dict(parameters={"draw": ParameterSpec("draw", 1.0)}), "parameters.draw"),
])
def test_bad_input_names_its_field(change, path):
    arguments = {"parameters": {**PARAMETERS, "e": ParameterSpec("e", 0.5)}, "seed": SEED, "n_draws": 10, **change}
    with pytest.raises(ScenarioError) as caught:
        parameter_draws(**arguments)
    assert caught.value.path == path


# --- the outer loop ----------------------------------------------------------------------

@pytest.fixture(scope="module")
def draws():
    return parameter_draws(PARAMETERS, SEED, FINGERPRINT["n_draws"])


@pytest.fixture(scope="module")
def reference_run(draws, tmp_path_factory):
    return run_draws(toy_model, draws, tmp_path_factory.mktemp("reference"), fingerprint=FINGERPRINT)


def test_results_are_in_draw_order_and_written_to_disk(reference_run, draws, tmp_path):
    run = run_draws(toy_model, draws, tmp_path, fingerprint=FINGERPRINT, progress=False)
    assert list(run.columns) == ["draw", "strategy", "costs_discounted", "qalys_discounted"]
    assert run["draw"].tolist() == np.repeat(draws["draw"], 2).tolist()
    values = draws.drop(columns="draw").to_dict("records")
    expected = pd.concat([toy_model(d, v) for d, v in zip(draws["draw"], values)], ignore_index=True)
    pd.testing.assert_frame_equal(run.drop(columns="draw"), expected, check_dtype=False)
    pd.testing.assert_frame_equal(run, pd.read_parquet(tmp_path / "psa_draws.parquet"))
    assert sorted(p.name for p in (tmp_path / "draws").iterdir()) == [f"draw-{d:06d}.parquet" for d in range(12)]
    pd.testing.assert_frame_equal(run, reference_run)


def test_two_worker_processes_give_the_same_table(reference_run, draws, tmp_path):
    run = run_draws(toy_model, draws, tmp_path, workers=2, fingerprint=FINGERPRINT)
    pd.testing.assert_frame_equal(run, reference_run)


def test_dask_local_cluster_gives_the_same_table(reference_run, draws, tmp_path):
    pytest.importorskip("dask.distributed")
    run = run_draws(toy_model, draws, tmp_path, workers=2, backend="dask", fingerprint=FINGERPRINT)
    pd.testing.assert_frame_equal(run, reference_run)


@pytest.mark.parametrize("workers, interrupt", [(1, KeyboardInterrupt), (2, StopHere)])
def test_an_interrupted_run_resumes_with_only_the_missing_draws(reference_run, draws, tmp_path, workers, interrupt):
    log_dir = tmp_path / "calls"
    log_dir.mkdir()
    run_dir = tmp_path / "run"
    stopping = functools.partial(logging_model, log_dir=log_dir, stop_at=5, interrupt=interrupt)
    with pytest.raises(interrupt):
        run_draws(stopping, draws, run_dir, workers=workers, fingerprint=FINGERPRINT)
    kept = {int(p.stem.split("-")[1]) for p in (run_dir / "draws").glob("draw-*.parquet")}
    assert 5 not in kept and not (run_dir / "psa_draws.parquet").exists()
    if workers == 1:  # in process, draws run in order: exactly 0..4 were finished
        assert kept == set(range(5))
    first = calls(log_dir)
    run = run_draws(functools.partial(logging_model, log_dir=log_dir), draws, run_dir,
                    workers=workers, fingerprint=FINGERPRINT)
    pd.testing.assert_frame_equal(run, reference_run)
    resumed = list(calls(log_dir))
    for draw in first:
        resumed.remove(draw)
    assert sorted(resumed) == sorted(set(range(12)) - kept)  # each missing draw once, no other


def test_a_folder_from_another_run_is_refused(draws, tmp_path):
    run_draws(toy_model, draws, tmp_path, fingerprint=FINGERPRINT)
    log_dir = tmp_path.parent / f"{tmp_path.name}-calls"
    log_dir.mkdir()
    counting = functools.partial(logging_model, log_dir=log_dir)
    for fingerprint, table in (({**FINGERPRINT, "seed": SEED + 1}, draws),
                               (FINGERPRINT, parameter_draws(PARAMETERS, SEED + 1, 12))):
        with pytest.raises(ScenarioError) as caught:
            run_draws(counting, table, tmp_path, fingerprint=fingerprint)
        assert caught.value.path == "psa" and "different PSA" in caught.value.message
    assert calls(log_dir) == []


def test_a_leftover_temporary_file_is_cleared_on_resume(reference_run, draws, tmp_path):
    run_draws(toy_model, draws, tmp_path, fingerprint=FINGERPRINT)
    (tmp_path / "draws" / "draw-000003.parquet").unlink()
    leftover = tmp_path / "draws" / ".draw-000003.parquet-x1.tmp"
    leftover.write_bytes(b"half a file")
    pd.testing.assert_frame_equal(run_draws(toy_model, draws, tmp_path, fingerprint=FINGERPRINT), reference_run)
    assert not leftover.exists()


@pytest.mark.parametrize("options, path", [
    (dict(backend="threads"), "backend"), (dict(workers=0), "workers"), (dict(address="tcp://x:1"), "address"),
])
def test_bad_run_options_are_refused_before_anything_is_written(draws, tmp_path, options, path):
    with pytest.raises(ScenarioError) as caught:
        run_draws(toy_model, draws, tmp_path / "run", fingerprint=FINGERPRINT, **options)
    assert caught.value.path == path and not (tmp_path / "run").exists()


def test_missing_dask_says_how_to_install_it(draws, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "dask.distributed", None)  # makes the import fail
    with pytest.raises(ScenarioError, match=r"pip install 'microsim\[dask\]'") as caught:
        run_draws(toy_model, draws, tmp_path / "run", backend="dask", fingerprint=FINGERPRINT)
    assert caught.value.path == "backend" and not (tmp_path / "run").exists()


def test_a_dask_address_nothing_answers_at_is_refused_in_one_line(draws, tmp_path, monkeypatch):
    # port 1 on this machine has no scheduler: the connection times out (kept short here)
    pytest.importorskip("dask.distributed")
    from microsim.uncertainty import backends
    monkeypatch.setattr(backends, "CONNECT_SECONDS", 1)
    with pytest.raises(ScenarioError, match="no Dask scheduler answered at 'tcp://127.0.0.1:1'"
                       ) as caught:
        run_draws(toy_model, draws, tmp_path / "run", backend="dask",
                  address="tcp://127.0.0.1:1", fingerprint=FINGERPRINT)
    assert caught.value.path == "address" and "\n" not in str(caught.value)
    assert not (tmp_path / "run").exists()  # the folder it made is removed again


def wrong_draw_model(draw, values):
    return toy_model(draw, values).assign(draw=draw + 1)


def no_table_model(draw, values):
    return values["a"]


@pytest.mark.parametrize("model, error", [(wrong_draw_model, ValueError), (no_table_model, TypeError)])
def test_a_model_that_breaks_the_contract_is_a_programming_error(draws, tmp_path, model, error):
    with pytest.raises(error):
        run_draws(model, draws, tmp_path, fingerprint=FINGERPRINT)


# --- one-way sensitivity and summaries ----------------------------------------------------

def linear_model(values):
    return pd.DataFrame({"nmb": [3.0 * values["a"] - 10.0 * values["b"] + values["c"] ** 2]})


def test_one_way_orders_parameters_by_swing():
    # Reference: for this invented model the swings are |coefficient| x range by hand:
    # a: 3 x 0.4 = 1.2, b: 10 x 0.5 = 5, c: |2.5^2 - 0.5^2| = 6; d has no range.
    parameters = {
        "a": beta("a", 0.3, 3.0, 7.0, low=0.1, high=0.5),
        "b": ParameterSpec("b", 2.0, low=1.75, high=2.25),
        "c": ParameterSpec("c", 1.5, low=0.5, high=2.5),
        "d": ParameterSpec("d", 9.0),
    }
    table = one_way(linear_model, parameters, lambda result: result["nmb"].iloc[0])
    assert table["parameter"].tolist() == ["c", "b", "a"]
    np.testing.assert_allclose(table["swing"], [6.0, 5.0, 1.2], rtol=1e-12)
    base = 3.0 * 0.3 - 10.0 * 2.0 + 1.5**2
    np.testing.assert_allclose(table["result_base"], base, rtol=1e-12)
    row_b = table.set_index("parameter").loc["b"]
    assert (row_b["low"], row_b["high"], row_b["base"]) == (1.75, 2.25, 2.0)
    assert row_b["result_low"] == pytest.approx(base + 2.5) and row_b["result_high"] == pytest.approx(base - 2.5)


def test_one_way_without_any_range_is_refused():
    with pytest.raises(ScenarioError) as caught:
        one_way(linear_model, PARAMETERS, lambda result: result["nmb"].iloc[0])
    assert caught.value.path == "parameters"


def test_summaries_are_the_economics_tables(reference_run):
    # Reference: the economics module's own (separately tested) functions on the same table.
    thresholds = [0.0, 1000.0, 20000.0]
    summary = summarise_draws(reference_run, thresholds, comparator="usual care")
    pd.testing.assert_frame_equal(summary["acceptability"], economics.acceptability_curve(reference_run, thresholds))
    pd.testing.assert_frame_equal(summary["evpi"], economics.per_person_evpi(reference_run, thresholds))
    pd.testing.assert_frame_equal(summary["plane"], economics.cost_effectiveness_plane(reference_run, "usual care"))
    # At threshold 0 the cheaper strategy always wins: usual care costs 400 less, noise sd 10*sqrt(2).
    zero = summary["acceptability"].query("threshold == 0").set_index("strategy")
    assert zero.loc["usual care", "probability_best"] == 1.0
    with pytest.raises(ScenarioError) as caught:
        summarise_draws(reference_run, thresholds, comparator="no such strategy")
    assert caught.value.path == "comparator"
