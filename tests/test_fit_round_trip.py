"""Fit -> scenario -> simulation: the written scenario reads back what was fitted, its
simulated survival follows the fitted model's (|z| < 4 with the binomial standard error:
common practice), and data drawn from known parameters give them back within their
standard errors: the Wald statistics of replicates against the chi-squared (fixed seeds)."""
from __future__ import annotations

import math
import re
from dataclasses import replace
from functools import lru_cache
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from lifelines.datasets import load_gbsg2, load_rossi

from microsim.cli import main
from microsim.fitting import scenario_text
from microsim.fitting.check import simulated_check
from microsim.fitting.data import read_survival_data
from microsim.fitting.estimate import fit_all
from microsim.fitting.families import AFT, BY_NAME, PH
from microsim.fitting.run import fit_and_write, output_names
from microsim.scenario import parse_scenario, read_scenario
from microsim.uncertainty.draw_checks import check_draws
from microsim.uncertainty.draws import ParameterSampler
import support
from support import Z

COVARIATES = ("fin", "prio")


@lru_cache(maxsize=None)
def rossi(tmp: str):
    """The Rossi data of lifelines.datasets (load_rossi), as a CSV, and our fits of it."""
    path = Path(tmp) / "rossi.csv"
    load_rossi().to_csv(path, index=False)
    data = read_survival_data(path, "week", "arrest", COVARIATES)
    return data, {fit.key: fit for fit in fit_all(data)}


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    return rossi(str(tmp_path_factory.mktemp("rossi")))


def written(tmp_path, fit, data, horizon=150.0, seed=3):
    path = tmp_path / "fitted_scenario.toml"
    path.write_text(scenario_text.scenario(fit, data, "rearrest", "weeks", horizon, seed,
                                           "fit_patients.csv"))
    data.frame().to_csv(tmp_path / "fit_patients.csv", index=False)
    return path


@pytest.mark.parametrize("key", [("weibull", PH), ("lognormal", AFT), ("generalised_gamma", AFT),
                                 ("gompertz", AFT), ("exponential", PH)])
def test_the_written_scenario_simulates_the_fitted_survival(fitted, tmp_path, key):
    data, fits = fitted
    fit = fits[key]
    check = simulated_check(written(tmp_path, fit, data), fit, data, 4000, 11)
    assert (np.abs(check.z_fitted) < Z).all(), check
    assert (np.abs(check.z) < Z).all(), check  # and its own analytic counterpart
    assert check.simulated.iloc[-1] < 0.7  # beyond the data, where families part


def test_the_written_scenario_reads_back_the_fit_bit_for_bit(fitted, tmp_path):
    data, fits = fitted
    fit = fits[("loglogistic", AFT)]
    scenario = read_scenario(written(tmp_path, fit, data))
    names = scenario_text.parameter_names(fit, "rearrest")
    values = [scenario.parameters[n].value for n in names]
    assert values == fit.family.natural(fit.estimate[:2]).tolist() + fit.coefficients.tolist()
    group = scenario.uncertainty.normal_groups[0]
    assert list(group.parameters) == names and list(group.means) == fit.estimate.tolist()
    assert np.array_equal(np.array(group.covariance), fit.covariance)
    assert group.on_log_scale == tuple(names[:2])
    effects = scenario.transitions[0].effects
    assert [(e.attribute, e.time_ratio, e.centre) for e in effects] == [
        (c, True, float(m)) for c, m in zip(COVARIATES, data.centres)]


def test_psa_draws_of_the_written_scenario_carry_the_fit_covariance(fitted, tmp_path):
    # reference: the sample covariance of the PSA draws on the fit's scale against the fit's
    # covariance, |z| < 4 with the standard error of a sample covariance (fourth moments)
    data, fits = fitted
    fit = fits[("weibull", PH)]
    scenario = read_scenario(written(tmp_path, fit, data))
    u = scenario.uncertainty
    sampler = ParameterSampler(scenario.parameters, None, u.dirichlets, u.normal_groups)
    table = check_draws(scenario, sampler, 4000, 5).table  # every draw valid as it stands
    names = scenario_text.parameter_names(fit, "rearrest")
    x = np.column_stack([np.log(table[names[0]]), np.log(table[names[1]]),
                         *(table[n] for n in names[2:])])
    centred = x - x.mean(axis=0)
    for i in range(x.shape[1]):
        for j in range(i + 1):
            products = centred[:, i] * centred[:, j]
            se = products.std(ddof=1) / math.sqrt(len(x))
            assert abs(products.mean() - fit.covariance[i, j]) < Z * se, (i, j)


