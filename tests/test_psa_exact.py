"""The PSA on the exact basis (`uncertainty.basis = "exact"`): each draw the mean of the
patients' analytic expectations on one set of patients shared by every draw.

References outside the project: the closed form of the expected time alive under a
constant death rate r cut at the horizon H, L(r) = (1 - exp(-r H)) / r (common practice),
per patient with a proportional-hazards multiplier, averaged by hand over the patients the
population section generates; and, for the simulated basis, the same draws simulated,
each within |z| < 4 of the exact value by its own within-draw standard error.
"""
from __future__ import annotations

import json
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from microsim.patients.population import patients_for
from microsim.scenario import ScenarioError, parse_scenario
from microsim.uncertainty.psa import BASES, parameter_uncertainty
from support import (Z, after, assert_refused, event, horizon, nested, parameters, probability,
                     rate, scenario_text, section, start, state, strategy)

R, H, C_WELL, THRESHOLD, DIABETES_HR, PATIENTS, DRAWS = 0.1, 10.0, 1000.0, 20000.0, 1.5, 300, 12


def model_text(*extra: str, basis: str = "exact", memory=None) -> str:
    return scenario_text(
        horizon(H), start(well=1.0), state("well", utility=1, cost=C_WELL),
        state("dead", absorbing=True),
        rate("well", "dead", R, effects=[dict(attribute="diabetes", hazard_ratio=DIABETES_HR)],
             memory=memory),
        parameters(hr=dict(value=0.6, distribution=dict(family="gamma", shape=36, scale=0.6 / 36)),
                   c_drug=dict(value=500.0,
                               distribution=dict(family="gamma", shape=25, scale=20.0))),
        strategy("usual", comparator=True),
        strategy("drug", changes=[nested(transition="well->dead", hazard_ratio="hr"),
                                  nested(cost="c_drug")]),
        section("population", patients=PATIENTS),
        *extra, section("uncertainty", draws=DRAWS, basis=basis),
        section("economics", threshold=THRESHOLD), section("simulation", seed=3)
    ) + '\n[[population.attributes]]\nname = "diabetes"\ndistribution = "yesno"\nprevalence = 0.3\n'


def life(r: float) -> float:
    return (1.0 - math.exp(-r * H)) / r


def test_each_exact_draw_is_the_patients_closed_form_averaged_by_hand(tmp_path):
    scenario = parse_scenario(model_text())
    result = parameter_uncertainty(scenario, tmp_path / "psa", progress=False)
    assert result.basis == BASES["exact"]
    share = patients_for(scenario, PATIENTS, 3)["diabetes"].mean()  # the shared patients
    rows = result.results.merge(result.draws, on="draw")
    assert len(rows) == 2 * DRAWS and (rows.patients == PATIENTS).all()
    for row in rows.itertuples():
        hr = 1.0 if row.strategy == "usual" else row.hr
        cost = C_WELL + (0.0 if row.strategy == "usual" else row.c_drug)
        years = share * life(R * DIABETES_HR * hr) + (1 - share) * life(R * hr)
        assert row.life_years == pytest.approx(years, rel=1e-9)
        assert row.qalys_discounted == pytest.approx(years, rel=1e-9)
        assert row.costs_discounted == pytest.approx(cost * years, rel=1e-9)
    assert (result.results.filter(like="within") == 0).all().all()
    assert result.variance is None  # no inner noise: nothing to split


def test_the_simulated_basis_agrees_with_the_exact_one_draw_by_draw(tmp_path):
    exact = parameter_uncertainty(parse_scenario(model_text()),
                                  tmp_path / "exact", progress=False)
    simulated = parameter_uncertainty(parse_scenario(model_text(basis="simulated")),
                                      tmp_path / "simulated", patients=2000, progress=False)
    assert simulated.basis == BASES["simulated"]
    np.testing.assert_array_equal(exact.draws.to_numpy(), simulated.draws.to_numpy())

    def incremental_nmb(results):
        nmb = (THRESHOLD * results.qalys_discounted - results.costs_discounted).to_numpy().reshape(-1, 2)
        return nmb[:, 1] - nmb[:, 0]

    # the simulated draws have their own patients, so each differs from the exact value
    # on the shared patients by both draws' patient sampling and the histories' noise;
    # the within-draw variance holds both (the exact draw's own sampling error is that of
    # the shared patients' mean, of the same size at most: counted twice to be safe)
    within = simulated.results.incremental_nmb_within_variance.to_numpy()[1::2]
    n = simulated.results.patients.to_numpy()[1::2]
    z = (incremental_nmb(simulated.results) - incremental_nmb(exact.results)) / np.sqrt(
        within / n + within / PATIENTS)
    assert np.all(np.abs(z) < Z), z


