"""Reading valid scenarios: the example files load, and each value lands in the right spec
field with the documented defaults (docs/scenario-format.md is the reference)."""
from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.cli import main
from microsim.patients.population import draw_population
from microsim.scenario import Scenario, ScenarioError, parse_scenario, read_scenario
from microsim.scenario.spec import REMAINDER, HazardSpec
from support import (Z, assert_refused, attribute, effect, horizon, nested, population,
                     probability, rate, scenario_text, section, start, state, strategy, table,
                     transition)

SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"

MINIMAL = """\
title = "Minimal"
provenance = "Invented for tests; not real data."

[time]
unit = "months"
horizon = 12

[start]
shares = { a = 1 }

[[states]]
name = "a"

[[states]]
name = "b"

[[transitions]]
from = "a"
to = "b"
{value}
"""


def minimal(value: str = "probability = 1", extra: str = "") -> Scenario:
    return parse_scenario(MINIMAL.replace("{value}", value) + extra)


@pytest.mark.parametrize("name", ["lakemoor_kidney.toml", "ward_recovery.toml",
                                  "ward_length_of_stay.toml"])
def test_examples_load_without_warnings(name):
    scenario = read_scenario(SCENARIOS / name)
    assert scenario.warnings == ()
    assert scenario.source == SCENARIOS / name
    assert "invented" in scenario.provenance.lower()
    assert "INVENTED" in (SCENARIOS / name).read_text().split("\n\n")[0]  # top comment


def test_lakemoor_values_land_in_their_fields():
    s = read_scenario(SCENARIOS / "lakemoor_kidney.toml")
    assert s.discrete
    assert (s.time.unit, s.time.cycle, s.time.horizon, s.time.lifetime_cap) == \
        ("years", 1.0, None, 40.0)
    assert s.time.end == 40.0 and s.time.n_cycles == 40
    assert s.state_names == ("early", "advanced", "kidney_failure", "dead")
    assert [st.absorbing for st in s.states] == [False, False, False, True]
    assert s.states[2].cost == "c_dialysis" and s.states[2].label == "Kidney failure (on dialysis)"
    assert s.start.age is None  # the population's attribute gives every patient's age
    assert s.start.shares == {"early": 0.7, "advanced": 0.3, "kidney_failure": 0.0, "dead": 0.0}

    by_key = {t.key: t for t in s.transitions}
    progression = by_key["early->advanced"]
    assert progression.name == "progression" and progression.probability == "p_progression"
    assert [(e.attribute, e.hazard_ratio, e.centre, e.level) for e in progression.effects] == \
        [("biomarker", "hr_biomarker", 0.8, None), ("diabetes", "hr_diabetes", 0.0, None)]
    assert progression.memory[0].after == "acute_kidney_injury"
    assert progression.memory[0].multipliers == (1.0, 1.3, 1.6)
    assert progression.memory[0].cap == 2
    assert by_key["early->early"].probability == REMAINDER
    assert by_key["early->dead"].probability == "background_death"
    assert by_key["early->dead"].clock == "age"  # the table is by age
    assert by_key["advanced->kidney_failure"].cost == "c_dialysis_start"

    injury = s.events[0]
    assert (injury.name, injury.states, injury.probability, injury.disutility) == \
        ("acute_kidney_injury", ("early", "advanced"), "p_acute_kidney_injury", 0.03)
    assert injury.effects[1].level == "male" and injury.effects[1].hazard_ratio == 1.1

    p = s.parameters["p_progression"]
    assert (p.value, p.low, p.high) == (0.06, 0.04, 0.08)
    assert p.distribution.family == "beta" and p.distribution.params == {"alpha": 60, "beta": 940}
    assert s.parameters["c_dialysis_start"].distribution is None

    table = s.tables["background_death"]
    assert table.by == "age" and table.clock == "age"
    assert table.starts[:3] == (0.0, 60.0, 65.0) and table.values[-1] == 0.28

    assert (s.outcomes.discount_costs, s.outcomes.discount_effects, s.outcomes.correction) == \
        (0.035, 0.035, "trapezoidal")
    pop = s.population
    assert pop.size == 5000 and pop.file is None
    attributes = {a.name: a for a in pop.attributes}
    assert attributes["age"].params == {"mean": 60, "sd": 9, "lower": 40, "upper": 90}
    assert attributes["sex"].params == {"levels": ("female", "male"), "shares": (0.48, 0.52)}
    assert attributes["diabetes"].params == {"prevalence": 0.35}
    assert attributes["biomarker"].continuous and not attributes["sex"].continuous
    assert pop.correlation_attributes == ("age", "biomarker")
    assert pop.correlation == ((1.0, 0.2), (0.2, 1.0))
    assert pop.derived[0].source == "age" and pop.derived[0].labels == ("40-59", "60-74", "75+")
    assert (s.simulation.seed, s.simulation.batch_size, s.simulation.grid) == \
        (20261201, 20000, 1.0)