def test_the_written_scenario_runs_a_psa_from_its_multivariate_normal(fitted, tmp_path):
    # `microsim run --psa` on the written scenario: its only uncertainty is the group
    data, fits = fitted
    fit = fits[("weibull", PH)]
    path = written(tmp_path, fit, data)
    assert main(["run", str(path), "--patients", "100", "--psa", "--draws", "3",
                 "--patients-per-draw", "20", "--out", str(tmp_path / "out")]) == 0
    drawn = pd.read_csv(tmp_path / "out" / path.stem / "latest" / "psa_parameters.csv")
    names = scenario_text.parameter_names(fit, "rearrest")
    assert len(drawn) == 3 and (drawn[names[:2]] > 0).all().all()
    assert drawn[names].nunique().eq(3).all()  # every member drawn, none left at its base


def test_fit_and_write_keeps_what_the_command_writes(tmp_path):
    path = tmp_path / "rossi.csv"
    load_rossi().to_csv(path, index=False)
    run = fit_and_write(path, "week", "arrest", ("fin",), None, "weeks", tmp_path,
                        family="lognormal", patients=1500, seed=4)
    assert run.chosen.key == ("lognormal", AFT)
    assert run.summary["check"]["agrees"]
    # named after the data file and the fit, so that two fits' files never share a name
    names = {"scenario": "rossi_lognormal_aft.toml", "block": "rossi_lognormal_aft_block.toml",
             "patients": "rossi_lognormal_aft_patients.csv"}
    assert run.summary["files"] == names and set(run.files) == set(names.values())
    block = run.files[names["block"]].read_text()
    assert run.data.sha256 in block and "log-normal" in block
    assert re.search(r"by `microsim fit` on \d{4}-\d{2}-\d{2} from rossi.csv", block)  # dated
    scenario = run.files[names["scenario"]].read_text()
    assert block in scenario and 'file = "rossi_lognormal_aft_patients.csv"' in scenario
    # the block alone is TOML of the scenario's keys: the transition, parameters, the group
    assert "[[transitions]]" in block and "[[uncertainty.multivariate_normal]]" in block
    models = run.tables["fit_models"]
    assert models.chosen.sum() == 1 and models.loc[models.chosen, "family"].item() == "lognormal"


def test_the_written_files_are_named_after_the_data_file_and_the_fit(fitted):
    # two fits never share a scenario's name, so their runs never share a folder: another
    # data file, another family, another form each give another name
    data, fits = fitted
    names = {output_names(d, fits[key])["scenario"] for d, key in [
        (data, ("weibull", PH)), (replace(data, path=Path("trial.csv")), ("weibull", PH)),
        (data, ("lognormal", AFT)), (data, ("weibull", AFT))]}
    assert names == {"rossi_weibull_ph.toml", "trial_weibull_ph.toml",
                     "rossi_lognormal_aft.toml", "rossi_weibull_aft.toml"}


# --- known parameters recovered ------------------------------------------------------------

def weibull_ph_data(rng, n, shape, scale, betas):
    """T with H(t | x) = exp(x'b) (t / scale)^shape, by inverting it (closed form), x a
    yes/no and a normal covariate, censored uniformly on (0, 30) and at 25."""
    x = np.column_stack([rng.random(n) < 0.4, rng.normal(0, 1, n)]).astype(float)
    eta = (x - x.mean(axis=0)) @ betas
    t = scale * (-np.log(rng.random(n)) / np.exp(eta)) ** (1 / shape)
    censor = np.minimum(rng.uniform(0, 30, n), 25.0)
    return x, np.minimum(t, censor), (t <= censor).astype(float)


def lognormal_aft_data(rng, n, meanlog, sdlog, betas):
    """log T = meanlog + x'b + sdlog Z (closed form), with delayed entry: a patient is in
    the data only if T exceeds its entry time, drawn on (0, 3)."""
    rows = []
    while sum(len(r[0]) for r in rows) < n:
        x = np.column_stack([rng.random(n) < 0.5, rng.normal(0, 1, n)]).astype(float)
        t = np.exp(meanlog + x @ betas + sdlog * rng.normal(size=n))
        entry = rng.uniform(0, 3, n)
        censor = entry + rng.uniform(0, 20, n)
        seen = t > entry
        rows.append((x[seen], entry[seen], np.minimum(t, censor)[seen], (t <= censor)[seen]))
    x, entry, time, event = (np.concatenate([r[k] for r in rows])[:n] for k in range(4))
    return x, entry, time, event.astype(float)


def to_file(tmp_path, name, x, time, event, entry=None) -> Path:
    frame = pd.DataFrame({"time": time, "event": event, "a": x[:, 0], "b": x[:, 1]})
    if entry is not None:
        frame["entry"] = entry
    path = tmp_path / f"{name}.csv"
    frame.to_csv(path, index=False)
    return path


