"""A catalogue of bad scenarios: each is a small edit of a valid base text and must be
refused with a ScenarioError naming the exact field path and saying what is valid.

The rules checked here are the scenario format's own (docs/scenario-format.md); the
positive-semi-definiteness case uses numpy.linalg.eigvalsh as the reference.
"""
from __future__ import annotations

import numpy as np
import pytest

from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from support import (after, assert_refused, attribute, edited, effect, event, horizon, nested,
                     outcomes, parameters, population, probability, rate, refusal, scenario_text,
                     section, start, state, table, transition)

PROVENANCE = "Invented for tests; not real data."

DISCRETE = scenario_text(
    horizon(10, cycle=1), start(well=0.9, sick=0.1),
    state("well", cost=100, utility=0.9), state("sick", cost="c_sick", utility=0.6),
    state("dead", absorbing=True),
    probability("well", "sick", "p_sick", effects=[effect("marker", 1.2)],
                memory=[after("flare", multipliers=[1.0, 1.5])]),
    probability("well", "dead", "mortality"), probability("well", "well", "remainder"),
    probability("sick", "dead", 0.2), probability("sick", "sick", 0.8),
    event("flare", ["well", "sick"], probability=0.1, cost=50),
    parameters(p_sick=dict(value=0.1, distribution=dict(family="beta", alpha=10, beta=90),
                           low=0.05, high=0.15),
               c_sick=500),
    table("mortality", by="age", starts=[0, 60, 80], values=[0.01, 0.05, 0.2]),
    outcomes(discount_costs=0.035),
    population(100, attribute("age", "normal", mean=50, sd=5, lower=30, upper=70),
               attribute("marker", "normal", mean=1, sd=0.5, lower=0, upper=3),
               attribute("sex", "categorical", levels=["female", "male"], shares=[0.5, 0.5]),
               attribute("smoker", "yesno", prevalence=0.2),
               correlation=nested(attributes=["age", "marker"],
                                  matrix=[[1.0, 0.3], [0.3, 1.0]])),
    section("simulation", seed=1),
    title="Test", provenance=PROVENANCE)

CONTINUOUS = scenario_text(
    horizon(30, unit="days"), start(ward=1.0),
    state("ward", cost=500), state("complication"), state("home", absorbing=True),
    rate("ward", "home", "discharge"), rate("ward", "complication", 0.02),
    transition("complication", "ward", hazard=dict(family="weibull", shape=1.5, scale=6)),
    rate("complication", "home", 0.004),
    table("discharge", by="time_in_state", starts=[0, 3], values=[0.1, 0.3]),
    title="Ward", provenance=PROVENANCE)

BASES = {"discrete": DISCRETE, "continuous": CONTINUOUS}


@pytest.mark.parametrize("name", BASES)
def test_bases_are_valid_and_quiet(name):
    assert parse_scenario(BASES[name]).warnings == ()


