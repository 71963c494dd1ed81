"""The report's figures, one function each: result tables in, a matplotlib Figure out.

Every function reads tidy tables exactly as a run writes them (see `microsim.workflow`
and `microsim.uncertainty.one_way`) and draws one series per strategy, state or parameter
it finds there, so a figure can be checked against its table. Monte-Carlo intervals are
mean +- 1.96 standard errors (normal approximation, common practice).
"""
from __future__ import annotations

import math
from typing import Mapping

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import StrMethodFormatter

from microsim.report.style import (BAND_ALPHA, INK, TONES, Z95, house_style, new_figure,
                                   series_style, wrapped)

Labels = Mapping[str, str]  # name -> what a reader sees (a strategy's or a state's label)


def ordered(column: pd.Series) -> list:
    """Distinct values in the order the table gives them."""
    return list(dict.fromkeys(column))


def panels(figure: Figure, count: int, columns: int = 2, **shared):
    """A grid of `count` axes (the unused ones removed), row by row."""
    columns = max(1, min(columns, count))
    rows = math.ceil(count / columns)
    grid = figure.subplots(rows, columns, squeeze=False, **shared)
    for spare in grid.flat[count:]:
        spare.remove()
    return list(grid.flat[:count])


def thousands(axis) -> None:
    """Money on an axis with thousands separators."""
    axis.set_major_formatter(StrMethodFormatter("{x:,.0f}"))


def banded(ax, time, simulated, analytic, se, style: dict, label: str) -> None:
    """One series: simulated line within its +-1.96 SE band, the analytic counterpart as a
    thin ink line on top."""
    time, simulated, se = (np.asarray(v, float) for v in (time, simulated, se))
    ax.fill_between(time, simulated - Z95 * se, simulated + Z95 * se, color=style["color"],
                    alpha=BAND_ALPHA, linewidth=0)
    ax.plot(time, simulated, color=style["color"], linestyle=style["linestyle"], linewidth=1.6,
            label=label)
    ax.plot(time, analytic, color=INK, linewidth=0.7)


def counterpart_keys(kind: str) -> list:
    return [Line2D([], [], color=INK, linewidth=0.7, label="analytic counterpart"),
            Patch(color=TONES[0], alpha=BAND_ALPHA, label=f"simulated {kind} ± 1.96 SE")]


def trace_figure(shares: pd.DataFrame, strategies: Labels, states: Labels,
                 time_unit: str) -> Figure:
    """State shares over time, one panel per strategy (table `validation_shares`)."""
    names, state_names = ordered(shares.strategy), ordered(shares.state)
    with house_style():
        figure = new_figure(7.2, 2.7 * math.ceil(len(names) / 2) + 0.8)
        axes = panels(figure, len(names), sharex=True, sharey=True)
        for ax, name in zip(axes, names):
            part = shares[shares.strategy == name]
            for k, state in enumerate(state_names):
                rows = part[part.state == state].sort_values("time")
                banded(ax, rows.time, rows.simulated, rows.analytic, rows.se, series_style(k),
                       states.get(state, state))
            ax.set_title(wrapped(strategies.get(name, name), 48))
            ax.set_ylim(-0.02, 1.02)
            ax.set_xlabel(f"time ({time_unit})")
            ax.set_ylabel("share of patients")
        handles = axes[0].get_legend_handles_labels()[0] + counterpart_keys("share")
        figure.legend(handles=handles, loc="outside lower center", ncols=3)
    return figure


def survival_figure(survival: pd.DataFrame, strategies: Labels, time_unit: str) -> Figure:
    """The share not yet absorbed, every strategy on one axes (table `validation_survival`)."""
    with house_style():
        figure = new_figure(6.0, 3.6)
        ax = figure.subplots()
        for k, name in enumerate(ordered(survival.strategy)):
            rows = survival[survival.strategy == name].sort_values("time")
            banded(ax, rows.time, rows.simulated, rows.analytic, rows.se, series_style(k),
                   wrapped(strategies.get(name, name), 40))
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel(f"time ({time_unit})")
        ax.set_ylabel("share not yet absorbed")
        handles = ax.get_legend_handles_labels()[0] + counterpart_keys("share")
        figure.legend(handles=handles, loc="outside lower center", ncols=2)
    return figure