def replicate_fits(folder, family, form, draw, replicates, seed, entry=False):
    """The fits of `replicates` data sets drawn by `draw`, each fitted as `fit_all` fits it,
    from the exponential up, with the data it was fitted to."""
    rng = np.random.default_rng(seed)
    fits = []
    for r in range(replicates):
        x, *rest = draw(rng)
        if entry:
            start, time, event = rest
            path = to_file(folder, f"d{r}", x, time, event, start)
        else:
            time, event = rest
            path = to_file(folder, f"d{r}", x, time, event)
        data = read_survival_data(path, "time", "event", ("a", "b"), "entry" if entry else None)
        chain = [BY_NAME[name] for name in ("exponential", "weibull", family.name)]
        fit = next(f for f in fit_all(data, tuple(dict.fromkeys(chain)))
                   if f.key == (family.name, form))
        assert fit.converged, fit.note
        fits.append((fit, data))
    return fits


def assert_recovered(fits, truth_at):
    # reference: for a consistent estimator with the right covariance V, each replicate's
    # Wald statistic (estimate - truth)' V^-1 (estimate - truth) is chi-squared with as many
    # degrees of freedom as parameters (asymptotically; Wald 1943), and the replicates are
    # independent, so their sum is chi-squared with the sum of those (scipy.stats.chi2);
    # both tails at the two-sided level of |z| < 4
    total = dof = 0
    for fit, data in fits:
        gap = fit.estimate - truth_at(data)
        total += float(gap @ np.linalg.solve(fit.covariance, gap))
        dof += fit.size
    level = 2 * stats.norm.sf(Z)
    assert level / 2 < stats.chi2.cdf(total, dof) < 1 - level / 2, (total, dof)


WEIBULL_TRUTH = 1.4, 12.0, np.array([0.5, -0.3])  # shape, scale, PH coefficients


@pytest.fixture(scope="module")
def weibull_replicates(tmp_path_factory):
    shape, scale, betas = WEIBULL_TRUTH
    return replicate_fits(tmp_path_factory.mktemp("weibull"), BY_NAME["weibull"], PH,
                          lambda rng: weibull_ph_data(rng, 300, shape, scale, betas), 30, 21)


def test_known_weibull_ph_parameters_are_recovered_within_their_standard_errors(
        weibull_replicates):
    shape, scale, betas = WEIBULL_TRUTH
    # the data are drawn centred at their own means, as the fit centres them
    assert_recovered(weibull_replicates,
                     lambda data: np.array([math.log(shape), math.log(scale), *betas]))


def test_a_truth_three_standard_errors_away_is_not_recovered(weibull_replicates):
    # the same check fails when the Weibull log shape it is given is 3 of its SEs off
    shape, scale, betas = WEIBULL_TRUTH
    off = 3 * np.mean([fit.se[0] for fit, _ in weibull_replicates])
    with pytest.raises(AssertionError):
        assert_recovered(weibull_replicates,
                         lambda data: np.array([math.log(shape) + off, math.log(scale), *betas]))


def test_known_lognormal_aft_parameters_are_recovered_under_delayed_entry(tmp_path):
    meanlog, sdlog, betas = 1.5, 0.8, np.array([0.4, 0.25])
    fits = replicate_fits(tmp_path, BY_NAME["lognormal"], AFT,
                          lambda rng: lognormal_aft_data(rng, 300, meanlog, sdlog, betas),
                          20, 22, entry=True)
    # centring moves meanlog to the covariates' means
    assert_recovered(fits, lambda data: np.array([meanlog + data.centres @ betas,
                                                  math.log(sdlog), *betas]))


# --- the unit of time ---------------------------------------------------------------------

def test_a_fit_in_days_is_the_fit_in_weeks_in_other_units(tmp_path):
    # reference: the change of variables t_days = 7 t_weeks (closed form): each event's
    # density is divided by 7, so log L drops by events x log 7; a log scale, meanlog or mu
    # gains log 7, a log rate loses it, the Gompertz shape is divided by 7; shapes, q and
    # coefficients stay; the covariance follows the same linear map (written out here by
    # parameter name, independently of the fit's own map). Every model must converge in
    # both units.
    frame = load_rossi()
    frame["day"] = frame.week * 7
    path = tmp_path / "rossi_days.csv"
    frame.to_csv(path, index=False)
    weeks, days = ({f.key: f for f in fit_all(read_survival_data(path, column, "arrest",
                                                                 COVARIATES))}
                   for column in ("week", "day"))
    for key, in_weeks in weeks.items():
        in_days = days[key]
        assert in_weeks.converged and in_days.converged, key
        gains = {"log_scale": math.log(7.0), "meanlog": math.log(7.0), "mu": math.log(7.0),
                 "log_rate": -math.log(7.0)}
        factor = np.array([1 / 7.0 if (name, key[0]) == ("shape", "gompertz") else 1.0
                           for name in in_weeks.names])
        shift = np.array([gains.get(name, 0.0) for name in in_weeks.names])
        expected = factor * in_weeks.estimate + shift
        se = np.sqrt(np.diag(in_days.covariance))
        assert np.all(np.abs(in_days.estimate - expected) <= 1e-3 * se), key
        assert in_days.log_likelihood == pytest.approx(
            in_weeks.log_likelihood - in_weeks.events * math.log(7.0), abs=1e-6), key
        np.testing.assert_allclose(in_days.covariance,
                                   in_weeks.covariance * np.outer(factor, factor), rtol=1e-3)