def test_ward_hazards_and_memory():
    s = read_scenario(SCENARIOS / "ward_length_of_stay.toml")
    assert not s.discrete
    assert s.time.horizon == 60.0 and s.time.n_cycles == 60
    by_key = {t.key: t for t in s.transitions}
    assert by_key["recovering->discharged"].hazard == HazardSpec("table", {"table": "discharge_rate"})
    assert by_key["recovering->discharged"].clock == "since_entry"  # table by time_in_state
    assert by_key["recovering->complication"].hazard == HazardSpec("constant", {"rate": "r_complication"})
    assert by_key["recovering->dead"].hazard == HazardSpec("constant", {"rate": 0.0005})
    resolved = by_key["complication->recovering"]
    assert resolved.name == "complication_resolved"
    assert resolved.hazard == HazardSpec("weibull", {"shape": 1.5, "scale": 6.0})
    after_fall = by_key["complication->dead"].memory[0]
    assert (after_fall.after, after_fall.within, after_fall.multiplier, after_fall.cap) == \
        ("fall", 2.0, 2.0, None)
    assert s.events[0].hazard == HazardSpec("constant", {"rate": 0.003})
    assert s.population is None
    assert s.simulation.seed == 7 and s.simulation.grid is None  # the grid defaults to the cycle


def test_defaults():
    s = minimal()
    assert s.description == "" and s.source is None
    assert (s.time.cycle, s.time.lifetime_cap) == (1.0, 100.0)
    a = s.states[0]
    assert (a.label, a.absorbing, a.cost, a.utility) == ("a", False, 0.0, 0.0)
    t = s.transitions[0]
    assert (t.name, t.clock, t.cost, t.disutility, t.effects, t.memory) == \
        ("a->b", "since_entry", 0.0, 0.0, (), ())
    assert s.start.age is None and s.start.shares == {"a": 1.0, "b": 0.0}
    assert s.outcomes.correction == "trapezoidal" and s.outcomes.discount_costs == 0.0
    assert s.population is None and s.events == () and s.parameters == {}
    assert s.simulation.batch_size == 20000 and s.simulation.validation_patients is None


def test_state_without_way_out_keeps_everyone():
    # 'b' is not absorbing and has no transitions: an implicit self-loop, allowed.
    assert minimal().states[1].absorbing is False


def test_remainder_with_parameter_row():
    s = minimal('probability = "p"', '\n[[transitions]]\nfrom = "a"\nto = "a"\n'
                'probability = "remainder"\n\n[parameters]\np = 0.25\n')
    assert [t.probability for t in s.transitions] == ["p", REMAINDER]


def test_cycle_tolerance_for_decimal_cycles():
    # 3 / 0.1 is 29.999999999999996 in floating point: within the 1e-9 relative tolerance.
    s = parse_scenario(MINIMAL.replace("horizon = 12", "cycle = 0.1\nhorizon = 3")
                       .replace("{value}", "probability = 1"))
    assert s.time.n_cycles == 30


@pytest.mark.parametrize("by, clock", [("time", "since_start"), ("time_in_state", "since_entry")])
def test_table_fixes_clock(by, clock):
    s = minimal('rate = "r"', f'\n[tables.r]\nby = "{by}"\nstarts = [0, 5]\nvalues = [0.1, 0.2]\n')
    assert s.transitions[0].clock == clock
    assert s.transitions[0].hazard == HazardSpec("table", {"table": "r"})


