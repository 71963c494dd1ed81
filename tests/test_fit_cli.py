"""`microsim fit` through microsim.cli.main: the run folder it writes, and the catalogue of
refusals (one line on stderr naming the option, exit code 2, nothing written: DESIGN.md's
rules). References: hashlib.sha256 of the data file's bytes, the scenario reader reading the
written scenario back, the Rossi data of lifelines.datasets (load_rossi)."""
from __future__ import annotations

import hashlib
import io
import json
import re
import shutil

import numpy as np
import pandas as pd
import pytest
from lifelines.datasets import load_rossi

from microsim import CAUTION
from microsim.cli import main
from microsim.fitting.data import read_survival_data
from microsim.scenario import read_scenario
from test_report import browser  # noqa: F401 (the report's headless Chromium fixture)

EXIT_BAD_INPUT = 2


@pytest.fixture(scope="module")
def rossi(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "rossi.csv"
    load_rossi().to_csv(path, index=False)
    return path


def fit(path, out, *options):
    return main(["fit", str(path), "--time", "week", "--event", "arrest", "--unit", "weeks",
                 "--patients", "1000", "--out", str(out), *map(str, options)])


def test_the_run_folder_holds_the_fit_the_scenario_and_its_page(rossi, tmp_path, capsys):
    assert fit(rossi, tmp_path, "--covariates", "fin,prio", "--seed", "7") == 0
    printed = capsys.readouterr().out
    assert "Models by AIC" in printed and CAUTION in printed and "Check: the written" in printed
    folder = (tmp_path / "rossi" / "latest").resolve()
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["data_sha256"] == hashlib.sha256(rossi.read_bytes()).hexdigest()
    assert manifest["scenario"] is None and not (folder / "scenario.toml").exists()
    for name in ("fit_models", "fit_parameters", "fit_covariance", "kaplan_meier",
                 "fit_curves", "fit_check"):
        assert name + ".csv" in manifest["files"] and name + ".parquet" in manifest["files"]
    summary = json.loads((folder / "fit_summary.json").read_text())
    base = f"rossi_{summary['chosen']['family']}_{summary['chosen']['form']}"
    assert summary["files"] == {"scenario": f"{base}.toml", "block": f"{base}_block.toml",
                                "patients": f"{base}_patients.csv"}
    for name in (*summary["files"].values(), "fit.html", "fit_summary.json",
                 "figures/fit_survival.svg", "figures/fit_hazards.png", "figures/fit_check.svg"):
        assert name in manifest["files"], name
    scenario = read_scenario(folder / f"{base}.toml")  # a scenario that reads as it is
    assert summary["chosen"]["label"] in scenario.provenance
    assert manifest["data_sha256"] in (folder / f"{base}_block.toml").read_text()
    models = pd.read_csv(folder / "fit_models.csv")
    assert len(models) == 9 and models.chosen.sum() == 1  # 6 families, 3 of them in two forms
    assert main(["check", str(folder / f"{base}.toml")]) == 0
    # its runs go under the scenario's own name (<out>/<scenario>/), the data's and the fit's
    assert main(["validate", str(folder / f"{base}.toml"), "--patients", "50",
                 "--out", str(tmp_path / "runs")]) == 0
    assert [p.name for p in (tmp_path / "runs").iterdir()] == [base]


def test_the_page_is_self_contained_and_shows_the_tables(rossi, tmp_path, capsys):
    assert fit(rossi, tmp_path, "--family", "weibull", "--form", "aft",
               "--covariates", "fin") == 0
    folder = (tmp_path / "rossi" / "latest").resolve()
    page = (folder / "fit.html").read_text()
    assert CAUTION in page and "Weibull, accelerated failure time" in page
    assert not re.search(r"""(src|href)=["'](https?:|//)""", page)  # nothing fetched
    assert page.count('src="data:image/svg+xml;base64,') == 3
    models = pd.read_csv(folder / "fit_models.csv")
    for row in models.itertuples():  # every model's AIC is on the page, tied to its row,
        assert f'data-table="fit_models" data-row="{row.Index}"' in page
        assert f"{row.aic:,.2f}" in page
        assert f"{row.rank}. {row.label}" in page  # and a table of its estimates
    parameters = pd.read_csv(folder / "fit_parameters.csv")
    for row in parameters.index:
        assert f'data-table="fit_parameters" data-row="{row}"' in page
    covariance = pd.read_csv(folder / "fit_covariance.csv")
    mine = covariance[(covariance.family == "weibull") & (covariance.form == "aft")]
    assert len(mine) == 9  # the written fit's 3 x 3 matrix, each cell tied to its row
    for row in mine.index:
        assert f'data-table="fit_covariance" data-row="{row}"' in page


def test_the_page_renders_in_chromium(rossi, tmp_path, browser, capsys):
    # the report's own check of a page (tests/test_report.py): every figure drawn and not
    # blank, no console error, the numbers with a data-key equal to fit_summary.json
    from PIL import Image
    from selenium.webdriver.common.by import By
    assert fit(rossi, tmp_path, "--covariates", "fin", "--family", "lognormal") == 0
    folder = (tmp_path / "rossi" / "latest").resolve()
    browser.get((folder / "fit.html").as_uri())
    assert [e for e in browser.get_log("browser") if e["level"] == "SEVERE"] == []
    figures = browser.find_elements(By.CSS_SELECTOR, "figure[data-figure]")
    assert [f.get_attribute("data-figure") for f in figures] == ["fit_survival", "fit_hazards",
                                                                 "fit_check"]
    for figure in figures:
        image = figure.find_element(By.TAG_NAME, "img")
        assert browser.execute_script(
            "return arguments[0].complete && arguments[0].naturalWidth > 0", image)
        assert image.rect["width"] > 300 and image.rect["height"] > 150
        pixels = np.asarray(Image.open(io.BytesIO(image.screenshot_as_png)).convert("L"), float)
        assert pixels.std() > 10 and 0.005 < (pixels < 200).mean() < 0.6
    summary = json.loads((folder / "fit_summary.json").read_text())
    keys = browser.find_elements(By.CSS_SELECTOR, "[data-key]")
    assert [k.get_attribute("data-key") for k in keys] == ["chosen.label", "check.words"]
    for element in keys:
        path = element.get_attribute("data-key").split(".")
        value = summary
        for part in path:
            value = value[part]
        assert value in element.text


def pages(folder):
    """fit.html and every figure's bytes."""
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in [folder / "fit.html", *(folder / "figures").iterdir()]}


