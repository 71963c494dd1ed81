"""The decision in plain words, from the run's summary.json.

A paragraph is a list of text and `Key`s; a `Key` is a number (or name) shown on the page
together with its place in summary.json, so the page can be checked against it.
"""
from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from typing import Callable, Mapping

from microsim.present import tables_in_words
from microsim.report.tables import number, percent, whole

@dataclass(frozen=True)
class Key:
    path: str  # where the value is in summary.json: keys and list positions joined by "."
    value: object
    text: str


def lookup(document, path: str):
    for part in path.split("."):
        document = document[int(part)] if isinstance(document, list) else document[part]
    return document


def key(summary: dict, path: str, show: Callable[[object], str] = number) -> Key:
    value = lookup(summary, path)
    return Key(path, value, show(value))


def position(records: list[dict], **match) -> int | None:
    """The index of the first record with these values, or None."""
    return next((i for i, r in enumerate(records) if all(r.get(k) == v for k, v in match.items())),
                None)


def listed(names: list[str]) -> str:
    return ", ".join(names[:-1]) + " and " + names[-1] if len(names) > 1 else "".join(names)


def decision(summary: dict, labels: Mapping[str, str]) -> list[list]:
    """The best strategy at the threshold and its gain, the frontier with its ICERs, who is
    treated, who gains, and what the PSA adds."""
    if "comparator" not in summary:
        return [["The scenario defines no strategies, so there is no decision to report: the "
                 "results below are those of the model as written."]]
    cur, best, comparator = summary["currency"], summary["best_at_threshold"], summary["comparator"]
    name = labels.get
    best_key = key(summary, "best_at_threshold", str)  # its name, tied to summary.json
    labelled = [f"{name(best)} (", best_key, ")"] if name(best, best) != best else [best_key]
    paragraphs = [[
        "At a willingness to pay of ", key(summary, "threshold"), f" {cur} per QALY, the "
        "strategy with the highest expected net monetary benefit is ", *labelled, "."]]
    at = position(summary["increments"], strategy=best, measure="incremental_nmb")
    if at is not None:
        path = f"increments.{at}"
        row = summary["increments"][at]
        paragraphs[0] += [
            f" Against {name(comparator, comparator)} it gains ", key(summary, f"{path}.mean"),
            f" {cur} of net monetary benefit per patient (95% CI ",
            key(summary, f"{path}.lower"), " to ", key(summary, f"{path}.upper"),
            "; Monte-Carlo, paired on the same patients)."]
        if row["lower"] <= 0 <= row["upper"]:
            paragraphs[0].append(" The interval includes 0: with these patients the simulation "
                                 "cannot tell the two apart (see the precision table).")
    elif best == comparator:
        paragraphs[0].append(" No other strategy gains on it at this threshold.")
    paragraphs.append(frontier(summary, labels))
    sequences = summary.get("treated_by_treatment", {})
    treated = [[f"{name(n, n)}: ", key(summary, f"treated.{n}", whole), " of ",
                key(summary, "patients", whole), " patients spend time on "
                + ("one of its treatments" if n in sequences else "its treatment")]
               for n in summary["treated"] if n != comparator]
    if treated:
        paragraphs.append([part for i, parts in enumerate(treated)
                           for part in ([] if i == 0 else ["; "]) + parts] + ["."])
    paragraphs.append(who_gains(summary, labels))
    if "psa" in summary:
        paragraphs.append(uncertainty(summary, labels))
    return paragraphs