def test_nested_families_fit_at_least_as_well_on_data_in_days(tmp_path):
    # reference: nesting (closed form): the exponential is the Weibull at shape 1 and the
    # Gompertz at shape 0, the Weibull and log-normal are the generalised gamma at q = 1 and
    # q = 0, so each larger family's maximum is at least the smaller's; on the German
    # breast cancer data of lifelines.datasets (load_gbsg2: 686 patients, days to
    # recurrence, 299 events), where a Gompertz shape per day is about 3e-4
    frame = load_gbsg2()
    frame["horth"] = (frame.horTh == "yes").astype(int)
    path = tmp_path / "gbsg2.csv"
    frame[["time", "cens", "horth", "tsize", "pnodes"]].to_csv(path, index=False)
    fits = {f.key: f for f in fit_all(read_survival_data(path, "time", "cens",
                                                         ("horth", "tsize", "pnodes")))}
    assert all(f.converged for f in fits.values()), [(k, f.note) for k, f in fits.items()]
    slack = 1e-6  # each maximum is found to within the convergence criterion (1e-8)
    for form in (PH, AFT):
        exponential = fits[("exponential", form)].log_likelihood
        for larger in ("weibull", "gompertz"):
            assert fits[(larger, form)].log_likelihood >= exponential - slack, (larger, form)
    gamma = fits[("generalised_gamma", AFT)].log_likelihood
    for smaller in ("weibull", "lognormal"):
        assert gamma >= fits[(smaller, AFT)].log_likelihood - slack, smaller


def test_text_covariates_are_written_as_level_effects_that_simulate_the_fit(tmp_path):
    # the German breast cancer data (lifelines.datasets, load_gbsg2) with its text columns
    # tgrade (I, II, III) and menostat (Post, Pre) and its age at entry: the scenario's
    # effects at each level, against the reference level, must reproduce the fitted
    # survival when simulated (|z| < 4, binomial SE), and the commented attributes must
    # read as categorical attributes with the shares of the data (pandas value_counts)
    frame = load_gbsg2()
    path = tmp_path / "gbsg2.csv"
    frame.to_csv(path, index=False)
    run = fit_and_write(path, "time", "cens", ("tgrade", "menostat", "age"), None, "days",
                        tmp_path, family="weibull", form="ph", patients=3000, seed=5,
                        references={"tgrade": "II"})
    assert run.summary["check"]["agrees"], run.tables["fit_check"]
    scenario = read_scenario(run.files[run.summary["files"]["scenario"]])
    effects = [(e.attribute, e.level) for e in scenario.transitions[0].effects]
    assert effects == [("tgrade", "I"), ("tgrade", "III"), ("menostat", "Pre"),
                       ("age_at_entry", None)]
    assert set(scenario.parameters) >= {"event_tgrade_i", "event_tgrade_iii",
                                        "event_menostat_pre", "event_age_at_entry"}
    block = run.files[run.summary["files"]["block"]].read_text()
    drawn = "\n".join(line.removeprefix("# ") for line in block.splitlines()
                      if line.startswith("# [[population") or line.startswith("# name")
                      or line.startswith("# distribution") or line.startswith("# levels")
                      or line.startswith("# shares"))
    around = support.scenario_text(support.horizon(10, unit="days"), support.start(a=1),
                                   support.state("a"), support.state("b", absorbing=True),
                                   support.rate("a", "b", 0.1))
    attributes = {a.name: a for a in parse_scenario(
        f"{around}\n[population]\npatients = 10\n{drawn}\n").population.attributes}
    for name in ("tgrade", "menostat"):
        counts = frame[name].value_counts(normalize=True).sort_index()
        assert attributes[name].distribution == "categorical"
        assert attributes[name].params["levels"] == tuple(counts.index)
        np.testing.assert_allclose(attributes[name].params["shares"], counts.to_numpy(),
                                   rtol=1e-15)