# (id, base, edits, exact path, phrase in the message)
CASES = [
    # types, unknown keys, missing keys
    ("string for number", "discrete", [("cycle = 1", 'cycle = "abc"')],
     "time.cycle", "must be a number, got 'abc'"),
    # quoted digits are text in TOML (toml.io/en/v1.0.0, from memory): say to drop the quotes
    ("quoted number for number", "discrete", [("cycle = 1", 'cycle = "1"')],
     "time.cycle", "must be a number, got '1'; write the number without quotes"),
    ("quoted number for cost", "discrete", [("cost = 100", 'cost = "1500"')],
     "states.well.cost", "got '1500'; write the number without quotes"),
    ("word for number", "discrete", [("cycle = 1", 'cycle = "one"')],
     "time.cycle", "must be a number, got 'one'; write it in digits, without quotes"),
    ("quoted number for whole number", "discrete", [("seed = 1", 'seed = "7"')],
     "simulation.seed", "must be a whole number, got '7'; write the number without quotes"),
    # no number larger than 1e12 in size: a cost of 1e308 sums to inf (IEEE 754 doubles end
    # near 1.8e308, common practice) and a rate of 1e20 breaks the matrix exponential
    ("huge cost", "discrete", [("cost = 100", "cost = 1e308")], "states.well.cost",
     "1e+308 is larger than 1e+12 in size"),
    ("huge negative utility", "discrete", [("utility = 0.9", "utility = -1e300")],
     "states.well.utility", "larger than 1e+12 in size"),
    ("huge threshold", "discrete", [("discount_costs = 0.035",
                                     "discount_costs = 0.035\n[economics]\nthreshold = 1e100")],
     "economics.threshold", "larger than 1e+12 in size"),
    ("bool for number", "discrete", [("cost = 100", "cost = true")],
     "states.well.cost", "must be a number, a parameter name or a table name, got true"),
    ("nan", "discrete", [("cost = 100", "cost = nan")], "states.well.cost", "finite number"),
    ("not a whole number", "discrete", [("seed = 1", "seed = 1.5")],
     "simulation.seed", "must be a whole number"),
    ("string for list", "discrete", [('states = ["well", "sick"]', 'states = "well"')],
     "events.flare.states", "must be a list of names"),
    ("unknown key typo", "discrete", [("cycle = 1", "cylce = 1")],
     "time.cylce", "unknown key (did you mean 'cycle'?); allowed keys: unit, cycle"),
    ("unknown top-level key", "discrete", [('title = "Test"', 'colour = 1\ntitle = "Test"')],
     "colour", "allowed keys: title"),
    ("unknown key in state", "discrete", [("utility = 0.9", "utilty = 0.9")],
     "states.well.utilty", "did you mean 'utility'"),
    ("unknown key for hazard family", "continuous",
     [("shape = 1.5, scale = 6", "shape = 1.5, scale = 6, rate = 1")],
     "transitions.complication->ward.hazard.rate", "for a weibull hazard"),
    ("missing horizon", "discrete", [("horizon = 10\n", "")], "time.horizon", "is required"),
    ("missing title", "discrete", [('title = "Test"\n', "")], "title", "is required"),
    ("missing value kind", "discrete", [("probability = 0.2\n", "")],
     "transitions.sick->dead", "needs one of: probability, rate, hazard"),
    ("missing from", "discrete", [('from = "sick"\nto = "dead"', 'to = "dead"')],
     "transitions[3].from", "is required"),
    ("missing event name", "discrete", [('name = "flare"\n', "")],
     "events[0].name", "is required"),
    ("unit not a word", "discrete", [('unit = "years"', 'unit = "per year"')],
     "time.unit", "single word"),
    # names and states
    ("invalid state name", "discrete", [('name = "well"', 'name = "Well"')],
     "states[0].name", "lowercase letters"),
    ("duplicate state", "discrete", [('name = "sick"\ncost', 'name = "well"\ncost')],
     "states[1].name", "duplicate state name 'well'"),
    ("unknown state in transition", "discrete",
     [('to = "sick"\nprobability = "p_sick"', 'to = "sik"\nprobability = "p_sick"')],
     "transitions.well->sik.to", "unknown state 'sik' (did you mean 'sick'?)"),
    ("unknown state in start", "discrete", [("sick = 0.1 }", "sik = 0.1 }")],
     "start.shares.sik", "unknown state 'sik'"),
    ("unknown state in event", "discrete", [('states = ["well", "sick"]', 'states = ["well", "ill"]')],
     "events.flare.states[1]", "unknown state 'ill'"),
    ("unknown memory after", "discrete", [('after = "flare"', 'after = "flair"')],
     "transitions.well->sick.memory[0].after", "did you mean 'flare'"),
    ("duplicate transition", "discrete",
     [("probability = 0.8", 'probability = 0.8\n\n[[transitions]]\nfrom = "sick"\nto = "dead"\n'
                            "probability = 0.0")],
     "transitions.sick->dead", "a second transition"),
    ("transition named like a state", "discrete",
     [('probability = "p_sick"', 'name = "sick"\nprobability = "p_sick"')],
     "transitions.well->sick.name", "is a state name"),
    ("event name taken by a transition", "discrete",
     [('probability = "p_sick"', 'name = "flare"\nprobability = "p_sick"')],
     "events.flare.name", "already the name of transitions.well->sick"),
    ("parameter named remainder", "discrete", [("c_sick = 500", "remainder = 500")],
     "parameters.remainder", "not a valid parameter name"),
    # probabilities and rows
    ("probability above 1", "discrete", [("probability = 0.2", "probability = 1.2")],
     "transitions.sick->dead.probability", "1.2 is above 1"),
    ("parameter used as probability", "discrete",
     [("probability = 0.2", 'probability = "c_sick"')],
     "parameters.c_sick", "500 is above 1"),
    ("table used as probability", "discrete",
     [("values = [0.01, 0.05, 0.2]", "values = [0.01, 0.05, 1.5]")],
     "tables.mortality.values[2]", "1.5 is above 1"),
    ("distribution beyond a probability", "discrete",
     [("probability = 0.2", 'probability = "p_gamma"'),
      ("c_sick = 500", 'c_sick = 500\np_gamma = { value = 0.2, distribution = { family = '
                       '"gamma", shape = 4, scale = 0.05 } }')],
     "parameters.p_gamma.distribution", "a gamma distribution draws values from 0 to inf"),
    ("row does not sum to 1", "discrete", [("probability = 0.8", "probability = 0.7")],
     "transitions.sick->*", "probabilities from 'sick' sum to 0.9, not 1"),
    ("row above 1 beside remainder (highest band)", "discrete",
     [("values = [0.01, 0.05, 0.2]", "values = [0.01, 0.05, 0.95]")],
     "transitions.well->*", "other than the remainder sum to 1.05"),
    ("two remainders", "discrete",
     [("probability = 0.2", 'probability = "remainder"'),
      ("probability = 0.8", 'probability = "remainder"')],
     "transitions.sick->sick.probability", 'a second "remainder"'),
    ("start shares do not sum to 1", "discrete", [("sick = 0.1 }", "sick = 0.2 }")],
     "start.shares", "shares sum to 1.1, not 1"),
    ("start share above 1", "discrete",
     [("{ well = 0.9, sick = 0.1 }", "{ well = 1.5, sick = -0.5 }")],
     "start.shares.well", "1.5 is above 1"),
    # rates, hazards, effects, memory
    ("negative rate", "continuous", [("rate = 0.004", "rate = -0.1")],
     "transitions.complication->home.rate", "-0.1 is below 0; a rate must be at least 0"),
    ("hazard shape zero", "continuous", [("shape = 1.5", "shape = 0")],
     "transitions.complication->ward.hazard.shape", "must be above 0, got 0"),
    ("unknown hazard family", "continuous", [('family = "weibull"', 'family = "weibul"')],
     "transitions.complication->ward.hazard.family", "did you mean 'weibull'"),
    ("hazard ratio zero", "discrete", [("hazard_ratio = 1.2", "hazard_ratio = 0")],
     "transitions.well->sick.effects[0].hazard_ratio", "a hazard ratio must be above 0"),
    ("hazard ratio and coefficient", "discrete",
     [("hazard_ratio = 1.2", "hazard_ratio = 1.2\n  coefficient = 0.1")],
     "transitions.well->sick.effects[0].coefficient", "cannot be combined with hazard_ratio"),
    ("two effects of one attribute", "discrete",
     [("hazard_ratio = 1.2", 'hazard_ratio = 1.2\n\n  [[transitions.effects]]\n'
                             '  attribute = "marker"\n  coefficient = 0.1')],
     "transitions.well->sick.effects[1]", "a second effect of 'marker'"),
    ("coefficient too large", "discrete", [("hazard_ratio = 1.2", "coefficient = 1000")],
     "transitions.well->sick.effects[0].coefficient", "too large"),
    ("multiplier zero", "discrete", [("multipliers = [1.0, 1.5]", "multipliers = [1.0, 0]")],
     "transitions.well->sick.memory[0].multipliers[1]", "a multiplier must be above 0"),
    ("memory with both forms", "discrete",
     [("multipliers = [1.0, 1.5]", "multipliers = [1.0, 1.5]\n  within = 1")],
     "transitions.well->sick.memory[0].within", "cannot be combined with multipliers"),
    ("remainder as a rate", "continuous", [("rate = 0.004", 'rate = "remainder"')],
     "transitions.complication->home.rate", "only valid as the probability of a transition"),
    ("rate to the same state", "continuous",
     [("rate = 0.004", 'rate = 0.004\n\n[[transitions]]\nfrom = "ward"\nto = "ward"\n'
                       "rate = 0.1")],
     "transitions.ward->ward.to", "changes nothing"),
    # parameters and tables
    ("undefined parameter", "discrete", [('cost = "c_sick"', 'cost = "c_sik"')],
     "states.sick.cost", "no parameter or table named 'c_sik' (did you mean 'c_sick'?)"),
    ("undefined parameter or table", "discrete",
     [('probability = "mortality"', 'probability = "mortalty"')],
     "transitions.well->dead.probability", "no parameter or table named 'mortalty'"),
    ("name is parameter and table", "discrete", [("c_sick = 500", "c_sick = 500\nmortality = 0.1")],
     "tables.mortality", "is also a parameter name"),
    ("table where a parameter belongs", "discrete",
     [("hazard_ratio = 1.2", 'hazard_ratio = "mortality"')],
     "transitions.well->sick.effects[0].hazard_ratio", "'mortality' is a table"),
    ("undefined hazard table", "continuous",
     [('hazard = { family = "weibull", shape = 1.5, scale = 6 }',
       'hazard = { family = "table", table = "nope" }')],
     "transitions.complication->ward.hazard.table", "no table named 'nope'"),
    ("unknown distribution family", "discrete", [('family = "beta"', 'family = "betta"')],
     "parameters.p_sick.distribution.family", "did you mean 'beta'"),
    ("missing distribution key", "discrete", [(", beta = 90 }", " }")],
     "parameters.p_sick.distribution.beta", "is required"),
    ("distribution key not positive", "discrete", [("alpha = 10", "alpha = -1")],
     "parameters.p_sick.distribution.alpha", "must be above 0, got -1"),
    ("low without high", "discrete", [(", low = 0.05, high = 0.15", ", low = 0.05")],
     "parameters.p_sick.high", "give both low and high"),
    ("value outside its distribution", "discrete",
     [("c_sick = 500", 'c_sick = { value = -5, distribution = { family = "gamma", shape = 2, '
                       "scale = 3 } }")],
     "parameters.c_sick.value", "outside the values its gamma distribution can take"),
    ("normal distribution for a hazard ratio", "discrete",
     [("hazard_ratio = 1.2", 'hazard_ratio = "hr"'),
      ("c_sick = 500", 'c_sick = 500\nhr = { value = 1.2, distribution = { family = "normal", '
                       "mean = 1.2, sd = 0.1 } }")],
     "parameters.hr.distribution", "a normal distribution draws values from -inf to inf"),
    ("utility above 1", "discrete", [("utility = 0.9", "utility = 1.2")],
     "states.well.utility", "at most 1"),
    ("table starts not increasing", "discrete", [("starts = [0, 60, 80]", "starts = [0, 80, 60]")],
     "tables.mortality.starts", "strictly increasing"),
    ("table lengths differ", "discrete",
     [("values = [0.01, 0.05, 0.2]", "values = [0.01, 0.05]")],
     "tables.mortality.values", "has 2 values but starts has 3"),
    ("table by age without an age", "discrete",
     [('name = "age"', 'name = "years"'),
      ('attributes = ["age", "marker"]', 'attributes = ["years", "marker"]')],
     "tables.mortality.by", "no age is known"),
    # absorbing states and lifetime
    ("absorbing state with a transition", "discrete",
     [("probability = 0.8", 'probability = 0.8\n\n[[transitions]]\nfrom = "dead"\nto = "well"\n'
                            "probability = 1")],
     "transitions.dead->well.from", "'dead' is absorbing"),
    ("absorbing state with an event", "discrete",
     [('states = ["well", "sick"]', 'states = ["well", "dead"]')],
     "events.flare.states[1]", "'dead' is absorbing"),
    ("lifetime without an absorbing state", "discrete",
     [("horizon = 10", 'horizon = "lifetime"'), ("absorbing = true", "absorbing = false")],
     "time.horizon", "no state is absorbing"),
    ("lifetime with absorbing state out of reach", "discrete",
     [("horizon = 10", 'horizon = "lifetime"'), ('probability = "mortality"', "probability = 0"),
      ("probability = 0.2", "probability = 0.0"), ("probability = 0.8", "probability = 1.0")],
     "time.horizon", "patients in 'well' (reachable from the start) can never reach"),
    ("cycle does not divide horizon", "discrete", [("cycle = 1", "cycle = 3")],
     "time.horizon", "not a whole multiple of the cycle length 3"),
    ("cycle does not divide lifetime cap", "discrete",
     [("cycle = 1\nhorizon = 10", 'cycle = 3\nhorizon = "lifetime"\nlifetime_cap = 100')],
     "time.lifetime_cap", "not a whole multiple"),
    ("default lifetime cap not whole cycles", "discrete",
     [("cycle = 1\nhorizon = 10", 'cycle = 3\nhorizon = "lifetime"')],
     "time.lifetime_cap", "100 (the default lifetime_cap) is not a whole multiple"),
    ("too many cycles", "discrete", [("cycle = 1", "cycle = 1e-6")],
     "time.horizon", "at most 1000000 cycles"),
    ("lifetime cap with a number horizon", "discrete", [("horizon = 10", "horizon = 10\nlifetime_cap = 50")],
     "time.lifetime_cap", 'only used with horizon = "lifetime"'),
    # model kind and clocks
    ("rate in a probability model", "discrete", [("probability = 0.2", "rate = 0.2")],
     "transitions.sick->dead", "the other transitions use per-cycle probabilities"),
    ("parametric hazard in a probability model", "discrete",
     [("probability = 0.2", 'hazard = { family = "weibull", shape = 1.2, scale = 5 }')],
     "transitions.sick->dead", "uses a rate or hazard"),
    ("event kind differs", "discrete", [("probability = 0.1\ncost = 50", "rate = 0.1\ncost = 50")],
     "events.flare", "but the transitions use per-cycle probabilities"),
    ("probability in a rate model", "continuous", [("rate = 0.004", "probability = 0.004")],
     "transitions.complication->home", "the other transitions use rates or hazards"),
    ("clock with a probability", "discrete",
     [("probability = 0.2", 'probability = 0.2\nclock = "since_start"')],
     "transitions.sick->dead.clock", "only used with rate or hazard"),
    ("clock conflicts with table", "continuous",
     [('rate = "discharge"', 'rate = "discharge"\nclock = "since_start"')],
     "transitions.ward->home.clock", 'fixes the clock to "since_entry"'),
    ("age clock without an age", "continuous",
     [("scale = 6 }", 'scale = 6 }\nclock = "age"')],
     "transitions.complication->ward.clock", "no age is known"),
    ("unknown clock", "continuous", [("rate = 0.02", 'rate = 0.02\nclock = "sinceentry"')],
     "transitions.ward->complication.clock", "did you mean 'since_entry'"),
    # effects and the population
    ("effect on unknown attribute", "discrete", [('attribute = "marker"', 'attribute = "markr"')],
     "transitions.well->sick.effects[0].attribute", "did you mean 'marker'"),
    ("effect without population", "continuous",
     [("rate = 0.02", 'rate = 0.02\neffects = [{ attribute = "marker", hazard_ratio = 2 }]')],
     "transitions.ward->complication.effects[0].attribute", "the scenario has no [population]"),
    ("level not among levels", "discrete",
     [('attribute = "marker"', 'attribute = "sex"\n  level = "other"')],
     "transitions.well->sick.effects[0].level", "'other' is not a level of 'sex'"),
    ("level for a continuous attribute", "discrete",
     [('attribute = "marker"', 'attribute = "marker"\n  level = "high"')],
     "transitions.well->sick.effects[0].level", "'marker' is continuous"),
    ("level for a yes/no attribute", "discrete",
     [('attribute = "marker"', 'attribute = "smoker"\n  level = "yes"')],
     "transitions.well->sick.effects[0].level", "yes/no attribute"),
    ("categorical effect without level", "discrete", [('attribute = "marker"', 'attribute = "sex"')],
     "transitions.well->sick.effects[0].level", "is required: 'sex' is categorical"),
    ("centre with level", "discrete",
     [('attribute = "marker"', 'attribute = "sex"\n  level = "male"\n  centre = 1')],
     "transitions.well->sick.effects[0].level", "cannot be combined with centre"),
    ("centre for a yes/no attribute", "discrete",
     [('attribute = "marker"', 'attribute = "smoker"\n  centre = 1')],
     "transitions.well->sick.effects[0].centre", "'smoker' is a yes/no attribute"),
    ("population size zero", "discrete", [("patients = 100", "patients = 0")],
     "population.patients", "must be at least 1"),
    ("attribute sd zero", "discrete", [("sd = 5", "sd = 0")],
     "population.attributes.age.sd", "must be above 0, got 0"),
    ("truncation leaves nobody", "discrete", [("lower = 30\n  upper = 70", "lower = 200\n  upper = 300")],
     "population.attributes.age.lower", "almost no patients"),
    ("categorical shares sum", "discrete", [("shares = [0.5, 0.5]", "shares = [0.5, 0.6]")],
     "population.attributes.sex.shares", "shares sum to 1.1, not 1"),
    ("age must be continuous", "discrete",
     [('name = "age"\n  distribution = "normal"\n  mean = 50\n  sd = 5\n  lower = 30\n  upper = 70',
       'name = "age"\n  distribution = "yesno"\n  prevalence = 0.5')],
     "population.attributes.age.distribution", "needs a continuous distribution"),
    ("correlation of a categorical attribute", "discrete",
     [('attributes = ["age", "marker"]', 'attributes = ["age", "sex"]')],
     "population.correlation.attributes[1]", "'sex' is not a continuous attribute"),
    ("correlation not symmetric", "discrete", [("[0.3, 1.0]]", "[0.2, 1.0]]")],
     "population.correlation.matrix[1][0]", "must be symmetric"),
    ("correlation diagonal", "discrete", [("[0.3, 1.0]]", "[0.3, 0.9]]")],
     "population.correlation.matrix[1][1]", "the diagonal must be 1"),
    ("correlation wrong shape", "discrete", [("[0.3, 1.0]]", "[0.3]]")],
     "population.correlation.matrix[1]", "must be a row of 2 numbers"),
    ("derived labels and edges differ", "discrete",
     [("[simulation]", '[[population.derived]]\nname = "band"\nfrom = "age"\nedges = [30, 50, 60]\n'
                       'labels = ["young", "old"]\n\n[simulation]')],
     "population.derived.band.labels", "has 2 labels for 3 edges"),
    ("derived bands miss the youngest", "discrete",
     [("[simulation]", '[[population.derived]]\nname = "band"\nfrom = "age"\nedges = [40, 60]\n'
                       'labels = ["young", "old"]\n\n[simulation]')],
     "population.derived.band.edges", "the first edge (40) is above the lowest value 'age' can "
                                      "take (30)"),
    ("derived from a categorical attribute", "discrete",
     [("[simulation]", '[[population.derived]]\nname = "band"\nfrom = "sex"\nedges = [0]\n'
                       'labels = ["all"]\n\n[simulation]')],
     "population.derived.band.from", "'sex' is not a continuous attribute or column"),
    ("weights without file", "discrete", [("patients = 100", 'patients = 100\nweights = "w"')],
     "population.weights", "only used with file"),
    # outcomes
    ("unknown correction", "discrete", [("discount_costs = 0.035", 'correction = "half"')],
     "outcomes.correction", 'must be one of "none", "half-cycle", "trapezoidal", "simpson"'),
    ("simpson with an odd number of cycles", "discrete",
     [("discount_costs = 0.035", 'correction = "simpson"'), ("horizon = 10", "horizon = 11")],
     "outcomes.correction", '"simpson" needs an even number of cycles, but time.horizon gives '
     '11; make it 12 cycles (12 years) or use "trapezoidal"'),
    ("negative discount rate", "discrete", [("discount_costs = 0.035", "discount_costs = -0.01")],
     "outcomes.discount_costs", "must be at least 0, got -0.01"),
    # rows of per-cycle probabilities and the probability rule
    ("unknown probability rule", "discrete", [("cycle = 1", 'cycle = 1\nprobability_rule = "compete"')],
     "time.probability_rule", 'must be one of "separate", "competing", got \'compete\''),
    ("competing rule in a rate model", "continuous",
     [('unit = "days"', 'unit = "days"\nprobability_rule = "competing"')],
     "time.probability_rule", "but this is a rate model"),
    ("unbounded attribute under the separate rule", "discrete", [("  upper = 3\n", "")],
     "transitions.well->*", "driven by marker (unbounded), memory of flare; set "
                            'time.probability_rule = "competing"'),
    ("one-way setting above 1 under the separate rule", "discrete",
     [("high = 0.15", "high = 0.95")],
     "transitions.well->*", "with parameters.p_sick at its high value 0.95 (one-way range)"),
    ("effect on a row without a remainder", "discrete",
     [("probability = 0.2", 'probability = 0.2\neffects = [{ attribute = "smoker", hazard_ratio = 2 }]')],
     "transitions.sick->dead.effects[0]", "'sick' has no transition with probability = "
                                          '"remainder"'),
    ("treatment on a row without a remainder", "discrete",
     [("seed = 1", 'seed = 1\n\n[[strategies]]\nname = "usual"\ncomparator = true\n\n'
                   '[[strategies]]\nname = "drug"\n[[strategies.changes]]\n'
                   'transition = "sick->dead"\nhazard_ratio = 0.5')],
     "strategies.drug.changes[0].transition", "so a multiplier on its moves would leave the row"),
    ("memory on the remainder", "discrete",
     [('probability = "remainder"',
       'probability = "remainder"\nmemory = [{ after = "flare", multipliers = [1, 2] }]')],
     "transitions.well->well.memory[0]", "the remainder takes what the other transitions"),
    ("competing moves without a remainder", "discrete",
     [("cycle = 1", 'cycle = 1\nprobability_rule = "competing"')],
     "transitions.sick->*", 'needs a transition with probability = "remainder" to go to'),
    ("competing move that is certain", "discrete",
     [("cycle = 1", 'cycle = 1\nprobability_rule = "competing"'),
      ("probability = 0.8", 'probability = "remainder"'),
      ('probability = "mortality"', "probability = 1.0")],
     "transitions.well->dead.probability", "a certain move leaves the others nothing"),
    ("competing table band of 1", "discrete",
     [("cycle = 1", 'cycle = 1\nprobability_rule = "competing"'),
      ("probability = 0.8", 'probability = "remainder"'),
      ("values = [0.01, 0.05, 0.2]", "values = [0.01, 0.05, 1]")],
     "tables.mortality.values[2]", "1 is not below 1; a probability of a move that competes "
                                   "with others must be at least 0 and below 1"),
    # a fixed word that stands where a number (or a name) goes, misspelt
    ("lifetime misspelt", "discrete", [("horizon = 10", 'horizon = "lifetim"')],
     "time.horizon", 'or "lifetime", got \'lifetim\' (did you mean \'lifetime\'?)'),
    ("horizon of other text", "discrete", [("horizon = 10", 'horizon = "forever"')],
     "time.horizon", 'must be a number of years or "lifetime", got \'forever\''),
    ("remainder misspelt", "discrete",
     [('probability = "remainder"', 'probability = "remaindr"')],
     "transitions.well->well.probability", "'remaindr' (did you mean 'remainder'?); defined:"),
    ("known unit misspelt", "discrete", [('unit = "years"', 'unit = "yeras"')],
     "time.unit", "minutes; did you mean 'years'?); give time.years_per_unit"),
    ("unknown invalid-draws policy", "discrete",
     [("seed = 1", 'seed = 1\n\n[uncertainty]\ninvalid_draws = "redrew"')],
     "uncertainty.invalid_draws", "did you mean 'redraw'"),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_refusal_names_path_and_fix(case):
    _, base, edits, path, phrase = case
    assert_refused(edited(BASES[base], *edits), path, phrase)


def test_smallest_eigenvalue_is_named():
    # Three correlations that no set of variables can have; reference: numpy.linalg.eigvalsh.
    matrix = [[1.0, 0.9, -0.9], [0.9, 1.0, 0.9], [-0.9, 0.9, 1.0]]
    smallest = np.linalg.eigvalsh(np.array(matrix)).min()
    assert smallest < 0
    text = edited(DISCRETE,
                  ('attributes = ["age", "marker"]', 'attributes = ["age", "marker", "bmi"]'),
                  ("matrix = [[1.0, 0.3], [0.3, 1.0]]", f"matrix = {matrix}"),
                  ("[population.correlation]", '[[population.attributes]]\n  name = "bmi"\n'
                   '  distribution = "gamma"\n  shape = 30\n  scale = 1\n\n'
                   "  [population.correlation]"))
    error = refusal(text)
    assert error.path == "population.correlation.matrix"
    assert f"smallest eigenvalue is {smallest:.12g}" in error.message


def test_syntax_error_names_file_line():
    text = DISCRETE.replace("cycle = 1", "cycle 1")
    line = DISCRETE.splitlines().index("cycle = 1") + 1
    error = refusal(text)
    assert error.path == f"scenario line {line}"
    assert error.message.startswith("expected '='")


def test_syntax_error_at_end_names_last_line(tmp_path):
    path = tmp_path / "broken.toml"
    text = DISCRETE + 'note = "unterminated'
    path.write_text(text)
    with pytest.raises(ScenarioError) as caught:
        read_scenario(path)
    assert caught.value.path == f"broken.toml line {len(text.splitlines())}"
    assert caught.value.message == ("unterminated string (at the end of the file); close the "
                                     "text with its quote on the same line")


# the TOML 1.0 rules behind each hint (toml.io/en/v1.0.0, from memory): text is quoted on one
# line, arrays close with ']', inline tables stay on one line with no trailing comma,
# booleans are lower case, a key is defined once
@pytest.mark.parametrize("old, new, hint", [
    ('family = "beta"', "family = beta", 'put text in quotes: "beta"'),
    ("absorbing = true", "absorbing = True", "write true in lower case"),
    ("multipliers = [1.0, 1.5]", "multipliers = [1.0, 1.5", "close the array with ']'"),
    ('name = "well"', 'name = "well', "close the text with its quote on the same line"),
    ("alpha = 10, beta = 90 }", "alpha = 10, beta = 90, }", "no comma after its last entry"),
    ("discount_costs = 0.035", "discount_costs = 0,035", "decimals with a point"),
    ("c_sick = 500", "c_sick = ", "give a value after '='"),
    ("alpha = 10, beta = 90 }", "alpha =\n10, beta = 90 }", "stays on one line, closed"),
    ("[outcomes]", "[time]\n[outcomes]", "cannot declare [time] twice (column"),
], ids=["bare word", "True", "open array", "open string", "trailing comma", "decimal comma",
        "no value", "line break in an inline table", "a table twice"])
def test_syntax_error_hints_at_the_common_cause(old, new, hint):
    error = refusal(edited(DISCRETE, (old, new)))
    assert error.path.startswith("scenario line ") and "(column " in error.message
    assert hint in error.message and "\n" not in str(error), str(error)


def test_a_byte_order_mark_is_read_as_no_part_of_the_file(tmp_path):
    # some editors start UTF-8 files with U+FEFF; TOML 1.0 does not allow it (from memory)
    # but the rest of the file is the same scenario
    path = tmp_path / "marked.toml"
    path.write_text("\ufeff" + DISCRETE, encoding="utf-8")
    assert read_scenario(path).state_names == parse_scenario(DISCRETE).state_names


def test_syntax_error_without_a_known_cause_has_no_hint():
    error = refusal(DISCRETE.replace("[outcomes]", "[outcomes"))
    assert error.message == "expected ']' at the end of a table declaration (column 10)"


def test_missing_and_non_utf8_files(tmp_path):
    with pytest.raises(ScenarioError, match="cannot read the scenario file"):
        read_scenario(tmp_path / "absent.toml")
    path = tmp_path / "latin.toml"
    path.write_bytes(b'title = "caf\xe9"\n')
    with pytest.raises(ScenarioError, match="not UTF-8"):
        read_scenario(path)


def file_population(tmp_path, population: str) -> ScenarioError:
    """Write the discrete base with its population replaced, and read it from tmp_path."""
    start = DISCRETE.index("[population]")
    end = DISCRETE.index("[simulation]")
    path = tmp_path / "scenario.toml"
    path.write_text(DISCRETE[:start] + population + "\n" + DISCRETE[end:])
    with pytest.raises(ScenarioError) as caught:
        read_scenario(path)
    return caught.value


@pytest.mark.parametrize("population, path, phrase", [
    ('[population]\npatients = 10\nfile = "absent.csv"', "population.file", "no such file"),
    ('[population]\npatients = 10\nfile = "patients.txt"', "population.file", ".csv or .parquet"),
    ('[population]\npatients = 10\nfile = "patients.csv"\nweights = "w"', "population.weights",
     "'w' is not a column of patients.csv"),
    ('[population]\npatients = 10\nfile = "patients.csv"\n[[population.attributes]]\nname = "x"\n'
     'distribution = "yesno"\nprevalence = 0.5', "population.attributes",
     "cannot be combined with file"),
    ('[population]\npatients = 10\nfile = "empty.csv"', "population.file",
     "cannot read the column names"),
    # the effect in the base reads `marker`, which the file does not have
    ('[population]\npatients = 10\nfile = "patients.csv"', "transitions.well->sick.effects[0].attribute",
     "the population has no attribute 'marker'"),
    ('[population]\npatients = 10\nfile = "reserved.csv"', "population.file",
     "reserved.csv has a column named 'patient', which is reserved for the patient id"),
    # the weights column is not an attribute: `marker` holds weights here
    ('[population]\npatients = 10\nfile = "marker.csv"\nweights = "marker"',
     "transitions.well->sick.effects[0].attribute",
     "the population has no attribute 'marker'; attributes: age"),
])
def test_file_population_refusals(tmp_path, population, path, phrase):
    (tmp_path / "patients.csv").write_text("age,weight\n50,1\n")
    (tmp_path / "empty.csv").write_text("")
    (tmp_path / "reserved.csv").write_text("patient,age\n1,50\n")
    (tmp_path / "marker.csv").write_text("age,marker\n50,1\n")
    error = file_population(tmp_path, population)
    assert error.path == path, str(error)
    assert phrase in error.message, str(error)