def test_age_table_with_start_age_and_matching_clock():
    text = MINIMAL.replace("shares = { a = 1 }", "age = 40\nshares = { a = 1 }").replace(
        "{value}", 'rate = "r"\nclock = "age"')
    s = parse_scenario(text + '\n[tables.r]\nby = "age"\nstarts = [0, 50]\nvalues = [0.1, 0.2]\n')
    assert s.transitions[0].clock == "age"


@pytest.mark.parametrize("clock", ["since_start", "since_entry"])
def test_explicit_clock_for_parametric_hazard(clock):
    s = minimal(f'hazard = {{ family = "gompertz", rate = 0.01, shape = -0.2 }}\nclock = "{clock}"')
    assert s.transitions[0].clock == clock
    assert s.transitions[0].hazard.params == {"rate": 0.01, "shape": -0.2}  # shape may be < 0


@pytest.mark.parametrize("coefficient, ratio, is_coefficient", [
    ("0.05", math.exp(0.05), False),  # a literal log-hazard is stored as its hazard ratio
    ('"b_age"', "b_age", True),       # a named one stays a name, flagged for the binding
])
def test_coefficient_storage(coefficient, ratio, is_coefficient):
    text = MINIMAL.replace("shares = { a = 1 }", "age = 50\nshares = { a = 1 }")
    value = f'rate = 0.1\neffects = [{{ attribute = "age", coefficient = {coefficient}, centre = 50 }}]'
    s = parse_scenario(text.replace("{value}", value) + "\n[parameters]\nb_age = 0.01\n")
    effect = s.transitions[0].effects[0]
    assert effect.hazard_ratio == (ratio if is_coefficient else pytest.approx(ratio))
    assert effect.coefficient is is_coefficient and effect.centre == 50.0


def test_warnings_name_their_paths():
    text = MINIMAL.replace("shares = { a = 1 }", "age = 30\nshares = { a = 1 }") + """
[[states]]
name = "c"

[parameters]
unused = 1

[tables.late]
by = "age"
starts = [40, 60]
values = [0.1, 0.2]
"""
    s = parse_scenario(text.replace("{value}", "probability = 1"))
    assert s.warnings == (
        "parameters.unused: defined but not used",
        "tables.late: defined but not used",
        "states.c: not reachable from the start (no start share, and no transition that can "
        "happen leads to it)",
    )  # a table used nowhere is not held to cover every age (tests/test_value_tables.py)


def test_zero_transition_does_not_make_state_reachable():
    s = minimal("probability = 0.0", '\n[[transitions]]\nfrom = "a"\nto = "a"\n'
                'probability = "remainder"\n')
    assert s.warnings == ("states.b: not reachable from the start (no start share, and no "
                          "transition that can happen leads to it)",)


ROW_OF_TWO_TABLES = """
[[states]]
name = "c"

[[transitions]]
from = "a"
to = "c"
probability = "late"

[[transitions]]
from = "a"
to = "a"
probability = "remainder"

[tables.early]
by = "time"
starts = [0, 5]
values = [0.6, 0.1]

[tables.late]
by = "{axis}"
starts = [0, 5]
values = [0.1, 0.6]
"""


def test_row_sum_uses_bands_of_one_axis_together():
    # Each table peaks at 0.6, but on one time axis the row sums to 0.7 in every band.
    s = minimal('probability = "early"', ROW_OF_TWO_TABLES.replace("{axis}", "time"))
    assert [t.probability for t in s.transitions] == ["early", "late", REMAINDER]


def test_row_sum_on_independent_axes_adds_the_peaks():
    # Time since start and time in state vary independently: both peaks can coincide.
    with pytest.raises(ScenarioError) as caught:
        minimal('probability = "early"', ROW_OF_TWO_TABLES.replace("{axis}", "time_in_state"))
    assert caught.value.path == "transitions.a->*"
    assert "other than the remainder sum to 1.2" in caught.value.message


