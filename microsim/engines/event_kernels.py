"""Compiled loops of the vectorised event engine (numba): the parts of a step that go
patient by patient (each patient's draws, multipliers and change points, the winner of
its round, the outcome), which numpy would do in dozens of calls on small arrays a step.

Draws: `philox_compiled` evaluates the streams' Philox for the (patient, purpose, block)
a round reaches, one block of four occurrences at a time, so they are the numbers the
SimPy event engine reads from `streams.block` and `streams.sequence`, bit for bit.

Floating point: these loops call no exp, log or power, only +, -, *, comparisons, min and
max of float64, each exactly rounded as in numpy, in the order of `event_engine.latent_time`
(numba compiles without fast-math, so nothing is reassociated or contracted): their
numbers are those of the numpy expressions they replace, bit for bit. The logarithm of
the draws and the latent times stay with numpy and the hazard families.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

from microsim.engines.philox_compiled import open_unit, philox_block


class RiskPlans(NamedTuple):
    """What the multipliers read of every risk of the model: the static part (risk,
    patient), the treatment window (per patient) and factors (per risk, where `windowed`),
    and the memory terms, risk r's being term_ptr[r] .. term_ptr[r + 1] - 1: a count's
    multipliers (`counted`) are tables[table_ptr[t] .. table_ptr[t + 1] - 1], the last
    kept past the end, and a `within` term multiplies by its factor while now < the
    tracked name's last occurrence + within."""
    static: np.ndarray
    on: np.ndarray
    off: np.ndarray
    windowed: np.ndarray
    on_factor: np.ndarray
    off_factor: np.ndarray
    term_ptr: np.ndarray
    counted: np.ndarray
    tracked: np.ndarray
    within: np.ndarray
    factor: np.ndarray
    table_ptr: np.ndarray
    tables: np.ndarray


@njit(cache=True, nogil=True)
def draws(seed, keys, slots, ids, rows, rounds, cached, blocks):
    """The uniforms (slot, patient) of the patients `rows` for their next round in a state
    whose risks' purpose keys are keys[slots]: occurrence k of each stream
    (`streams.uniforms`), k the patient's count of rounds there, which this advances.
    `blocks` (patient, key, 4) holds each patient's Philox block of occurrences
    4 c .. 4 c + 3 of each key, c = cached[patient, key] (-1: none yet), and a round that
    needs another block makes it. The keys are those of every copy of the state (treatment
    phases), whose rounds continue one count, so a copy's first round may fall anywhere in
    a block and a key may skip blocks."""
    u = np.empty((slots.size, rows.size))
    words = np.empty(4, np.uint64)
    for p in range(rows.size):
        b = rows[p]
        k = rounds[b]
        rounds[b] = k + 1
        block, lane = k // 4, k % 4
        for j in range(slots.size):
            s = slots[j]
            if cached[b, s] != block:
                philox_block(ids[b], np.uint64(block), seed, keys[s], words)
                for w in range(4):
                    blocks[b, s, w] = open_unit(words[w])
                cached[b, s] = block
            u[j, p] = blocks[b, s, lane]
    return u


@njit(cache=True, nogil=True)
def multipliers(risks, rows, now, end, plans, counts, last):
    """For the patients `rows` of one state at times `now`: each of its `risks`'
    multiplier (risk, patient), where a treatment window makes it 0 (the risk is off),
    and the state's next change point (each patient's `end` at the latest: the horizon,
    or a wait's deadline):
    `event_engine.latent_time`'s multiplier and change point, term by term, in its order."""
    m = np.empty((risks.size, rows.size))
    is_off = np.zeros((risks.size, rows.size), np.bool_)
    change = np.empty(rows.size)
    for p in range(rows.size):
        b, t = rows[p], now[p]
        bound = end[p]
        for j in range(risks.size):
            r = risks[j]
            value = plans.static[r, b]
            if plans.windowed[r]:
                on, off = plans.on[b], plans.off[b]
                if on <= t < off:
                    value *= plans.on_factor[r]
                    bound = min(bound, off)
                else:
                    value *= plans.off_factor[r]
                    if t < on:
                        bound = min(bound, on)
                is_off[j, p] = value == 0.0
            for term in range(plans.term_ptr[r], plans.term_ptr[r + 1]):
                index = plans.tracked[term]
                if plans.counted[term]:
                    first, stop = plans.table_ptr[term], plans.table_ptr[term + 1]
                    value *= plans.tables[min(first + counts[index, b], stop - 1)]
                else:
                    ends = last[index, b] + plans.within[term]
                    if t < ends:  # a nan (no occurrence yet) is never after
                        value *= plans.factor[term]
                        if not is_off[j, p]:
                            bound = min(bound, ends)
            m[j, p] = value
        change[p] = bound
    return m, is_off, change


