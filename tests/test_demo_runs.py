"""The demo runs for any seed and population size, and its validation agrees.

Its moves compete through their rates (time.probability_rule = "competing"), so no patient's
row can leave 1 however high the urine protein-to-creatinine ratio is drawn; the verdicts
are the comparison's own (the simulated trace against the analytic expanded chain, with a
Bonferroni family-wise level of 0.001), at fixed seeds.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from microsim.cli import main
from microsim.scenario import read_scenario

DEMO = Path(__file__).parents[1] / "scenarios" / "lakemoor_kidney.toml"


def test_the_demo_says_its_moves_compete():
    assert read_scenario(DEMO).time.probability_rule == "competing"


@pytest.mark.parametrize("seed", [2, 987654321, 7])
def test_the_demo_runs_for_other_seeds(seed, tmp_path):
    assert main(["run", str(DEMO), "--seed", str(seed), "--patients", "300",
                 "--out", str(tmp_path)]) == 0
    summary = json.loads((tmp_path / "lakemoor_kidney" / "latest" / "summary.json").read_text())
    assert summary["seed"] == seed and summary["patients"] == 300
    assert {name: v["agrees"] for name, v in summary["validation"].items()} == {
        "usual_care": True, "protein_lowering": True, "everyone_treated": True}


def test_the_demo_runs_for_a_large_population(tmp_path):
    assert main(["validate", str(DEMO), "--patients", "50000", "--engine", "vectorised",
                 "--out", str(tmp_path)]) == 0
    manifest = json.loads((tmp_path / "lakemoor_kidney" / "latest" / "manifest.json").read_text())
    assert manifest["verdict"].startswith("The simulation agrees")


LUNG = Path(__file__).parents[1] / "scenarios" / "marshdale_lung_pathway.toml"


def test_the_lung_pathway_demo_runs_and_agrees(tmp_path):
    # two causes of death, exacerbations by state, start shares by a score and treatment
    # on entering a state (with a sequence): every strategy's simulation against its exact
    # per-patient counterpart, at the comparison's own family-wise level
    assert main(["run", str(LUNG), "--patients", "600", "--seed", "5",
                 "--out", str(tmp_path)]) == 0
    summary = json.loads((tmp_path / "marshdale_lung_pathway" / "latest" / "summary.json")
                         .read_text())
    assert {name: v["agrees"] for name, v in summary["validation"].items()} == {
        "usual_care": True, "maintenance": True, "sequence": True}