def frontier(summary: dict, labels: Mapping[str, str]) -> list:
    cur, name = summary["currency"], labels.get
    parts: list = ["Incremental analysis: "]
    for i, row in enumerate(summary["incremental_analysis"]):
        strategy = name(row["strategy"], row["strategy"])
        path = f"incremental_analysis.{i}"
        if row["status"] == "frontier" and row["compared_with"]:
            other = name(row["compared_with"], row["compared_with"])
            parts += [f"{strategy} against {other} costs ",
                      key(summary, f"{path}.incremental_costs"),
                      f" {cur} more for ", key(summary, f"{path}.incremental_qalys"),
                      " more QALYs, an ICER of ", key(summary, f"{path}.icer"),
                      f" {cur} per QALY. "]
        elif row["status"] == "frontier":
            parts.append(f"{strategy} is the least costly strategy on the frontier. ")
        elif row["status"] == "dominated":
            by = name(row["dominated_by"], row["dominated_by"])
            parts.append(f"{strategy} is dominated by {by}: it costs more and gains no more "
                         "QALYs. ")
        else:
            parts.append(f"{strategy} is extendedly dominated: a mix of "
                         f"{row['dominated_by']} costs less and gains more QALYs. ")
    return parts


def who_gains(summary: dict, labels: Mapping[str, str]) -> list:
    """Per strategy, the subgroups where it clearly pays and where it clearly does not; a
    strategy with neither is uncertain in every subgroup (but those it changes nothing in)."""
    sentences = []
    by_strategy: dict[str, dict[str, list[str]]] = {}
    for row in summary["subgroups"]:
        kinds = by_strategy.setdefault(row["strategy"], {"pays": [], "does not pay": [],
                                                         "no difference": []})
        kind = next((k for k in kinds if row["verdict"].startswith(k)), None)
        if kind:
            kinds[kind].append(f"{row['attribute']} = {row['level']}")
    counted = Counter(row["strategy"] for row in summary["subgroups"])
    for strategy, kinds in by_strategy.items():
        label, same = labels.get(strategy, strategy), listed(kinds["no difference"])
        if kinds["pays"] or kinds["does not pay"]:
            pays = listed(kinds["pays"]) or "no subgroup"
            loses = listed(kinds["does not pay"]) or "no subgroup"
            sentences.append(f"{label} pays (95% CI of incremental net monetary benefit "
                             f"above 0) for {pays}, and does not pay (95% CI below 0) for "
                             f"{loses}.")
        elif len(kinds["no difference"]) < counted[strategy]:
            sentences.append(f"{label} is uncertain in every subgroup"
                             + (" it changes" if same else "") + " (no 95% CI of incremental "
                             "net monetary benefit lies above or below 0)"
                             + (f"; it changes nothing for {same}." if same else "."))
        else:
            sentences.append(f"{label} changes nothing in any subgroup.")
    if not sentences:
        return ["The patients carry no attribute to form subgroups by."]
    return ["Who gains: " + " ".join(sentences)]


def uncertainty(summary: dict, labels: Mapping[str, str]) -> list:
    psa, best, cur = summary["psa"], summary["best_at_threshold"], summary["currency"]
    parts = ["In the PSA (", key(summary, "psa.draws", whole), " draws), "]
    at = position(psa["acceptability_at_threshold"], strategy=best)
    if at is not None:
        path = f"psa.acceptability_at_threshold.{at}"
        parts += [f"{labels.get(best, best)} has the highest net monetary benefit in ",
                  key(summary, f"{path}.probability_best", percent), " of draws at ",
                  key(summary, f"{path}.threshold"), f" {cur} per QALY; "]
    if psa["evpi_at_threshold"]:
        parts += ["the expected value of perfect information there is ",
                  key(summary, "psa.evpi_at_threshold.0.evpi"), f" {cur} per patient."]
    return parts


def psa_tables(summary: dict) -> list | None:
    """The printed summary's sentence on which tables the PSA varies and which it holds
    fixed, each name tied to summary.json; None where the model reads no table (or the
    summary was written before it said)."""
    psa = summary.get("psa", {})
    varied, fixed = ([key(summary, f"psa.{kind}.{i}", str) for i in range(len(psa.get(kind, [])))]
                     for kind in ("tables_varied", "tables_held_fixed"))
    return tables_in_words(varied, fixed) if varied or fixed else None
