"""The page of a fit: one self-contained HTML file (`fit.html`) and its figures, made from
the tables and summary `microsim fit` writes, with the report's style, macros and table
cells (`report.style`, `templates/parts.html.j2`, `report.tables`); `microsim report` makes
it again from a fit's run folder, which holds all of them."""
from __future__ import annotations

import json
from pathlib import Path

import jinja2
import pandas as pd

from microsim import CAUTION
from microsim.report import fit_figures, tables
from microsim.report.builder import FIGURES, Drawn, publish
from microsim.report.folder import MANIFEST, RunFolder
from microsim.report.style import rendered
from microsim.report.tables import Column, whole
from microsim.scenario import ScenarioError

PAGE, SUMMARY = "fit.html", "fit_summary.json"
TABLES = ("fit_models", "fit_parameters", "fit_covariance", "kaplan_meier", "fit_curves",
          "fit_check")


def fixed(x) -> str:
    """Log-likelihoods and information criteria, to two decimals (their differences matter)."""
    return "–" if tables.missing(x) else f"{float(x):,.2f}"


def precise(x) -> str:
    return "–" if tables.missing(x) else f"{float(x):.4g}"


def figures_of(t: dict[str, pd.DataFrame], summary: dict) -> list[Drawn]:
    unit, end = summary["unit"], summary["longest_follow_up"]
    km, curves, models = t["kaplan_meier"], t["fit_curves"], t["fit_models"]
    chosen = summary["chosen"]["label"]
    return [
        Drawn("fit_survival", "The data and each family's fit",
              "Kaplan-Meier curve of the data (step, with its 95% log-log band) and each "
              "family's fitted survival averaged over the data's patients (its better form by "
              "AIC), out to the extrapolation horizon.",
              rendered(fit_figures.survival_figure(km, curves, models, unit, end))),
        Drawn("fit_hazards", "Hazards over the extrapolated horizon",
              "Each family's hazard of the data's patients taken together (the hazard of their "
              "mean survival): families that fit alike within the data can part beyond it.",
              rendered(fit_figures.hazard_figure(curves, models, unit, end))),
        Drawn("fit_check", "The written scenario, simulated",
              f"The chosen fit ({chosen}) against the scenario written from it: simulated "
              f"for {summary['check']['patients']} patients resampled from the data (with "
              "±1.96 binomial SE) and its analytic counterpart, over the Kaplan-Meier curve.",
              rendered(fit_figures.check_figure(km, t["fit_check"], chosen, unit, end))),
    ]


PARAMETER_COLUMNS = [
    Column("parameter", ("parameter",)),
    Column("estimate (SE)", ("estimate", "se"), lambda e, s: f"{precise(e)} ({precise(s)})"),
    Column("95% CI", ("lower", "upper"), lambda lo, hi: f"{precise(lo)} to {precise(hi)}"),
    Column("as the scenario reads it", ("natural", "natural_value", "natural_lower",
                                        "natural_upper"),
           lambda n, v, lo, hi: f"{n} {precise(v)} ({precise(lo)} to {precise(hi)})")]


def models_view(models: pd.DataFrame) -> tables.Table:
    return tables.table("fit_models", models, [
        Column("rank", ("rank",), whole), Column("model", ("label",)),
        Column("parameters", ("parameters",), whole),
        Column("log-likelihood", ("log_likelihood",), fixed),
        Column("AIC", ("aic",), fixed), Column("BIC", ("bic",), fixed),
        Column("AIC above the best", ("delta_aic",), fixed),
        Column("converged", ("converged", "note"), lambda c, n: "yes" if c else f"no: {n}"),
        Column("written", ("chosen",), lambda c: "yes" if c else "")],
        "Every model fitted, ranked by AIC (converged fits first)")


def parameter_views(models: pd.DataFrame, parameters: pd.DataFrame) -> list[tables.Table]:
    """One table per model, in rank order: its estimates on the fit's scale with their
    standard errors (observed information) and 95% Wald intervals."""
    views = []
    for model in models.itertuples():
        mine = parameters[(parameters.family == model.family) & (parameters.form == model.form)]
        written = " (written to the scenario)" if model.chosen else ""
        views.append(tables.table("fit_parameters", mine, PARAMETER_COLUMNS,
                                  f"{model.rank}. {model.label}{written}: log-likelihood "
                                  f"{fixed(model.log_likelihood)}, AIC {fixed(model.aic)}, "
                                  f"BIC {fixed(model.bic)}"))
    return views


def covariance_view(covariance: pd.DataFrame, chosen: dict) -> tables.Table:
    """The written fit's covariance as a matrix, each cell tied to its row of the table (a
    written fit has converged, so it has one)."""
    mine = covariance[(covariance.family == chosen["family"]) & (covariance.form == chosen["form"])]
    names = list(dict.fromkeys(mine.row))
    value = Column("covariance", ("covariance",), precise)
    rows = [[tables.Cell(a)] + [tables.cell("fit_covariance", mine, mine.index[
        (mine.row == a) & (mine.column == b)][0], value) for b in names] for a in names]
    return tables.Table(f"Covariance of the written fit's estimates, {chosen['label']} (the "
                        "inverse observed information; the PSA's multivariate normal)",
                        ["", *names], rows)


def render(context: dict) -> str:
    environment = jinja2.Environment(
        loader=jinja2.PackageLoader("microsim.report", "templates"), autoescape=True,
        undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    return environment.get_template("fit.html.j2").render(context)


def write_fit_page(folder: Path, t: dict[str, pd.DataFrame], summary: dict, block: str
                   ) -> list[Path]:
    """fit.html and figures/ (SVG and PNG) into `folder`, staged and moved in; the paths."""
    drawn = figures_of(t, summary)
    html = render({"summary": summary, "caution": CAUTION, "figures": drawn,
                   "models": models_view(t["fit_models"]),
                   "parameters": parameter_views(t["fit_models"], t["fit_parameters"]),
                   "covariance": covariance_view(t["fit_covariance"], summary["chosen"]),
                   "block": block})
    return [publish(Path(folder), drawn, html, PAGE), Path(folder) / FIGURES]


def rebuild_fit_page(folder: Path) -> Path:
    """fit.html and figures/ made again from a fit's run folder (its tables, fit_summary.json
    and the block it wrote), as `microsim fit` made them; refuse a folder that lacks one."""
    folder = Path(folder)
    summary = json.loads((folder / SUMMARY).read_text())
    summary.setdefault("files", {  # a fit written before its files were named after the data
        "scenario": "fitted_scenario.toml", "block": "fitted_block.toml",
        "patients": "fit_patients.csv" if (folder / "fit_patients.csv").is_file() else None})
    run = RunFolder(folder, summary, json.loads((folder / MANIFEST).read_text()))
    t = {name: run.table(name) for name in TABLES}
    block = folder / summary["files"]["block"]
    for name, found in [*((f"{n}.parquet", t[n] is not None) for n in TABLES),
                        (block.name, block.is_file())]:
        if not found:
            raise ScenarioError(str(folder), f"the fit's run folder has no {name}; run "
                                             "`microsim fit` again")
    return write_fit_page(folder, t, summary, block.read_text())[0]
