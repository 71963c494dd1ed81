"""Common random numbers under treatment phases in rate models: a copy of a state reads
that state's streams and continues its rounds, so a patient whom the treatment does not
act on has, record for record, the comparator's history (docs/scenario-format.md, "Draws
under phases").

Reference: the comparator's own histories (the same scenario bound without the strategy),
read through `BoundModel.entered` and the risks' names, since the strategy's model numbers
its states and risks otherwise. The SimPy engine must give them exactly (the same Python
arithmetic on the same draws); the vectorised engine within its documented tolerance on
times (relative 1e-12 for closed forms, DEVELOPERS.md "Rate models")."""
import numpy as np
import pytest

from microsim.binding import bind
from microsim.engines.histories import START
from microsim.scenario import parse_scenario
from support import (after, attribute, both_engines, event, horizon, nested, population, rate,
                     records_by_patient, scenario_text, start, state, strategy, transition)

COMPARATOR = strategy("usual", comparator=True)

# no way back from 'sick'; 'sick' is all constant rates but for a memory effect, 'well'
# all constant (the event engine's precomputed rounds) and flares often enough (rate 4
# over 12 years) that many patients run past the engines' first blocks of draws
ONE_WAY = [
    horizon(12), start(well=0.7, sick=0.3),
    state("well", cost=100), state("sick", cost=400), state("dead", absorbing=True),
    rate("well", "sick", 0.2, name="fall_ill"), rate("well", "dead", 0.02),
    rate("sick", "dead", 0.1, name="die_sick", memory=[after("flare", multipliers=[1, 1.3])]),
    event("flare", ["well", "sick"], rate=4, cost=20)]

# patients move back and forth, so they re-enter copies of states they have been in; the
# way back is a Weibull hazard on the time since the start (the general path)
BACK_AND_FORTH = [
    horizon(12), start(well=0.7, sick=0.3),
    state("well", cost=100), state("sick", cost=400), state("dead", absorbing=True),
    rate("well", "sick", 0.3, name="fall_ill"), rate("well", "dead", 0.02),
    transition("sick", "well", name="recover",
               hazard=dict(family="weibull", shape=1.3, scale=2), clock="since_start"),
    rate("sick", "dead", 0.1, name="die_sick"),
    event("flare", ["well", "sick"], rate=4, cost=20)]

IDS = np.arange(600) * 5 + 2


def named(model, h, ids) -> dict:
    """{patient id: its records with states by the name memory counts them under (a copy
    as its state) and risks by name}: comparable across strategies."""
    state = {START: "start", **{i: model.entered(i) for i in range(model.n_states)}}
    risk = {START: "start", **{r: x.name for r, x in enumerate(model.risks)}}
    return {pid: (rows[:, 0], [(state[int(a)], state[int(b)], risk[int(r)])
                               for a, b, r in rows[:, 1:].tolist()])
            for pid, rows in records_by_patient(h, ids).items()}


def by_engine(text: str, name: str, seed: int = 7):
    """{engine: (comparator's named records, strategy's)} for patients IDS, the strategy's
    model and its multipliers (whose window says whom it treats)."""
    scenario = parse_scenario(text)
    usual, treat = bind(scenario, strategy="usual"), bind(scenario, strategy=name)
    runs = [both_engines(model, IDS, seed) for model in (usual, treat)]
    return ({engine: tuple(named(model, run[j], IDS) for model, run in zip((usual, treat), runs))
             for j, engine in enumerate(("simpy", "vectorised"))}, treat, runs[1][2])


def assert_same_history(one, two, rtol):
    (t1, r1), (t2, r2) = one, two
    assert r1 == r2
    np.testing.assert_allclose(t2, t1, rtol=rtol, atol=0)


RTOL = {"simpy": 0.0, "vectorised": 1e-12}


def test_a_treatment_that_starts_on_entry_and_acts_elsewhere_leaves_every_history_alone():
    # by hand: treatment starts on entering 'sick' and lowers the hazard of falling ill,
    # which only acts in 'well'; no one comes back to 'well', so it acts on no one
    text = scenario_text(*ONE_WAY, COMPARATOR, strategy(
        "treat", start_on="sick", changes=[nested(transition="fall_ill", hazard_ratio=0.5),
                                           nested(cost=900)]))
    runs, treat, _ = by_engine(text, "treat")
    assert "sick+treat" in treat.states
    for engine, (usual, treated) in runs.items():
        for pid in IDS.tolist():
            assert_same_history(usual[pid], treated[pid], RTOL[engine])
        # the copies were entered, and patients had many rounds in 'sick' (draws past the
        # event engine's first block of 32)
        sick_rounds = [sum(b == "sick" for _, b, _ in records) for _, records in treated.values()]
        assert max(sick_rounds) > 40