def test_report_makes_the_page_of_a_fit_again(rossi, tmp_path, capsys):
    # the page made again from the run folder's tables is the page the fit made (byte for
    # byte: figures carry no dates), and the manifest hashes it (hashlib.sha256)
    assert fit(rossi, tmp_path, "--covariates", "fin", "--family", "weibull") == 0
    folder = (tmp_path / "rossi" / "latest").resolve()
    made = pages(folder)
    (folder / "fit.html").unlink()
    shutil.rmtree(folder / "figures")
    assert main(["report", str(tmp_path / "rossi")]) == 0
    assert pages(folder) == made
    files = json.loads((folder / "manifest.json").read_text())["files"]
    assert files["fit.html"] == hashlib.sha256(made["fit.html"]).hexdigest()
    # a fit folder written before its files were named after the data file
    summary = json.loads((folder / "fit_summary.json").read_text())
    for name, old in (("block", "fitted_block.toml"), ("scenario", "fitted_scenario.toml"),
                      ("patients", "fit_patients.csv")):
        (folder / summary["files"][name]).rename(folder / old)
    del summary["files"]
    (folder / "fit_summary.json").write_text(json.dumps(summary))
    assert main(["report", str(folder)]) == 0
    assert "fitted_block.toml" in (folder / "fit.html").read_text()
    (folder / "fitted_block.toml").unlink()
    assert main(["report", str(folder)]) == EXIT_BAD_INPUT
    assert "the fit's run folder has no fitted_block.toml" in capsys.readouterr().err


def test_a_fit_without_covariates_writes_a_cohort_scenario(rossi, tmp_path, capsys):
    assert fit(rossi, tmp_path, "--family", "gompertz", "--name", "rearrest") == 0
    folder = (tmp_path / "rossi" / "latest").resolve()
    scenario = read_scenario(folder / "rossi_gompertz.toml")
    assert scenario.population is None and not list(folder.glob("*_patients.csv"))
    assert json.loads((folder / "fit_summary.json").read_text())["files"]["patients"] is None
    assert scenario.transitions[0].name == "rearrest"
    assert set(scenario.parameters) == {"rearrest_rate", "rearrest_shape"}


