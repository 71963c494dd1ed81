"""Simulated queues against queueing theory: which closed form a resource's queue matches,
and whether the simulation agrees with it.

A resource has an exact counterpart when its patients arrive as one Poisson stream that
needs it at once (a constant arrival rate, every arrival starting in the state that holds
it), are served first come first served by a constant number of units, never leave the
queue and never come back, and have service times (their time in the held state) that are
independent and alike: exponential (M/M/c, or M/M/c/K with a queue limit) or, with one
unit, any distribution (M/G/1, by Pollaczek-Khinchine). Little's law L = lambda W (Little
1961) holds for every stable queue, so it is tested wherever arrivals go on over time.

Each figure is tested with its standard error over replications (or batches of one run):
z = (simulated - formula) / se with a two-sided Student-t p-value, and the verdict is the
cohort comparison's rule (`microsim.results.comparison`): Bonferroni over the K figures at
family-wise level 0.001, so a correct engine is flagged in fewer than one run in a thousand.
Batch means are trusted only while their lag-1 autocorrelation is within Bartlett's bound
2 / sqrt(B) for B uncorrelated batches (Bartlett 1946, "On the theoretical specification and
sampling properties of autocorrelated time-series", from memory; common practice in
simulation output analysis); a figure whose batches are more correlated is left untested.
"""
from __future__ import annotations

from dataclasses import dataclass
from math import exp

import numpy as np
import pandas as pd
from scipy import stats

from microsim.capacity.binding import CapacityModel
from microsim.markov import queues
from microsim.results.comparison import FAMILY_ALPHA, ROUNDOFF

QUANTITIES = {  # simulated measure -> field of queues.SteadyState
    "waited": "p_wait", "mean_wait": "mean_wait", "utilisation": "utilisation",
    "mean_queue": "mean_queue", "turned_away": "p_blocked"}
LITTLE = "little_gap"


def counterpart(cm: CapacityModel, k: int, cut: bool = False) -> queues.SteadyState | str:
    """The closed form resource k's queue matches, or why it has none (a sentence)."""
    r, model = cm.resources[k], cm.model
    name = model.states[r.state]
    if cm.arrivals is None:
        return "a closed cohort: everyone is there at time 0, so the queue has no steady state"
    rate = cm.arrivals.constant_rate
    if rate is None:
        return ("arrivals are a rate by period or a file of times, not one Poisson stream of "
                "constant rate")
    if cut:
        return "arrivals stopped at the limit on patients before the end of the run"
    if model.start[r.state] < 1.0:
        return f"not every arrival needs {r.label!r} on arrival (start share of {name!r} below 1)"
    if not r.capacity.constant:
        return "the capacity changes by period"
    if not r.first_come:
        return "a priority rule orders the queue"
    moves = [risk for risk in model.risks if risk.target not in (None, risk.source)]
    if r.patience is not None or any(risk.source in r.waiting and risk.target not in r.waiting
                                     for risk in moves):
        return "patients can leave the queue before admission"
    if r.state in reached_after(moves, r.state):
        return f"patients can need {r.label!r} again after service, so arrivals to it are not Poisson"
    service = [(i, risk) for i, risk in enumerate(model.risks)
               if risk.source == r.state and risk.target not in (None, r.state)]
    factor = treatment_factors(cm, [i for i, _ in service])
    if isinstance(factor, str):
        return factor
    if any(risk.effects or risk.memory for _, risk in service):
        return ("service times differ between patients or with their history (covariate "
                "effects or memory on the ways out of the held state)")
    servers = r.capacity.units[0]
    if all(risk.family == "constant" for _, risk in service):
        mu = sum(risk.params["rate"] * f for (_, risk), f in zip(service, factor))
        if r.queue_limit is not None:
            return queues.mmck(rate, mu, servers, servers + r.queue_limit)
        return queues.mmc(rate, mu, servers) if queues.stable(rate, 1 / mu, servers) else \
            unstable(rate, 1 / mu, servers)
    if any(risk.clock != "since_entry" for _, risk in service):
        return "service hazards that move with calendar time or age are not alike for every patient"
    if servers != 1 or r.queue_limit is not None:
        return ("service times are not exponential, and M/G/c with several units or a finite "
                "waiting room has no closed form")

    def survival(t: float) -> float:
        return exp(-sum(f * risk.hazard.cumulative_hazard(t) for (_, risk), f in zip(service, factor)))

    mean, second = queues.service_moments(survival)
    if not np.isfinite(second):
        return "the service time has no finite second moment"
    return queues.mg1(rate, mean, second) if queues.stable(rate, mean, 1) else \
        unstable(rate, mean, 1)


def unstable(rate: float, mean_service: float, servers: int) -> str:
    return (f"no steady state: arrivals keep {rate * mean_service / servers:.3g} of the units "
            "busy (rho >= 1), so the queue grows without end")


def reached_after(moves, state: int) -> set[int]:
    """States reachable from where patients go on leaving `state`."""
    seen = {risk.target for risk in moves if risk.source == state}
    stack = list(seen)
    while stack:
        here = stack.pop()
        for risk in moves:
            if risk.source == here and risk.target not in seen:
                seen.add(risk.target)
                stack.append(risk.target)
    return seen


