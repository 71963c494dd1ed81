"""The report: one self-contained HTML file made from a finished run folder.

It reads the folder's tables and documents by name (`RunFolder`), draws each figure whose
data are there (and says in a line why any other is left out), fills the one template, and
writes `report.html` and `figures/` (SVG and PNG) into the folder atomically: everything is
made first, then moved in.
"""
from __future__ import annotations

import base64
import os
import shutil
import tempfile
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Callable

import jinja2

from microsim import CAUTION
from microsim.decision.measures import MEASURES as SENSITIVITY_MEASURES
from microsim.report import figures, tables
from microsim.report.folder import RunFolder
from microsim.report.structure import structure_figure
from microsim.report.style import rendered
from microsim.report.tables import (CI95, Column, interval, nonnegative_interval,
                                    normal_interval, number, percent, whole)
from microsim.report.words import decision, psa_tables
from microsim.uncertainty.evppi import cap_words

REPORT = "report.html"
FIGURES = "figures"
NO_PSA = "This run has no PSA; \u201cmicrosim run FILE --psa\u201d adds it."
AS_WRITTEN = {"as written": "The model as written"}  # the one "strategy" without strategies
NO_STRATEGIES = "The scenario defines no strategies, so there is nothing to compare."


@dataclass(frozen=True)
class Drawn:
    """A figure for the page: its file name, heading, caption and the image itself."""
    name: str
    title: str
    caption: str
    files: dict[str, bytes]

    @property
    def source(self) -> str:
        return "data:image/svg+xml;base64," + base64.b64encode(self.files["svg"]).decode("ascii")


@dataclass(frozen=True)
class Absent:
    name: str
    title: str
    reason: str


