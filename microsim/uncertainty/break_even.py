"""Threshold (break-even) analysis: the value of one parameter, typically a price, at which
a strategy's measure (by default its incremental net monetary benefit at the willingness to
pay) crosses zero, the other parameters at base.

The measure is the one-way analysis's (`Settings`): on the same generated patients, exact
where the model has an exact counterpart. The parameter's low..high range is scanned on the
grid of the two-way analysis, and every sign change found there is refined by Brent's method
(Brent 1973, "Algorithms for Minimization without Derivatives", ch. 4; scipy.optimize.brentq),
so a measure that crosses zero more than once gives each crossing.

Without an exact counterpart the measure is simulated, but always on the same patients with
the same draws (common random numbers), so it is a deterministic function of the parameter
and Brent's method applies as it stands (it needs only a sign change, not smoothness: where
a change of the parameter moves some patients' histories the function steps, and the root
found is where it changes sign). Its Monte-Carlo uncertainty is that of the patient sample:
by the delta method (common practice; e.g. Casella & Berger 2002, "Statistical Inference",
5.5.4) the root r of f has standard error SE(f(r)) / |f'(r)|, with SE(f(r)) the paired
standard error of the measure at r and f'(r) the secant slope over the scan interval that
holds the root (robust to the steps).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from microsim.scenario.read_sensitivity import grid_values
from microsim.uncertainty.one_way import EXACT, SIMULATED, Settings, as_text

Z95 = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
RELATIVE_TOLERANCE = 1e-10  # of the parameter's range: the root's accuracy
COLUMNS = ["strategy", "measure", "compared_with", "parameter", "low", "high", "base",
           "crossing", "value", "se", "lower", "upper", "result_at_value", "slope", "basis",
           "finding"]
CURVE = ["strategy", "measure", "compared_with", "parameter", "value", "result", "se", "basis"]


def brackets(xs: np.ndarray, fs: np.ndarray) -> list[tuple[int, int]]:
    """Scan intervals (i, i + 1) over which f changes sign, and points (i, i) where it is
    exactly 0, in order."""
    found = []
    for i in range(len(xs)):
        if fs[i] == 0 and (not found or found[-1][1] != i):
            found.append((i, i))
        elif i + 1 < len(xs) and fs[i] * fs[i + 1] < 0:
            found.append((i, i + 1))
    return found


def no_crossing(xs: np.ndarray, fs: np.ndarray, ses: np.ndarray, parameter: str) -> str:
    sign = "positive" if fs[0] > 0 else "negative"
    words = (f"no crossing from {xs[0]:.6g} to {xs[-1]:.6g}: the measure is {sign} over "
             f"the whole range of {parameter}")
    near = int(np.argmin(np.abs(fs)))
    if np.isfinite(ses[near]) and abs(fs[near]) < Z95 * ses[near]:
        words += (f" (but within its 95% Monte-Carlo interval of 0 at {parameter} = "
                  f"{xs[near]:.6g}: more patients may find a crossing)")
    return words


def crossing_words(parameter: str, value: float, slope: float, measure: str) -> str:
    below, above = ("positive", "negative") if slope < 0 else ("negative", "positive")
    words = f"crosses 0 at {parameter} = {value:.6g}: {below} below, {above} above"
    if measure == "incremental_nmb":
        side = "below" if slope < 0 else "above"
        words += f" (the strategy has the higher net monetary benefit {side} it)"
    return words


def break_even(settings: Settings, parameter: str, points: int
               ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Each crossing of zero of the measure as `parameter` runs over its range, per chosen
    strategy (a row saying so where there is none), and the scanned curve for the figure."""
    spec = settings.scenario.parameters[parameter]
    xs = grid_values(spec, points)
    frames, curves = [], []
    for name in settings.chosen:
        scan = [settings.at(name, {parameter: float(x)}) for x in xs]
        fs, ses = np.array([e.value for e in scan]), np.array([e.se for e in scan])
        curves.append(settings.labelled(pd.DataFrame(
            {"parameter": parameter, "value": xs, "result": fs, "se": ses}), name))
        crossings = [crossing(settings, name, parameter, xs, fs, i, j)
                     for i, j in brackets(xs, fs)]
        found = pd.DataFrame(crossings or [{"finding": no_crossing(xs, fs, ses, parameter)}],
                             columns=COLUMNS[7:-2] + ["finding"])
        found["crossing"] = np.arange(1, len(found) + 1) if crossings else 0
        found["basis"] = SIMULATED if np.isfinite(ses).any() else EXACT
        frames.append(settings.labelled(found, name))
    table = pd.concat(frames, ignore_index=True).assign(
        parameter=parameter, low=float(spec.low), high=float(spec.high), base=float(spec.value))
    curve = pd.concat(curves, ignore_index=True)
    curve["basis"] = np.where(curve.se.isna(), EXACT, SIMULATED)
    as_text(table, "strategy", "measure", "compared_with", "parameter", "basis", "finding")
    as_text(curve, "strategy", "measure", "compared_with", "parameter", "basis")
    return table[COLUMNS].astype({"crossing": int}), curve[CURVE]


def crossing(settings: Settings, name, parameter: str, xs: np.ndarray, fs: np.ndarray,
             i: int, j: int) -> dict:
    """The root in scan interval (i, j) (a scan point where i == j), its delta-method SE
    and 95% interval where the measure is simulated."""
    spec = settings.scenario.parameters[parameter]
    tolerance = RELATIVE_TOLERANCE * (spec.high - spec.low)
    root = float(xs[i]) if i == j else brentq(
        lambda x: settings.at(name, {parameter: float(x)}).value, xs[i], xs[j],
        xtol=tolerance, maxiter=200)
    at = settings.at(name, {parameter: root})
    lo, hi = (max(i - 1, 0), min(j + 1, len(xs) - 1)) if i == j else (i, j)
    slope = float((fs[hi] - fs[lo]) / (xs[hi] - xs[lo]))
    se = at.se / abs(slope) if np.isfinite(at.se) and slope != 0 else math.nan
    return {"value": root, "se": se, "lower": root - Z95 * se, "upper": root + Z95 * se,
            "result_at_value": at.value, "slope": slope,
            "finding": crossing_words(parameter, root, slope, settings.measure)}
