"""Simulated queues against queueing theory: M/M/1, M/M/c (Erlang C), M/M/c/K (blocking),
M/G/1 (Pollaczek-Khinchine) and Little's law, each within |z| < 4 of its closed form.

The closed forms are `microsim.markov.queues` (themselves checked against a numpy
birth-death chain and scipy.stats in tests/test_queues.py); the sources are Erlang 1917,
Gross, Shortle, Thompson & Harris 2008 ("Fundamentals of Queueing Theory", ch. 2 and 5),
Pollaczek 1930 / Khinchine 1932 and Little 1961 (from memory). Standard errors come from
replications or, for one long run, from batch means (trusted within Bartlett's bound on
their lag-1 autocorrelation, 2 / sqrt(B), common practice); seeds are fixed, runs short.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import special

from microsim.capacity.binding import bind_capacity
from microsim.capacity.run import queue_values, simulate_strategies, windows
from microsim.capacity.validation import compare_queues, counterpart
from microsim.markov import queues
from microsim.scenario import parse_scenario
from support import (Z, arrivals, attribute, horizon, nested, population, rate,
                     replications, resource, scenario_text, start, state, strategy, table,
                     transition)

SEED = 4


def service(arrival_rate, servers, *, service_risk=None, length=400, count=20, warm_up=60,
            extra=(), **fields) -> str:
    """Every arrival needs one of `servers` units at once; service ends at rate 1 (or as
    `service_risk` says)."""
    leave = service_risk if service_risk is not None else rate("service", "done", 1.0)
    return scenario_text(
        horizon(length, unit="minutes"), start(service=1.0),
        state("service", cost=1), state("queue", cost=0.5), state("done", absorbing=True),
        leave, *extra, arrivals(rate=arrival_rate),
        resource("desks", capacity=servers, state="service", waiting=["queue"], **fields),
        replications(count=count, warm_up=warm_up), title="queue")


def validated(text: str, seed: int = SEED):
    s = parse_scenario(text)
    runs = simulate_strategies(s, [None], seed, None)
    (sr,) = runs.values()
    spans = windows(len(sr.runs), s.capacity.replications.warm_up, s.time.end)
    return compare_queues(sr.cm, queue_values(sr, spans), sr.cut, batches=len(sr.runs) == 1)


def assert_agrees(check, model: str, quantities: set[str]):
    table = check.table
    assert set(table.quantity) == quantities | {"little_gap"}, table
    assert set(table.model) == {model, "Little's law"}
    assert table.z.abs().max() < Z, table
    assert check.agrees, check.verdict


def test_mm1():
    check = validated(service(0.6, 1))
    assert_agrees(check, "M/M/1", {"waited", "mean_wait", "utilisation", "mean_queue"})
    row = check.table.set_index("quantity").loc["mean_wait"]
    assert row.formula == pytest.approx(0.6 / (1 - 0.6))  # rho / (mu - lambda), mu = 1


def test_mmc_by_erlang_c():
    check = validated(service(2.1, 3))
    assert_agrees(check, "M/M/3", {"waited", "mean_wait", "utilisation", "mean_queue"})
    assert check.table.set_index("quantity").loc["waited"].formula == \
        pytest.approx(queues.erlang_c(3, 2.1))


def test_mmck_blocking():
    check = validated(service(2.5, 2, queue_limit=3, turned_away="done"))
    assert_agrees(check, "M/M/2/5", {"waited", "mean_wait", "utilisation", "mean_queue",
                                     "turned_away"})
    blocked = check.table.set_index("quantity").loc["turned_away"]
    assert blocked.simulated > 0.1 and blocked.formula == pytest.approx(
        queues.mmck(2.5, 1.0, 2, 5).p_blocked)


def test_mg1_by_pollaczek_khinchine_with_batch_means():
    shape, scale = 2.0, 1.0  # E[S] = Gamma(1.5), E[S^2] = Gamma(2) (scipy.special.gamma)
    weibull = transition("service", "done", hazard={"family": "weibull", "shape": shape,
                                                    "scale": scale})
    check = validated(service(0.8, 1, service_risk=weibull, length=12000, count=1, warm_up=100))
    assert_agrees(check, "M/G/1", {"waited", "mean_wait", "utilisation", "mean_queue"})
    mean, second = scale * special.gamma(1.5), scale**2 * special.gamma(2.0)
    row = check.table.set_index("quantity").loc["mean_wait"]
    assert row.formula == pytest.approx(0.8 * second / (2 * (1 - 0.8 * mean)), rel=1e-8)
    assert row.groups == 20  # one run cut into batches


def test_the_comparison_can_fail():
    """The same M/M/2 run is far from the formula of three servers (so |z| < 4 is a test)."""
    s = parse_scenario(service(1.6, 2))
    runs = simulate_strategies(s, [None], SEED, None)
    (sr,) = runs.values()
    groups = queue_values(sr, windows(len(sr.runs), s.capacity.replications.warm_up, s.time.end))
    waits = groups[groups.measure == "mean_wait"].value.to_numpy()
    wrong = queues.mmc(1.6, 1.0, 3).mean_wait
    assert abs(waits.mean() - wrong) / (waits.std(ddof=1) / math.sqrt(waits.size)) > 2 * Z


def test_littles_law_where_no_formula_applies():
    text = service(1.7, 2, extra=[rate("queue", "done", 0.2)],
                   patience=3.0, leave_to="done", priority={"attribute": "vip", "levels": ["yes", "no"]})
    text += "\n" + population(None, attribute("vip", "yesno", prevalence=0.4))
    check = validated(text)
    assert list(check.table.quantity) == ["little_gap"]
    assert abs(check.table.z.iloc[0]) < Z
    assert check.agrees and "No exact counterpart for desks: a priority rule" in check.verdict


def test_a_universal_treatment_on_service_is_recognised():
    text = service(1.5, 1) + "\n" + strategy("usual", comparator=True) + "\n" + strategy(
        "faster", changes=[nested(transition="service->done", hazard_ratio=2.0)])
    s = parse_scenario(text)
    assert counterpart(bind_capacity(s, "faster"), 0).mean_wait == pytest.approx(
        queues.mmc(1.5, 2.0, 1).mean_wait)
    assert "no steady state" in counterpart(bind_capacity(s, "usual"), 0)


REASONS = [
    ("a closed cohort", lambda t: t.replace('[arrivals]\nrate = 0.5\n', "")),
    ("not one Poisson stream", lambda t: t.replace("rate = 0.5\n", 'rate = "by_period"\n')
     + "\n" + table("by_period", by="time", starts=[0, 100], values=[0.5, 0.6])),
    ("the capacity changes by period", lambda t: t.replace("capacity = 1\n", 'capacity = "units"\n')
     + "\n" + table("units", by="time", starts=[0, 100], values=[1, 2])),
    ("patients can leave the queue", lambda t: t + "\n" + rate("queue", "done", 0.1)),
    ("need 'desks' again", lambda t: t.replace('to = "done"', 'to = "later"')
     + "\n" + state("later") + "\n" + rate("later", "service", 0.1)),
    ("covariate effects", lambda t: t.replace("rate = 1.0\n", "rate = 1.0\n\n  [[transitions.effects]]\n"
                                              '  attribute = "age"\n  hazard_ratio = 1.01\n')
     + "\n" + population(None, attribute("age", "normal", mean=50, sd=5))),
    ("not every arrival needs", lambda t: t.replace("shares = { service = 1.0 }",
                                                    "shares = { service = 0.5, done = 0.5 }")),
]


@pytest.mark.parametrize("reason, edit", REASONS, ids=[r for r, _ in REASONS])
def test_no_exact_counterpart_says_why(reason, edit):
    s = parse_scenario(edit(service(0.5, 1, warm_up=0)))
    found = counterpart(bind_capacity(s), 0)
    assert isinstance(found, str) and reason in found, found


def test_non_exponential_service_with_several_units_has_no_closed_form():
    weibull = transition("service", "done", hazard={"family": "weibull", "shape": 2, "scale": 1})
    s = parse_scenario(service(0.5, 2, service_risk=weibull))
    assert "M/G/c with several units" in counterpart(bind_capacity(s), 0)
    assert "stopped at the limit" in counterpart(bind_capacity(s), 0, cut=True)


def test_correlated_batch_means_are_left_untested():
    """Batch means of one run that trend (lag-1 autocorrelation far above Bartlett's 2 / sqrt(B))
    give no standard error to trust; the same values as replications are tested."""
    cm = bind_capacity(parse_scenario(service(0.6, 1, count=1)))
    trend = np.linspace(0.5, 2.0, 20)
    groups = pd.DataFrame([("desks", g, measure, v) for measure in
                           ("waited", "mean_wait", "utilisation", "mean_queue", "little_gap")
                           for g, v in enumerate(trend)],
                          columns=["resource", "group", "measure", "value"])
    batches = compare_queues(cm, groups, batches=True)
    assert batches.table.p_value.isna().all() and batches.agrees is None
    assert "5 figure(s) untested: the batches of the one run are correlated" in batches.verdict
    assert compare_queues(cm, groups).table.p_value.notna().all()
