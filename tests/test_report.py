"""The report of a run folder: its numbers equal the run's tables and summary.json, it needs
nothing from outside the file, it says why a figure is left out, and it renders in a real
browser (headless Chromium through selenium and the system chromedriver).

References outside the project: the run's own result tables and summary.json as written by
`microsim run` (the report must repeat them, not recompute them); the standard library's
HTML parser; Chromium's rendering, console and PDF printing; Python's float parsing of the
numbers a reader sees, within the rounding of the digits shown.
"""
from __future__ import annotations

import io
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from microsim import CAUTION
from microsim.cli import main
from microsim.report.builder import build_report
from microsim.report.words import decision, lookup, psa_tables, who_gains
from microsim.scenario import ScenarioError
from support import horizon, rate, scenario_text, start, state

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "scenarios" / "lakemoor_kidney.toml"
FIGURES = ["subgroups", "ce_plane", "acceptability", "acceptability_noise_removed", "evpi",
           "evppi", "tornado", "two_way", "break_even", "budget", "trace", "survival",
           "structure"]  # in the order of the page
CHROMIUM, CHROMEDRIVER = Path("/usr/bin/chromium"), Path("/usr/bin/chromedriver")


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """The demo with PSA (EVPPI of one parameter: 8 draws are too few for the demo's pair),
    the sensitivity analyses (a 3 x 3 two-way grid) and the budget impact in one run
    folder, and its report."""
    out = tmp_path_factory.mktemp("runs")
    assert main(["run", str(DEMO), "--patients", "300", "--psa", "--draws", "8",
                 "--patients-per-draw", "40", "--evppi", "hr_therapy", "--sensitivity", "--grid",
                 "3", "--budget", "--out", str(out), "--report"]) == 0
    return out / DEMO.stem / "latest"


class Page(HTMLParser):
    """What the checks read from the page: cells with their sources, key numbers, figures,
    lines saying a figure is left out, and every address the page refers to."""

    def __init__(self, html: str):
        super().__init__()
        self.cells, self.keys, self.figures, self.absent, self.addresses = [], [], [], [], []
        self.tags, self._open = [], None
        self.feed(html)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        for name in ("src", "href"):
            if name in attrs:
                self.addresses.append(attrs[name])
        if "data-table" in attrs:
            self._open = {"table": attrs["data-table"], "row": int(attrs["data-row"]),
                          "values": json.loads(attrs["data-values"]), "text": ""}
            self.cells.append(self._open)
        if "data-value" in attrs:
            self._open = {"key": attrs["data-key"], "value": json.loads(attrs["data-value"]),
                          "text": ""}
            self.keys.append(self._open)
        if "data-figure" in attrs:
            self.figures.append(attrs["data-figure"])
        if "data-absent" in attrs:
            self.absent.extend(attrs["data-absent"].split())  # one line for a shared reason

    def handle_data(self, data):
        if self._open is not None:
            self._open["text"] += data

    def handle_endtag(self, tag):
        if tag in ("td", "span"):
            self._open = None


def page_of(folder: Path) -> tuple[str, Page]:
    html = (folder / "report.html").read_text(encoding="utf-8")
    return html, Page(html)


def equal(shown, stored) -> bool:
    if stored is None or stored is pd.NA or (isinstance(stored, float) and math.isnan(stored)):
        return shown is None
    if isinstance(stored, (float, np.floating)) and shown is not None:
        return math.isclose(float(shown), float(stored), rel_tol=1e-12, abs_tol=1e-12)
    return shown == (stored.item() if hasattr(stored, "item") else stored)


def test_every_number_in_a_table_equals_the_run_table_it_comes_from(folder):
    _, page = page_of(folder)
    assert len(page.cells) > 100
    tables = {}
    for cell in page.cells:
        table = tables.setdefault(cell["table"], pd.read_parquet(folder / f"{cell['table']}.parquet"))
        for column, shown in cell["values"].items():
            assert equal(shown, table.iloc[cell["row"]][column]), (cell, column)
    assert {"strategies", "increments", "incremental_analysis", "net_benefit", "subgroups",
            "precision", "acceptability", "evpi", "evppi", "psa_variance", "one_way",
            "two_way", "break_even", "budget_impact", "validation_outcomes",
            "average_patient"} <= set(tables)
    # every row of the decision tables is shown
    for name in ("incremental_analysis", "net_benefit", "subgroups", "precision", "one_way",
                 "two_way", "break_even", "budget_impact"):
        assert {c["row"] for c in page.cells if c["table"] == name} == set(range(len(tables[name])))