def test_a_model_without_an_exact_counterpart_is_refused_before_any_draw(tmp_path):
    text = model_text(event("fall", ["well"], rate=0.2),
                      memory=[after("fall", within=2.0, multiplier=2.0)])
    with pytest.raises(ScenarioError) as refused:
        parameter_uncertainty(parse_scenario(text), tmp_path / "psa", progress=False)
    assert refused.value.path == "uncertainty.basis"
    assert "no exact counterpart" in refused.value.message and "simulated" in refused.value.message
    assert not (tmp_path / "psa").exists()


def test_a_misspelt_basis_is_refused_with_the_choices():
    assert_refused(model_text(basis="exakt"), "uncertainty.basis", "exact")


def test_the_basis_option_overrides_the_key_and_needs_the_psa(tmp_path, capsys):
    path = tmp_path / "drug.toml"
    path.write_text(model_text(basis="simulated"))
    out = tmp_path / "out"
    assert main(["run", str(path), "--basis", "exact", "--out", str(out)]) == 2
    assert capsys.readouterr().err.startswith("error: --basis: only acts on the PSA")
    assert main(["run", str(path), "--psa", "--draws", "4", "--basis", "exact",
                 "--patients", "200", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "PSA (4 draws; exact:" in printed
    assert main(["run", str(path), "--psa", "--basis", "exactly", "--out", str(out)]) == 2
    assert capsys.readouterr().err.startswith("error: --basis:")


def test_patients_given_on_the_command_line_are_the_psa_s_per_draw_default(tmp_path, capsys):
    path = tmp_path / "drug.toml"
    path.write_text(model_text(basis="simulated"))
    out = tmp_path / "out"
    assert main(["run", str(path), "--psa", "--draws", "2", "--patients", "150",
                 "--out", str(out)]) == 0
    draws = pd.read_parquet(out / "drug" / "latest" / "psa_draws.parquet")
    assert (draws.patients == 150).all()  # population.patients, as --patients set it
    assert main(["run", str(path), "--patients", "1", "--out", str(out)]) == 2
    assert capsys.readouterr().err.startswith("error: --patients: is 1; comparing strategies "
                                              "needs at least 2 patients")


def test_the_exact_basis_takes_its_shared_patients_from_patients_per_draw(tmp_path, capsys):
    # docs/scenario-format.md: n = --patients-per-draw, else patients_per_draw, else
    # population.patients; the draws are the closed form over the first n patients
    path = tmp_path / "drug.toml"
    path.write_text(model_text())
    out = tmp_path / "out"
    assert main(["run", str(path), "--psa", "--draws", "3", "--patients-per-draw", "40",
                 "--out", str(out)]) == 0
    folder = out / "drug" / "latest"
    rows = pd.read_parquet(folder / "psa_draws.parquet").merge(
        pd.read_parquet(folder / "psa_parameters.parquet"), on="draw")
    assert (rows.patients == 40).all()
    share = patients_for(parse_scenario(model_text()), 40, 3)["diabetes"].mean()
    for row in rows[rows.strategy == "usual"].itertuples():
        years = share * life(R * DIABETES_HR) + (1 - share) * life(R)
        assert row.life_years == pytest.approx(years, rel=1e-9)


def test_the_exact_basis_has_no_inner_noise_to_take_out(tmp_path, capsys):
    # docs/scenario-format.md: on the exact basis the draws carry no inner noise, so the
    # acceptability curve without it is left out of the printed summary, the written
    # table and summary.json alike (the report already says it is not drawn)
    path = tmp_path / "drug.toml"
    path.write_text(model_text())
    out = tmp_path / "out"
    assert main(["run", str(path), "--psa", "--draws", "4", "--patients", "50",
                 "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "PSA (4 draws): probability each strategy is best" in printed
    assert "noise_removed" not in printed and "noise_scale" not in printed
    folder = out / "drug" / "latest"
    table = pd.read_parquet(folder / "acceptability.parquet")
    assert {"probability_best", "expected_nmb"} <= set(table.columns)
    assert not {"probability_best_noise_removed", "noise_scale"} & set(table.columns)
    psa = json.loads((folder / "summary.json").read_text())["psa"]
    assert "noise_removed" not in psa
    assert not any("noise" in key for row in psa["acceptability_at_threshold"] for key in row)
    # the simulated basis of the same model keeps them
    path.write_text(model_text(basis="simulated"))
    assert main(["run", str(path), "--psa", "--draws", "4", "--patients", "50",
                 "--out", str(out)]) == 0
    assert "probability_best_noise_removed: " in capsys.readouterr().out
    table = pd.read_parquet(out / "drug" / "latest" / "acceptability.parquet")
    assert {"probability_best_noise_removed", "noise_scale"} <= set(table.columns)


def test_the_exact_basis_states_its_shared_patients_sampling_error(tmp_path):
    """The shared patients are a sample of the population: every draw carries their mean's
    offset alike. The stated standard error must be SD / sqrt(n) of the patients' closed
    forms (common practice), and the population's mean (the closed form at the
    prevalence, 0.3) must lie within Z of those errors of the shared patients' mean."""
    from types import SimpleNamespace
    from microsim.present import sampling_words
    scenario = parse_scenario(model_text())
    result = parameter_uncertainty(scenario, tmp_path / "psa", progress=False)
    diabetes = patients_for(scenario, PATIENTS, 3)["diabetes"].to_numpy(float)
    years = np.where(diabetes == 1, life(R * DIABETES_HR), life(R))  # usual care, base case
    se = years.std(ddof=1) / math.sqrt(PATIENTS)
    usual = result.sampling.set_index("strategy").loc["usual"]
    assert usual.qalys_discounted_se == pytest.approx(se, rel=1e-9)
    assert usual.costs_discounted_se == pytest.approx(C_WELL * se, rel=1e-9)
    population = 0.3 * life(R * DIABETES_HR) + 0.7 * life(R)
    assert abs(years.mean() - population) < Z * se
    # the increment of the drug (hr 0.6, c_drug 500 per year on it), paired by patient
    drug = np.where(diabetes == 1, life(R * DIABETES_HR * 0.6), life(R * 0.6))
    gain, spend = drug - years, (C_WELL + 500.0) * drug - C_WELL * years
    row = result.sampling.set_index("strategy").loc["drug"]
    for got, x in ((row.incremental_qalys_se, gain), (row.incremental_costs_se, spend),
                   (row.incremental_nmb_se, THRESHOLD * gain - spend)):
        assert got == pytest.approx(x.std(ddof=1) / math.sqrt(PATIENTS), rel=1e-9)
    assert math.isnan(usual.incremental_nmb_se)
    line = sampling_words(result, "pounds")
    assert f"the {PATIENTS:,} patients every draw shares are a sample" in line
    assert "of the increments over usual, paired by patient: drug" in line
    alike = SimpleNamespace(results=result.results, sampling=result.sampling.assign(
        qalys_discounted_se=0.0, costs_discounted_se=0.0))
    assert "no sampling error either" in sampling_words(alike, "pounds")


def test_the_exact_basis_gives_the_same_draws_on_two_workers(tmp_path):
    """Worker processes run the compiled exact products on one thread each; a cycle model
    with count memory (expanded states) must give the draws of one process, number for
    number."""
    text = scenario_text(
        horizon(10, cycle=1), start(well=1.0), state("well", utility=1, cost=C_WELL),
        state("dead", absorbing=True),
        probability("well", "dead", "p_die", effects=[dict(attribute="diabetes",
                                                           hazard_ratio=DIABETES_HR)],
                    memory=[after("flare", multipliers=[1.0, 1.4])]),
        probability("well", "well", "remainder"),
        event("flare", ["well"], probability=0.3),
        parameters(p_die=dict(value=0.1, distribution=dict(family="beta", alpha=10, beta=90)),
                   hr=dict(value=0.6, distribution=dict(family="gamma", shape=36,
                                                        scale=0.6 / 36))),
        strategy("usual", comparator=True),
        strategy("drug", changes=[nested(transition="well->dead", hazard_ratio="hr")]),
        section("population", patients=PATIENTS), section("uncertainty", draws=6, basis="exact"),
        section("economics", threshold=THRESHOLD), section("simulation", seed=3)
    ) + '\n[[population.attributes]]\nname = "diabetes"\ndistribution = "yesno"\nprevalence = 0.3\n'
    scenario = parse_scenario(text)
    one = parameter_uncertainty(scenario, tmp_path / "one", progress=False)
    two = parameter_uncertainty(scenario, tmp_path / "two", progress=False, workers=2)
    pd.testing.assert_frame_equal(one.results, two.results)
    assert one.results.qalys_discounted.nunique() == len(one.results)  # draws that differ