def population_text(population: str) -> str:
    text = MINIMAL.replace("{value}", 'probability = 0.5\neffects = [{ attribute = "sex", '
                                      'level = "m", hazard_ratio = 1.2 }]\n\n[[transitions]]\n'
                                      'from = "a"\nto = "a"\nprobability = "remainder"')
    return text.replace("shares = { a = 1 }", "shares = { a = 1 }\n") + population


def test_file_population_reads_only_the_header(tmp_path):
    pd.DataFrame({"age": [50, 60], "sex": ["m", "f"], "w": [1.0, 2.0]}).to_csv(
        tmp_path / "patients.csv", index=False)
    path = tmp_path / "scenario.toml"
    path.write_text(population_text('\n[population]\npatients = 10\nfile = "patients.csv"\n'
                                    'weights = "w"\n[[population.derived]]\nname = "band"\n'
                                    'from = "age"\nedges = [0, 55]\nlabels = ["young", "old"]\n'))
    pop = read_scenario(path).population
    assert pop.file == tmp_path / "patients.csv" and pop.weights == "w"
    assert pop.attributes == () and pop.derived[0].source == "age"


def test_parquet_population(tmp_path):
    pd.DataFrame({"sex": ["m", "f"]}).to_parquet(tmp_path / "people.parquet")
    path = tmp_path / "scenario.toml"
    path.write_text(population_text('\n[population]\npatients = 3\nfile = "people.parquet"\n'))
    assert read_scenario(path).population.file.name == "people.parquet"


def test_normal_attribute_without_truncation_gets_infinite_bounds():
    s = parse_scenario(population_text(
        '\n[population]\npatients = 2\n[[population.attributes]]\nname = "sex"\n'
        'distribution = "categorical"\nlevels = ["f", "m"]\nshares = [0.5, 0.5]\n'
        '[[population.attributes]]\nname = "height"\ndistribution = "normal"\nmean = 170\nsd = 10\n'))
    height = s.population.attributes[1]
    assert height.params["lower"] == -math.inf and height.params["upper"] == math.inf


def test_derived_bands_may_open_at_minus_infinity():
    s = parse_scenario(population_text(
        '\n[population]\npatients = 2\n[[population.attributes]]\nname = "sex"\n'
        'distribution = "categorical"\nlevels = ["f", "m"]\nshares = [0.5, 0.5]\n'
        '[[population.attributes]]\nname = "height"\ndistribution = "normal"\nmean = 170\nsd = 10\n'
        '[[population.derived]]\nname = "tall"\nfrom = "height"\nedges = [-inf, 180]\n'
        'labels = ["no", "yes"]\n'))
    assert s.population.derived[0].edges == (-math.inf, 180.0)


@pytest.mark.parametrize("section_name, old, new", [("population", "size", "patients"),
                                                    ("uncertainty", "patients", "patients_per_draw")])
def test_a_renamed_key_is_refused_with_its_new_name(section_name, old, new):
    text = scenario_text(horizon(5), start(well=1.0), state("well"), state("dead", absorbing=True),
                         rate("well", "dead", 0.1), section(section_name, **{old: 10}))
    assert_refused(text, f"{section_name}.{old}", f"is now called {new!r}")


# ------------------------------------------------------------------------ negative ages

def aged(age: dict, *blocks: str, reads: str = "clock") -> str:
    """A rate model whose patients' age comes from `age`, read by a hazard on the age clock,
    a table by age, an effect of age, or (reads="nothing") by nothing."""
    death = {"clock": dict(hazard=dict(family="gompertz", rate=0.001, shape=0.08), clock="age"),
             "table": dict(rate="by_age"), "effect": dict(rate=0.02, effects=[effect("age", 1.03)]),
             "nothing": dict(rate=0.02)}[reads]
    return scenario_text(
        horizon(10), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
        transition("well", "dead", **death),
        table("by_age", by="age", starts=[0, 50], values=[0.01, 0.05]) if reads == "table" else "",
        population(200, attribute("age", **age)), *blocks, title="negative ages")


def age_warnings(text: str) -> list[str]:
    return [w for w in parse_scenario(text).warnings if w.startswith("population.attributes.age")]


@pytest.mark.parametrize("reads, where", [("clock", "transitions.well->dead.clock"),
                                          ("table", "tables.by_age"),
                                          ("effect", "transitions.well->dead.effects[0]")])