def ce_plane_figure(plane: pd.DataFrame, increments: pd.DataFrame, threshold: float,
                    comparator: str, strategies: Labels, currency: str) -> Figure:
    """PSA draws of incremental QALYs and costs against the comparator (table `ce_plane`),
    the base case with its 95% CI (table `increments`) and the threshold line."""
    base = increments.pivot(index="strategy", columns="measure")
    with house_style():
        figure = new_figure(6.4, 4.4)
        ax = figure.subplots()
        for k, name in enumerate(ordered(plane.strategy)):
            style, part = series_style(k), plane[plane.strategy == name]
            ax.scatter(part.incremental_effect, part.incremental_cost, s=12,
                       marker=style["marker"], facecolors="none", edgecolors=style["color"],
                       linewidths=0.7, alpha=0.7,
                       label=wrapped(f"{strategies.get(name, name)}: PSA draws", 36))
            if name in base.index:
                effect = base.loc[name, ("mean", "incremental_effect")]
                cost = base.loc[name, ("mean", "incremental_cost")]
                ax.errorbar(effect, cost, fmt=style["marker"], markersize=8,
                            markerfacecolor=style["color"], markeredgecolor=INK, ecolor=INK,
                            elinewidth=0.9, capsize=3,
                            xerr=[[effect - base.loc[name, ("lower", "incremental_effect")]],
                                  [base.loc[name, ("upper", "incremental_effect")] - effect]],
                            yerr=[[cost - base.loc[name, ("lower", "incremental_cost")]],
                                  [base.loc[name, ("upper", "incremental_cost")] - cost]],
                            label=wrapped(f"{strategies.get(name, name)}: base case (95% CI)", 36))
        ax.axhline(0, color=INK, linewidth=0.6)
        ax.axvline(0, color=INK, linewidth=0.6)
        left, right = ax.get_xlim()
        ax.plot([left, right], [threshold * left, threshold * right], color=INK,
                linestyle=(0, (4, 3)), linewidth=0.9,
                label=f"threshold: {threshold:,.0f} {currency} per QALY")
        ax.set_xlim(left, right)
        against = strategies.get(comparator, comparator)
        ax.set_xlabel(f"incremental QALYs (discounted) against {against}")
        ax.set_ylabel(f"incremental costs ({currency}, discounted)")
        thousands(ax.yaxis)
        figure.legend(loc="outside lower center", ncols=2)
    return figure


def acceptability_figure(acceptability: pd.DataFrame, threshold: float,
                         strategies: Labels, currency: str) -> Figure:
    """The probability that each strategy has the highest net monetary benefit over the
    threshold range (table `acceptability`), with the acceptability frontier: at each
    threshold, the strategy with the highest expected net monetary benefit."""
    with house_style():
        figure = new_figure(6.4, 3.8)
        ax = figure.subplots()
        frontier = acceptability[acceptability.on_frontier].sort_values("threshold")
        ax.plot(frontier.threshold, frontier.probability_best, color="#bdbdbd", linewidth=7,
                solid_capstyle="butt", label="acceptability frontier (highest expected NMB)")
        for k, name in enumerate(ordered(acceptability.strategy)):
            style = series_style(k)
            rows = acceptability[acceptability.strategy == name].sort_values("threshold")
            ax.plot(rows.threshold, rows.probability_best, color=style["color"],
                    linestyle=style["linestyle"], linewidth=1.5,
                    label=wrapped(strategies.get(name, name), 40))
        ax.axvline(threshold, color=INK, linestyle=(0, (4, 3)), linewidth=0.8,
                   label=f"threshold {threshold:,.0f}")
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel(f"willingness to pay ({currency} per QALY)")
        ax.set_ylabel("probability of the highest NMB")
        thousands(ax.xaxis)
        figure.legend(loc="outside lower center", ncols=2)
    return figure


def evpi_figure(evpi: pd.DataFrame, threshold: float, currency: str) -> Figure:
    """The expected value of perfect information per patient over the threshold range
    (table `evpi`)."""
    with house_style():
        figure = new_figure(6.4, 3.2)
        ax = figure.subplots()
        rows = evpi.sort_values("threshold")
        ax.plot(rows.threshold, rows.evpi, color=TONES[0], linewidth=1.6, label="EVPI per patient")
        ax.axvline(threshold, color=INK, linestyle=(0, (4, 3)), linewidth=0.8,
                   label=f"threshold {threshold:,.0f}")
        ax.set_ylim(bottom=0)
        ax.set_xlabel(f"willingness to pay ({currency} per QALY)")
        ax.set_ylabel(f"EVPI per patient ({currency})")
        thousands(ax.xaxis)
        thousands(ax.yaxis)
        ax.legend(loc="best")
    return figure


