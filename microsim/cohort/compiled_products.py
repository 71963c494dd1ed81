"""The exact cycle-model products of `microsim.cohort.analytic`, compiled.

Cycle by cycle this carries every patient row's distribution over the expanded states
(`microsim.cohort.expand`) through the cycle's ways (`cycle_matrices.expanded_rows`), and
adds each risk's expected occurrences. The numpy evaluation (`cycle_matrices.cycle_moves`
and `analytic.matrix_products`) stays the reference; this one does the same arithmetic
without arrays of every cycle, expanded state and way in memory: the patients of a chunk
are the innermost loop, so each step runs over contiguous numbers, and chunks of patients
run on the run's threads (`microsim.threads`; the kernel releases the GIL).

A risk's base value and multiplier are read by the compiled cycle engine's own functions
(`microsim.engines.compiled_cycles.base_index` and `outer_multiplier`, on its `layout`);
the memory factor of each expanded state is the expansion's own (`Expansion.memory_factor`),
and the per-cycle probabilities follow the same rules (`microsim.hazards.cycle_probabilities`).
The results equal the reference's to rounding.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

from microsim import threads
from microsim.cohort.cycle_matrices import expanded_rows, occurs
from microsim.cohort.expand import Expansion
from microsim.engines.compiled_cycles import base_index, layout, outer_multiplier
from microsim.engines.cycle_engine import AXES
from microsim.hazards.cycle_probabilities import LIMIT, competing_scale, overflow, separate_one
from microsim.patients.multipliers import Multipliers

TIME_IN_STATE = AXES["time_in_state"]
CHUNK_NUMBERS = 2 ** 20  # a chunk's patients x expanded states x risks (its memo: 16 MB)


class _Ways(NamedTuple):
    """The expanded states as the kernel reads them: each one's model state, cycles in it
    and memory factor of each risk; whether each risk's happening is an occurrence; each
    one's split events (CSR: positions in its state's events) and entries (CSR: target,
    way, pattern; see `cycle_matrices.Row`)."""
    state: np.ndarray
    duration: np.ndarray
    memory: np.ndarray  # (E, R)
    counted: np.ndarray  # (R,)
    split_ptr: np.ndarray
    split: np.ndarray
    entry_ptr: np.ndarray
    target: np.ndarray
    way: np.ndarray
    pattern: np.ndarray


def _ways(exp: Expansion) -> tuple[_Ways, int, int, int]:
    """The kernel's `_Ways`, and the most ways, events and split events of any row."""
    model, rows = exp.model, expanded_rows(exp)
    live = [row for row in rows if row is not None]
    split = [() if row is None else tuple(row.events.index(r) for r in row.split) for row in rows]
    entries = [() if row is None else row.entries for row in rows]
    flat = np.array([x for e in entries for x in e], np.int64).reshape(-1, 3)
    ways = _Ways(
        np.array([i for i, _, _ in exp.expanded], np.int64),
        np.array([d for _, d, _ in exp.expanded], np.int64),
        np.array([[exp.memory_factor(risk, counts) for risk in model.risks]
                  for _, _, counts in exp.expanded], float).reshape(exp.size, -1),
        np.array([occurs(risk) for risk in model.risks], bool),
        np.cumsum([0] + [len(s) for s in split]).astype(np.int64),
        np.array([q for s in split for q in s], np.int64),
        np.cumsum([0] + [len(x) for x in entries]).astype(np.int64),
        *(np.ascontiguousarray(flat[:, k]) for k in range(3)))
    return (ways, max((len(row.moves) + 1 for row in live), default=1),
            max((len(row.events) for row in live), default=1),
            max((len(row.split) for row in live), default=0))