class Report:
    """What the template shows, gathered from one run folder."""

    def __init__(self, run: RunFolder):
        self.run, self.summary = run, run.summary
        self.scenario, self.scenario_note = run.scenario()
        s = self.scenario
        strategies = s.strategies if s else ()
        self.strategy_labels = {**AS_WRITTEN, **{x.name: x.label for x in strategies}}
        self.state_labels = {x.name: x.label for x in s.states} if s else {}
        for strategy in strategies:
            self.state_labels.update({x.name: x.label for x in strategy.states})
        self.currency = self.summary.get("currency") or (
            s.economics.currency if s else "money units")
        self.time_unit = s.time.unit if s else "time units"
        self.threshold = self.summary.get("threshold", s.economics.threshold if s else None)
        self.figures: list[Drawn | Absent] = []
        self.comparator = self.label(self.summary.get("comparator", ""))

    def label(self, name: str) -> str:
        return self.strategy_labels.get(name, name)

    def figure(self, name: str, title: str, caption: str,
               draw: Callable[[], object] | None, reason: str = "") -> None:
        """Draw a figure, or record in a line why it is left out."""
        if draw is None:
            self.figures.append(Absent(name, title, reason))
            return
        figure = draw()
        self.figures.append(Drawn(name, title, caption, rendered(figure)))

    def placed(self, *names: str) -> list[Drawn | Absent]:
        """The figures `names` in order; neighbours left out for one reason share a line."""
        found: list[Drawn | Absent] = []
        for f in (f for f in self.figures if f.name in names):
            last = found[-1] if found else None
            if isinstance(f, Absent) and isinstance(last, Absent) and last.reason == f.reason:
                f = Absent(f"{last.name} {f.name}", f"{last.title}; {f.title}", f.reason)
                found.pop()
            found.append(f)
        return found

    # --------------------------------------------------------------------- figures

    def draw_all(self) -> None:
        run, s = self.run, self.summary
        strategies = "comparator" in s
        shares, survival = run.table("validation_shares"), run.table("validation_survival")
        approximate = (" Where there is no exact counterpart (see the verdicts), the thin line "
                       "is a Markov approximation, for orientation only."
                       if any(v["agrees"] is None for v in s["validation"].values()) else "")
        self.figure("trace", "State shares over time",
                    "Share of patients in each state: simulated (line, with a band of ±1.96 "
                    "Monte-Carlo SE) over its analytic counterpart (thin dark line), per "
                    "strategy." + approximate,
                    None if shares is None else lambda: figures.trace_figure(
                        shares, self.strategy_labels, self.state_labels, self.time_unit),
                    "This run folder has no validation_shares table.")
        survival_reason = ("This run folder has no validation_survival table (it was written "
                           "before survival was reported); run again to draw it."
                           if survival is None else
                           "The model has no absorbing state, so every patient stays in it.")
        self.figure("survival", "Survival: the share not yet absorbed",
                    "Share of patients not yet in an absorbing state: simulated (line, ±1.96 "
                    "Monte-Carlo SE, exact for independent patients) over its analytic "
                    "counterpart (thin dark line)." + approximate,
                    None if survival is None or survival.empty else lambda: figures.survival_figure(
                        survival, self.strategy_labels, self.time_unit), survival_reason)
        psa_reason = NO_STRATEGIES if not strategies else NO_PSA
        has_psa = strategies and "psa" in s
        self.figure("ce_plane", "Cost-effectiveness plane",
                    f"PSA draws of incremental QALYs and costs against {self.comparator}; "
                    "the base case (this run's patients) with its 95% CI; the dashed line is "
                    "the threshold: points below it are cost-effective.",
                    (lambda: figures.ce_plane_figure(
                        run.table("ce_plane"), run.table("increments"), self.threshold,
                        s["comparator"], self.strategy_labels, self.currency)) if has_psa else None,
                    psa_reason)
        self.figure("acceptability", "Acceptability curves",
                    "Probability that each strategy has the highest net monetary benefit, over "
                    "the threshold range; the wide grey line is the acceptability frontier "
                    "(the strategy with the highest expected net monetary benefit).",
                    (lambda: figures.acceptability_figure(
                        run.table("acceptability"), self.threshold, self.strategy_labels,
                        self.currency)) if has_psa else None, psa_reason)
        exact = has_psa and str(s["psa"].get("basis", "")).startswith("exact")
        acceptability = run.table("acceptability") if has_psa and not exact else None
        self.figure("acceptability_noise_removed",
                    "Acceptability curves without the inner patients' noise",
                    "As above, after each draw's incremental net benefit is moved towards the "
                    "mean by sqrt(between / (between + within / n)), the variance split of "
                    "O'Hagan, Stevenson & Madan (2007): the curve the parameters' uncertainty "
                    "alone would give (constrained Bayes, Louis 1984).",
                    (lambda: figures.acceptability_figure(
                        acceptability, self.threshold, self.strategy_labels, self.currency,
                        column="probability_best_noise_removed"))
                    if acceptability is not None
                    and "probability_best_noise_removed" in acceptability
                    and acceptability.probability_best_noise_removed.notna().any() else None,
                    psa_reason if not has_psa else "The PSA is on the exact basis: its draws "
                    "carry no inner noise to take out." if exact else "The PSA's draws carry no within-draw "
                    "variances (one inner patient each, or written by an older microsim).")
        evpi = run.table("evpi") if has_psa else None
        self.figure("evpi", "Expected value of perfect information",
                    "EVPI per patient over the threshold range" + (
                        "; the right-hand scale is the population EVPI (EVPI times the "
                        "discounted number of patients the decision reaches)."
                        if evpi is not None and "population_evpi" in evpi else "."),
                    (lambda: figures.evpi_figure(evpi, self.threshold, self.currency))
                    if has_psa else None, psa_reason)
        evppi = run.table("evppi") if has_psa else None
        self.figure("evppi", "Expected value of partial perfect information",
                    "EVPPI per patient of each group of parameters (regression on the PSA "
                    "sample, Strong, Oakley & Brennan 2014) under the EVPI of the same draws, "
                    "its upper bound.",
                    (lambda: figures.evppi_figure(evppi, self.threshold, self.currency))
                    if evppi is not None else None,
                    psa_reason if not has_psa else "No parameter groups were named; "
                    "uncertainty.evppi (or --evppi) names them.")
        one_way = self.one_way()
        self.figure("tornado", "One-way sensitivity (tornado)",
                    "Each parameter from its low to its high value, the others at base, widest "
                    "swing on top; the vertical line is the base case.",
                    None if one_way is None else lambda: figures.tornado_figure(
                        one_way, self.strategy_labels, self.sensitivity_label(one_way),
                        self.sensitivity_unit(one_way)),
                    "No one-way sensitivity in this run; \u201cmicrosim run FILE "
                    "--sensitivity\u201d includes it.")
        two_way = run.table("two_way")
        self.figure("two_way", "Two-way sensitivity",
                    "Two parameters varied together over their ranges, the others at base: "
                    "the measure in shades (lighter is higher) with labelled contours; the "
                    "heavy line is 0, where the strategy breaks even; the circle is the base "
                    "case.",
                    None if two_way is None else lambda: figures.two_way_figure(
                        two_way, self.strategy_labels, self.sensitivity_label(two_way),
                        self.sensitivity_unit(two_way)),
                    "No two-way sensitivity in this run; sensitivity.two_way (or --two-way) "
                    "with \u201cmicrosim run FILE --sensitivity\u201d includes it.")
        curve, found = run.table("break_even_curve"), run.table("break_even")
        self.figure("break_even", "Break-even values",
                    "The measure as one parameter runs over its range, the others at base; "
                    "each diamond is where it crosses 0 (with its 95% Monte-Carlo interval "
                    "shaded where simulated); the dotted line is the base value.",
                    None if curve is None or found is None else lambda: figures.break_even_figure(
                        curve, found, self.strategy_labels, self.sensitivity_label(found),
                        self.sensitivity_unit(found)),
                    "No break-even analysis in this run; sensitivity.break_even (or "
                    "--break-even) with \u201cmicrosim run FILE --sensitivity\u201d includes it.")
        budget = run.table("budget_impact")
        self.figure("budget", "Budget impact",
                    "The payer's cost of each strategy in each calendar year for the stated "
                    "population, undiscounted, and below it the difference from the comparator.",
                    None if budget is None else lambda: figures.budget_figure(
                        budget, self.strategy_labels, self.currency),
                    "No budget impact in this run; economics.budget_years with "
                    "\u201cmicrosim run FILE --budget\u201d includes it.")
        subgroups = run.table("subgroups")
        self.figure("subgroups", "Incremental net monetary benefit by subgroup",
                    f"Per subgroup level and strategy against {self.comparator}, "
                    "mean with its 95% CI (±1.96 Monte-Carlo SE).",
                    (lambda: figures.subgroup_figure(subgroups, self.strategy_labels,
                                                     self.currency))
                    if strategies and subgroups is not None and len(subgroups) else None,
                    NO_STRATEGIES if not strategies else "The patients carry no attribute to "
                                                         "form subgroups by.")
        self.figure("structure", "The model's structure",
                    "States and transitions as the scenario gives them (base-case values).",
                    (lambda: structure_figure(self.scenario)) if self.scenario else None,
                    f"It needs the scenario, and {self.scenario_note}.")

    def one_way(self):
        """The one-way table, when it names its strategy and measure (an older microsim
        wrote it without them)."""
        table = self.run.table("one_way")
        wanted = {"strategy", "measure", "compared_with", "se_low", "se_high", "se_base"}
        return table if table is not None and wanted <= set(table.columns) else None

    def sensitivity_label(self, one_way) -> str:
        return SENSITIVITY_MEASURES.get(one_way.measure.iloc[0], one_way.measure.iloc[0])

    def sensitivity_unit(self, one_way) -> str:
        return "QALYs" if one_way.measure.iloc[0].endswith("qalys") else self.currency

    # ---------------------------------------------------------------------- tables

    def decision_tables(self) -> list[tables.Table]:
        run, cur = self.run, self.currency
        if "comparator" not in self.summary:
            return []
        money = f"({cur})"
        return [
            tables.by_strategy(
                "strategies", run.table("strategies"),
                ["costs_discounted", "qalys_discounted", "life_years"],
                Column("", ("mean", "se"), normal_interval), self.strategy_labels,
                f"Per strategy: mean per patient ({CI95}: ±1.96 Monte-Carlo SE); costs in {cur}"),
            tables.by_strategy(
                "increments", run.table("increments"),
                ["incremental_costs", "incremental_qalys", "incremental_nmb"],
                Column("", ("mean", "lower", "upper"), interval), self.strategy_labels,
                f"Against {self.comparator} on the same patients: mean "
                f"per patient ({CI95}, paired); money in {cur}"),
            tables.table("incremental_analysis", run.table("incremental_analysis"), [
                Column("strategy", ("strategy",), self.label),
                Column(f"costs, discounted {money}", ("costs_discounted",), number),
                Column("QALYs, discounted", ("qalys_discounted",), number),
                Column("status", ("status", "dominated_by"),
                       lambda s, by: s if tables.missing(by) else f"{s} by {by}"),
                Column("compared with", ("compared_with",),
                       lambda c: "–" if tables.missing(c) else self.label(c)),
                Column(f"incremental costs {money}", ("incremental_costs",), number),
                Column("incremental QALYs", ("incremental_qalys",), number),
                Column(f"ICER ({cur} per QALY)", ("icer",), number)],
                "Incremental analysis: dominance and ICERs along the frontier"),
            tables.table("net_benefit", run.table("net_benefit"), [
                Column("strategy", ("strategy",), self.label),
                Column(f"net monetary benefit {money}", ("nmb",), number),
                Column("net health benefit (QALYs)", ("nhb",), number),
                Column("highest", ("best",), lambda b: "yes" if b else "")],
                f"Net benefit per patient at {number(self.threshold)} {cur} per QALY"),
        ]

    def subgroup_tables(self) -> list[tables.Table]:
        run, money = self.run, f"({self.currency})"
        if "comparator" not in self.summary:
            return []
        return [
            tables.table("subgroups", run.table("subgroups"), [
                Column("attribute", ("attribute",)), Column("level", ("level",)),
                Column("strategy", ("strategy",), self.label),
                Column("patients", ("patients",), whole),
                Column(f"incremental NMB {money}, {CI95}", ("incremental_nmb", "se"),
                       normal_interval),
                Column("verdict", ("verdict",))],
                f"Incremental net monetary benefit by subgroup ({CI95}: ±1.96 Monte-Carlo SE)"),
            tables.table("precision", run.table("precision"), [
                Column("strategy", ("strategy",), self.label),
                Column(f"target half-width {money}", ("target_half_width",), number),
                Column(f"SD of paired NMB {money}", ("sd_paired_nmb",), number),
                Column("patients now", ("patients_now",), whole),
                Column("patients needed", ("patients_needed",), whole)],
                f"Patients needed for a {CI95} of incremental NMB of the target half-width "
                "(without economics.precision: the estimate's own size, i.e. until its sign "
                "is clear)"),
        ]

    def uncertainty_tables(self) -> list[tables.Table]:
        run, cur, found = self.run, self.currency, []
        if "psa" in self.summary and "comparator" in self.summary:
            at = run.table("acceptability")
            near = at.loc[(at.threshold - self.threshold).abs().idxmin(), "threshold"]
            noise = "probability_best_noise_removed" in at and not str(
                self.summary["psa"].get("basis", "")).startswith("exact")
            found.append(tables.table("acceptability", at[at.threshold == near], [
                Column("strategy", ("strategy",), self.label),
                Column("probability highest NMB", ("probability_best",), percent),
                *([Column("without the inner patients' noise",
                          ("probability_best_noise_removed",), percent)] if noise else []),
                Column(f"expected NMB ({cur})", ("expected_nmb",), number),
                Column("on the frontier", ("on_acceptability_frontier",), lambda b: "yes" if b else "")],
                f"PSA at {number(near)} {cur} per QALY",
                "Without the inner patients' noise: each draw's incremental net benefit moved "
                "towards the mean by sqrt(between / (between + within / n)) (O'Hagan, "
                "Stevenson & Madan 2007; Louis 1984)." if noise else ""))
            evpi = run.table("evpi")
            population = "population_evpi" in evpi
            found.append(tables.table("evpi", evpi[evpi.threshold == near], [
                Column(f"threshold ({cur} per QALY)", ("threshold",), number),
                Column(f"EVPI per patient ({cur})", ("evpi",), number),
                *([Column(f"population EVPI ({cur})", ("population_evpi",), number)]
                  if population else [])],
                "Expected value of perfect information",
                f"Population: {self.summary['psa'].get('population', '')}." if population else ""))
            evppi = run.table("evppi")
            if evppi is not None:
                found.append(tables.table("evppi", evppi[evppi.threshold == near], [
                    Column("parameters", ("group",)),
                    Column(f"EVPPI per patient ({cur}), {CI95}", ("evppi", "se"),
                           nonnegative_interval),
                    Column(f"EVPI per patient ({cur})", ("evpi",), number),
                    *([Column(f"population EVPPI ({cur})", ("population_evppi",), number)]
                      if "population_evppi" in evppi else []),
                    Column("regression", ("method",))],
                    f"Expected value of partial perfect information at {number(near)} {cur} "
                    "per QALY (Strong, Oakley & Brennan 2014)",
                    cap_words(evppi, cur, simulated=not str(self.summary["psa"].get(
                        "basis", "")).startswith("exact")) or ""))
            variance = run.table("psa_variance")
            if variance is not None:
                found.append(tables.table("psa_variance", variance, [
                    Column("strategy", ("strategy",), self.label),
                    Column("draws", ("draws",), whole),
                    Column("patients per draw", ("patients_per_draw",), whole),
                    Column(f"mean incremental NMB ({cur})", ("mean_incremental_nmb",), number),
                    Column("between-draw variance", ("between_draw_variance",), number),
                    Column("within-draw variance", ("within_draw_variance",), number),
                    Column("suggested draws", ("suggested_draws",), whole),
                    Column("suggested patients per draw", ("suggested_patients_per_draw",), whole)],
                    "Inner and outer samples (O'Hagan, Stevenson & Madan 2007)"))
        one_way = self.one_way()
        if one_way is not None:
            found.append(tables.table("one_way", one_way, [
                Column("strategy", ("strategy",), self.label),
                Column("parameter", ("parameter",)),
                Column("low to high", ("low", "high"), lambda lo, hi: f"{lo:g} to {hi:g}"),
                Column("result at low", ("result_low", "se_low"), normal_interval),
                Column("result at high", ("result_high", "se_high"), normal_interval),
                Column("base case", ("result_base",), number),
                Column("swing", ("swing", "se_swing"), nonnegative_interval)
                if "se_swing" in one_way.columns else Column("swing", ("swing",), number)],
                f"One-way sensitivity of {self.sensitivity_label(one_way)} "
                f"({self.sensitivity_unit(one_way)}; {CI95} where simulated)"))
        two_way = run.table("two_way")
        if two_way is not None:
            for name in dict.fromkeys(two_way.strategy):
                part = two_way[two_way.strategy == name]
                first, second = part.first_parameter.iloc[0], part.second_parameter.iloc[0]
                found.append(tables.grid(
                    "two_way", part, "first_value", "second_value",
                    Column("", ("result", "se"), normal_interval),
                    f"Two-way sensitivity of {self.sensitivity_label(two_way)} of "
                    f"{self.label(name)} ({self.sensitivity_unit(two_way)}; {CI95} where "
                    f"simulated): rows {first}, columns {second}", f"{first} \\ {second}"))
        found_even = run.table("break_even")
        if found_even is not None:
            found.append(tables.table("break_even", found_even, [
                Column("strategy", ("strategy",), self.label),
                Column("parameter", ("parameter",)),
                Column("range", ("low", "high"), lambda lo, hi: f"{lo:g} to {hi:g}"),
                Column(f"break-even value ({CI95} where simulated)", ("value", "se"),
                       normal_interval),
                Column("finding", ("finding",))],
                f"Break-even values: where {self.sensitivity_label(found_even)} crosses 0"))
        return found

    def budget_tables(self) -> list[tables.Table]:
        run, cur = self.run, self.currency
        impact = run.table("budget_impact")
        if impact is None:
            return []
        return [tables.table("budget_impact", impact, [
            Column("year", ("year",), whole),
            Column("strategy", ("strategy",), self.label),
            Column("new patients", ("new_patients",), number),
            Column("patients entered", ("patients_entered",), number),
            Column(f"cost ({cur}, {CI95} where simulated)", ("cost", "se"), normal_interval),
            Column(f"impact against the comparator ({cur})", ("impact", "impact_se"),
                   normal_interval)],
            f"Budget impact: each strategy's cost to the payer by calendar year, "
            f"undiscounted ({cur})",
            "The patients already there and each year's new patients enter at the start of "
            "their year; each costs the model's own cost by year since entry "
            f"({impact.basis.iloc[0]}). Sullivan et al. 2014.")]

    def validation_tables(self) -> list[tables.Table]:
        run = self.run
        return [
            tables.table("validation_outcomes", run.table("validation_outcomes"), [
                Column("strategy", ("strategy",), self.label),
                Column("measure", ("measure",), lambda m: tables.MEASURES.get(m, m)),
                Column(f"simulated ({CI95})", ("simulated", "se"), normal_interval),
                Column("analytic", ("analytic",), number),
                Column("z", ("z",), number), Column("p-value", ("p_value",), number),
                Column("test", ("test",))],
                f"Outcomes per patient, simulated against the analytic counterpart "
                f"(costs in {self.currency})"),
            tables.table("average_patient", run.table("average_patient"), [
                Column("strategy", ("strategy",), self.label),
                Column("measure", ("measure",), lambda m: tables.MEASURES.get(m, m)),
                Column("population", ("population",), number),
                Column("average patient", ("average_patient",), number),
                Column("difference", ("difference",), number),
                Column("relative", ("relative_difference",), percent),
                Column("basis", ("basis",))],
                "The 'average patient' cohort (everyone given the mean attributes) against "
                "the population"),
        ]

    # ------------------------------------------------------------------- the page

    def context(self) -> dict:
        s, scenario = self.summary, self.scenario
        return {
            "title": s.get("scenario") or (scenario.title if scenario else "microsim run"),
            "description": scenario.description.strip() if scenario else "",
            "provenance": s.get("provenance", ""), "caution": CAUTION,
            "scenario_note": self.scenario_note, "manifest": self.run.manifest,
            "summary": s, "currency": self.currency, "time_unit": self.time_unit,
            "psa_basis": s.get("psa", {}).get("basis"), "psa_tables": psa_tables(s),
            "strategy_labels": self.strategy_labels,
            "decision": decision(s, self.strategy_labels),
            "decision_tables": self.decision_tables(),
            "subgroup_tables": self.subgroup_tables(),
            "uncertainty_tables": self.uncertainty_tables(),
            "budget_tables": self.budget_tables(),
            "validation_tables": self.validation_tables(),
            "placed": self.placed, "libraries": library_versions(),
        }


