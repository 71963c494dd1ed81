"""Reading [[strategies]], [economics] and [uncertainty]: values land in their spec fields
with the documented defaults, bad input is refused with the exact field path, and the
softer findings come back as warnings.

The rules are the scenario format's own (docs/scenario-format.md). References outside the
project: the supports of the attribute distributions come from scipy.stats, the
positive-semi-definiteness check from numpy.linalg.eigvalsh.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from microsim.binding import bind
from microsim.scenario import parse_scenario, read_scenario
from microsim.scenario.spec import ChangeSpec, ConditionSpec, EconomicsSpec, UncertaintySpec
from support import (assert_refused, attribute, edited, event, horizon, move, nested, parameters,
                     population, probability, rate, refusal, scenario_text, section, start, state,
                     strategy, transition)

SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"

PROVENANCE = "Invented for tests; not real data."


def base_text(**added) -> str:
    """The base scenario; `added` gives the drug strategy its own states and transitions."""
    return scenario_text(
        horizon(10), start(well=1.0),
        state("well", cost=100, utility=0.9), state("sick", utility=0.6),
        state("dead", absorbing=True),
        transition("well", "sick", name="onset", probability="p_sick"),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.2), probability("sick", "sick", 0.8),
        event("flare", ["well", "sick"], probability=0.1),
        parameters(
            p_sick=dict(value=0.1, distribution=dict(family="beta", alpha=10, beta=90)),
            hr_drug=dict(value=0.7, distribution=dict(family="lognormal", meanlog=-0.357,
                                                      sdlog=0.1)),
            c_drug=dict(value=300, distribution=dict(family="gamma", shape=100, scale=3))),
        population(100, attribute("age", "normal", mean=50, sd=5, lower=30, upper=70),
                   attribute("marker", "lognormal", meanlog=0, sdlog=0.5),
                   attribute("sex", "categorical", levels=["female", "male", "other"],
                             shares=[0.5, 0.5, 0.0]),
                   attribute("smoker", "yesno", prevalence=0.2),
                   derived=[nested(**{"name": "marker_band", "from": "marker",
                                      "edges": [-math.inf, 2], "labels": ["low", "high"]})]),
        strategy("usual", comparator=True),
        strategy("drug", label="A drug for the high-risk", uptake=0.8, start=1, stop=8,
                 discontinuation=0.1,
                 eligible=nested(all=[dict(attribute="marker", at_least=1.0),
                                      dict(attribute="age", below=65)],
                                 any=[dict(attribute="smoker", equals=True),
                                      dict(attribute="sex", one_of=["male"])]),
                 changes=[nested(transition="onset", hazard_ratio="hr_drug"),
                          nested(transition="flare", hazard_ratio=0.5),
                          nested(state="well", cost="c_drug", utility=-0.01)],
                 **added),
        section("economics", threshold=30000, thresholds={"from": 0, "to": 50000, "step": 500},
                currency="test dollars", precision=100),
        section("uncertainty", draws=20, patients_per_draw=50,
                correlation=nested(parameters=["p_sick", "hr_drug"], matrix=[[1, 0.3], [0.3, 1]])),
        title="Test", provenance=PROVENANCE)


BASE = base_text()


def with_added() -> str:
    """The drug strategy with added states and transitions (they follow its changes)."""
    return base_text(states=[nested(name="on_drug", utility=0.95)],
                     transitions=[move("well", "on_drug", probability=0.3),
                                  move("on_drug", "sick", probability=0.05, while_treated=False),
                                  move("on_drug", "on_drug", probability="remainder",
                                       while_treated=False)])


CONTINUOUS = scenario_text(
    horizon(30, unit="days"), start(ward=1.0), state("ward"), state("home", absorbing=True),
    rate("ward", "home", 0.1),
    strategy("usual", comparator=True),
    strategy("early_discharge", states=[nested(name="day_unit")],
             transitions=[move("ward", "day_unit", name="fast_track", rate=0.05),
                          move("day_unit", "home", rate=0.5, while_treated=False)]),
    title="Ward", provenance=PROVENANCE)

BASES = {"base": BASE, "continuous": CONTINUOUS}


# -- reading -------------------------------------------------------------------------------

@pytest.mark.parametrize("text", [BASE, with_added(), CONTINUOUS], ids=["base", "added", "ward"])
def test_bases_are_valid_and_quiet(text):
    assert parse_scenario(text).warnings == ()


def test_values_land_in_their_fields():
    s = parse_scenario(BASE)
    usual, drug = s.strategies
    assert (usual.name, usual.label, usual.comparator, usual.eligible) == \
        ("usual", "usual", True, None)
    assert (usual.uptake, usual.start, usual.stop, usual.discontinuation) == (1.0, 0.0, None, 0.0)
    assert (drug.label, drug.comparator, drug.uptake, drug.start, drug.stop,
            drug.discontinuation) == ("A drug for the high-risk", False, 0.8, 1.0, 8.0, 0.1)
    assert drug.eligible.all == (ConditionSpec("marker", "at_least", 1.0),
                                 ConditionSpec("age", "below", 65.0))
    assert drug.eligible.any == (ConditionSpec("smoker", "equals", True),
                                 ConditionSpec("sex", "one_of", ("male",)))
    assert drug.changes == (ChangeSpec(risk="onset", hazard_ratio="hr_drug"),
                            ChangeSpec(risk="flare", hazard_ratio=0.5),
                            ChangeSpec(state="well", cost="c_drug", utility=-0.01))
    assert s.strategy("drug") is drug
    assert s.economics == EconomicsSpec(30000.0, (0.0, 50000.0, 500.0), "test dollars", 100.0)
    assert s.uncertainty == UncertaintySpec(
        draws=20, patients=50, correlation_parameters=("p_sick", "hr_drug"),
        correlation=((1.0, 0.3), (0.3, 1.0)))


def test_defaults_without_the_sections():
    start = BASE.index("[[strategies]]")
    s = parse_scenario(BASE[:start])
    assert s.strategies == ()
    assert s.economics == EconomicsSpec() and s.uncertainty == UncertaintySpec()
    # documented defaults (docs/scenario-format.md)
    assert (s.economics.threshold, s.economics.thresholds, s.economics.currency,
            s.economics.precision) == (20000.0, (0.0, 100000.0, 1000.0), "money units", None)
    assert (s.uncertainty.draws, s.uncertainty.patients, s.uncertainty.dirichlets) == \
        (100, None, ())
    # parameters used only by strategies are reported unused once the strategies are gone
    assert s.warnings == ("parameters.hr_drug: defined but not used",
                          "parameters.c_drug: defined but not used")


def test_partial_threshold_range_keeps_the_other_defaults():
    s = parse_scenario(edited(BASE, ("{ from = 0, to = 50000, step = 500 }", "{ to = 40000 }")))
    assert s.economics.thresholds == (0.0, 40000.0, 1000.0)


def test_added_states_and_transitions():
    s = parse_scenario(with_added())
    drug = s.strategy("drug")
    assert [st.name for st in drug.states] == ["on_drug"] and drug.states[0].utility == 0.95
    assert [t.key for t in drug.transitions] == ["well->on_drug", "on_drug->sick",
                                                 "on_drug->on_drug"]
    assert drug.while_treated == (True, False, False)
    assert s.state_names == ("well", "sick", "dead")  # the base model is unchanged


def test_binding_reads_the_strategy():
    s = parse_scenario(with_added())
    model = bind(s, strategy="drug")
    assert model.states == ("well", "sick", "dead", "on_drug")
    t = model.treatment
    assert (t.uptake, t.start, t.stop, t.discontinuation) == (0.8, 1.0, 8.0, 0.1)
    names = [r.name for r in model.risks]
    assert t.on_factor[names.index("onset")] == pytest.approx(0.7)
    assert t.off_factor[names.index("well->on_drug")] == 0.0  # while_treated = true
    assert t.off_factor[names.index("on_drug->sick")] == 1.0  # while_treated = false
    assert t.extra_cost.tolist() == [300.0, 0.0, 0.0, 0.0]
    assert bind(s, strategy="usual").treatment is None


def test_continuous_added_transition_with_its_own_name():
    s = parse_scenario(CONTINUOUS)
    added = s.strategy("early_discharge").transitions[0]
    assert added.name == "fast_track" and added.hazard.params == {"rate": 0.05}
    assert s.strategy("early_discharge").while_treated == (True, False)


def test_change_by_from_to_key_and_added_transition():
    s = parse_scenario(edited(with_added(), ('transition = "onset"', 'transition = "well->sick"'),
                              ('transition = "flare"', 'transition = "on_drug->sick"')))
    assert [c.risk for c in s.strategy("drug").changes[:2]] == ["well->sick", "on_drug->sick"]


def test_dirichlet_group():
    text = edited(BASE, ("[parameters]", "[parameters]\np_a = 0.2\np_b = 0.3\np_c = 0.5"),
                  ("cost = 100", 'cost = "p_a"'), ("utility = 0.6", 'utility = "p_b"'),
                  ("probability = 0.1\n", 'probability = "p_c"\n'),
                  ("matrix = [[1, 0.3], [0.3, 1]]\n", "matrix = [[1, 0.3], [0.3, 1]]\n\n"
                   "  [[uncertainty.dirichlet]]\n  parameters = [\"p_a\", \"p_b\", \"p_c\"]\n"
                   "  alphas = [20, 30, 50]\n"))
    s = parse_scenario(text)
    assert s.uncertainty.dirichlets == ((("p_a", "p_b", "p_c"), (20.0, 30.0, 50.0)),)
    assert s.warnings == ()


def test_demo_scenario_strategies():
    s = read_scenario(SCENARIOS / "lakemoor_kidney.toml")
    assert [st.name for st in s.strategies] == ["usual_care", "protein_lowering",
                                               "everyone_treated"]
    assert [st.comparator for st in s.strategies] == [True, False, False]
    targeted = s.strategy("protein_lowering")
    assert targeted.eligible.all == (ConditionSpec("biomarker", "at_least", 1.0),
                                     ConditionSpec("age", "below", 80.0))
    assert (targeted.uptake, targeted.discontinuation) == (0.85, 0.08)
    assert [(c.risk, c.hazard_ratio) for c in targeted.changes[:2]] == \
        [("progression", "hr_therapy"), ("kidney_failure_onset", "hr_therapy")]
    assert targeted.changes[2] == ChangeSpec(cost="c_therapy")
    assert s.strategy("everyone_treated").eligible is None
    assert (s.economics.threshold, s.economics.thresholds, s.economics.currency) == \
        (20000.0, (0.0, 60000.0, 1000.0), "Lakemoor dollars")
    assert (s.uncertainty.draws, s.uncertainty.patients) == (60, 400)
    assert s.uncertainty.correlation_parameters == ("hr_biomarker", "hr_diabetes")
    band = s.population.derived[1]
    assert (band.name, band.source, band.edges, band.labels) == \
        ("biomarker_band", "biomarker", (-np.inf, 1.0), ("below 1.0", "1.0 and above"))


# -- refusals ------------------------------------------------------------------------------

STRATEGY = "strategies.drug"
ELIGIBLE = "strategies.drug.eligible"

# (id, base, edits, exact path, phrase in the message)
CASES = [
    # keys and types
    ("unknown strategy key", "base", [("uptake = 0.8", "uptak = 0.8")],
     f"{STRATEGY}.uptak", "unknown key (did you mean 'uptake'?); allowed keys: name, label"),
    ("unknown top-level section", "base", [("[economics]", "[econmics]")],
     "econmics", "did you mean 'economics'"),
    ("strategy without a name", "base", [('name = "drug"\n', "")],
     "strategies[1].name", "is required"),
    ("strategy name not an identifier", "base", [('name = "drug"', 'name = "Drug A"')],
     "strategies[1].name", "lowercase letters"),
    ("duplicate strategy", "base", [('name = "drug"', 'name = "usual"')],
     "strategies[1].name", "duplicate strategy name 'usual'"),
    ("comparator not a flag", "base", [("comparator = true", 'comparator = "yes"')],
     "strategies.usual.comparator", "must be true or false"),
    ("unknown condition key", "base", [("at_least = 1.0", "atleast = 1.0")],
     f"{ELIGIBLE}.all[0].atleast", "did you mean 'at_least'"),
    ("condition without a test", "base",
     [('{ attribute = "age", below = 65 }', '{ attribute = "age" }')],
     f"{ELIGIBLE}.all[1]", "needs one of: above, at_least, below, at_most, equals, one_of"),
    ("condition with two tests", "base",
     [('{ attribute = "age", below = 65 }', '{ attribute = "age", below = 65, above = 40 }')],
     f"{ELIGIBLE}.all[1].below", "cannot be combined with above"),
    ("condition number as text", "base", [("below = 65", 'below = "65"')],
     f"{ELIGIBLE}.all[1].below", "must be a number, got '65'"),
    ("one_of not a list", "base", [('one_of = ["male"]', 'one_of = "male"')],
     f"{ELIGIBLE}.any[1].one_of", "must be a list of text"),
    ("empty eligible", "base",
     [('  all = [{ attribute = "marker", at_least = 1.0 }, { attribute = "age", below = 65 }]\n'
       '  any = [{ attribute = "smoker", equals = true }, { attribute = "sex", one_of = ["male"] }]\n',
       "  all = []\n")],
     ELIGIBLE, "needs all = [...] and/or any = [...]"),
    ("change mixes both forms", "base",
     [('hazard_ratio = "hr_drug"', 'hazard_ratio = "hr_drug"\n  cost = 5')],
     f"{STRATEGY}.changes[0].cost", "cannot be combined with transition and hazard_ratio"),
    ("change with state only", "base",
     [('  state = "well"\n  cost = "c_drug"\n  utility = -0.01\n', '  state = "well"\n')],
     f"{STRATEGY}.changes[2]", "needs transition with hazard_ratio, rate or probability, or cost and/or utility"),
    ("hazard ratio without transition", "base", [('transition = "onset"\n', "")],
     f"{STRATEGY}.changes[0].transition", "is required"),
    ("transition without hazard ratio", "base", [('hazard_ratio = "hr_drug"\n', "")],
     f"{STRATEGY}.changes[0]", "needs one of: hazard_ratio, rate, probability"),
    ("unknown change key", "base", [("hazard_ratio = 0.5", "hazard_rato = 0.5")],
     f"{STRATEGY}.changes[1].hazard_rato", "did you mean 'hazard_ratio'"),
    # ranges
    ("hazard ratio zero", "base", [("hazard_ratio = 0.5", "hazard_ratio = 0")],
     f"{STRATEGY}.changes[1].hazard_ratio", "0 is not above 0; a hazard ratio must be above 0"),
    ("hazard ratio parameter not positive", "base",
     [("hr_drug = { value = 0.7, distribution = { family = \"lognormal\", meanlog = -0.357, "
       "sdlog = 0.1 } }", "hr_drug = -0.7")],
     "parameters.hr_drug", "-0.7 is not above 0; a hazard ratio must be above 0 (it is used as a "
                           "hazard ratio at strategies.drug.changes[0].hazard_ratio)"),
    ("uptake above 1", "base", [("uptake = 0.8", "uptake = 1.2")],
     f"{STRATEGY}.uptake", "1.2 is above 1; an uptake share must be between 0 and 1"),
    ("uptake parameter drawn beyond 1", "base",
     [("uptake = 0.8", 'uptake = "c_drug"')],
     "parameters.c_drug", "300 is above 1; an uptake share must be between 0 and 1"),
    ("negative discontinuation", "base", [("discontinuation = 0.1", "discontinuation = -0.1")],
     f"{STRATEGY}.discontinuation", "-0.1 is below 0; a rate must be at least 0"),
    ("negative start", "base", [("start = 1", "start = -1")],
     f"{STRATEGY}.start", "must be at least 0, got -1"),
    ("start at the end of the horizon", "base", [("start = 1\nstop = 8", "start = 10")],
     f"{STRATEGY}.start", "10 is at or beyond the end of the horizon (10 years)"),
    ("stop not after start", "base", [("stop = 8", "stop = 1")],
     f"{STRATEGY}.stop", "must be above start (1), got 1"),
    ("stop beyond the horizon", "base", [("stop = 8", "stop = 12")],
     f"{STRATEGY}.stop", "12 is beyond the end of the horizon (10 years)"),
    ("negative treatment cost", "base", [('cost = "c_drug"', "cost = -5")],
     f"{STRATEGY}.changes[2].cost", "-5 is below 0; a treatment cost must be at least 0"),
    ("undefined parameter", "base", [('hazard_ratio = "hr_drug"', 'hazard_ratio = "hr_drugg"')],
     f"{STRATEGY}.changes[0].hazard_ratio", "no parameter named 'hr_drugg' (did you mean "
                                            "'hr_drug'?)"),
    # comparators
    ("no comparator", "base", [("comparator = true\n", "")],
     "strategies", "no strategy has comparator = true; mark the one the others are compared "
                   "with (strategies: usual, drug)"),
    ("two comparators", "base", [("uptake = 0.8", "comparator = true\nuptake = 0.8")],
     f"{STRATEGY}.comparator", "2 strategies have comparator = true ('usual', 'drug'); keep "
                               "it on the one the others are compared with"),
    ("a single strategy", "base",
     [('[[strategies]]\nname = "usual"\ncomparator = true\n\n', "")],
     "strategies", "has only 'drug'; give at least two strategies"),
    # eligibility against the population
    ("condition on an unknown attribute", "base",
     [('{ attribute = "marker", at_least', '{ attribute = "markr", at_least')],
     f"{ELIGIBLE}.all[0].attribute", "the population has no attribute 'markr' (did you mean "
                                     "'marker'?); attributes: age, marker, sex, smoker, "
                                     "marker_band"),
    ("above on a categorical attribute", "base",
     [('{ attribute = "sex", one_of = ["male"] }', '{ attribute = "sex", above = 1 }')],
     f"{ELIGIBLE}.any[1].above", "'sex' is categorical; above compares numbers"),
    ("below on a yes/no attribute", "base",
     [('{ attribute = "smoker", equals = true }', '{ attribute = "smoker", below = 1 }')],
     f"{ELIGIBLE}.any[0].below", "'smoker' is a yes/no attribute; use equals = true"),
    ("yes/no equals a level", "base", [("equals = true", 'equals = "yes"')],
     f"{ELIGIBLE}.any[0].equals", "equals needs true or false, got 'yes'"),
    ("level not among the levels", "base", [('one_of = ["male"]', 'one_of = ["male", "mal"]')],
     f"{ELIGIBLE}.any[1].one_of[1]", "'mal' is not a level of 'sex' (levels: 'female', 'male', "
                                     "'other'; did you mean 'male'?)"),
    ("equals a level that is not one", "base",
     [('{ attribute = "sex", one_of = ["male"] }', '{ attribute = "sex", equals = "men" }')],
     f"{ELIGIBLE}.any[1].equals", "'men' is not a level of 'sex'"),
    ("band level not among its labels", "base",
     [('{ attribute = "sex", one_of = ["male"] }', '{ attribute = "marker_band", equals = "hi" }')],
     f"{ELIGIBLE}.any[1].equals", "'hi' is not a level of 'marker_band' (levels: 'low', 'high'"),
    ("one_of on a continuous attribute", "base",
     [('{ attribute = "age", below = 65 }', '{ attribute = "age", one_of = ["old"] }')],
     f"{ELIGIBLE}.all[1].one_of", "'age' is continuous; one_of lists levels"),
    ("equals text on a continuous attribute", "base",
     [('{ attribute = "age", below = 65 }', '{ attribute = "age", equals = "old" }')],
     f"{ELIGIBLE}.all[1].equals", "'age' is continuous; equals needs a number, got 'old'"),
    ("condition without a population", "continuous",
     [('name = "early_discharge"', 'name = "early_discharge"\neligible = { all = '
                                   '[{ attribute = "age", above = 70 }] }')],
     "strategies.early_discharge.eligible.all[0].attribute", "the scenario has no [population]"),
    # changes against the model
    ("hazard ratio on an unknown transition", "base", [('transition = "onset"', 'transition = "onst"')],
     f"{STRATEGY}.changes[0].transition", "'onst' is not a transition or event (did you mean "
                                          "'onset'?)"),
    ("hazard ratio on the remainder", "base", [('transition = "onset"', 'transition = "well->well"')],
     f"{STRATEGY}.changes[0].transition", "takes the remainder of its row"),
    ("cost in an unknown state", "base", [('state = "well"', 'state = "wel"')],
     f"{STRATEGY}.changes[2].state", "unknown state 'wel' (did you mean 'well'?)"),
    ("cost in an absorbing state", "base", [('state = "well"', 'state = "dead"')],
     f"{STRATEGY}.changes[2].state", "'dead' is absorbing"),
    # added states and transitions: the rules of [[states]] and [[transitions]]
    ("added state clashes with a state", "added", [('name = "on_drug"\n  utility', 'name = "sick"\n  utility')],
     f"{STRATEGY}.states.sick.name", "'sick' is already the name of states.sick"),
    ("added state clashes with an event", "added",
     [('name = "on_drug"\n  utility', 'name = "flare"\n  utility')],
     f"{STRATEGY}.states.flare.name", "'flare' is already the name of events.flare"),
    ("added state key typo", "added", [("utility = 0.95", "utilty = 0.95")],
     f"{STRATEGY}.states.on_drug.utilty", "did you mean 'utility'"),
    ("added state utility above 1", "added", [("utility = 0.95", "utility = 1.5")],
     f"{STRATEGY}.states.on_drug.utility", "at most 1"),
    ("added transition to an unknown state", "added", [('to = "on_drug"\n  probability = 0.3',
                                                         'to = "on_drugs"\n  probability = 0.3')],
     f"{STRATEGY}.transitions.well->on_drugs.to", "unknown state 'on_drugs' (did you mean "
                                                  "'on_drug'?)"),
    ("added transition probability above 1", "added", [("probability = 0.3", "probability = 1.3")],
     f"{STRATEGY}.transitions.well->on_drug.probability", "1.3 is above 1"),
    ("added transition key typo", "added",
     [("while_treated = false\n\n  [[", "whle_treated = false\n\n  [[")],
     f"{STRATEGY}.transitions.on_drug->sick.whle_treated", "did you mean 'while_treated'"),
    ("while_treated not a flag", "added",
     [("while_treated = false\n\n  [[", "while_treated = 1\n\n  [[")],
     f"{STRATEGY}.transitions.on_drug->sick.while_treated", "must be true or false"),
    ("added transition duplicates one of the model", "added",
     [('to = "on_drug"\n  probability = 0.3', 'to = "sick"\n  probability = 0.3')],
     f"{STRATEGY}.transitions.well->sick", "a second transition from 'well' to 'sick'"),
    ("added transition from an absorbing state", "added",
     [('from = "well"\n  to = "on_drug"', 'from = "dead"\n  to = "on_drug"')],
     f"{STRATEGY}.transitions.dead->on_drug.from", "'dead' is absorbing"),
    ("added transition named like an event", "added",
     [("to = \"on_drug\"\n  probability = 0.3", "to = \"on_drug\"\n  name = \"flare\"\n"
                                               "  probability = 0.3")],
     f"{STRATEGY}.transitions.well->on_drug.name", "'flare' is already the name of events.flare"),
    ("added transition named like an added state", "added",
     [("to = \"on_drug\"\n  probability = 0.3", "to = \"on_drug\"\n  name = \"on_drug\"\n"
                                               "  probability = 0.3")],
     f"{STRATEGY}.transitions.well->on_drug.name", "'on_drug' is a state name"),
    ("added transition of the other kind", "added", [("probability = 0.3", "rate = 0.3")],
     f"{STRATEGY}.transitions.well->on_drug", "uses a rate or hazard, but the model's "
                                              "transitions use per-cycle probabilities"),
    ("added probability in a rate model", "continuous", [("rate = 0.05", "probability = 0.05")],
     "strategies.early_discharge.transitions.ward->day_unit", "uses a per-cycle probability"),
    ("added rate to the same state", "continuous",
     [('to = "day_unit"\n  name = "fast_track"', 'to = "ward"\n  name = "fast_track"')],
     "strategies.early_discharge.transitions.ward->ward.to", "changes nothing"),
    ("added transition from a row without remainder", "added",
     [('from = "well"\n  to = "on_drug"', 'from = "sick"\n  to = "on_drug"')],
     f"{STRATEGY}.transitions.sick->on_drug", "'sick' has no transition with probability = "
                                              '"remainder"'),
    ("added row leaves no room", "added", [("probability = 0.3", "probability = 0.95")],
     f"{STRATEGY}.transitions.well->*", "other than the remainder sum to 1.05"),
    ("added state row does not sum to 1", "added",
     [('probability = "remainder"\n  while_treated = false', "probability = 0.9\n"
                                                             "  while_treated = false")],
     f"{STRATEGY}.transitions.on_drug->*", "probabilities from 'on_drug' sum to 0.95, not 1"),
    ("added transition with an unknown memory", "added",
     [("probability = 0.05\n", 'probability = 0.05\n  memory = [{ after = "flair", '
                               "multipliers = [1, 2] }]\n")],
     f"{STRATEGY}.transitions.on_drug->sick.memory[0].after", "did you mean 'flare'"),
    ("added transition effect on an unknown attribute", "added",
     [("probability = 0.05\n", 'probability = 0.05\n  effects = [{ attribute = "bmi", '
                               "hazard_ratio = 2 }]\n")],
     f"{STRATEGY}.transitions.on_drug->sick.effects[0].attribute",
     "the population has no attribute 'bmi'"),
    ("added transition with an undefined parameter", "added",
     [("probability = 0.05\n", 'probability = "p_on"\n')],
     f"{STRATEGY}.transitions.on_drug->sick.probability", "no parameter or table named 'p_on'"),
    # economics
    ("negative threshold", "base", [("threshold = 30000", "threshold = -1")],
     "economics.threshold", "must be at least 0, got -1"),
    ("threshold range backwards", "base", [("from = 0, to = 50000", "from = 60000, to = 50000")],
     "economics.thresholds.to", "must be above from (60000), got 50000"),
    ("threshold step zero", "base", [("step = 500", "step = 0")],
     "economics.thresholds.step", "must be above 0, got 0"),
    ("too many thresholds", "base", [("step = 500", "step = 1")],
     "economics.thresholds.step", "1 gives 50001 thresholds from 0 to 50000; at most 10000"),
    ("unknown threshold key", "base", [("step = 500", "stp = 500")],
     "economics.thresholds.stp", "did you mean 'step'"),
    ("empty currency", "base", [('currency = "test dollars"', 'currency = " "')],
     "economics.currency", "must not be empty"),
    ("precision zero", "base", [("precision = 100", "precision = 0")],
     "economics.precision", "must be above 0, got 0"),
    # uncertainty
    ("draws zero", "base", [("draws = 20", "draws = 0")],
     "uncertainty.draws", "must be at least 1, got 0"),
    ("patients not whole", "base", [("patients_per_draw = 50", "patients_per_draw = 50.5")],
     "uncertainty.patients_per_draw", "must be a whole number"),
    ("correlation of an undefined parameter", "base",
     [('parameters = ["p_sick", "hr_drug"]', 'parameters = ["p_sick", "hr_drugs"]')],
     "uncertainty.correlation.parameters[1]", "no parameter named 'hr_drugs' (did you mean "
                                              "'hr_drug'?)"),
    ("correlation of a parameter without distribution", "base",
     [("[parameters]", "[parameters]\nfixed_one = 0.1"), ("probability = 0.1\n",
                                                           'probability = "fixed_one"\n'),
      ('parameters = ["p_sick", "hr_drug"]', 'parameters = ["p_sick", "fixed_one"]')],
     "uncertainty.correlation.parameters[1]", "'fixed_one' has no distribution that varies"),
    ("correlation of one parameter", "base",
     [('parameters = ["p_sick", "hr_drug"]', 'parameters = ["p_sick"]')],
     "uncertainty.correlation.parameters", "needs at least two parameters"),
    ("correlation parameter twice", "base",
     [('parameters = ["p_sick", "hr_drug"]', 'parameters = ["p_sick", "p_sick"]')],
     "uncertainty.correlation.parameters[1]", "'p_sick' appears twice"),
    ("correlation rows", "base", [("matrix = [[1, 0.3], [0.3, 1]]", "matrix = [[1, 0.3]]")],
     "uncertainty.correlation.matrix", "has 1 rows; it needs 2 (one per parameter)"),
    ("correlation outside [-1, 1]", "base", [("[[1, 0.3], [0.3, 1]]", "[[1, 1.3], [1.3, 1]]")],
     "uncertainty.correlation.matrix[0][1]", "1.3 is above 1; a correlation must be between -1 "
                                             "and 1"),
    ("correlation not symmetric", "base", [("[[1, 0.3], [0.3, 1]]", "[[1, 0.3], [0.2, 1]]")],
     "uncertainty.correlation.matrix[1][0]", "must be symmetric"),
    ("correlation diagonal", "base", [("[[1, 0.3], [0.3, 1]]", "[[1, 0.3], [0.3, 0.9]]")],
     "uncertainty.correlation.matrix[1][1]", "the diagonal must be 1"),
    ("unknown uncertainty key", "base", [("draws = 20", "drawz = 20")],
     "uncertainty.drawz", "did you mean 'draws'"),
]

DIRICHLET = ('[parameters]', '[parameters]\np_a = 0.2\np_b = 0.3\np_c = 0.5')
GROUP = ("matrix = [[1, 0.3], [0.3, 1]]\n",
         'matrix = [[1, 0.3], [0.3, 1]]\n\n  [[uncertainty.dirichlet]]\n'
         '  parameters = {names}\n  alphas = {alphas}\n')


def dirichlet_case(name, names, alphas, path, phrase, *extra):
    edits = [DIRICHLET, (GROUP[0], GROUP[1].format(names=names, alphas=alphas)), *extra]
    return (name, "base", edits, path, phrase)


CASES += [
    dirichlet_case("dirichlet of an undefined parameter", '["p_a", "p_d"]', "[1, 2]",
                   "uncertainty.dirichlet[0].parameters[1]", "no parameter named 'p_d'"),
    dirichlet_case("dirichlet member with its own distribution", '["p_a", "p_sick"]', "[1, 2]",
                   "uncertainty.dirichlet[0].parameters[1]",
                   "'p_sick' has its own distribution (parameters.p_sick.distribution)"),
    dirichlet_case("dirichlet alphas count", '["p_a", "p_b", "p_c"]', "[1, 2]",
                   "uncertainty.dirichlet[0].alphas", "has 2 alphas for 3 parameters"),
    dirichlet_case("dirichlet alpha zero", '["p_a", "p_b", "p_c"]', "[1, 0, 2]",
                   "uncertainty.dirichlet[0].alphas[1]", "must be above 0, got 0"),
    dirichlet_case("dirichlet of one parameter", '["p_a"]', "[1]",
                   "uncertainty.dirichlet[0].parameters", "needs at least two parameters"),
    dirichlet_case("parameter in two dirichlet groups", '["p_a", "p_b"]', "[1, 2]",
                   "uncertainty.dirichlet[1].parameters[0]",
                   "'p_b' is already in uncertainty.dirichlet[0]",
                   ("alphas = [1, 2]\n", 'alphas = [1, 2]\n\n  [[uncertainty.dirichlet]]\n'
                                         '  parameters = ["p_b", "p_c"]\n  alphas = [3, 4]\n')),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_refusal_names_path_and_fix(case):
    _, base, edits, path, phrase = case
    text = with_added() if base == "added" else BASES[base]
    assert_refused(edited(text, *edits), path, phrase)


def test_smallest_eigenvalue_is_named():
    # Three correlations no set of variables can have; reference: numpy.linalg.eigvalsh.
    matrix = [[1.0, 0.9, -0.9], [0.9, 1.0, 0.9], [-0.9, 0.9, 1.0]]
    smallest = np.linalg.eigvalsh(np.array(matrix)).min()
    assert smallest < 0
    error = refusal(edited(BASE, ('parameters = ["p_sick", "hr_drug"]',
                                  'parameters = ["p_sick", "hr_drug", "c_drug"]'),
                           ("matrix = [[1, 0.3], [0.3, 1]]", f"matrix = {matrix}")))
    assert error.path == "uncertainty.correlation.matrix"
    assert f"smallest eigenvalue is {smallest:.12g}" in error.message


def test_singular_but_semi_definite_correlation_is_accepted():
    # Perfect correlation: eigenvalues 0 and 2 (numpy.linalg.eigvalsh), so semi-definite.
    assert np.linalg.eigvalsh(np.array([[1.0, 1.0], [1.0, 1.0]])).min() == pytest.approx(0.0)
    s = parse_scenario(edited(BASE, ("[[1, 0.3], [0.3, 1]]", "[[1, 1], [1, 1]]")))
    assert s.uncertainty.correlation == ((1.0, 1.0), (1.0, 1.0))


def test_lifetime_horizon_with_an_added_trap():
    # The added state can never be left for an absorbing one, so "lifetime" never ends.
    text = edited(with_added(), ("horizon = 10", 'horizon = "lifetime"\nlifetime_cap = 20'),
                  ("stop = 8", "stop = 20"),
                  ("probability = 0.05\n  while_treated", "probability = 0.0\n  while_treated"))
    error = refusal(text)
    assert error.path == "strategies.drug.transitions"
    assert "patients in 'on_drug' (reachable from the start) can never reach" in error.message


# -- warnings ------------------------------------------------------------------------------

def warnings_of(*edits: tuple[str, str], text: str = BASE) -> tuple[str, ...]:
    return parse_scenario(edited(text, *edits)).warnings


ALL_GROUP = '[{ attribute = "marker", at_least = 1.0 }, { attribute = "age", below = 65 }]'
ANY_LINE = ('  any = [{ attribute = "smoker", equals = true }, '
            '{ attribute = "sex", one_of = ["male"] }]\n')


def test_empty_group_above_the_support():
    # The truncated normal age draws from [30, 70] (scipy.stats.truncnorm support).
    low, high = stats.truncnorm(-4, 4, loc=50, scale=5).support()
    assert (low, high) == (30.0, 70.0)
    found = warnings_of((ALL_GROUP, '[{ attribute = "age", above = 70 }]'))
    assert found == ("strategies.drug.eligible: no patient can be eligible: 'age' takes values "
                     "from 30 to 70, none of them above 70; the strategy treats no one",)
    assert warnings_of((ALL_GROUP, '[{ attribute = "age", above = 69.9 }]')) == ()


def test_empty_group_from_conditions_that_exclude_each_other():
    # A lognormal draws from (0, inf) (scipy.stats.lognorm support): at least 3 and below 2.
    assert stats.lognorm(s=0.5).support() == (0.0, np.inf)
    found = warnings_of((ALL_GROUP, '[{ attribute = "marker", at_least = 3 }, '
                                    '{ attribute = "marker", below = 2 }]'))
    assert found == ("strategies.drug.eligible: no patient can be eligible: 'marker' takes "
                     "values from 0 to inf, none of them at least 3 and below 2; the strategy "
                     "treats no one",)
    assert warnings_of((ALL_GROUP, '[{ attribute = "marker", below = 0 }]'))[0].endswith(
        "none of them below 0; the strategy treats no one")


@pytest.mark.parametrize("condition, reason", [
    ('{ attribute = "sex", equals = "other" }', "no patient has 'sex' = 'other' (share 0)"),
    ('{ attribute = "sex", one_of = ["male"] }, { attribute = "sex", equals = "female" }',
     "no value of 'sex' meets every condition on it"),
    ('{ attribute = "marker", equals = 1.5 }',
     "'marker' is continuous, so it equals 1.5 with probability 0"),
])
def test_empty_group_of_levels(condition, reason):
    found = warnings_of((ALL_GROUP, f"[{condition}]"), (ANY_LINE, ""))
    assert found == (f"strategies.drug.eligible: no patient can be eligible: {reason}; the "
                     "strategy treats no one",)


def test_empty_group_of_a_yes_no_attribute():
    found = warnings_of(("prevalence = 0.2", "prevalence = 0"),
                        ('{ attribute = "sex", one_of = ["male"] }',
                         '{ attribute = "sex", equals = "other" }'))
    assert found == ("strategies.drug.eligible: no patient can be eligible: no patient has "
                     "'smoker' = true (share 0); no patient has 'sex' = 'other' (share 0); the "
                     "strategy treats no one",)
    # one `any` condition that can hold is enough
    assert warnings_of(("prevalence = 0.2", "prevalence = 0")) == ()


def test_empty_band():
    # marker is lognormal on (0, inf): the band from -inf to 0 holds nobody.
    found = warnings_of(("edges = [-inf, 2]", "edges = [-inf, 0]"),
                        (ALL_GROUP, '[{ attribute = "marker_band", equals = "low" }]'))
    assert found == ("strategies.drug.eligible: no patient can be eligible: no patient has "
                     "'marker_band' = 'low' (share 0); the strategy treats no one",)
    assert warnings_of((ALL_GROUP, '[{ attribute = "marker_band", equals = "low" }]')) == ()


def test_uptake_zero_and_strategies_that_change_nothing():
    found = warnings_of(("uptake = 0.8", "uptake = 0"),
                        ("comparator = true", "comparator = true\n\n  [[strategies.changes]]\n"
                                              "  cost = 10"))
    assert found == (
        "strategies.usual: is the comparator but has changes or added transitions; a "
        "comparator normally runs the model as written (check that this is intended)",
        "strategies.drug.uptake: is 0, so no one takes the treatment up; the strategy runs "
        "the model as written")
    start = BASE.index("  [[strategies.changes]]")
    text = BASE[:start] + BASE[BASE.index("[economics]"):]
    assert parse_scenario(text).warnings == (
        "parameters.hr_drug: defined but not used", "parameters.c_drug: defined but not used",
        "strategies.drug: changes nothing (no changes and no added transitions), so it gives "
        "the same results as the comparator")


def test_unreachable_added_state():
    found = warnings_of(("probability = 0.3", "probability = 0"), text=with_added())
    assert found == ("strategies.drug.states.on_drug: not reachable from the start (no "
                     "transition that can happen leads to it)",)


def test_dirichlet_base_values_that_do_not_sum_to_one():
    found = warnings_of(("[parameters]", "[parameters]\np_a = 0.2\np_b = 0.3"),
                        ("cost = 100", 'cost = "p_a"'), ("utility = 0.6", 'utility = "p_b"'),
                        (GROUP[0], GROUP[1].format(names='["p_a", "p_b"]', alphas="[2, 3]")))
    assert found == ("uncertainty.dirichlet[0]: the base values of p_a, p_b sum to 0.5, not 1; "
                     "every PSA draw of the group sums to 1",)


def test_threshold_outside_the_curve():
    assert warnings_of(("threshold = 30000", "threshold = 60000")) == (
        "economics.threshold: 60000 is outside the acceptability-curve range (0 to 50000); the "
        "curve does not show it",)