@njit(cache=True, nogil=True)
def _fmin(a, b):
    """numpy.fmin: the smaller, a nan only where both are."""
    return b if a != a or b < a else a


@njit(cache=True, nogil=True)
def _fmax(a, b):
    """numpy.fmax: the larger, a nan only where both are."""
    return b if a != a or b > a else a


@njit(cache=True, nogil=True)
def choose(times, now, change, tie):
    """Each patient's earliest latent time (times: position among its state's risks,
    patient; the first of equal times wins and a nan never does, as the event engine's
    `dt < best`), that position, and whether its round is a near-tie: two latent times,
    or the earliest and the change point, within `tie` relative."""
    width, n = times.shape
    best = np.empty(n)
    first = np.zeros(n, np.int64)
    close = np.zeros(n, np.bool_)
    for p in range(n):
        soonest, runner_up = _fmin(times[0, p], np.inf), np.inf
        for j in range(1, width):
            t = times[j, p]
            if t < soonest:
                first[p] = j
            runner_up = _fmin(runner_up, _fmax(soonest, t))
            soonest = _fmin(soonest, t)
        reached = now[p] + soonest
        close[p] = (abs(reached - change[p]) <= tie * change[p]
                    or runner_up - soonest <= tie * reached)
        best[p] = soonest
    return best, first, close


@njit(cache=True, nogil=True)
def settle(live, state_of, first, best, change, now, end, width, risk_at, targets, bumps,
           absorbing, clock, state, entered, counts, last, waiting, delay_to, deadline, delay):
    """Each live patient's round outcome: its winner occurs at now + best if that is before
    the change point (recorded, counted in memory, the state and its entry time moved on;
    entering the `waiting` copies from elsewhere sets the `deadline` `delay` later), or the
    patient's clock moves to the change point (the deadline: a phase change to `delay_to`,
    recorded with risk -1, the entry time kept). Returns the records (patient row, time,
    from, to, risk) and the patients still live: not absorbed, not at the horizon."""
    n = live.size
    who, at = np.empty(n, np.int64), np.empty(n)
    source, target, winner = np.empty(n, np.int16), np.empty(n, np.int16), np.empty(n, np.int32)
    still = np.empty(n, np.int64)
    made = kept = 0
    for p in range(n):
        b = live[p]
        reached = now[p] + best[p]
        if reached < change[p]:
            i = state_of[p]
            r = risk_at[i * width + first[p]]
            to = targets[r]
            who[made], at[made], source[made], target[made], winner[made] = b, reached, i, to, r
            made += 1
            clock[b] = reached
            for index in range(bumps.shape[1]):
                if bumps[r, index]:
                    counts[index, b] += 1
                    last[index, b] = reached
            if to != i:
                if waiting[to] and not waiting[i]:
                    deadline[b] = reached + delay
                state[b], entered[b] = to, reached
            if not absorbing[to]:
                still[kept] = b
                kept += 1
        else:
            clock[b] = change[p]
            if change[p] < end:
                i = state_of[p]
                if waiting[i] and change[p] == deadline[b]:  # the wait ends: treatment
                    to = delay_to[i]
                    who[made], at[made], source[made], target[made] = b, change[p], i, to
                    winner[made] = -1
                    made += 1
                    state[b] = to
                still[kept] = b
                kept += 1
    return (who[:made], at[:made], source[:made], target[:made], winner[:made]), still[:kept]
