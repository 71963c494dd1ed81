"""The rare ways of a model: what the patients' own variance cannot show.

An outcome mean is tested on the standard error the patients' deviations give. A way an
outcome can take (entering a state, a transition, an event) that the model expects only a
few times among the compared patients is often missing from a sample, and then so is its
part of the variance: a state costing 100,000 a cycle that 0.3 of 300 patients are expected
to reach is usually never reached, the mean is off by its expected cost and the SE knows
nothing of it, so the test cries "disagrees" at a correct engine.

The analytic side knows each way's expected number per patient mu (a state's entries are
its starts and the transitions into it from elsewhere) and the mean difference c one
occurrence makes (a transition's or event's one-off cost or disutility; a state's expected
value less what its time would have accrued in the states it is entered from, over its
expected entries: to first order what entering it changes, so a state that only replaces
time of the same value adds nothing). A rare way's count is about Poisson (Le Cam 1960, "An
approximation theorem for the Poisson binomial distribution", Pacific J. Math.
10:1181-1197), so its part of a patient's variance is about mu c^2, the compound-Poisson
variance mu E[C^2] with the variation of C left out (common practice; from memory: Klugman,
Panjer & Willmot 1998, Loss Models), which makes it a lower bound; `variances` takes the
Bernoulli mu (1 - mu) c^2, lower still for a way that recurs. A way is rare here when it is
expected at most RARE times per patient, where the two differ by at most a quarter.

Everything is a sum over patients (`WaySums`), so batches add up as the comparison's do.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from microsim.binding import BoundModel
from microsim.results.outcomes import Exposure, outcome_values

RARE = 0.2  # expected occurrences per patient up to which a way's count is about Poisson


def way_names(model: BoundModel) -> tuple[list[str], np.ndarray, np.ndarray]:
    """The model's ways in plain words, and which ways each state (copies of a state in a
    treatment phase are one way) and each risk (risks of one name are one way) belongs to."""
    names, of_state, of_risk = [], [], []
    for s in range(model.n_states):
        label = f"entering '{model.entered(s)}'"
        if label not in names:
            names.append(label)
        of_state.append(names.index(label))
    for risk in model.risks:
        label = f"the {'event' if risk.is_event else 'transition'} '{risk.name}'"
        if label not in names:
            names.append(label)
        of_risk.append(names.index(label))
    return names, np.array(of_state, int), np.array(of_risk, int)


def part(exposure: Exposure, states: np.ndarray, risks: np.ndarray) -> Exposure:
    """The exposure of some states (bool (S,)) and risks (bool (R,)) alone: outcomes are
    linear in the exposure, so its value is those ways' share of every outcome."""
    s, r = states.astype(float)[None, :, None], risks.astype(float)[None, :, None]
    bands = exposure.bands
    if bands is not None:
        bands = replace(bands, occupancy=bands.occupancy * s[..., None],
                        on_treatment=bands.on_treatment * s[..., None],
                        occurrences=bands.occurrences * r[..., None])
    return replace(exposure, occupancy=exposure.occupancy * s,
                   on_treatment=exposure.on_treatment * s,
                   occurrences=exposure.occurrences * r, bands=bands)


WEIGHTING = {"life_years": 0, "qalys": 0, "costs": 0, "qalys_discounted": 2,
             "costs_discounted": 1}  # the exposure's weighting each outcome is valued at


@dataclass
class WaySums:
    """Per way, summed over the compared patients: its expected number of occurrences, its
    expected value in each outcome and, for a state, the time spent in it (at each
    weighting); and the expected moves between states and starts in each, for what the time
    in a state stands in for."""
    model: BoundModel
    n: int = 0
    count: np.ndarray | float = 0.0  # (W,)
    value: dict = field(default_factory=dict)  # measure -> (W,)
    time: np.ndarray | float = 0.0  # (W, 3)
    moves: np.ndarray | float = 0.0  # (W, W) from one state's way to another's
    starts: np.ndarray | float = 0.0  # (W,)

    def __post_init__(self):
        self.names, self.of_state, self.of_risk = way_names(self.model)

    def add(self, exposure: Exposure, start: np.ndarray, patients: int) -> None:
        """One batch's expected exposure and start shares (B, S), B the batch's patients
        or one row for all of them."""
        model, W = self.model, len(self.names)
        scale = patients if exposure.occupancy.shape[0] == 1 else 1
        occurrences = scale * exposure.occurrences[:, :, 0].sum(axis=0)
        starts, time, moves = np.zeros(W), np.zeros((W, 3)), np.zeros((W, W))
        np.add.at(starts, self.of_state, scale * start.sum(axis=0))
        np.add.at(time, self.of_state, scale * exposure.occupancy.sum(axis=0))
        count = starts.copy()
        np.add.at(count, self.of_risk, occurrences)
        for r, risk in enumerate(model.risks):
            source, target = (None if s is None else self.of_state[s]
                              for s in (risk.source, risk.target))
            if target is not None and target != source:
                moves[source, target] += occurrences[r]
                count[target] += occurrences[r]
        self.n += patients
        self.count, self.starts = self.count + count, self.starts + starts
        self.time, self.moves = self.time + time, self.moves + moves
        for w in range(W):
            values = outcome_values(model, part(exposure, self.of_state == w, self.of_risk == w))
            for measure, v in values.items():
                sums = self.value.setdefault(measure, np.zeros(W))
                sums[w] += scale * float(np.sum(v))

    def differences(self, measure: str) -> np.ndarray:
        """(W,) the expected difference each way makes to the outcome, summed over the
        patients: a transition's or event's own value; a state's value less what the
        patient would have accrued instead, to first order: at the value per unit time of
        the state it is entered from, for as long as a stay in the one entered lasts but
        no longer than a stay in the one left (a start in it: at the start shares' value
        per unit time). A state of the same value as those it replaces (life years in
        'sick' instead of 'well') makes none; one that only takes the place of a short
        stay elsewhere makes about its own value."""
        value, time = self.value[measure], self.time[:, WEIGHTING[measure]]
        with np.errstate(divide="ignore", invalid="ignore"):
            per_time = np.where(time > 0, value / time, 0.0)
            stay = np.where(self.count > 0, time / self.count, 0.0)  # per entry
            at_start = self.starts @ per_time / max(float(np.sum(self.starts)), 1e-300)
        # instead[u, s]: what a patient entering s from u would have accrued in u meanwhile
        instead = per_time[:, None] * np.minimum(stay[:, None], stay[None, :])
        return value - (self.moves * instead).sum(axis=0) - self.starts * at_start * stay

    def variances(self, measure: str) -> np.ndarray:
        """(W,) each rare way's variance per patient, mu (1 - mu) c^2 with mu its expected
        number per patient and c the mean difference one occurrence makes: a way taken at
        most once's, which is the compound Poisson's mu c^2 for a rare way and below it for
        one that recurs, so that it stays a floor (0 for the ways that are not rare)."""
        count, difference = self.count, self.differences(measure)
        mu = count / max(self.n, 1)
        with np.errstate(divide="ignore", invalid="ignore"):
            proxy = np.where(count > 0, (1 - mu) * difference ** 2 / count / self.n, 0.0)
        return np.where(mu <= RARE, proxy, 0.0)