def library_versions() -> dict[str, str]:
    return {name: metadata.version(name) for name in ("matplotlib", "jinja2", "networkx")}


def render(context: dict) -> str:
    environment = jinja2.Environment(
        loader=jinja2.PackageLoader("microsim.report", "templates"),
        autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True,
        lstrip_blocks=True)
    return environment.get_template("report.html.j2").render(context)


def publish(folder: Path, drawn: list[Drawn], html: str, page: str = REPORT) -> Path:
    """Write figures/ and the page (report.html, or a fit's fit.html) into the folder: all
    made in a hidden staging folder first, then moved in (the old figures/ goes, so no
    figure of an earlier page stays)."""
    staging = Path(tempfile.mkdtemp(prefix=".report-", dir=folder))
    try:
        made = staging / FIGURES
        made.mkdir()
        for figure in drawn:
            for fmt, data in figure.files.items():
                (made / f"{figure.name}.{fmt}").write_bytes(data)
        (staging / page).write_text(html, encoding="utf-8")
        if (folder / FIGURES).is_dir():
            os.replace(folder / FIGURES, staging / "previous")
        os.replace(made, folder / FIGURES)
        os.replace(staging / page, folder / page)
        return folder / page
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def build_report(folder: Path) -> Path:
    """Make `report.html` (and `figures/`) in a run folder; refuse a folder that is not one."""
    report = Report(RunFolder.open(folder))
    report.draw_all()
    html = render(report.context())
    return publish(Path(folder), [f for f in report.figures if isinstance(f, Drawn)], html)
