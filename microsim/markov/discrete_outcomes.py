"""Expected discounted outcomes of a discrete cohort trace, with within-cycle correction.

The outcome is the integral over [0, n c] of f(t) = pi(t) v D(t), where v holds the value
per time unit in each state (a cost, a utility, or 1 for life years) and D(t) = (1 + d)^-t
the discount factor for an effective rate d per time unit. The trace gives f only at the
cycle points t_k = k c, so the integral is a weighted sum of them; the weights depend on
the correction (Elbasha & Chhatwal 2016, "Theoretical foundations and practical
applications of within-cycle correction methods", Med Decis Making 36(1):115-131), and
the discount factor is applied to the integrand at each point, as in that paper:

- "none": each cycle counted at its start, c (f_0 + ... + f_{n-1});
- "half-cycle": as "none" minus half of the first cycle, c (f_0/2 + f_1 + ... + f_{n-1})
  (the traditional correction, Sonnenberg & Beck 1993, "Markov models in medical decision
  making: a practical guide"); it differs from "trapezoidal" only by the final c f_n / 2,
  so the two agree when the cohort has left all valued states by the horizon;
- "trapezoidal": c (f_0/2 + f_1 + ... + f_{n-1} + f_n/2);
- "simpson": Simpson's 1/3 rule, c/3 (f_0 + 4 f_1 + 2 f_2 + ... + 4 f_{n-1} + f_n), which
  needs an even number of cycles.

One-off values (transition costs, disutilities) are counted at the end of the cycle in
which they happen: discount D(t_{k+1}) for cycle k.
"""
from __future__ import annotations

from typing import Literal

import numpy as np

from .checks import as_stochastic

Correction = Literal["none", "half-cycle", "trapezoidal", "simpson"]
CORRECTIONS = ("none", "half-cycle", "trapezoidal", "simpson")


def discount_factors(times, discount: float) -> np.ndarray:
    """(1 + d)^-t for an effective discount rate d per time unit."""
    if discount <= -1:
        raise ValueError(f"discount rate must be > -1, got {discount}")
    return (1.0 + discount) ** -np.asarray(times, dtype=float)


def _rule(n_cycles: int, correction: str) -> np.ndarray:
    """Quadrature weights, in cycles, for the n_cycles + 1 trace rows."""
    if correction not in CORRECTIONS:
        raise ValueError(f"correction must be one of {CORRECTIONS}, got {correction!r}")
    if correction == "simpson" and n_cycles % 2:
        raise ValueError(f"Simpson's rule needs an even number of cycles, got {n_cycles}: "
                         "use 'trapezoidal' or a horizon of an even number of cycles")
    weights = np.ones(n_cycles + 1)
    if n_cycles == 0:
        return weights * 0.0
    if correction == "simpson":
        weights[1::2], weights[2:-1:2] = 4.0, 2.0
        return weights / 3.0
    weights[0] = 1.0 if correction == "none" else 0.5
    weights[-1] = 0.5 if correction == "trapezoidal" else 0.0
    return weights


def cycle_weights(n_cycles: int, cycle: float, discount: float = 0.0, *,
                  correction: Correction) -> np.ndarray:
    """Weights w_k (time units, discounted) such that the outcome is sum_k w_k pi_k v."""
    if n_cycles < 0 or cycle <= 0:
        raise ValueError("n_cycles must be >= 0 and cycle > 0")
    times = cycle * np.arange(n_cycles + 1)
    return cycle * _rule(n_cycles, correction) * discount_factors(times, discount)


def state_time(trace, cycle: float, discount: float = 0.0, *,
               correction: Correction) -> np.ndarray:
    """Expected discounted time spent in each state over the trace, shape (S,)."""
    trace = np.asarray(trace, dtype=float)
    return cycle_weights(len(trace) - 1, cycle, discount, correction=correction) @ trace


def expected_value(trace, values, cycle: float, discount: float = 0.0, *,
                   correction: Correction) -> float:
    """Expected discounted total of per-time-unit state values over the trace.

    `values` is (S,) or, for values that change over time (e.g. by age), (n_cycles+1, S).
    """
    trace = np.asarray(trace, dtype=float)
    values = np.broadcast_to(np.asarray(values, dtype=float), trace.shape)
    weights = cycle_weights(len(trace) - 1, cycle, discount, correction=correction)
    return float(weights @ np.einsum("ks,ks->k", trace, values))


def _matrices_for(trace: np.ndarray, matrices) -> np.ndarray:
    matrices = as_stochastic(matrices)
    n_cycles, size = len(trace) - 1, trace.shape[1]
    if matrices.ndim == 2:
        matrices = np.broadcast_to(matrices, (n_cycles, size, size))
    if matrices.shape[0] < n_cycles or matrices.shape[1:] != (size, size):
        raise ValueError(f"matrices: expected ({n_cycles}, {size}, {size}), got {matrices.shape}")
    return matrices[:n_cycles]


def transition_counts(trace, matrices) -> np.ndarray:
    """Expected number of i -> j moves in each cycle k: pi_k[i] P_k[i, j], shape (n, S, S)."""
    trace = np.asarray(trace, dtype=float)
    return trace[:-1, :, None] * _matrices_for(trace, matrices)


def one_off_value(trace, amounts, cycle: float, discount: float = 0.0) -> float:
    """Expected discounted total of amounts incurred during cycles, paid at each cycle's end.

    `amounts[i]` (or `amounts[k, i]`) is the expected one-off value in cycle k per person
    in state i at the cycle's start (e.g. sum_j P[i, j] c[i, j], or an event's
    probability times its cost).
    """
    trace = np.asarray(trace, dtype=float)
    n_cycles = len(trace) - 1
    amounts = np.broadcast_to(np.asarray(amounts, dtype=float), (n_cycles, trace.shape[1]))
    ends = discount_factors(cycle * np.arange(1, n_cycles + 1), discount)
    return float(ends @ np.einsum("ks,ks->k", trace[:-1], amounts))


def transition_value(trace, matrices, one_off, cycle: float, discount: float = 0.0) -> float:
    """Expected discounted total of one-off values c[i, j] per i -> j move (end of cycle)."""
    trace = np.asarray(trace, dtype=float)
    per_state = (_matrices_for(trace, matrices) * np.asarray(one_off, dtype=float)).sum(axis=-1)
    return one_off_value(trace, per_state, cycle, discount)