TINY = "time,event\n1,1\n2,0\n3,1\n4,0\n5,0\n"  # 2 events: too few for 3 parameters
REFUSALS = [  # (rows of the data file, options, the option named, what the message says)
    ("time,event\n1,1\n2,0\n", ("--time", "tme"), "--time", "no column 'tme'"),
    ("time,event\n1,1\n2,0\n", ("--time", "time", "--event", "Event"), "--event",
     "did you mean 'event'"),
    ("time,event\n1,0\n2,0\n", (), "--event", "has no events"),
    ("time,event\n1,1\n-2,0\n", (), "--time", "has -2 in data row 2"),
    ("time,event\n1,1\n,0\n", (), "--time", "has no value in data row 2"),
    ("time,event\n1,1\nn/a,0\n3,1\n", (), "--time", "data row 2"),
    ("time,event\n1,1\n0,0\n", (), "--time", "must be above 0"),
    ("time,event\n1,1\n2,2\n", (), "--event", "must be 0 (censored) or 1"),
    ("time,event\n1,died\n2,alive\n", (), "--event", "holds text (alive, died)"),
    ("time,event,start\n1,1,0\n2,0,2\n", ("--entry", "start"), "--entry",
     "below the time in column 'time'"),
    ("time,event,x\n1,1,a\n2,0,a\n", ("--covariates", "x"), "--covariates",
     "takes the one value 'a'"),
    ("time,event,x\n" + "".join(f"{i + 1},{i % 2},p{i}\n" for i in range(21)),
     ("--covariates", "x"), "--covariates", "text of 21 levels (at most 20"),
    ("time,event,x\n1,1,a\n2,0,b\n", ("--covariates", "x", "--reference", "x=B"),
     "--reference", "'B' is not a level of column 'x' (levels: a, b) (did you mean 'b'?)"),
    ("time,event,x,y\n1,1,a,0\n2,0,b,1\n", ("--covariates", "x,y", "--reference", "y=0"),
     "--reference", "column 'y' is not a categorical covariate"),
    ("time,event,x\n1,1,a\n2,0,b\n", ("--covariates", "x", "--reference", "x"), "--reference",
     "'x' is not COLUMN=LEVEL"),
    ("time,event,x,x_b\n1,1,a,0\n2,0,b,1\n", ("--covariates", "x,x_b"), "--covariates",
     "'x_b' names both level 'b' of column 'x' and column 'x_b'"),
    ("time,event,x\n1,1,3\n2,0,3\n", ("--covariates", "x"), "--covariates",
     "takes the one value 3"),
    ("time,event,age,age_at_entry\n1,1,50,50\n2,0,60,61\n",
     ("--covariates", "age,age_at_entry"), "--covariates",
     "columns 'age' and 'age_at_entry' would both be the attribute 'age_at_entry'"),
    ("time,event,Sex\n1,1,0\n2,0,1\n", ("--covariates", "Sex"), "--covariates",
     "cannot name an attribute"),
    ("time,event\n1,1\n2,0\n", ("--covariates", "fin,prio"), "--covariates", "no column 'fin'"),
    ("time,event\n1,1\n2,0\n", ("--covariates", "time"), "--covariates",
     "already given to --time"),
    ("time,event\n1,1\n2,0\n", ("--form", "ph"), "--form", "give --covariates too"),
    ("time,event\n1,1\n2,0\n", ("--unit", "person years"), "--unit", "a single word"),
    ("time,event\n1,1\n2,0\n", ("--unit", "fortnights"), "--unit", "not a unit microsim knows"),
    ("time,event\n1,1\n2,0\n", ("--name", "Death"), "--name", "must be a name"),
    ("time,event\n1,1\n2,0\n", ("--horizon", "0"), "--horizon", "above 0"),
    ("time,event\n1,1\n2,0\n", ("--family", "weibul"), "--family", "did you mean 'weibull'"),
    (TINY, ("--family", "generalised_gamma"), "--family", "no fit converged"),
    ("time,event,x\n1,1,0\n2,0,1\n3,1,1\n", ("--covariates", "x", "--family", "lognormal",
                                             "--form", "ph"), "--form", "choose --form aft"),
]


@pytest.mark.parametrize("rows, options, option, phrase", REFUSALS,
                         ids=[f"{r[2]}-{r[3][:24]}" for r in REFUSALS])
