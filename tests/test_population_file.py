"""A population file (CSV or Parquet) is typed by one rule and every use of its columns is
checked against that rule whenever a command reads it, before anything is simulated.

The rules are the scenario format's own (docs/scenario-format.md, "Population files").
References outside the project: the closed form of a constant hazard, P(event by t) =
1 - exp(-h t), with the proportional-hazards multiplier of Cox (1972, "Regression models
and life-tables"), against which simulated shares are tested at |z| < 4 with the binomial
standard error (common practice); numpy and pandas (weighted means, min/max, the same
frame read back from Parquet written by pandas/pyarrow) for what the file holds.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.cli import main
from microsim.cohort.summaries import cohort_trace
from microsim.patients.multipliers import multipliers
from microsim.patients.population import draw_population, expected_covariate, patients_for
from microsim.scenario import ScenarioError, read_scenario
from microsim.scenario import population_file
from microsim.scenario.population_file import read_population_file
from microsim.scenario.spec import PopulationSpec
from microsim.simulation import simulate
from microsim.uncertainty.one_way import tornado
from microsim.uncertainty.psa import inner_patients
from microsim.workflow import run_main, validate
from support import (Z, edited, effect, horizon, move, nested, parameters, population, rate,
                     scenario_text, section, start, state, strategy)

PROVENANCE = "Invented for tests; the patients in the file are not real."
PEOPLE = "group,age,smoker,w\na,40,yes,1\nb,65,No,2\na,70,TRUE,1\nb,55,false,3\n"


def base_text(**added) -> str:
    """A rate model whose patients come from people.csv: effects on a text column (with a
    level) and on a yes/no column (without), conditions on all three kinds of column."""
    return scenario_text(
        horizon(5), start(well=1.0), state("well", cost=100, utility=0.9),
        state("sick", utility=0.6), state("dead", absorbing=True),
        rate("well", "dead", "r_death", effects=[effect("group", 1.5, level="b")]),
        rate("well", "sick", 0.05, effects=[effect("smoker", 2.0)]), rate("sick", "dead", 0.3),
        parameters(r_death=dict(value=0.1, low=0.05, high=0.15,
                                distribution=dict(family="gamma", shape=100, scale=0.001)),
                   hr_drug=dict(value=0.8, distribution=dict(family="lognormal", meanlog=-0.22,
                                                             sdlog=0.1))),
        population(100, file="people.csv", weights="w"),
        strategy("usual", comparator=True),
        strategy("drug", eligible=nested(all=[dict(attribute="age", above=50)],
                                         any=[dict(attribute="smoker", equals=True),
                                              dict(attribute="group", one_of=["a"])]),
                 changes=[nested(transition="well->dead", hazard_ratio="hr_drug")], **added),
        section("uncertainty", draws=2, patients_per_draw=20),
        title="population file test", provenance=PROVENANCE)


BASE = base_text()


def write(folder, text: str = BASE, people: str = PEOPLE):
    (folder / "people.csv").write_text(people)
    path = folder / "scenario.toml"
    path.write_text(text)
    return path


# ------------------------------------------------------- the defects users saw, refused

# (scenario edits, file edits, field path, phrase of the one-line message)
DEFECTS = {
    "level in the wrong case": (
        [('level = "b"', 'level = "B"')], [], "transitions.well->dead.effects[0].level",
        "'B' is not a level of column 'group' (levels: 'a', 'b'; did you mean 'b'?)"),
    "no level on a text column": (
        [('\n  level = "b"', "")], [], "transitions.well->dead.effects[0].level",
        "is required: 'group' is categorical; give the level the hazard ratio applies to, one "
        "of 'a', 'b'"),
    "n/a in a number column": (
        [], [("b,55,", "b,n/a,")], "population.file",
        "column 'age' of people.csv holds numbers, but data row 4 has 'n/a'; write a finite "
        "number there"),
    "decimal comma in a number column": (
        [], [("b,55,", 'b,"12,5",')], "population.file",
        "column 'age' of people.csv holds numbers, but data row 4 has '12,5'; write a finite "
        "number there (with a decimal point, like 12.5)"),
    "unquoted decimal comma": (
        [], [("b,55,", "b,55,5,")], "population.file",
        "cannot read people.csv: data row 4 has 5 values but the header names 4 columns; a "
        "decimal comma splits a number in two (write 0.77, not 0,77)"),
}


def defect_file(folder, defect: str):
    scenario_edits, file_edits, _, _ = DEFECTS[defect]
    return write(folder, edited(BASE, *scenario_edits), edited(PEOPLE, *file_edits))


def test_the_base_runs_and_checks_quietly(tmp_path, capsys):
    path = write(tmp_path)
    assert main(["run", str(path), "--patients", "50", "--out", str(tmp_path / "out")]) == 0
    assert "Traceback" not in capsys.readouterr().err


@pytest.mark.parametrize("command", ["run", "validate", "sensitivity", "population", "trace"])
@pytest.mark.parametrize("defect", DEFECTS)
def test_a_defect_is_one_line_and_exit_2_through_the_cli(defect, command, tmp_path, capsys):
    path = defect_file(tmp_path, defect)
    out = tmp_path / "out"
    assert main([command, str(path), "--out", str(out)]) == 2
    captured = capsys.readouterr()
    _, _, field, phrase = DEFECTS[defect]
    lines = captured.err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {field}: "), captured.err
    assert phrase in lines[0]
    assert "Traceback" not in captured.err + captured.out
    assert not out.exists()  # nothing written


API = {  # every way the Python API draws patients or the average patient
    "run_main": lambda path: run_main(path, patients=50),
    "validate": lambda path: validate(path, patients=50),
    "patients_for": lambda path: patients_for(read_scenario(path), 50, 1),
    "psa inner patients": lambda path: inner_patients(read_scenario(path), 3, 20),
    "average patient": lambda path: cohort_trace(bind(read_scenario(path))),
    "sensitivity": lambda path: tornado(read_scenario(path), 50),
}


@pytest.mark.parametrize("entry", API)
@pytest.mark.parametrize("defect", DEFECTS)
def test_a_defect_is_a_scenario_error_with_the_exact_path(defect, entry, tmp_path):
    path = defect_file(tmp_path, defect)
    with pytest.raises(ScenarioError) as refused:
        API[entry](path)
    _, _, field, phrase = DEFECTS[defect]
    assert refused.value.path == field and phrase in refused.value.message
    assert "\n" not in str(refused.value)


# --------------------------------------------- every use of a column, against its kind

# (id, scenario edits, file edits, field path, phrase)
USES = [
    ("level on a number column", [('attribute = "group"\n', 'attribute = "age"\n')], [],
     "transitions.well->dead.effects[0].level", "'age' is continuous: the hazard ratio applies "
     "per unit"),
    ("level on a yes/no column", [('attribute = "group"\n', 'attribute = "smoker"\n')], [],
     "transitions.well->dead.effects[0].level", "'smoker' is a yes/no attribute: the hazard "
     "ratio applies when yes; remove level"),
    ("centre on a yes/no column", [("hazard_ratio = 2.0", "hazard_ratio = 2.0\n  centre = 1.0")],
     [], "transitions.well->sick.effects[0].centre", "is only used with continuous attributes; "
     "'smoker' is a yes/no attribute"),
    ("a level only in another case", [], [("a,40,", "A,40,"), ("a,70,", "A,70,")],
     "strategies.drug.eligible.any[1].one_of[0]",
     "'a' is not a level of column 'group' (levels: 'A', 'b'; did you mean 'A'?)"),
    ("number test on a text column", [('one_of = ["a"]', "above = 1")], [],
     "strategies.drug.eligible.any[1].above", "'group' is categorical; above compares numbers"),
    ("a level the column lacks", [('one_of = ["a"]', 'one_of = ["a", "c"]')], [],
     "strategies.drug.eligible.any[1].one_of[1]",
     "'c' is not a level of column 'group' (levels: 'a', 'b')"),
    ("yes/no column tested against text", [("equals = true", 'equals = "yes"')], [],
     "strategies.drug.eligible.any[0].equals", "equals needs true or false, got 'yes'"),
    ("number test on a yes/no column", [("equals = true", "at_most = 0")], [],
     "strategies.drug.eligible.any[0].at_most", "'smoker' is a yes/no attribute; use equals"),
    ("levels of a number column", [("above = 50", 'one_of = ["50"]')], [],
     "strategies.drug.eligible.all[0].one_of", "'age' is continuous; one_of lists levels"),
    ("band of a text column", [('weights = "w"', 'weights = "w"\n\n  [[population.derived]]\n'
                                '  name = "band"\n  from = "group"\n  edges = [0]\n'
                                '  labels = ["all"]')], [],
     "population.derived.band.from", "column 'group' of people.csv holds text (categorical); "
     "bands need a column of numbers"),
    ("band of a yes/no column", [('weights = "w"', 'weights = "w"\n\n  [[population.derived]]\n'
                                  '  name = "band"\n  from = "smoker"\n  edges = [0]\n'
                                  '  labels = ["all"]')], [],
     "population.derived.band.from", "holds yes/no values; bands need a column of numbers"),
    ("band above the lowest value", [('weights = "w"', 'weights = "w"\n\n  [[population.derived]]\n'
                                      '  name = "band"\n  from = "age"\n  edges = [50]\n'
                                      '  labels = ["50+"]')], [],
     "population.derived.band.edges", "the first edge (50) is above the lowest value 'age' can "
     "take (40), so some patients would fit no band"),
    ("age column of text", [], [("a,40,", "a,old,"), ("b,65,", "b,old,"), ("a,70,", "a,young,"),
                                ("b,55,", "b,young,")],
     "population.file", "column 'age' of people.csv is the age at time 0 and must hold numbers, "
     "but it holds text (categorical)"),
    ("a negative age", [], [("a,70,", "a,-0.5,")], "population.file",
     "column 'age' of people.csv is the age at time 0 and cannot be negative, but data row 3 "
     "has -0.5; correct it or drop the row"),
    ("weights of text", [], [("yes,1\n", "yes,one\n"), ("No,2\n", "No,two\n")],
     "population.weights", "column 'w' of people.csv holds text (categorical); sampling weights "
     "are numbers"),
    ("a negative weight", [], [("No,2\n", "No,-2\n")], "population.weights",
     "sampling weights must be >= 0, but data row 2 of people.csv has -2"),
    ("a missing weight", [], [("No,2\n", "No,\n")], "population.weights",
     "column 'w' of people.csv has no value in data row 2"),
    ("all weights zero", [], [("yes,1\n", "yes,0\n"), ("No,2\n", "No,0\n"),
                              ("TRUE,1\n", "TRUE,0\n"), ("false,3\n", "false,0\n")],
     "population.weights", "are all zero, so no row can be drawn"),
    ("a missing value", [], [("b,65,", "b,,")], "population.file",
     "column 'age' of people.csv has no value in data row 2 (1 missing in all); fill in"),
    ("a short row", [], [("false,3\n", "false\n")], "population.weights",
     "column 'w' of people.csv has no value in data row 4"),
    ("an infinite number", [], [("b,65,", "b,inf,")], "population.file",
     "column 'age' of people.csv holds numbers, but data row 2 has 'inf'"),
    ("an unquoted decimal comma", [], [("b,65,", "b,6,5,")], "population.file",
     "cannot read people.csv: data row 2 has 5 values but the header names 4 columns"),
    ("an unquoted decimal comma in the first row", [], [("a,40,", "a,4,0,")], "population.file",
     "cannot read people.csv: data row 1 has more values than the header names columns"),
    ("no data rows", [], [(PEOPLE[PEOPLE.index("\n") + 1:], "")], "population.file",
     "people.csv has no data rows"),
]


@pytest.mark.parametrize("case", USES, ids=[c[0] for c in USES])
def test_every_use_of_a_column_is_checked_when_the_file_is_read(case, tmp_path):
    _, scenario_edits, file_edits, field, phrase = case
    path = write(tmp_path, edited(BASE, *scenario_edits), edited(PEOPLE, *file_edits))
    scenario = read_scenario(path)  # the header alone: any use of a column passes here
    with pytest.raises(ScenarioError) as refused:
        patients_for(scenario, 10, 1)
    assert refused.value.path == field, str(refused.value)
    assert phrase in refused.value.message, str(refused.value)
    assert "\n" not in str(refused.value)


def test_an_added_transition_is_checked_under_its_strategy(tmp_path):
    text = base_text(transitions=[move("sick", "well", rate=0.1, effects=[
        effect("group", 2.0, level="B")])])
    with pytest.raises(ScenarioError) as refused:
        patients_for(read_scenario(write(tmp_path, text)), 10, 1)
    assert refused.value.path == "strategies.drug.transitions.sick->well.effects[0].level"
    assert "did you mean 'b'?" in refused.value.message


@pytest.mark.parametrize("added, field", [
    (dict(events=[nested(name="cough", states=["sick"], rate=0.5, effects=[
        effect("group", 2.0, level="B")])]), "strategies.drug.events.cough.effects[0].level"),
    (dict(stop_on="sick", then=[nested(name="second", events=[nested(
        name="cough", states=["sick"], rate=0.5, effects=[effect("group", 2.0, level="B")])])]),
     "strategies.drug.then.second.events.cough.effects[0].level"),
], ids=["strategy-event", "later-treatment-event"])
def test_an_added_event_is_checked_under_its_treatment(tmp_path, added, field):
    with pytest.raises(ScenarioError) as refused:
        patients_for(read_scenario(write(tmp_path, base_text(**added))), 10, 1)
    assert refused.value.path == field
    assert "did you mean 'b'?" in refused.value.message


def test_the_weights_column_is_not_an_attribute(tmp_path):
    """Known from the header alone, so refused when the scenario is read."""
    text = edited(BASE, ('attribute = "group"\n', 'attribute = "w"\n'))
    with pytest.raises(ScenarioError) as refused:
        read_scenario(write(tmp_path, text))
    assert refused.value.path == "transitions.well->dead.effects[0].attribute"
    assert "no attribute 'w'" in refused.value.message


def one_risk(folder, people: str, *effects, size: int = 20, **population_fields):
    """A two-state model (well -> dead at rate 0.1 for 2 years) drawing from `people`."""
    (folder / "people.csv").write_text(people)
    text = scenario_text(
        horizon(2), start(well=1.0), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.1, effects=list(effects) or None),
        population(size, file="people.csv", **population_fields),
        title="one risk", provenance=PROVENANCE)
    (folder / "scenario.toml").write_text(text)
    return read_scenario(folder / "scenario.toml")


def test_a_long_list_of_levels_is_cut(tmp_path):
    people = "group\n" + "".join(f"g{i:03d}\n" for i in range(200))
    scenario = one_risk(tmp_path, people, effect("group", 2.0, level="g1000"))
    with pytest.raises(ScenarioError) as refused:
        patients_for(scenario, 10, 1)
    assert refused.value.path == "transitions.well->dead.effects[0].level"
    assert "(levels: 'g000', 'g001', " in refused.value.message
    assert "'g011' and 188 more; did you mean " in refused.value.message


# ---------------------------------------------------------------- what the file holds

def test_the_typing_rule(tmp_path):
    path = tmp_path / "people.csv"
    path.write_text("stage,age,flag,note\n1,40 ,Yes,x\n2, 65.5,no,x\n3a,70,TRUE,y\n3b,55,False,x\n")
    file = read_population_file(path)
    rows, columns = file.rows, file.columns
    assert columns["stage"].levels == ("1", "2", "3a", "3b")  # half numbers: categorical
    assert columns["age"].kind == "continuous" and rows["age"].tolist() == [40, 65.5, 70, 55]
    assert (columns["age"].lowest, columns["age"].highest) == (40, 70)  # numpy min/max
    assert rows["flag"].dtype == bool and rows["flag"].tolist() == [True, False, True, False]
    assert (columns["flag"].lowest, columns["flag"].highest) == (0, 1)
    assert columns["note"].kind == "categorical" and columns["note"].lowest is None
    assert list(rows["note"].cat.categories) == ["x", "y"]
    assert (file.weights == 1).all()


def test_levels_are_exact_case_and_come_from_the_whole_file(tmp_path):
    (tmp_path / "people.csv").write_text("group,w\nb,1\nA,1\na,0\n")  # 'a' is never drawn
    spec = PopulationSpec(size=500, file=tmp_path / "people.csv", weights="w")
    one, many = draw_population(spec, 1, [7]), draw_population(spec, 1)
    for frame in (one, many):
        assert list(frame["group"].cat.categories) == ["A", "a", "b"]  # sorted(), exact case
    assert set(many["group"]) == {"A", "b"}
    (tmp_path / "reversed.csv").write_text("group,w\na,0\nA,1\nb,1\n")
    assert read_population_file(tmp_path / "reversed.csv", "w").columns["group"].levels == (
        "A", "a", "b")


def test_an_effect_applies_to_its_level_in_exactly_that_case(tmp_path):
    people = "group\na\nA\nb\na\n"
    scenario = one_risk(tmp_path, people, effect("group", 4.0, level="a"))
    drawn = patients_for(scenario, 20, 5)
    log_hr = multipliers(bind(scenario), drawn).log_static[:, 0]
    # proportional hazards (Cox 1972): log HR where the level applies, 0 elsewhere
    np.testing.assert_allclose(log_hr, math.log(4.0) * (drawn["group"] == "a"))
    with pytest.raises(ScenarioError, match=r"'B' is not a level of column 'group' \(levels: "
                                            r"'A', 'a', 'b'; did you mean 'b'\?\)"):
        patients_for(one_risk(tmp_path, people, effect("group", 4.0, level="B")), 20, 5)


def test_a_yes_no_text_column_is_a_yes_no_attribute(tmp_path):
    """An effect without level multiplies the hazard of the 'yes' rows only: the share dead
    by t is 1 - exp(-h HR t) for them and 1 - exp(-h t) for the others (closed form)."""
    h, hr, t, n = 0.1, 3.0, 2.0, 4000
    scenario = one_risk(tmp_path, "smoker,w\nYes,1\nno,3\nTRUE,2\nFalse,1\nyes,1\n",
                        effect("smoker", hr), size=n, weights="w")
    drawn = patients_for(scenario, None, 11)
    assert drawn["smoker"].dtype == bool
    sim = simulate(bind(scenario), drawn, 11)
    dead = sim.states[:, -1] == 1
    for smoker, multiplier in ((True, hr), (False, 1.0)):
        group = dead[drawn["smoker"].to_numpy() == smoker]
        p = 1 - math.exp(-h * multiplier * t)
        assert abs(group.mean() - p) / math.sqrt(p * (1 - p) / group.size) < Z, smoker
    # the average patient's covariate: the weighted share of yes rows (numpy.average)
    assert expected_covariate(scenario.population, "smoker") == pytest.approx(
        np.average([1, 0, 1, 0, 1], weights=[1, 3, 2, 1, 1]), rel=1e-12)


def test_an_age_of_0_is_drawn_and_a_negative_age_in_parquet_is_refused(tmp_path, capsys):
    # the edge: 0 is an age (a newborn); -1 in a Parquet file is refused as in a CSV, also
    # by the command line in one line with exit code 2
    newborn = write(tmp_path, people=PEOPLE.replace("a,40,", "a,0,"))
    patients = patients_for(read_scenario(newborn), 50, 1)
    assert patients["age"].min() == 0
    table = pd.read_csv(tmp_path / "people.csv", dtype=str)
    table["age"], table["w"] = table["age"].astype(float), table["w"].astype(float)
    table.loc[1, "age"] = -1.0
    table.to_parquet(tmp_path / "people.parquet")
    path = tmp_path / "parquet.toml"
    path.write_text(BASE.replace("people.csv", "people.parquet"))
    assert main(["validate", str(path), "--patients", "10", "--out", str(tmp_path / "out")]) == 2
    assert capsys.readouterr().err.strip().splitlines() == [
        "error: population.file: column 'age' of people.parquet is the age at time 0 and cannot be "
        "negative, but data row 2 has -1; correct it or drop the row"]
    assert not (tmp_path / "out").exists()  # nothing half-written


def test_a_parquet_file_behaves_like_the_csv(tmp_path):
    csv_path = write(tmp_path)
    table = pd.read_csv(tmp_path / "people.csv", dtype=str)
    table["age"], table["w"] = table["age"].astype(int), table["w"].astype(float)
    table["group"] = pd.Categorical(table["group"], categories=["a", "b", "unused"])
    table.to_parquet(tmp_path / "people.parquet")
    parquet_path = tmp_path / "parquet.toml"
    parquet_path.write_text(BASE.replace("people.csv", "people.parquet"))
    frames = [patients_for(read_scenario(p), 300, 3) for p in (csv_path, parquet_path)]
    pd.testing.assert_frame_equal(frames[0], frames[1], check_dtype=False)
    assert list(frames[1]["group"].cat.categories) == ["a", "b"]  # the values, not the dtype's
    table["group"] = table["group"].astype(str)  # a plain string column
    table.to_parquet(tmp_path / "people.parquet")
    parquet_path.write_text(edited(BASE.replace("people.csv", "people.parquet"),
                                   ('level = "b"', 'level = "B"')))
    with pytest.raises(ScenarioError) as refused:
        patients_for(read_scenario(parquet_path), 10, 1)
    field, phrase = DEFECTS["level in the wrong case"][2:]
    assert refused.value.path == field and phrase in refused.value.message


def test_a_parquet_column_of_dates_is_refused(tmp_path):
    pd.DataFrame({"visit": pd.to_datetime(["2020-01-01", "2021-06-30"])}).to_parquet(
        tmp_path / "visits.parquet")
    with pytest.raises(ScenarioError, match="column 'visit' of visits.parquet holds datetime"):
        read_population_file(tmp_path / "visits.parquet")


# ------------------------------------------------------------------ read once, the same

def test_a_command_reads_the_file_once(tmp_path, monkeypatch, capsys):
    """run with PSA draws patients, the average patient and the PSA inner patients: one
    parse of the file; a changed file is read again."""
    reads = []
    original = population_file.raw_table
    monkeypatch.setattr(population_file, "raw_table", lambda path: reads.append(path) or
                        original(path))
    path = write(tmp_path)
    argv = ["run", str(path), "--patients", "50", "--psa", "--draws", "2", "--patients-per-draw",
            "20", "--out", str(tmp_path / "out")]
    assert main(argv) == 0
    assert len(reads) == 1
    (tmp_path / "people.csv").write_text(PEOPLE + "b,80,no,1\n")
    assert main(argv[:2] + ["--patients", "50", "--out", str(tmp_path / "again")]) == 0
    assert len(reads) == 2
    capsys.readouterr()


def test_check_reads_the_file_and_refuses_what_run_would(tmp_path, capsys):
    # `microsim check` must not say ok for a scenario that `run` then refuses
    path = write(tmp_path, edited(BASE, ('level = "b"', 'level = "B"')))
    assert main(["check", str(path)]) == 2
    assert "is not a level of column 'group'" in capsys.readouterr().err
