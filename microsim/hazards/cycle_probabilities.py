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
  The cycle cancels in r_j / R, and exp(-R cycle) = prod (1 - p_j)^(m_j) exactly, so with
  L_j = -log1p(-p_j) (precomputed with `math` once per base value when the model is bound,
  `BoundRisk.logs`) the per-patient arithmetic is only *, +, / and powers: the same
  operations, in the same order, whether a patient is a Python float (the SimPy engine)
  or an element of an array (the vectorised engine, with `np.float_power`), so the two
  stay bit-identical. A row with one move is the same under both rules, and is computed
  by the separate rule under either.
"""
from __future__ import annotations

import math

from microsim.scenario.fields import TOLERANCE

LIMIT = 1.0 + TOLERANCE  # a row may exceed 1 by rounding, never by more


def log_survival(p: float) -> float:
    """L = -ln(1 - p): the cumulative hazard of one cycle (inf for p = 1, a certain move,
    which the competing rule refuses beside other moves)."""
    return -math.log1p(-p) if p < 1.0 else math.inf


def competing(row, power):
    """The competing-risks probabilities p'_j of a row's moves, given as (p_j, L_j, m_j)
    (see the module docstring): Python floats with `power = pow`, or numpy arrays with
    `power = np.float_power`. When every weight L_j m_j is 0 nothing can happen (the
    product is then exactly 1) and every p'_j is 0."""
    weights = [log * m for _, log, m in row]
    (p, _, m), *others = row
    total, stay = weights[0], power(1.0 - p, m)
    for weight, (p, _, m) in zip(weights[1:], others):
        total = total + weight
        stay = stay * power(1.0 - p, m)
    scale = (1.0 - stay) / (total + (total == 0))
    return [weight * scale for weight in weights]


def overflow(row: str, total: float, who: str, cycle: int) -> RuntimeError:
    """The error for a row that sums above 1 in a run (`who`: which patient): a bug, since
    the reader and the PSA draw checks refuse every row that could."""
    return RuntimeError(f"{row}: the per-cycle probabilities of {who} sum to {total!r} at "
                        f"cycle {cycle}, above 1; the scenario checks should have refused "
                        "this row (a bug in microsim)")