def test_bad_data_and_options_are_refused_in_one_line(tmp_path, capsys, rows, options, option,
                                                      phrase):
    data = tmp_path / "trial.csv"
    data.write_text(rows)
    given = dict(zip(options[::2], options[1::2]))
    command = ["fit", str(data), "--time", given.pop("--time", "time"),
               "--event", given.pop("--event", "event"), "--out", str(tmp_path / "out")]
    for key, value in given.items():
        command += [key, value]
    assert main(command) == EXIT_BAD_INPUT
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {option}: "), captured.err
    assert phrase in lines[0], lines[0]
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").rglob("*.csv"))


def test_a_parquet_file_reads_as_its_csv_does_and_fits(rossi, tmp_path, capsys):
    # reference: the same data written by pandas as CSV and as Parquet (pyarrow)
    parquet = tmp_path / "rossi.parquet"
    load_rossi().to_parquet(parquet)
    columns = ("week", "arrest", ("fin", "prio"), None)
    csv_data, parquet_data = (read_survival_data(p, *columns) for p in (rossi, parquet))
    for name in ("time", "event", "entry", "values"):
        assert np.array_equal(getattr(csv_data, name), getattr(parquet_data, name)), name
    assert fit(parquet, tmp_path / "out", "--family", "weibull") == 0
    assert (tmp_path / "out" / "rossi" / "latest" / "rossi_weibull.toml").is_file()


def test_yes_no_columns_read_as_one_and_zero(tmp_path):
    # reference: the population file's typing rule (docs/scenario-format.md): yes/true is
    # yes; a Parquet boolean column keeps its type
    text = tmp_path / "words.csv"
    text.write_text("time,event,treated\n1,yes,TRUE\n2,no,false\n3,Yes,true\n")
    booleans = tmp_path / "booleans.parquet"
    pd.DataFrame({"time": [1.0, 2.0, 3.0], "event": [True, False, True],
                  "treated": [True, False, True]}).to_parquet(booleans)
    for path in (text, booleans):
        data = read_survival_data(path, "time", "event", ("treated",))
        assert data.event.tolist() == [1.0, 0.0, 1.0]
        assert data.values[:, 0].tolist() == [1.0, 0.0, 1.0]


def test_a_parquet_file_with_a_missing_time_is_refused(tmp_path, capsys):
    frame = pd.DataFrame({"time": [1.0, None, 3.0], "event": [1, 0, 1]})
    frame.to_parquet(tmp_path / "gaps.parquet")
    assert main(["fit", str(tmp_path / "gaps.parquet"), "--time", "time", "--event", "event",
                 "--out", str(tmp_path / "out")]) == EXIT_BAD_INPUT
    line = capsys.readouterr().err.strip()
    assert line.startswith("error: --time: ") and "data row 2" in line and "\n" not in line
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").rglob("*.csv"))


def test_a_model_without_a_maximum_is_ranked_last_and_never_written(tmp_path, capsys):
    # 2 events cannot pin down the generalised gamma's 3 parameters: its estimates run off
    # (q to thousands below 0); the written fit is the best converged one
    data = tmp_path / "tiny.csv"
    data.write_text(TINY)
    assert main(["fit", str(data), "--time", "time", "--event", "event", "--patients", "300",
                 "--out", str(tmp_path / "out")]) == 0
    models = pd.read_csv(tmp_path / "out" / "tiny" / "latest" / "fit_models.csv")
    last = models.iloc[-1]
    assert last.family == "generalised_gamma" and not last.converged
    # the optimiser stops either without a maximum or at a boundary with a singular
    # information matrix (which one depends on the scipy release); never chosen either way
    assert ("no maximum found" in last.note or "not positive definite" in last.note)
    assert not last.chosen
    assert models.converged.iloc[:-1].all() and models.chosen.iloc[0]


def test_a_missing_file_and_a_file_of_another_kind_are_refused(tmp_path, capsys):
    for name in ("absent.csv", "notes.txt"):
        assert main(["fit", str(tmp_path / name), "--time", "t", "--event", "e",
                     "--out", str(tmp_path / "out")]) == EXIT_BAD_INPUT
        line = capsys.readouterr().err.strip()
        assert line.startswith(f"error: {tmp_path / name}: ") and "\n" not in line