def test_every_key_number_equals_summary_json(folder):
    _, page = page_of(folder)
    summary = json.loads((folder / "summary.json").read_text())
    assert {k["key"] for k in page.keys} >= {"threshold", "best_at_threshold", "psa.draws",
                                             "psa.evpi_at_threshold.0.evpi",
                                             "psa.tables_held_fixed.0"}
    assert any(k["key"].endswith(".icer") for k in page.keys)
    for key in page.keys:
        assert equal(key["value"], lookup(summary, key["key"])), key


def test_the_psa_section_names_the_tables_it_holds_fixed_as_the_summary_does(folder):
    # the demo's one table (background death by age) holds numbers only: summary.json says
    # so, and the page repeats the printed summary's sentence in its PSA section
    html, _ = page_of(folder)
    psa = json.loads((folder / "summary.json").read_text())["psa"]
    assert psa["tables_varied"] == [] and psa["tables_held_fixed"] == ["background_death"]
    section = html[html.index('<section id="uncertainty"'):html.index('<section id="budget"')]
    assert ("PSA tables: held fixed in every draw: background_death (no entry names a drawn "
            "parameter; an entry that names one varies with it).") in re.sub(r"<[^>]+>", "", section)


def test_the_psa_tables_sentence_ties_every_name_to_summary_json():
    summary = {"psa": {"tables_varied": ["cost_by_age", "death_by_sex"],
                       "tables_held_fixed": ["utility_by_age"]}}
    parts = psa_tables(summary)
    assert "".join(p if isinstance(p, str) else p.text for p in parts) == (
        "PSA tables: varied through the drawn parameters they name: cost_by_age, death_by_sex; "
        "held fixed in every draw: utility_by_age (no entry names a drawn parameter; an entry "
        "that names one varies with it).")
    keys = [p for p in parts if not isinstance(p, str)]
    assert [k.path for k in keys] == ["psa.tables_varied.0", "psa.tables_varied.1",
                                      "psa.tables_held_fixed.0"]
    assert all(lookup(summary, k.path) == k.value == k.text for k in keys)
    varied_only = psa_tables({"psa": {"tables_varied": ["t"], "tables_held_fixed": []}})
    assert "".join(p if isinstance(p, str) else p.text for p in varied_only) == (
        "PSA tables: varied through the drawn parameters they name: t.")
    # no table read, or a summary written before it said: no sentence
    assert psa_tables({"psa": {"tables_varied": [], "tables_held_fixed": []}}) is None
    assert psa_tables({"psa": {"draws": 8}}) is None and psa_tables({}) is None


@pytest.mark.parametrize("labels, words", [({"drug": "New drug"}, "is New drug (drug)."),
                                            ({}, "is drug.")])
def test_the_best_strategy_is_named_once_when_it_has_no_label(labels, words):
    summary = {"comparator": "usual", "best_at_threshold": "drug", "threshold": 20000,
               "currency": "GBP", "increments": [], "treated": {}, "incremental_analysis": [],
               "subgroups": []}
    first = decision(summary, labels)[0]
    text = "".join(p if isinstance(p, str) else p.text for p in first)
    assert words in text and "( " not in text and "(drug) (" not in text, text


def subgroup_rows(strategy: str, *verdicts: str) -> list[dict]:
    """Rows of summary.json's subgroups, the verdicts as decision.strategies.verdict words."""
    return [{"strategy": strategy, "attribute": "age_band", "level": f"band {i}",
             "verdict": v} for i, v in enumerate(verdicts)]


def test_who_gains_says_uncertain_where_no_subgroup_is_clear():
    uncertain, pays = "uncertain (95% CI spans 0)", "pays (95% CI above 0)"
    same = "no difference (the strategy changes nothing here)"
    summary = {"subgroups": subgroup_rows("a", uncertain, uncertain)
               + subgroup_rows("b", same, uncertain) + subgroup_rows("c", same, same)
               + subgroup_rows("d", pays, uncertain)}
    (text,) = who_gains(summary, {"a": "A"})
    assert "A is uncertain in every subgroup (no 95% CI of incremental net monetary benefit " \
           "lies above or below 0)." in text
    assert "b is uncertain in every subgroup it changes (no 95% CI of incremental net " \
           "monetary benefit lies above or below 0); it changes nothing for age_band = band 0." in text
    assert "c changes nothing in any subgroup." in text
    assert ("d pays (95% CI of incremental net monetary benefit above 0) for age_band = band 0, "
            "and does not pay (95% CI below 0) for no subgroup.") in text
    assert text.count("for no subgroup") == 1  # never "pays for no subgroup, and does not ..."