def test_an_age_that_a_normal_can_draw_below_0_is_a_warning_with_its_share(reads, where):
    # the share below 0 of Normal(5, 10) is scipy.stats.norm.cdf(-0.5) = 0.309 (reference)
    share = stats.norm.cdf(0, loc=5, scale=10)
    assert age_warnings(aged(dict(distribution="normal", mean=5, sd=10), reads=reads)) == [
        f"population.attributes.age: a share of {share:.3g} of the patients start at a "
        f"negative age (a normal with no lower), which {where} reads; give lower = 0"]


def test_the_share_below_0_of_a_truncated_normal_and_a_uniform_is_scipys():
    # references: scipy.stats.truncnorm for a normal with lower = -10, scipy.stats.uniform
    # for a uniform from -2 to 8 (a share of 0.2)
    truncated = stats.truncnorm((-10 - 5) / 10, math.inf, loc=5, scale=10).cdf(0)
    assert age_warnings(aged(dict(distribution="normal", mean=5, sd=10, lower=-10))) == [
        f"population.attributes.age: a share of {truncated:.3g} of the patients start at a "
        "negative age (a normal with lower = -10), which transitions.well->dead.clock reads; "
        "give lower = 0"]
    uniform = stats.uniform(-2, 10).cdf(0)
    assert [w.split(" of the")[0] for w in age_warnings(aged(dict(
        distribution="uniform", lower=-2, upper=8)))] == [
        f"population.attributes.age: a share of {uniform:.3g}"]


def test_the_warned_share_is_the_share_of_drawn_patients_below_0():
    # 20,000 drawn ages against the warned share, binomial SE (common practice), |z| < 4
    s = parse_scenario(aged(dict(distribution="normal", mean=5, sd=10, upper=30)))
    share = float(s.warnings[0].split("a share of ")[1].split(" ")[0])
    ages = draw_population(replace(s.population, size=20_000), 11)["age"].to_numpy()
    expected = stats.truncnorm(-math.inf, 2.5, loc=5, scale=10).cdf(0)  # scipy, to 3 digits
    assert share == float(f"{expected:.3g}")
    assert abs((ages < 0).mean() - expected) / math.sqrt(expected * (1 - expected) / len(ages)) < Z


def test_an_age_that_cannot_be_negative_or_that_nothing_reads_gives_no_warning():
    for age in (dict(distribution="normal", mean=5, sd=10, lower=0),
                dict(distribution="uniform", lower=0, upper=8),
                dict(distribution="gamma", shape=2, scale=3),
                dict(distribution="lognormal", meanlog=1, sdlog=1)):
        assert age_warnings(aged(age)) == [], age
    assert age_warnings(aged(dict(distribution="normal", mean=5, sd=10), reads="nothing")) == []


def test_an_effect_of_age_in_a_strategys_treatment_is_named_under_it():
    text = aged(dict(distribution="normal", mean=5, sd=10), strategy("usual", comparator=True),
                strategy("drug", events=[nested(name="flare", states=["well"], rate=0.5,
                                                effects=[effect("age", 1.05)])]),
                reads="nothing")
    assert [w.split("which ")[1] for w in age_warnings(text)] == [
        "strategies.drug.events.flare.effects[0] reads; give lower = 0"]


def test_run_and_validate_say_the_warning_before_the_work(tmp_path, capsys):
    path = tmp_path / "young.toml"
    path.write_text(scenario_text(
        horizon(3, cycle=1), start(well=1.0), state("well", utility=1),
        state("dead", absorbing=True), probability("well", "dead", "by_age"),
        probability("well", "well", "remainder"),
        table("by_age", by="age", starts=[0, 50], values=[0.01, 0.05]),
        population(20, attribute("age", distribution="normal", mean=5, sd=10)),
        title="negative ages"))
    for command in ("run", "validate"):
        assert main([command, str(path), "--patients", "20", "--out", str(tmp_path / "out")]) == 0
        err = capsys.readouterr().err
        assert "warning: population.attributes.age: a share of 0.309 of the patients start at a " \
               "negative age" in err, command