def compiled_products(exp: Expansion, mult: Multipliers) -> tuple[np.ndarray, np.ndarray]:
    """The trace (B, T + 1, S) and each cycle's expected occurrences of each risk (T, B, R)
    of every patient row of `mult`: the numbers of `analytic.matrix_products`."""
    model = exp.model
    batch, n_risks = mult.log_static.shape
    rows, risks, people, _ = layout(model, mult, np.arange(batch), 0)
    ways, longest, events, split = _ways(exp)
    start = exp.start_rows(mult.start, batch)
    trace = np.empty((batch, model.n_cycles + 1, model.n_states))
    flow = np.zeros((model.n_cycles, n_risks, batch))  # patients last, as the kernel adds
    used = threads.count()
    # at most CHUNK_NUMBERS, and enough chunks for every thread
    chunk = int(np.clip(min(CHUNK_NUMBERS // (exp.size * max(n_risks, 1)), -(-batch // used)),
                        64, 2048))

    def one_chunk(lo: int):
        hi = min(lo + chunk, batch)
        size = hi - lo
        scratch = (np.empty((exp.size, size)), np.empty((exp.size, size)),  # now, after
                   np.empty((longest, size)), np.empty((longest, size)),  # weights, ways
                   np.empty((max(events, 1), size)), np.empty((1 << split, size)),  # chances
                   np.zeros((size, max(n_risks, 1)), np.int64),  # each risk's last band
                   np.zeros((2, exp.size, n_risks, size)),  # last m L and chance,
                   np.zeros((2, exp.size, size)),  # and last R and scale (0 gives 0)
                   np.empty((n_risks, size), np.int64), np.empty((n_risks, size)),
                   np.empty(size))
        return _products(rows, risks, ways, people.on, people.age0, people.off, lo,
                         float(model.cycle), model.n_cycles, LIMIT,
                         np.ascontiguousarray(start[lo:hi].T), trace[lo:hi], flow[:, :, lo:hi],
                         scratch)

    for failed in threads.in_order(one_chunk, range(0, batch, chunk), used):
        if failed[0] >= 0:
            row, n, state, total = failed
            raise overflow(f"transitions.{model.states[int(state)]}->*", float(total),
                           f"the cohort's patient row {int(row)}", int(n))
    return trace, flow.transpose(0, 2, 1)


@njit(cache=True, nogil=True, _nrt=False)
def _products(rows, risks, ways, on, age0, off, first, cycle, n_cycles, limit, start, trace,
              flow, scratch):
    """Fill the trace (b, T + 1, S) and flow (T, R, b) of the patients first.. of the
    layout (start: their (E, b) start distributions); returns (-1, ...) or, for a row whose
    moves sum above 1, (patient row, cycle, state, total).

    Each risk's base value and multiplier are read once a cycle (once per expanded state
    where a table is by time in state); a chance is worked out again only when its
    argument changed since the last cycle (each expanded state's m L and R, per patient):
    the same argument gives the same number, and most do not change. The memo starts at 0,
    whose chance and scale are 0."""
    now, after, weights, chances_of_ways, chances, patterns, hints, memo, scales, bases, \
        outer, totals = scratch
    E, B = now.shape
    for e in range(E):
        for b in range(B):
            now[e, b] = start[e, b]
    _collapse(now, ways.state, trace, 0)
    for n in range(n_cycles):
        t = n * cycle
        for r in range(bases.shape[0]):
            for b in range(B):
                p = first + b
                bases[r, b] = base_index(risks, r, p, t, age0[p] + t, 0.0, hints[b])
                outer[r, b] = outer_multiplier(risks, r, p, n, t, on[p], off[p])
        after[:] = 0.0
        for e in range(E):
            i = ways.state[e]
            if rows.absorbing[i]:
                for b in range(B):
                    after[e, b] += now[e, b]
                continue
            if _empty(now, e):  # no patient of the chunk can be here yet (or any more)
                continue
            lo, hi = rows.move_ptr[i], rows.move_ptr[i + 1]
            in_state = ways.duration[e] * cycle
            totals[:] = 0.0
            for j in range(lo, hi):
                r = rows.moves[j]
                by_stay = risks.band_axis[r] == TIME_IN_STATE
                for b in range(B):
                    k = (base_index(risks, r, first + b, t, age0[first + b] + t, in_state, hints[b])
                         if by_stay else bases[r, b])
                    m = outer[r, b] * ways.memory[e, r]
                    if rows.combined[i]:
                        weights[j - lo, b] = risks.logs[k] * m
                        totals[b] += weights[j - lo, b]  # 0 + w is w: the engines' sum
                    else:
                        chances_of_ways[j - lo, b] = _separate(risks, k, m, memo, e, r, b)
            if rows.combined[i]:
                for b in range(B):
                    if totals[b] != scales[0, e, b]:
                        scales[0, e, b], scales[1, e, b] = totals[b], competing_scale(totals[b])
                for j in range(lo, hi):
                    for b in range(B):
                        chances_of_ways[j - lo, b] = weights[j - lo, b] * scales[1, e, b]
            for b in range(B):
                total = 0.0
                for j in range(lo, hi):
                    total += chances_of_ways[j - lo, b]
                if not 1.0 - total >= 1.0 - limit:
                    return first + b, n, i, total
                chances_of_ways[hi - lo, b] = max(1.0 - total, 0.0)  # remainder, or staying put
            for j in range(lo, hi + 1):
                r = rows.moves[j] if j < hi else rows.remainder_risk[i]
                if r >= 0 and ways.counted[r]:
                    for b in range(B):
                        flow[n, r, b] += now[e, b] * chances_of_ways[j - lo, b]
            head = rows.event_ptr[i]
            for j in range(head, rows.event_ptr[i + 1]):
                r = rows.events[j]
                by_stay = risks.band_axis[r] == TIME_IN_STATE
                for b in range(B):
                    k = (base_index(risks, r, first + b, t, age0[first + b] + t, in_state, hints[b])
                         if by_stay else bases[r, b])
                    chances[j - head, b] = _separate(risks, k, outer[r, b] * ways.memory[e, r],
                                                     memo, e, r, b)
                    flow[n, r, b] += now[e, b] * chances[j - head, b]
            # each pattern of the split events: the product of their chances or complements
            split, n_split = ways.split_ptr[e], ways.split_ptr[e + 1] - ways.split_ptr[e]
            for pattern in range(1 << n_split):
                for b in range(B):
                    factor = 1.0
                    for s in range(n_split):
                        chance = chances[ways.split[split + s], b]
                        factor *= chance if pattern >> s & 1 else 1.0 - chance
                    patterns[pattern, b] = factor
            for q in range(ways.entry_ptr[e], ways.entry_ptr[e + 1]):
                to, way, pattern = ways.target[q], ways.way[q], ways.pattern[q]
                for b in range(B):
                    after[to, b] += now[e, b] * (chances_of_ways[way, b] * patterns[pattern, b])
        now, after = after, now
        _collapse(now, ways.state, trace, n + 1)
    return -1, 0, 0, 0.0


@njit(cache=True, nogil=True, _nrt=False)
def _collapse(now, state, trace, n):
    """trace[:, n] = the shares `now` (E, b) summed over the copies of each model state."""
    trace[:, n, :] = 0.0
    for e in range(now.shape[0]):
        for b in range(now.shape[1]):
            trace[b, n, state[e]] += now[e, b]


@njit(cache=True, nogil=True, _nrt=False, inline="always")
def _empty(now, e):
    """True when no patient has a share in expanded state e."""
    for b in range(now.shape[1]):
        if now[e, b] != 0.0:
            return False
    return True


@njit(cache=True, nogil=True, _nrt=False, inline="always")
def _separate(risks, k, m, memo, e, r, b):
    """The separate rule's chance of base value k under multiplier m: the base value where
    m is 1, else `separate_one`, a function of m L alone, kept in `memo` for the last m L
    of each expanded state, risk and patient."""
    if m == 1.0:
        return risks.values[k]
    weight = m * risks.logs[k]
    if weight != memo[0, e, r, b]:
        memo[0, e, r, b], memo[1, e, r, b] = weight, separate_one(risks.logs[k], m)
    return memo[1, e, r, b]
