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
from matplotlib import colormaps
from matplotlib.colors import ListedColormap
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
            ax.scatter(part.incremental_qalys, part.incremental_costs, s=12,
                       marker=style["marker"], facecolors="none", edgecolors=style["color"],
                       linewidths=0.7, alpha=0.7,
                       label=wrapped(f"{strategies.get(name, name)}: PSA draws", 36))
            if name in base.index:
                effect = base.loc[name, ("mean", "incremental_qalys")]
                cost = base.loc[name, ("mean", "incremental_costs")]
                ax.errorbar(effect, cost, fmt=style["marker"], markersize=8,
                            markerfacecolor=style["color"], markeredgecolor=INK, ecolor=INK,
                            elinewidth=0.9, capsize=3,
                            xerr=[[effect - base.loc[name, ("lower", "incremental_qalys")]],
                                  [base.loc[name, ("upper", "incremental_qalys")] - effect]],
                            yerr=[[cost - base.loc[name, ("lower", "incremental_costs")]],
                                  [base.loc[name, ("upper", "incremental_costs")] - cost]],
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
                         strategies: Labels, currency: str,
                         column: str = "probability_best") -> Figure:
    """The probability that each strategy has the highest net monetary benefit over the
    threshold range (table `acceptability`; `column` probability_best_noise_removed for
    the curve without the inner patients' noise), with the acceptability frontier: at each
    threshold, the strategy with the highest expected net monetary benefit."""
    with house_style():
        figure = new_figure(6.4, 3.8)
        ax = figure.subplots()
        frontier = acceptability[acceptability.on_acceptability_frontier].sort_values("threshold")
        ax.plot(frontier.threshold, frontier[column], color="#bdbdbd", linewidth=7,
                solid_capstyle="butt", label="acceptability frontier (highest expected NMB)")
        for k, name in enumerate(ordered(acceptability.strategy)):
            style = series_style(k)
            rows = acceptability[acceptability.strategy == name].sort_values("threshold")
            ax.plot(rows.threshold, rows[column], color=style["color"],
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
    (table `evpi`); with its population_evpi, the population's scale on the right (the
    same curve: population EVPI is EVPI times the discounted patients reached)."""
    with house_style():
        figure = new_figure(6.4, 3.2)
        ax = figure.subplots()
        rows = evpi.sort_values("threshold")
        ax.plot(rows.threshold, rows.evpi, color=TONES[0], linewidth=1.6, label="EVPI per patient")
        value_axes(ax, threshold, currency, f"EVPI per patient ({currency})")
        population_axis(ax, rows, "evpi", f"population EVPI (millions of {currency})")
        ax.legend(loc="best")
    return figure


def value_axes(ax, threshold: float, currency: str, label: str) -> None:
    """The axes of a value of information over the threshold range: the threshold
    marked, values from 0, both axes in thousands."""
    ax.axvline(threshold, color=INK, linestyle=(0, (4, 3)), linewidth=0.8,
               label=f"threshold {threshold:,.0f}")
    ax.set_ylim(bottom=0)
    ax.set_xlabel(f"willingness to pay ({currency} per QALY)")
    ax.set_ylabel(label)
    thousands(ax.xaxis)
    thousands(ax.yaxis)


def population_axis(ax, rows: pd.DataFrame, column: str, label: str) -> None:
    """A right-hand axis in population terms when the table has population_<column>."""
    if f"population_{column}" not in rows or not (rows[column] > 0).any():
        return
    positive = rows[rows[column] > 0]
    people = float((positive[f"population_{column}"] / positive[column]).iloc[0])
    right = ax.secondary_yaxis("right", functions=(lambda y: y * people / 1e6,
                                                   lambda y: y * 1e6 / people))
    right.set_ylabel(label)


def evppi_figure(evppi: pd.DataFrame, threshold: float, currency: str) -> Figure:
    """EVPPI per patient of each parameter group over the threshold range (table `evppi`),
    under the EVPI of the same draws (their upper bound), with the threshold marked."""
    with house_style():
        figure = new_figure(6.4, 3.6)
        ax = figure.subplots()
        groups = ordered(evppi.group)
        first = evppi[evppi.group == groups[0]].sort_values("threshold")
        ax.plot(first.threshold, first.evpi, color=INK, linewidth=2.2,
                label="EVPI (all parameters, from the draws)")
        for k, group in enumerate(groups):
            style, rows = series_style(k + 1), evppi[evppi.group == group].sort_values("threshold")
            ax.plot(rows.threshold, rows.evppi, color=style["color"],
                    linestyle=style["linestyle"], linewidth=1.5, label=wrapped(group, 40))
        value_axes(ax, threshold, currency, f"value per patient ({currency})")
        population_axis(ax, first, "evppi", f"population value (millions of {currency})")
        figure.legend(loc="outside lower center", ncols=2)
    return figure


def inmost_points(lines, x: np.ndarray, y: np.ndarray) -> list[tuple[float, float]]:
    """For each contour line, its point farthest from the grid's edges (in axis fractions),
    where its label is read whole rather than cut by the frame; a line that stays within
    EDGE of a corner gets none (the colour bar still gives its value)."""
    span = np.array([x.max() - x.min(), y.max() - y.min()])
    span[span == 0] = 1.0
    points = []
    for segments in lines.allsegs:
        vertices = [v for segment in segments for v in segment]
        if not vertices:
            continue
        share = (np.array(vertices) - [x.min(), y.min()]) / span
        inside = np.minimum(share, 1.0 - share).min(axis=1)
        if inside.max() >= EDGE:
            points.append(tuple(vertices[int(np.argmax(inside))]))
    return points


EDGE = 0.06  # axis fraction a contour label needs from the frame to be read whole


def two_way_figure(two_way: pd.DataFrame, strategies: Labels, measure_label: str,
                   unit: str) -> Figure:
    """The two-way grid (table `two_way`), one panel per strategy: the measure as filled
    contours in light greys (lighter is higher, so the order survives greyscale printing and
    the ink stays readable) with labelled contour lines (negative ones dashed), the zero
    line drawn heavy (where the strategy breaks even), the base case marked."""
    shades = ListedColormap(colormaps["Greys"](np.linspace(0.55, 0.05, 256)))
    names = ordered(two_way.strategy)
    with house_style():
        figure = new_figure(6.6, 4.2 * len(names) + 0.4)
        axes = panels(figure, len(names), columns=1)
        for ax, name in zip(axes, names):
            rows = two_way[two_way.strategy == name]
            grid = rows.pivot(index="second_value", columns="first_value", values="result")
            x, y, z = grid.columns.to_numpy(), grid.index.to_numpy(), grid.to_numpy()
            filled = ax.contourf(x, y, z, levels=10, cmap=shades)
            lines = ax.contour(x, y, z, levels=filled.levels, colors=INK, linewidths=0.5)
            ax.clabel(lines, fontsize=6.5, manual=inmost_points(lines, x, y),
                      fmt=lambda v: f"{v:,.0f}" if unit != "QALYs" else f"{v:.3g}")
            if z.min() < 0 < z.max():
                ax.contour(x, y, z, levels=[0.0], colors=INK, linewidths=2.2)
            # the base value of a parameter: the one whose whole line is at base
            at = [next(v for v, line in rows.groupby(column) if line.at_base.all())
                  for column in ("first_value", "second_value")]
            ax.plot(*at, marker="o", markersize=7, markerfacecolor="white",
                    markeredgecolor=INK, linestyle="none", label="base case")
            ax.set_xlabel(rows.first_parameter.iloc[0])
            ax.set_ylabel(rows.second_parameter.iloc[0])
            ax.grid(False)
            against = rows.compared_with.iloc[0]
            title = strategies.get(name, name) + (
                f" against {strategies.get(against, against)}" if isinstance(against, str) else "")
            ax.set_title(wrapped(title, 70))
            bar = figure.colorbar(filled, ax=ax)
            bar.set_label(f"{measure_label} ({unit})")
            if unit != "QALYs":
                thousands(bar.ax.yaxis)
        handles = [Line2D([], [], color=INK, linewidth=2.2, label="0: break-even"),
                   *axes[0].get_legend_handles_labels()[0]]
        figure.legend(handles=handles, loc="outside lower center", ncols=2)
    return figure


def break_even_figure(curve: pd.DataFrame, found: pd.DataFrame, strategies: Labels,
                      measure_label: str, unit: str) -> Figure:
    """Break-even values (tables `break_even_curve` and `break_even`), one panel per
    strategy and parameter: the measure over the parameter's range (with ±1.96 SE where
    simulated), the zero line, each crossing with its 95% interval, the base value dotted."""
    keys = ordered(zip(curve.strategy, curve.parameter))
    with house_style():
        figure = new_figure(6.4, 2.9 * len(keys) + 0.6)
        axes = panels(figure, len(keys), columns=1)
        for ax, (name, parameter) in zip(axes, keys):
            rows = curve[(curve.strategy == name) & (curve.parameter == parameter)]
            roots = found[(found.strategy == name) & (found.parameter == parameter)]
            banded(ax, rows.value, rows.result, rows.result, rows.se.fillna(0.0),
                   series_style(0), measure_label)
            ax.axhline(0, color=INK, linewidth=0.8)
            ax.axvline(float(roots.base.iloc[0]), color=INK, linestyle=(0, (1, 2)),
                       linewidth=0.9, label="base value")
            for row in roots[roots.crossing > 0].itertuples():
                if np.isfinite(row.se):
                    ax.axvspan(row.lower, row.upper, color=TONES[1], alpha=BAND_ALPHA,
                               linewidth=0)
                ax.plot([row.value], [0.0], marker="D", markersize=7, color=TONES[1],
                        markeredgecolor=INK, linestyle="none",
                        label=f"break-even {row.value:,.4g}")
            against = roots.compared_with.iloc[0]
            title = f"{strategies.get(name, name)}" + (
                f" against {strategies.get(against, against)}" if isinstance(against, str) else "")
            ax.set_title(wrapped(f"{title}: {parameter}", 70))
            ax.set_xlabel(parameter)
            ax.set_ylabel(f"{measure_label}\n({unit})")
            if unit != "QALYs":
                thousands(ax.yaxis)
            ax.legend(loc="best")
    return figure


def budget_figure(budget: pd.DataFrame, strategies: Labels, currency: str) -> Figure:
    """The payer's yearly cost of each strategy (table `budget_impact`), as bars by calendar
    year told apart by hatching as well as tone, and below it each strategy's difference
    from the comparator (with 95% Monte-Carlo intervals where simulated)."""
    names = ordered(budget.strategy)
    years = np.array(sorted(set(budget.year)))
    width = 0.8 / len(names)
    hatches = ("", "///", "...", "xx", "\\\\", "++")
    others = [n for n in names if (budget[budget.strategy == n].impact.abs() > 0).any()]
    with house_style():
        figure = new_figure(6.6, 6.4 if others else 3.6)
        axes = figure.subplots(2 if others else 1, 1, squeeze=False)[:, 0]
        for k, name in enumerate(names):
            rows = budget[budget.strategy == name].sort_values("year")
            style = series_style(k)
            axes[0].bar(years + (k - (len(names) - 1) / 2) * width, rows.cost / 1e6, width,
                        color=style["color"], edgecolor=INK, linewidth=0.5,
                        hatch=hatches[k % len(hatches)], label=wrapped(strategies.get(name, name), 40))
        # labels wrapped to a panel's height: a long currency name ran past the figure
        axes[0].set_ylabel(wrapped(f"cost to the payer (millions of {currency}, "
                                   "undiscounted)", 30))
        axes[0].set_xticks(years)
        axes[0].set_xlabel("calendar year")
        if others:
            step = 0.8 / len(others)
            for k, name in enumerate(others):
                rows = budget[budget.strategy == name].sort_values("year")
                style = series_style(names.index(name))
                errors = Z95 * rows.impact_se.to_numpy() / 1e6 if rows.impact_se.notna().any() else None
                axes[1].bar(years + (k - (len(others) - 1) / 2) * step, rows.impact / 1e6, step,
                            yerr=errors, capsize=2, color=style["color"], edgecolor=INK,
                            linewidth=0.5, hatch=hatches[names.index(name) % len(hatches)],
                            ecolor=INK)
            against = budget.compared_with.dropna().iloc[0]
            axes[1].axhline(0, color=INK, linewidth=0.8)
            axes[1].set_ylabel(wrapped(f"budget impact against {strategies.get(against, against)} "
                                       f"(millions of {currency})", 30))
            axes[1].set_xticks(years)
            axes[1].set_xlabel("calendar year")
        figure.legend(handles=axes[0].get_legend_handles_labels()[0], loc="outside lower center",
                      ncols=min(3, len(names)))
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
