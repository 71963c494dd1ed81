"""Expected value of partial perfect information (EVPPI) from the PSA sample by
nonparametric regression (Strong, Oakley & Brennan 2014, "Estimating multiparameter partial
expected value of perfect information from a probabilistic sensitivity analysis sample: a
nonparametric regression approach", Medical Decision Making 34:311-326).

For a group of parameters phi, EVPPI = E_phi[max_k E(NB_k | phi)] - max_k E(NB_k). Each
draw's net benefit is a noisy observation of E(NB_k | phi) at the draw's phi, so a smoother
of NB on phi over the draws estimates it, and

    EVPPI ~ mean_d max_k g_k(phi_d) - max_k mean_d g_k(phi_d),

g_k the fitted values (`microsim.uncertainty.smoothing`). Only differences between
strategies matter, so the incremental net benefit against the comparator is fitted (the
comparator's is 0). Net benefit is lambda x effect - cost and a conditional expectation is
linear, so E(INB | phi) = lambda E(dE | phi) - E(dC | phi): the incremental effects and costs
are each fitted once, and every threshold reads the same two fits.

The inner patients' Monte-Carlo noise in each draw is noise around the regression, which
the smoother averages out, so unlike the EVPI straight from the draws it does not inflate
the estimate (beyond the small upward bias that any estimation noise gives a maximum).

Standard error: two independent parts, added as variances. The regression's: the wild
bootstrap of the residuals with Rademacher weights, the same weight for a draw's cost and
effect residuals (Wu 1986, "Jackknife, bootstrap and other resampling methods in regression
analysis", Annals of Statistics 14:1261-1295; Mammen 1993, "Bootstrap and wild bootstrap
for high dimensional linear models", Annals of Statistics 21:255-285), each fit's smoothing
held where GCV chose it. The draws': the sample variance over draws of
max_k g_k - g_k* (k* the strategy best on average) over the number of draws, the standard
error of a mean (common practice).

EVPPI cannot exceed EVPI (perfect information on some parameters is worth no more than on
all of them; common practice), but an estimate can, by regression error or by few draws:
the table shows it capped at the EVPI of the same draws, and `above_evpi` says by how much
the estimate exceeded it (0 where it did not), so a cap is seen rather than hidden.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from microsim import streams
from microsim.decision import economics
from microsim.uncertainty.smoothing import Smoother, smoothing_words

REPLICATES = 200  # wild-bootstrap replicates of the regression's error
PURPOSE = "evppi:wild-bootstrap"


@dataclass(frozen=True)
class Partial:
    """EVPPI of one group at each threshold, its standard error, and the fits' effective
    degrees of freedom (incremental effects, then costs, per strategy)."""
    evppi: np.ndarray
    se: np.ndarray
    edf: tuple[float, ...]


def expected_maximum(gain: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """EVPPI and its draws' part of the variance from fitted incremental net benefits
    (L thresholds, D draws, K - 1 strategies), the comparator's 0 added."""
    nb = np.concatenate([np.zeros(gain.shape[:2] + (1,)), gain], axis=2)
    regret = economics.regret(nb)
    return regret.mean(axis=1), regret.var(axis=1, ddof=1) / nb.shape[1]


def partial_value(inputs: np.ndarray, incremental_effects: np.ndarray,
                  incremental_costs: np.ndarray, thresholds: np.ndarray, seed: int,
                  replicates: int = REPLICATES) -> Partial:
    """EVPPI of the group whose draws are `inputs` (D, d), from each draw's incremental
    effects and costs (D, K - 1) against the comparator, at each threshold."""
    smoother = Smoother(inputs)
    lam = np.asarray(thresholds, dtype=float)[:, None, None]
    fits = [(smoother.fit(e), smoother.fit(c))
            for e, c in zip(incremental_effects.T, incremental_costs.T)]
    effect = np.stack([f.fitted for f, _ in fits], axis=1)
    cost = np.stack([f.fitted for _, f in fits], axis=1)
    value, draws_variance = expected_maximum(lam * effect[None] - cost[None])
    n_draws = len(inputs)
    signs = streams.uniforms(seed, np.arange(n_draws * replicates), PURPOSE)
    signs = signs.reshape(n_draws, replicates)
    signs = np.where(signs < 0.5, -1.0, 1.0)  # one Rademacher weight per draw and replicate
    shifts = [(fe.smooth(signs * (e - fe.fitted)[:, None]),
               fc.smooth(signs * (c - fc.fitted)[:, None]))
              for (fe, fc), e, c in zip(fits, incremental_effects.T, incremental_costs.T)]
    again = np.empty((replicates, len(lam)))
    for b in range(replicates):
        e_b = effect + np.stack([s[0][:, b] for s in shifts], axis=1)
        c_b = cost + np.stack([s[1][:, b] for s in shifts], axis=1)
        again[b] = expected_maximum(lam * e_b[None] - c_b[None])[0]
    se = np.sqrt(draws_variance + again.var(axis=0, ddof=1))
    return Partial(value, se, tuple(f.edf for pair in fits for f in pair))