def tornado_figure(one_way: pd.DataFrame, strategies: Labels, measure_label: str,
                   unit: str) -> Figure:
    """One-way sensitivity (table `one_way`), one panel per strategy: for each parameter a
    bar from the result at its low value to the result at its high value, widest on top,
    with 95% Monte-Carlo intervals at the bar ends where the settings were simulated."""
    names = ordered(one_way.strategy)
    tallest = one_way.groupby("strategy").size().max()
    with house_style():
        figure = new_figure(6.8, (0.38 * tallest + 1.0) * len(names) + 0.6)
        axes = panels(figure, len(names), columns=1)
        for ax, name in zip(axes, names):
            rows = one_way[one_way.strategy == name].sort_values("swing", kind="stable")
            y = np.arange(len(rows))
            base = float(rows.result_base.iloc[0])
            ax.barh(y, rows.result_low - base, left=base, height=0.6, color="#c9c9c9",
                    edgecolor=INK, linewidth=0.5, label="parameter at its low value")
            ax.barh(y, rows.result_high - base, left=base, height=0.6, color=TONES[0],
                    edgecolor=INK, linewidth=0.5, label="parameter at its high value")
            simulated = rows.se_base.notna().any()
            if simulated:
                ends = np.concatenate([rows.result_low, rows.result_high])
                errors = Z95 * np.concatenate([rows.se_low, rows.se_high])
                ax.errorbar(ends, np.concatenate([y, y]), xerr=errors, fmt="none", ecolor=INK,
                            elinewidth=0.8, capsize=2.5, label="95% Monte-Carlo interval")
            ax.axvline(base, color=INK, linewidth=0.8)
            ax.set_yticks(y, [f"{r.parameter}  ({r.low:g} to {r.high:g})"
                              for r in rows.itertuples()])
            ax.grid(axis="y", visible=False)
            against = rows.compared_with.iloc[0]
            title = strategies.get(name, name) + (
                f" against {strategies.get(against, against)}" if isinstance(against, str) else "")
            ax.set_title(wrapped(title, 70))
            ax.set_xlabel(f"{measure_label} ({unit})")
            if unit != "QALYs":
                thousands(ax.xaxis)
        figure.legend(handles=axes[0].get_legend_handles_labels()[0], loc="outside lower center",
                      ncols=3)
    return figure


def subgroup_figure(subgroups: pd.DataFrame, strategies: Labels, currency: str) -> Figure:
    """Incremental net monetary benefit with its 95% CI per subgroup level and strategy
    (table `subgroups`), one row per attribute level."""
    levels = ordered(zip(subgroups.attribute, subgroups.level))
    names = ordered(subgroups.strategy)
    step = 0.7 / max(len(names), 1)
    with house_style():
        figure = new_figure(6.8, 0.34 * len(levels) * max(1, len(names) / 2) + 1.4)
        ax = figure.subplots()
        row = {level: i for i, level in enumerate(reversed(levels))}
        for k, name in enumerate(names):
            style, part = series_style(k), subgroups[subgroups.strategy == name]
            y = [row[(a, l)] + (len(names) - 1) / 2 * step - k * step
                 for a, l in zip(part.attribute, part.level)]
            ax.errorbar(part.incremental_nmb, y, xerr=Z95 * part.se.to_numpy(),
                        fmt=style["marker"], color=style["color"], markersize=5, capsize=2,
                        elinewidth=1, label=wrapped(strategies.get(name, name), 40))
        ax.axvline(0, color=INK, linewidth=0.8)
        ax.set_yticks(list(row.values()), [f"{a}: {l}" for a, l in row])
        ax.grid(axis="y", visible=False)
        ax.set_xlabel(f"incremental net monetary benefit per patient ({currency}), 95% CI")
        thousands(ax.xaxis)
        figure.legend(loc="outside lower center", ncols=2)
    return figure
