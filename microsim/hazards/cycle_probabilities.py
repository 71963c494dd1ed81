"""Per-cycle probabilities of a state's moves once the hazard multipliers are applied.

Two rules, chosen per scenario (`time.probability_rule`):

- "separate": each move on its own, p' = 1 - (1 - p)^m (common practice; Briggs, Claxton
  & Sculpher 2006, "Decision Modelling for Health Economic Evaluation", ch. 3). The row
  can exceed 1, which the reader refuses before any work.
- "competing": the moves of a row compete through their rates (the standard
  competing-risks combination; Briggs, Claxton & Sculpher 2006, ch. 3; Gidwani & Russell
  2020, "Estimating transition probabilities from published evidence: a tutorial for
  decision modelers", PharmacoEconomics; both from memory). Each p_j is read as the move's
  probability in the absence of the others: r_j = -ln(1 - p_j) / cycle x m_j,
  R = sum r_j, p'_j = (r_j / R)(1 - exp(-R cycle)), and the remainder takes exp(-R cycle).
  A row with one move is the same under both rules, and is computed by the separate rule
  under either.

Both are written with L = -ln(1 - p), the one-cycle cumulative hazard of a base value
(precomputed with `math` once per base value when the model is bound, `BoundRisk.logs`):
the separate rule is 1 - (1 - p)^m = -expm1(-m L), and the competing one needs R = sum of
m_j L_j (the cycle cancels in r_j / R) and 1 - exp(-R) = -expm1(-R). So the per-patient work
is a product, a sum and one `expm1`.

The engines take one patient at a time through `separate_one` and `competing_scale`, which
numba compiles for the compiled cycle engine and whose Python originals (`.py_func`) the
SimPy cycle engine calls: both evaluate `math.expm1`, the C library's, so the two engines
stay bit for bit identical. (numpy's `expm1` may use its own SIMD routine, which can differ
in the last bit.) The cycle matrices take whole arrays through `separate` and `competing`.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from microsim.scenario.fields import TOLERANCE

LIMIT = 1.0 + TOLERANCE  # a row may exceed 1 by rounding, never by more


def log_survival(p: float) -> float:
    """L = -ln(1 - p): the cumulative hazard of one cycle (inf for p = 1, a certain move,
    which the competing rule refuses beside other moves)."""
    return -math.log1p(-p) if p < 1.0 else math.inf


def separate(log, m):
    """A per-cycle probability under multiplier m: 1 - (1 - p)^m = -expm1(-m L). (Where
    m is 1 the callers keep the file's p itself, which this gives only to the last bit.)"""
    return -np.expm1(-(m * log))


@njit(cache=True, nogil=True)
def separate_one(log, m):
    """`separate` for one patient: 1 - (1 - p)^m = -expm1(-m L) by the C library."""
    return -math.expm1(-(m * log))


@njit(cache=True, nogil=True)
def competing_scale(total):
    """(1 - exp(-R)) / R of the competing rule for one patient (0 when R is 0): p'_j is
    L_j m_j times this, with R = sum of L_j m_j added in the row's order."""
    return -math.expm1(-total) / (total + (total == 0))


def competing(row) -> list:
    """The competing-risks probabilities p'_j of a row's moves, given as (p_j, L_j, m_j)
    (see the module docstring), as numpy scalars or arrays. When every weight L_j m_j is 0
    nothing can happen and every p'_j is 0."""
    weights = [log * m for _, log, m in row]
    total = weights[0]
    for weight in weights[1:]:
        total = total + weight
    scale = -np.expm1(-total) / (total + (total == 0))
    return [weight * scale for weight in weights]


def overflow(row: str, total: float, who: str, cycle: int) -> RuntimeError:
    """The error for a row that sums above 1 in a run (`who`: which patient): a bug, since
    the reader and the PSA draw checks refuse every row that could."""
    return RuntimeError(f"{row}: the per-cycle probabilities of {who} sum to {total!r} at "
                        f"cycle {cycle}, above 1; the scenario checks should have refused "
                        "this row (a bug in microsim)")
