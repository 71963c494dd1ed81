"""The value of information of `microsim run --psa`: EVPPI of the groups named by
uncertainty.evppi or --evppi, population EVPI by the formula computed here by hand
(EVPI x sum_{t=1..T} I_t / (1 + r)^t, Briggs, Claxton & Sculpher 2006 ch. 7, from memory),
the acceptability curve without the inner noise, and the refusals before any work."""
import json
import math

import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from support import horizon, parameters, rate, scenario_text, section, start, state, strategy
from test_tornado import nested

INCIDENCE, YEARS, DISCOUNT = 1000.0, 10, 0.035
MODEL = scenario_text(
    horizon(10), start(well=1.0), state("well", utility=1, cost=1000.0),
    state("dead", absorbing=True), rate("well", "dead", 0.1),
    parameters(hr=dict(value=0.6, distribution=dict(family="lognormal",
                                                    meanlog=math.log(0.6), sdlog=0.3)),
               c_drug=dict(value=3000.0, distribution=dict(family="gamma", shape=16,
                                                          scale=187.5))),
    strategy("usual", comparator=True),
    strategy("drug", changes=[nested(transition="well->dead", hazard_ratio="hr"),
                              nested(cost="c_drug")]),
    section("uncertainty", draws=40, patients_per_draw=30, evppi=["hr"]),
    section("economics", thresholds={"from": 0, "to": 40000, "step": 20000}))


def run(tmp_path, *options):
    path = tmp_path / "drug.toml"
    path.write_text(MODEL)
    out = tmp_path / "out"
    code = main(["run", str(path), "--patients", "20", "--psa", "--json", *options,
                 "--out", str(out)])
    return code, out / "drug" / "latest"


def test_evppi_population_evpi_and_the_noise_removed_curve_are_reported(tmp_path, capsys):
    code, folder = run(tmp_path, "--evppi", "hr", "--evppi", "c_drug,hr", "--incidence",
                       str(INCIDENCE), "--evpi-years", str(YEARS), "--evpi-discount",
                       str(DISCOUNT))
    assert code == 0
    summary = json.loads(capsys.readouterr().out)["psa"]
    evppi = pd.read_parquet(folder / "evppi.parquet")
    assert list(dict.fromkeys(evppi.group)) == ["hr", "c_drug + hr"]  # the option's groups
    assert (evppi.evppi >= 0).all() and (evppi.se[evppi.evppi > 0] > 0).all()
    assert (evppi[evppi.threshold == 0].evppi == 0).all()  # at 0 the drug never pays
    people = sum(INCIDENCE / (1 + DISCOUNT) ** t for t in range(1, YEARS + 1))  # by hand
    evpi = pd.read_parquet(folder / "evpi.parquet")
    np.testing.assert_allclose(evpi.population_evpi, evpi.evpi * people, rtol=1e-12)
    np.testing.assert_allclose(evppi.population_evppi, evppi.evppi * people, rtol=1e-12)
    acceptability = pd.read_parquet(folder / "acceptability.parquet")
    shares = acceptability.groupby("threshold").probability_best_noise_removed.sum()
    np.testing.assert_allclose(shares, 1.0)
    assert "inner patients' Monte-Carlo noise" in summary["noise_removed"]
    assert "1,000 new patients a year over 10 years" in summary["population"]
    assert {r["group"] for r in summary["evppi_at_threshold"]} == {"hr", "c_drug + hr"}


def test_the_scenario_s_groups_are_used_without_the_option(tmp_path, capsys):
    code, folder = run(tmp_path)
    assert code == 0
    assert set(pd.read_parquet(folder / "evppi.parquet").group) == {"hr"}
    assert "population_evpi" not in pd.read_parquet(folder / "evpi.parquet")


@pytest.mark.parametrize("options, phrase", [
    (["--evppi", "nothing"], "error: --evppi: no parameter named 'nothing'"),
    (["--evpi-years", "10"], "error: --evpi-years: population EVPI also needs "
                             "economics.evpi_discount and economics.incidence"),
    (["--evppi", "hr,c_drug,hr"], "error: --evppi[0]"),
])
def test_bad_options_are_refused_before_any_work(tmp_path, capsys, options, phrase):
    code, folder = run(tmp_path, *options)
    assert code == 2
    error = capsys.readouterr().err
    assert error.startswith(phrase.split("[")[0]) and "\n" not in error.strip(), error
    assert not (tmp_path / "out").exists()


def test_too_few_draws_for_a_group_are_refused_before_any_draw(tmp_path, capsys):
    code, _ = run(tmp_path, "--draws", "20", "--evppi", "hr,c_drug")
    assert code == 2
    assert capsys.readouterr().err.startswith(
        "error: --evppi: EVPPI of 2 parameter(s) needs at least 32 PSA draws")
    assert not (tmp_path / "out").exists()


def test_psa_options_without_the_psa_are_refused(tmp_path, capsys):
    path = tmp_path / "drug.toml"
    path.write_text(MODEL)
    assert main(["run", str(path), "--evppi", "hr", "--out", str(tmp_path / "out")]) == 2
    assert capsys.readouterr().err.startswith("error: --evppi: only acts on the PSA")
    assert main(["run", str(path), "--grid", "5", "--out", str(tmp_path / "out")]) == 2
    assert "only acts on the sensitivity analysis; add --sensitivity" in capsys.readouterr().err