def treatment_factors(cm: CapacityModel, service: list[int]) -> list[float] | str:
    """The strategy's factor on each service risk, when it acts on every patient throughout."""
    t = cm.model.treatment
    if t is None or all(t.on_factor[i] == t.off_factor[i] for i in service):
        return [1.0 if t is None else float(t.off_factor[i]) for i in service]
    if t.eligible is None and t.uptake >= 1 and t.start == 0 and t.discontinuation == 0 \
            and t.stop >= cm.end:
        return [float(t.on_factor[i]) for i in service]
    return "the strategy's treatment changes service times for some patients or some of the time"


@dataclass(frozen=True)
class QueueValidation:
    table: pd.DataFrame  # resource, quantity, simulated, formula, se, z, p_value, groups,
    # test, model, source
    agrees: bool | None  # None: nothing to compare
    verdict: str


def compare_queues(cm: CapacityModel, groups: pd.DataFrame, cut: bool = False,
                   open_population: bool = True, batches: bool = False) -> QueueValidation:
    """Test every resource's figures (tidy per-group values in group order: resource, group,
    measure, value) against its closed form, and Little's law where arrivals go on over time.
    `batches`: the groups are consecutive batches of one run, whose standard error holds only
    while they are nearly uncorrelated; a figure whose batch means are not is left untested."""
    rows, reasons = [], []
    for k, r in enumerate(cm.resources):
        mine = groups[groups.resource == r.name]
        formula = counterpart(cm, k, cut)
        if isinstance(formula, str):
            reasons.append(f"{r.name}: {formula}")
        else:
            for measure, field in QUANTITIES.items():
                if field == "p_blocked" and r.queue_limit is None:
                    continue
                rows.append(test_row(r.name, measure, mine, getattr(formula, field),
                                     formula.model, formula.source, batches))
        if open_population:
            rows.append(test_row(r.name, LITTLE, mine, 0.0, "Little's law", queues.LITTLE,
                                 batches))
    table = pd.DataFrame([row for row in rows if row is not None],
                         columns=["resource", "quantity", "simulated", "formula", "se", "z",
                                  "p_value", "groups", "test", "model", "source"])
    return QueueValidation(table, *verdict(table, reasons, batches))


def lag_one(x: np.ndarray) -> float:
    """The lag-1 autocorrelation of a series (0 for a constant one)."""
    centred = x - x.mean()
    spread = float(centred @ centred)
    return float(centred[:-1] @ centred[1:]) / spread if spread > 0 else 0.0


def test_row(resource: str, measure: str, groups: pd.DataFrame, formula: float, model: str,
             source: str, batches: bool) -> tuple | None:
    x = groups.loc[groups.measure == measure, "value"].to_numpy(float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return None
    mean, se = float(x.mean()), float(x.std(ddof=1) / np.sqrt(x.size))
    difference = mean - formula
    tolerance = ROUNDOFF * max(abs(formula), 1.0)
    r = lag_one(x)
    if batches and abs(r) > 2 / np.sqrt(x.size):  # Bartlett's bound for white noise
        z, p, test = np.nan, np.nan, f"untested: batch means correlated (lag-1 r = {r:.2f})"
    elif se <= tolerance:  # no spread between groups: equal within round-off, or not
        z, p, test = 0.0, float(abs(difference) <= tolerance), f"equal within {ROUNDOFF:g}"
    else:
        z = difference / se
        p, test = float(2 * stats.t.sf(abs(z), x.size - 1)), "Student t"
    return resource, measure, mean, formula, se, z, p, x.size, test, model, source


def verdict(everything: pd.DataFrame, reasons: list[str], batches: bool = False
            ) -> tuple[bool | None, str]:
    none = ("No exact counterpart for " + "; ".join(reasons) + ".") if reasons else ""
    table = everything[everything.p_value.notna()]
    untested = everything[everything.p_value.isna()]
    if len(untested):
        none += (f" {len(untested)} figure(s) untested: the batches of the one run are "
                 "correlated, so their standard error would understate the noise; give more "
                 "replications or a longer run.")
        none = none.strip()
    if table.empty:
        return None, none or "Nothing to compare with queueing theory."
    level = FAMILY_ALPHA / len(table)
    worst = table.loc[table.p_value.idxmin()]
    basis = (f"Bonferroni over {len(table)} comparison{'s' if len(table) != 1 else ''} at "
             f"family-wise level {FAMILY_ALPHA}: "
             f"each Student-t p-value must be at least {level:.2g}")
    models = ", ".join(dict.fromkeys(table.model))
    if worst.p_value >= level:
        said = (f"The simulated queues agree with queueing theory ({models}): the largest |z| "
                f"is {table.z.abs().max():.2f} and the smallest p-value {worst.p_value:.2g} "
                f"({basis}).")
        return True, f"{said} {none}".strip()
    said = (f"The simulated queues DISAGREE with queueing theory: {worst.resource} "
            f"{worst.quantity} is {worst.simulated:.4g} against {worst.formula:.4g} "
            f"({worst.model}; z = {worst.z:.2f}, p = {worst.p_value:.2g}; {basis}). Check the "
            "engine, the warm-up or the run length"
            + ("; batches of one run shorter than the queue's memory understate the noise, "
               "so try more replications first." if batches else "."))
    return False, f"{said} {none}".strip()