def test_a_treatment_an_event_starts_that_changes_no_risk_leaves_every_history_alone():
    # the flare moves the patient to the treated copy of its state in the middle of its
    # rounds there; the comparator stays in the state and takes its next round from the
    # next occurrence of the same streams, and so must the strategy (round k + 1, not a
    # copy's round 0, which would also reuse a draw already read in the state)
    text = scenario_text(*BACK_AND_FORTH, COMPARATOR, strategy(
        "treat", start_on="flare", changes=[nested(cost=900), nested(utility=-0.1)]))
    runs, treat, _ = by_engine(text, "treat")
    for engine, (usual, treated) in runs.items():
        for pid in IDS.tolist():
            assert_same_history(usual[pid], treated[pid], RTOL[engine])
    # and the model does take the copies: every patient who flares is in one after it
    copies = [i for i, name in enumerate(treat.states) if name.endswith("+treat")]
    _, vectorised, _ = both_engines(treat, IDS, 7)
    assert np.isin(vectorised.target, copies).sum() > len(IDS) / 2


WHO = {"not eligible": dict(eligible=nested(all=[dict(attribute="marker", equals=True)])),
       "not taken up": dict(uptake=0.5)}


@pytest.mark.parametrize("who", sorted(WHO))
def test_patients_a_treatment_does_not_reach_keep_the_comparators_histories(who):
    # by hand: only marked patients are eligible (or half take the treatment up: the
    # patients' own 'uptake' draws), and the treatment acts on both ways out of 'sick';
    # the others pass through the copies with the comparator's records, while treated ones
    # differ (so the check could fail on a strategy that changed nothing)
    text = scenario_text(
        *BACK_AND_FORTH, population(600, attribute("marker", "yesno", prevalence=0.5)),
        COMPARATOR, strategy(
            "treat", start_on="sick", **WHO[who],
            changes=[nested(transition="recover", hazard_ratio=1.5),
                     nested(transition="die_sick", hazard_ratio=0.5)]))
    runs, treat, mult = by_engine(text, "treat")
    treated = np.isfinite(mult.window.on)
    assert 0.3 < treated.mean() < 0.7
    for engine, (usual, phased) in runs.items():
        differ = 0
        for pid, is_treated in zip(IDS.tolist(), treated.tolist()):
            if is_treated:
                differ += usual[pid][1] != phased[pid][1]
            else:
                assert_same_history(usual[pid], phased[pid], RTOL[engine])
        assert differ > treated.sum() / 4


def test_the_subgroup_a_phased_treatment_never_reaches_is_told_nothing_changes():
    # what a practitioner reads: in the decision's subgroup table, the patients the
    # treatment is not for have the comparator's histories, so their increment is 0 but for
    # round-off (their time in 'sick' is valued as the sum of its copies': about 1e-14
    # here, where draws of their own gave a noise gain of about 36 with SE 100) and the
    # verdict says nothing changes, while the treated subgroup's does not; SimPy engine and
    # the default (vectorised) one
    from microsim.decision.strategies import decision_of, run_strategies
    from microsim.patients.population import draw_population
    text = scenario_text(
        *BACK_AND_FORTH, population(400, attribute("marker", "yesno", prevalence=0.5)),
        COMPARATOR, strategy(
            "treat", start_on="sick", eligible=nested(all=[dict(attribute="marker", equals=True)]),
            changes=[nested(transition="die_sick", hazard_ratio=0.5), nested(cost=300)]))
    scenario = parse_scenario(text)
    patients = draw_population(scenario.population, 5, np.arange(400))
    for engine in ("simpy", "auto"):
        table = decision_of(scenario, run_strategies(scenario, patients, 5, engine=engine)).subgroups
        rows = table[(table.attribute == "marker") & (table.strategy == "treat")].set_index("level")
        untreated, treated = rows.loc["False"], rows.loc["True"]
        assert untreated.verdict.startswith("no difference"), (engine, untreated)
        assert not treated.verdict.startswith("no difference"), (engine, treated)