def test_the_page_is_self_contained_and_opens_with_the_question_and_the_caution(folder):
    html, page = page_of(folder)
    assert "script" not in page.tags and "link" not in page.tags
    assert all(a.startswith(("data:image/svg+xml;base64,", "#")) for a in page.addresses)
    assert not re.search(r"url\(|@import|https?://", html)
    head = html[:html.index('<section id="decision"')]
    assert "Chronic kidney disease progression in Lakemoor" in head
    assert CAUTION in head and "invented for demonstration" in head  # the provenance
    assert html.count(CAUTION) == 2  # and again at the end


def test_every_figure_is_on_the_page_and_written_as_svg_and_png(folder):
    _, page = page_of(folder)
    assert page.figures == FIGURES and page.absent == []
    for name in FIGURES:
        for suffix in ("svg", "png"):
            assert (folder / "figures" / f"{name}.{suffix}").stat().st_size > 1000


@pytest.fixture()
def bare(tmp_path) -> Path:
    """A run without strategies, PSA or sensitivity, whose title needs escaping."""
    path = tmp_path / "bare.toml"
    path.write_text(scenario_text(horizon(5), start(well=1.0), state("well", utility=1),
                                  state("dead", absorbing=True), rate("well", "dead", 0.2),
                                  title="Wards <script>alert(1)</script> & beds"))
    assert main(["run", str(path), "--patients", "50", "--out", str(tmp_path / "out")]) == 0
    return tmp_path / "out" / "bare" / "latest"


def test_figures_without_data_are_left_out_with_a_reason(bare, capsys):
    assert main(["report", str(bare)]) == 0
    assert capsys.readouterr().out.strip() == f"wrote {bare / 'report.html'}"
    html, page = page_of(bare)
    assert page.figures == ["trace", "survival", "structure"]
    assert page.absent == ["subgroups", "ce_plane", "acceptability",
                           "acceptability_noise_removed", "evpi", "evppi", "tornado", "two_way",
                           "break_even", "budget"]
    # once for the subgroups and once for the uncertainty figures, not once per figure
    assert html.count("defines no strategies, so there is nothing") == 2
    assert "Cost-effectiveness plane; Acceptability curves" in html
    assert "no strategies" in html and "microsim run FILE --sensitivity" in html
    assert "microsim run FILE --budget" in html and "PSA tables" not in html
    assert sorted(p.stem for p in (bare / "figures").glob("*.svg")) == sorted(page.figures)


def test_text_from_the_scenario_is_escaped(bare):
    build_report(bare)
    html, page = page_of(bare)
    assert "script" not in page.tags
    assert "Wards &lt;script&gt;alert(1)&lt;/script&gt; &amp; beds" in html


def test_the_report_reads_the_runs_own_scenario_and_old_figures_go(bare):
    # editing the scenario file after the run changes nothing: the run folder has its copy
    scenario = Path(json.loads((bare / "manifest.json").read_text())["scenario"])
    build_report(bare)
    (bare / "figures" / "stale.svg").write_text("<svg/>")
    scenario.write_text(scenario.read_text().replace("Wards", "Clinics"))
    build_report(bare)
    html, page = page_of(bare)
    assert "structure" in page.figures and "Clinics" not in html
    assert not (bare / "figures" / "stale.svg").exists()
    (bare / "scenario.toml").unlink()  # without the copy the structure is left out
    build_report(bare)
    html, page = page_of(bare)
    assert "structure" in page.absent and "holds no copy of its scenario" in html


