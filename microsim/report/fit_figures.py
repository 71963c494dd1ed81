"""The figures of a fit, one function each: the tables `microsim fit` writes in, a matplotlib
Figure out, in the report's house style.

- `survival_figure`: the Kaplan-Meier curve with its 95% band beside each family's fitted
  survival (averaged over the data's patients; the family's better form by AIC), out to the
  extrapolation horizon;
- `hazard_figure`: the same families' hazards over that horizon, where families that agree
  within the data part;
- `check_figure`: the chosen fit against the scenario written from it, simulated (with its
  band of +-1.96 binomial standard errors) and its analytic counterpart.
A dotted line marks the end of the longest follow-up in each.
"""
from __future__ import annotations

import pandas as pd
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from microsim.report.style import (BAND_ALPHA, GRID, INK, TONES, Z95, house_style, new_figure,
                                   series_style)

KM_WASH = "#bdbdbd"


def best_forms(models: pd.DataFrame) -> pd.DataFrame:
    """The best converged form of each family, in the models' rank order."""
    converged = models[models.converged.astype(bool)]
    return converged.drop_duplicates("family", keep="first")


def kaplan_meier_steps(ax, km: pd.DataFrame) -> None:
    ax.fill_between(km.time, km.lower, km.upper, step="post", color=KM_WASH, alpha=0.5,
                    linewidth=0, label="Kaplan-Meier 95% band (log-log)")
    ax.step(km.time, km.survival, where="post", color=INK, linewidth=1.3, label="Kaplan-Meier")


def end_of_data(ax, end: float) -> None:
    ax.axvline(end, color=INK, linestyle=(0, (1, 2)), linewidth=0.8)
    ax.annotate("end of follow-up", (end, 1.0), xycoords=("data", "axes fraction"),
                xytext=(3, -10), textcoords="offset points", fontsize=7, color=INK)


def family_lines(ax, curves: pd.DataFrame, models: pd.DataFrame, column: str) -> None:
    for i, row in enumerate(best_forms(models).itertuples()):
        part = curves[(curves.family == row.family) & (curves.form == row.form)]
        style = series_style(i)
        ax.plot(part.time, part[column], color=style["color"], linestyle=style["linestyle"],
                linewidth=1.4, label=row.label)


def survival_figure(km: pd.DataFrame, curves: pd.DataFrame, models: pd.DataFrame,
                    unit: str, end: float) -> Figure:
    with house_style():
        figure = new_figure(7.0, 4.2)
        ax = figure.subplots()
        kaplan_meier_steps(ax, km)
        family_lines(ax, curves, models, "survival")
        end_of_data(ax, end)
        ax.set(xlabel=f"time ({unit})", ylabel="share without the event", ylim=(0, 1.02),
               xlim=(0, float(curves.time.max())))
        ax.legend(loc="upper right")
    return figure


def hazard_figure(curves: pd.DataFrame, models: pd.DataFrame, unit: str, end: float) -> Figure:
    with house_style():
        figure = new_figure(7.0, 4.2)
        ax = figure.subplots()
        family_lines(ax, curves[curves.time > 0], models, "hazard")
        end_of_data(ax, end)
        ax.set(xlabel=f"time ({unit})", ylabel=f"hazard (per {unit.rstrip('s')})",
               xlim=(0, float(curves.time.max())))
        ax.set_ylim(bottom=0)
        ax.legend(loc="upper right")
    return figure


def check_figure(km: pd.DataFrame, check: pd.DataFrame, label: str, unit: str,
                 end: float) -> Figure:
    with house_style():
        figure = new_figure(7.0, 4.2)
        ax = figure.subplots()
        kaplan_meier_steps(ax, km)
        ax.plot(check.time, check.fitted, color=TONES[1], linewidth=1.6,
                linestyle=(0, (5, 2)), label=f"fitted: {label}")
        ax.fill_between(check.time, check.simulated - Z95 * check.se_fitted,
                        check.simulated + Z95 * check.se_fitted, color=TONES[0],
                        alpha=BAND_ALPHA, linewidth=0)
        ax.plot(check.time, check.simulated, color=TONES[0], linewidth=1.4,
                label="simulated from the written scenario")
        ax.plot(check.time, check.analytic, color=INK, linewidth=0.7,
                label="its analytic counterpart")
        end_of_data(ax, end)
        handles, labels = ax.get_legend_handles_labels()
        handles.append(Patch(color=TONES[0], alpha=BAND_ALPHA))
        labels.append("simulated ± 1.96 SE")
        ax.legend(handles, labels, loc="upper right")
        ax.set(xlabel=f"time ({unit})", ylabel="share without the event", ylim=(0, 1.02),
               xlim=(0, float(check.time.max())))
        ax.grid(color=GRID)
    return figure