def fit_words(strategies, edf: tuple[float, ...]) -> str:
    """Each fit's effective degrees of freedom in words: 'drug: QALYs 2.1, costs 3.4'."""
    return "; ".join(f"{name}: QALYs {e:.3g}, costs {c:.3g}"
                     for name, e, c in zip(strategies, edf[0::2], edf[1::2]))


def evppi_table(parameters: pd.DataFrame, results: pd.DataFrame, groups, thresholds,
                comparator: str, seed: int) -> pd.DataFrame:
    """EVPPI per threshold for each group of parameters (names), beside the EVPI of the
    same draws: threshold, group, parameters, evppi, se, evpi, edf (the largest effective
    degrees of freedom of the group's fits, a number), edf_fits (each fit's, in words),
    method, above_evpi (how far the estimate exceeded the EVPI it is capped at).

    `parameters` holds each draw's values (column `draw`, one per parameter), `results`
    each draw's discounted costs and QALYs per strategy (the PSA's tables)."""
    plane = economics.cost_effectiveness_plane(results, comparator)
    order = list(dict.fromkeys(plane.strategy))
    gains = {m: plane.pivot(index="draw", columns="strategy", values=f"incremental_{m}")
             .reindex(columns=order) for m in ("qalys", "costs")}
    values = parameters.set_index("draw").loc[gains["qalys"].index]
    lam = np.asarray(thresholds, dtype=float)
    evpi = economics.per_person_evpi(results, lam)["evpi"].to_numpy()
    frames = []
    for group in groups:
        found = partial_value(values[list(group)].to_numpy(dtype=float),
                              gains["qalys"].to_numpy(), gains["costs"].to_numpy(), lam, seed)
        capped = np.minimum(found.evppi, evpi)
        frames.append(pd.DataFrame({
            "threshold": lam, "group": " + ".join(group), "parameters": len(group),
            "evppi": capped, "se": found.se, "evpi": evpi, "above_evpi": found.evppi - capped,
            "edf": max(found.edf), "edf_fits": fit_words(order, found.edf),
            "method": smoothing_words(len(group))}))
    table = pd.concat(frames, ignore_index=True)
    for column in ("group", "edf_fits", "method"):
        table[column] = table[column].astype("string")
    return table


def cap_words(table: pd.DataFrame, currency: str, simulated: bool) -> str | None:
    """A sentence for the rows whose estimate exceeded the EVPI it is capped at, or None;
    on simulated draws it adds that the EVPI itself holds the inner patients' noise."""
    if "above_evpi" not in table:  # a run folder written before the cap
        return None
    over = table[table.above_evpi > 0]
    if not len(over):
        return None
    worst = over.loc[over.above_evpi.idxmax()]
    return (f"EVPPI capped at EVPI in {len(over)} of {len(table)} rows (an estimate above "
            f"its bound is estimation error; by at most {worst.above_evpi:.4g} {currency} "
            f"per patient, for {worst.group} at threshold {worst.threshold:g}); more PSA "
            "draws narrow it." + (
                " On simulated draws the EVPI also holds the inner patients' noise, which "
                "makes it an upper estimate itself, so the bound is loose; more patients per "
                "draw, or the exact basis where the model has one, tighten both."
                if simulated else ""))