def test_a_folder_that_is_not_a_run_folder_is_refused_in_one_line(tmp_path, capsys):
    (tmp_path / "manifest.json").write_text("{}")
    assert main(["report", str(tmp_path)]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and "not a run folder: it has no summary.json" in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["manifest.json"]  # nothing written
    with pytest.raises(ScenarioError):
        build_report(tmp_path / "missing")


def test_commands_without_a_report_load_no_drawing_library():
    code = ("import sys, microsim.cli, microsim.workflow; "
            "print(sorted({'matplotlib', 'jinja2', 'networkx'} & set(sys.modules)))")
    loaded = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True).stdout.strip()
    assert loaded == "[]"


# ------------------------------------------------------------------ in a real browser

@pytest.fixture(scope="module")
def browser():
    """Headless Chromium through the system chromedriver (never a downloaded browser)."""
    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        message = "needs Debian's chromium and chromium-driver: apt-get install -y chromium chromium-driver"
        if os.environ.get("CI"):
            pytest.fail(message)
        pytest.skip(message)
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    profile = tempfile.mkdtemp(prefix="microsim-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", f"--user-data-dir={profile}", "--window-size=1280,1000"):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    yield driver
    driver.quit()
    shutil.rmtree(profile, ignore_errors=True)


def shown_value(text: str) -> tuple[float, float]:
    """The number a reader sees and half its last shown digit (the rounding it allows)."""
    text = text.strip().replace(",", "")
    scale = 0.01 if text.endswith("%") else 1.0
    text = text.rstrip("%")
    digits = len(text.split(".")[1]) if "." in text else 0
    return float(text) * scale, 0.5 * 10.0 ** -digits * scale


def test_the_report_renders_in_chromium(folder, browser, tmp_path):
    from PIL import Image
    from selenium.webdriver.common.by import By
    browser.get((folder / "report.html").as_uri())
    height = browser.execute_script("return document.documentElement.scrollHeight")
    browser.set_window_size(1280, min(height + 200, 20000))
    browser.save_screenshot(str(tmp_path / "report.png"))  # the whole page, for a person
    assert Image.open(tmp_path / "report.png").size[1] > 2000
    errors = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
    assert errors == []

    figures = browser.find_elements(By.CSS_SELECTOR, "figure[data-figure]")
    assert [f.get_attribute("data-figure") for f in figures] == FIGURES
    for figure in figures:
        image = figure.find_element(By.TAG_NAME, "img")
        assert browser.execute_script("return arguments[0].complete && arguments[0].naturalWidth > 0",
                                      image)
        box = image.rect
        assert box["width"] > 300 and box["height"] > 150, (figure.get_attribute("data-figure"), box)
        pixels = np.asarray(Image.open(io.BytesIO(image.screenshot_as_png)).convert("L"), float)
        ink = (pixels < 200).mean()  # the share of the figure's area drawn in something dark
        assert pixels.std() > 10 and 0.005 < ink < 0.6, (figure.get_attribute("data-figure"), ink)

    summary = json.loads((folder / "summary.json").read_text())
    keys = browser.find_elements(By.CSS_SELECTOR, "[data-key][data-value]")
    assert len(keys) > 10
    for element in keys:
        stored = lookup(summary, element.get_attribute("data-key"))
        assert json.loads(element.get_attribute("data-value")) == stored
        if isinstance(stored, str):
            assert element.text == stored
        else:
            value, rounding = shown_value(element.text)
            assert abs(value - stored) <= rounding * (1 + 1e-9), (element.text, stored)


def test_the_report_prints_with_a_page_per_section_and_nothing_cut(folder, browser):
    import base64
    browser.get((folder / "report.html").as_uri())
    pdf = base64.b64decode(browser.print_page())
    assert pdf.startswith(b"%PDF")
    sections = browser.find_elements("css selector", "section")
    assert len(re.findall(rb"/Type\s*/Page(?![s\w])", pdf)) > len(sections)
    # the page as printed on A4 (180 mm of text width, about 680 CSS pixels): every section
    # starts a page, and nothing is wider than the paper
    browser.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": "print"})
    browser.set_window_size(680, 1000)
    breaks = browser.execute_script(
        "return [...document.querySelectorAll('section')].map(s => getComputedStyle(s).breakBefore)")
    assert breaks == ["page"] * len(sections)
    width = browser.execute_script("return document.documentElement.clientWidth")
    widest = browser.execute_script(
        "return Math.max(...[...document.querySelectorAll('body *')]"
        ".map(e => e.getBoundingClientRect().right))")
    assert widest <= width + 1, (widest, width)
    browser.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": ""})
