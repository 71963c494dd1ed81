"""The command line, through microsim.cli.main and once through `python -m microsim`.

References outside the project: hashlib.sha256 of the scenario file's bytes and the
installed versions from importlib.metadata (the manifest); json.loads (the --json
output); pandas reading back the CSV and Parquet tables; argparse's own --help exit code 0;
errno/os.strerror for the operating system's ENOSPC and EACCES; the shell's 130 for a
process stopped by SIGINT and sysexits.h's EX_IOERR (74) for output that could not be
written (both common practice). The rules checked are DESIGN.md's: bad input gives one
line on stderr starting with "error: " that names the field or option, exit code 2, no
traceback, and nothing written.
"""
from __future__ import annotations

import argparse
import errno
import hashlib
import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import time
from importlib import metadata
from pathlib import Path

import pandas as pd
import pytest

from microsim import CAUTION
from microsim.cli import build_parser, main
from microsim.scenario import read_scenario
from support import (horizon, probability, rate, scenario_text, start, state, strategy,
                     transition)

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = sorted((ROOT / "scenarios").glob("*.toml"))
DEMO = ROOT / "scenarios" / "lakemoor_kidney.toml"
WARD = ROOT / "scenarios" / "ward_recovery.toml"


ENTRY_POINT = Path(sys.executable).parent / "microsim"  # the installed console script


def python_m(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "microsim", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def refused(captured, start: str) -> str:
    """The one line of a refusal: on stderr, starting with `start`, nothing on stdout."""
    lines = captured.err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(start), captured.err
    assert captured.out == "" and "Traceback" not in captured.err
    return lines[0]


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under `folder` (hidden ones too) with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


# ------------------------------------------------------------------------------- check

@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_check_accepts_every_shipped_scenario(path, capsys):
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr()
    assert out.out.startswith("ok: ") and out.err == ""


def test_check_notes_a_model_without_an_exact_counterpart(tmp_path, capsys):
    # a Weibull sojourn in a state patients re-enter is semi-Markov: check says so before any
    # run, as validate and the exact basis would; a constant-rate model gets no note
    semi = scenario_text(horizon(30, unit="days"), start(recovering=1), state("recovering"),
                         state("complication"), state("discharged", absorbing=True),
                         rate("recovering", "complication", 0.1),
                         rate("recovering", "discharged", 0.2),
                         transition("complication", "recovering",
                                    hazard=dict(family="weibull", shape=1.5, scale=4)))
    path = tmp_path / "semi.toml"
    for text, noted in ((semi, True), (semi.replace(
            'hazard = { family = "weibull", shape = 1.5, scale = 4 }', "rate = 0.3"), False)):
        path.write_text(text)
        assert main(["check", str(path)]) == 0
        out = capsys.readouterr().out
        assert ("note: no exact analytic counterpart ('complication->recovering' has a weibull"
                in out) == noted, out


def test_check_through_python_m():
    done = python_m("check", DEMO)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("ok: ") and "Traceback" not in done.stderr


# ----------------------------------------------------------------- bad input is refused

TITLE = "bad input test"
GOOD = scenario_text(
    horizon(5), start(well=1.0), state("well", cost=100), state("dead", absorbing=True),
    probability("well", "dead", 0.1), probability("well", "well", "remainder"), title=TITLE)
RATE = scenario_text(
    horizon(5, unit="days"), start(well=1.0), state("well"), state("dead", absorbing=True),
    rate("well", "dead", -0.1), title=TITLE)

# (file text, the field path the message must name)
BAD = {
    "syntax": (GOOD.replace('unit = "years"', 'unit = "years'), "bad.toml line 4"),
    "probability_above_1": (GOOD.replace("probability = 0.1", "probability = 1.2"),
                            "transitions.well->dead.probability"),
    "unknown_state": (GOOD.replace('to = "dead"', 'to = "gone"'), "transitions.well->gone.to"),
    "row_not_summing_to_1": (GOOD.replace('probability = "remainder"', "probability = 0.8"),
                             "transitions.well->*"),
    "negative_rate": (RATE, "transitions.well->dead.rate"),
    "undefined_parameter": (GOOD.replace("cost = 100", 'cost = "c_well"'), "states.well.cost"),
}
WRITING = [["trace"], ["chain"], ["run", "--patients", "10"], ["population", "--patients", "10"],
           ["sensitivity", "--patients", "10"]]


def test_the_good_file_of_the_catalogue_is_accepted(tmp_path):
    path = tmp_path / "good.toml"
    path.write_text(GOOD)
    assert main(["check", str(path)]) == 0


@pytest.mark.parametrize("case", BAD)
@pytest.mark.parametrize("command", [["check"], *WRITING], ids=lambda c: c[0])
def test_bad_input_is_one_line_exit_2_and_nothing_written(case, command, tmp_path, capsys):
    text, field = BAD[case]
    path = tmp_path / "bad.toml"
    path.write_text(text)
    out = tmp_path / "out"
    argv = [command[0], str(path), *command[1:]] + ([] if command == ["check"] else ["--out", str(out)])
    assert main(argv) == 2
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert len(lines) == 1, captured.err
    assert lines[0].startswith(f"error: {field}"), lines[0]
    assert "Traceback" not in captured.err + captured.out
    assert not out.exists()  # nothing created under --out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml"]


def test_bad_input_through_python_m(tmp_path):
    text, field = BAD["probability_above_1"]
    (tmp_path / "bad.toml").write_text(text)
    done = python_m("trace", "bad.toml", "--out", "out", cwd=tmp_path)
    assert done.returncode == 2
    assert done.stderr.splitlines() == [done.stderr.strip()]
    assert done.stderr.startswith(f"error: {field}") and "Traceback" not in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml"]


def test_a_missing_scenario_file_is_one_line_and_exit_2(tmp_path, capsys):
    missing = tmp_path / "missing.toml"
    assert main(["trace", str(missing), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert err.splitlines() == [f"error: {missing}: cannot read the scenario file "
                                "(No such file or directory)"]
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("option", [["--patients", "0"], ["--patients", "-5"], ["--seed", "-1"]],
                         ids=["patients-0", "patients-negative", "seed-negative"])
@pytest.mark.parametrize("command", ["run", "population", "validate"])
def test_a_bad_command_line_number_is_refused(command, option, tmp_path, capsys):
    scenario = DEMO if command == "population" else WARD
    out = tmp_path / "out"
    extra = ["--patients", "20"] if option[0] == "--seed" else []
    assert main([command, str(scenario), *option, *extra, "--out", str(out)]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {option[0]}")
    assert not out.exists()


# ------------------------------------------------------------------------------- trace

def test_trace_writes_tables_and_manifest(tmp_path, capsys):
    assert main(["trace", str(WARD), "--out", str(tmp_path)]) == 0
    assert CAUTION in capsys.readouterr().out
    folder = tmp_path / WARD.stem / "latest"
    names = {p.name for p in folder.iterdir()}
    assert {"cohort_trace.csv", "cohort_trace.parquet", "manifest.json", "scenario.toml"} <= names
    csv, parquet = pd.read_csv(folder / "cohort_trace.csv"), pd.read_parquet(folder / "cohort_trace.parquet")
    pd.testing.assert_frame_equal(csv, parquet, check_dtype=False)
    # a trace: shares of every state sum to 1 at every time (probability, common practice)
    assert parquet.groupby("time").share.sum().sub(1).abs().max() < 1e-9
    record = json.loads((folder / "manifest.json").read_text())
    # reference: hashlib over the file's bytes
    assert record["scenario_sha256"] == hashlib.sha256(WARD.read_bytes()).hexdigest()
    for package in ("numpy", "scipy", "pandas", "pyarrow", "simpy"):
        assert record["versions"][package] == metadata.version(package)
    assert record["versions"]["python"] == ".".join(map(str, sys.version_info[:3]))
    assert set(record["files"]) == names - {"manifest.json"}
    # reference: hashlib over each file's bytes, and the run's own copy of the scenario
    assert all(record["files"][n] == hashlib.sha256((folder / n).read_bytes()).hexdigest()
               for n in record["files"])
    assert (folder / "scenario.toml").read_bytes() == WARD.read_bytes()


def test_trace_through_python_m_records_the_command(tmp_path):
    done = python_m("trace", WARD, "--out", tmp_path)
    assert done.returncode == 0, done.stderr
    record = json.loads((tmp_path / WARD.stem / "latest" / "manifest.json").read_text())
    assert record["command"] == f"microsim trace {WARD} --out {tmp_path}"


def test_trace_through_main_records_the_command(tmp_path):
    assert main(["trace", str(WARD), "--out", str(tmp_path)]) == 0
    record = json.loads((tmp_path / WARD.stem / "latest" / "manifest.json").read_text())
    assert record["command"] == f"microsim trace {WARD} --out {tmp_path}"


# ------------------------------------------------------------------ one strategy's cohort

def two_strategies(tmp_path) -> Path:
    """well -> dead at rate 0.2; strategy 'drug' halves it for everyone from time 0."""
    path = tmp_path / "two.toml"
    path.write_text(scenario_text(
        horizon(10), start(well=1), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.2), strategy("usual", comparator=True),
        strategy("drug", changes=[dict(transition="well->dead", hazard_ratio=0.5)])))
    return path


@pytest.mark.parametrize("option, alive", [([], math.exp(-0.2 * 10)),
                                           (["--strategy", "drug"], math.exp(-0.1 * 10))])
def test_trace_and_chain_follow_one_strategy(tmp_path, capsys, option, alive):
    # the share still well at 10 years, exp(-rate * 10) (exponential survival, common practice)
    path = two_strategies(tmp_path)
    assert main(["trace", str(path), "--out", str(tmp_path / "out"), *option]) == 0
    assert main(["chain", str(path), "--out", str(tmp_path / "out"), *option]) == 0
    runs = {p.name.rsplit("-", 1)[1]: p for p in (tmp_path / "out" / "two").iterdir()
            if p.is_dir() and p.name != "latest"}
    trace = pd.read_csv(runs["trace"] / "cohort_trace.csv")
    assert trace.query("time == 10 and state == 'well'")["share"].item() == pytest.approx(alive, rel=1e-9)
    outcomes = pd.read_csv(runs["chain"] / "expected_outcomes.csv").set_index("measure")["value"]
    # life years up to 10: (1 - exp(-10 r)) / r (the integral of the survival, common practice)
    r = -math.log(alive) / 10
    assert outcomes["life_years"] == pytest.approx((1 - alive) / r, rel=1e-9)
    assert ("strategy drug" in capsys.readouterr().out) == bool(option)


@pytest.mark.parametrize("command", ["trace", "chain"])
def test_trace_and_chain_refuse_an_unknown_strategy(tmp_path, capsys, command):
    path = two_strategies(tmp_path)
    assert main([command, str(path), "--strategy", "drugg", "--out", str(tmp_path / "out")]) == 2
    line = refused(capsys.readouterr(), "error: --strategy: no strategy 'drugg'")
    assert "did you mean 'drug'?" in line and "usual, drug" in line
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------------- run

@pytest.mark.parametrize("options, start", [
    (["--psa", "--draws", "8", "--budget"], "error: economics.budget_years: is needed"),
    (["--sensitivity"], "error: parameters: no parameter has a low..high range")])
def test_run_refuses_the_analyses_after_it_before_any_work(tmp_path, capsys, options, start):
    # the budget impact and the sensitivity analysis follow the main run and the PSA: what
    # they need is checked first, so nothing is simulated or written (not even PSA draws)
    path = two_strategies(tmp_path)
    out = tmp_path / "out"
    assert main(["run", str(path), "--patients", "40", "--out", str(out), *options]) == 2
    refused(capsys.readouterr(), start)
    assert not out.exists()


def test_a_run_without_subgroups_says_why_there_are_none(tmp_path, capsys):
    # patients alike (no attribute): the subgroup table is empty, and the run says why
    # instead of printing an empty table under 'Who benefits'
    path = two_strategies(tmp_path)
    assert main(["run", str(path), "--patients", "40", "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    assert "Who benefits: no subgroups, as the patients carry no category" in out
    assert "by subgroup (all)" not in out


def test_run_writes_the_summary_and_shows_the_caution(tmp_path, capsys):
    assert main(["run", str(WARD), "--patients", "300", "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert CAUTION in out
    folder = tmp_path / WARD.stem / "latest"
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["patients"] == 300 and summary["caution"] == CAUTION
    assert (folder / "manifest.json").exists()


def test_run_json_prints_valid_json(tmp_path, capsys):
    assert main(["run", str(WARD), "--patients", "300", "--json", "--out", str(tmp_path)]) == 0
    data = json.loads(capsys.readouterr().out)  # the whole of stdout is one JSON document
    assert data["caution"] == CAUTION
    assert "validation" in data and all("agrees" in v for v in data["validation"].values())


# ------------------------------------------------------------------------- other commands

def subcommands() -> list[str]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return sorted(action.choices)


def test_every_documented_command_exists():
    # the commands of the README's table
    assert {"check", "trace", "chain", "population", "run", "sensitivity",
            "benchmark"} <= set(subcommands())


@pytest.mark.parametrize("command", [[], *([c] for c in subcommands())],
                         ids=lambda c: c[0] if c else "microsim")
def test_help_works_for_every_command(command, capsys):
    with pytest.raises(SystemExit) as done:
        main([*command, "--help"])
    assert done.value.code == 0
    assert capsys.readouterr().out.startswith("usage: microsim")


@pytest.mark.parametrize("command, tables", [
    (["population", "--patients", "200"], {"population", "population_summary"}),
    (["chain"], {"expected_outcomes"}),
    (["sensitivity", "--patients", "100"], {"one_way"}),
])
def test_demo_commands_run_and_write(command, tables, tmp_path, capsys):
    assert main([command[0], str(DEMO), *command[1:], "--out", str(tmp_path)]) == 0
    assert capsys.readouterr().err == ""
    folder = tmp_path / DEMO.stem / "latest"
    for name in tables:
        assert (folder / f"{name}.csv").exists() and (folder / f"{name}.parquet").exists()
    assert (folder / "manifest.json").exists()
    if command[0] == "population":
        assert len(pd.read_parquet(folder / "population.parquet")) == 200
    if command[0] == "sensitivity":
        one_way = pd.read_parquet(folder / "one_way.parquet")
        # one row per parameter of the demo that carries a low..high range
        ranged = {n for n, p in read_scenario(DEMO).parameters.items() if p.low is not None}
        assert ranged and set(one_way.parameter) == ranged


# ------------------------------------------------------- the command line's own refusals

COMMAND_LINES = {  # argv after the command name, the start of the one line on stderr
    "draws-without-psa": (["run", WARD, "--draws", "5"],
                          "error: --draws: only acts on the PSA; add --psa, or leave it out"),
    "workers-without-psa": (["run", WARD, "--workers", "2"],
                            "error: --workers: only acts on the PSA; add --psa"),
    "patients-not-a-number": (["run", WARD, "--patients", "abc"],
                              "error: --patients: must be a whole number, got 'abc'"),
    "rows-not-whole": (["trace", WARD, "--rows", "1.5"],
                       "error: --rows: must be a whole number, got '1.5'"),
    "draws-zero": (["run", WARD, "--psa", "--draws", "0"],
                   "error: --draws: must be a whole number from 1 to"),
    "value-missing": (["run", WARD, "--patients"], "error: --patients: needs a value"),
    "unknown-option": (["run", WARD, "--bogus", "3"],
                       "error: --bogus: unknown option or extra argument; see "
                       "`microsim run --help`"),
    "unknown-choice": (["validate", WARD, "--engine", "fast"],
                       "error: --engine: no 'fast'; choose from auto, simpy, vectorised"),
    "measure-typo": (["sensitivity", WARD, "--measure", "nmbb"],
                     "error: --measure: no measure 'nmbb' (did you mean 'nmb'?); choose one of"),
    "command-typo": (["runn", WARD], "error: COMMAND: no 'runn' (did you mean 'run'?); choose from"),
    "missing-scenario": (["run"], "error: scenario: missing; see `microsim run --help`"),
    "unknown-command": (["frobnicate", WARD], "error: COMMAND: no 'frobnicate'; choose from check"),
}


@pytest.mark.parametrize("case", COMMAND_LINES)
def test_a_bad_command_line_is_one_line_not_the_usage(case, tmp_path, capsys):
    argv, start = COMMAND_LINES[case]
    out = tmp_path / "out"
    assert main([*map(str, argv), "--out", str(out)]) == 2
    refused(capsys.readouterr(), start)
    assert not out.exists()


def test_the_entry_point_refuses_in_one_line_with_exit_2_and_helps_with_0(tmp_path):
    done = subprocess.run([ENTRY_POINT, "run", WARD, "--patients", "abc",
                           "--out", tmp_path / "out"], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert done.stderr.splitlines() == ["error: --patients: must be a whole number, got 'abc'"]
    assert done.stdout == "" and not (tmp_path / "out").exists()
    helped = subprocess.run([ENTRY_POINT, "run", "--help"], capture_output=True, text=True,
                            timeout=120)
    assert helped.returncode == 0 and helped.stdout.startswith("usage: microsim run")


# ------------------------------------------------------------ --out is checked before work

def out_in_the_way(tmp_path: Path) -> tuple[Path, str]:
    """--out names a regular file."""
    (tmp_path / "notes.txt").write_text("mine")
    return tmp_path / "notes.txt", "notes.txt is a file, not a folder"


def out_under_a_file(tmp_path: Path) -> tuple[Path, str]:
    """--out lies under a regular file: no one, root included, can create it."""
    (tmp_path / "notes.txt").write_text("mine")
    return tmp_path / "notes.txt" / "results", "notes.txt is a file, not a folder"


def run_folder_is_a_file(tmp_path: Path) -> tuple[Path, str]:
    """The scenario's own folder under --out is a regular file."""
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / WARD.stem).write_text("mine")
    return tmp_path / "out", f"{WARD.stem} is a file, not a folder"


OUT_PROBLEMS = {"a file": out_in_the_way, "under a file": out_under_a_file,
                "run folder is a file": run_folder_is_a_file}


@pytest.mark.parametrize("problem", OUT_PROBLEMS)
@pytest.mark.parametrize("command", WRITING + [["validate", "--histories"]], ids=lambda c: c[0])
def test_an_out_that_cannot_take_files_is_refused_before_any_work(problem, command, tmp_path,
                                                                     capsys):
    out, phrase = OUT_PROBLEMS[problem](tmp_path)
    before = snapshot(tmp_path)
    assert main([command[0], str(WARD), *command[1:], "--out", str(out)]) == 2
    line = refused(capsys.readouterr(), "error: --out: ")  # nothing printed: no work done
    assert phrase in line
    assert snapshot(tmp_path) == before


def test_a_psa_folder_that_is_a_file_is_refused_before_any_work(tmp_path, capsys):
    (tmp_path / WARD.stem).mkdir()
    (tmp_path / WARD.stem / "psa").write_text("mine")
    before = snapshot(tmp_path)
    assert main(["run", str(WARD), "--psa", "--draws", "2", "--out", str(tmp_path)]) == 2
    assert "psa is a file, not a folder" in refused(capsys.readouterr(), "error: --out: ")
    assert snapshot(tmp_path) == before


def test_a_folder_that_refuses_files_is_refused_before_any_work(tmp_path, monkeypatch, capsys):
    """Permission bits do not stop root (CI runs as root), so the refusal of the operating
    system is simulated where the check meets it: the probe file."""
    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES))

    monkeypatch.setattr(tempfile, "TemporaryFile", refuse)
    assert main(["run", str(WARD), "--patients", "20", "--out", str(tmp_path / "out")]) == 2
    line = refused(capsys.readouterr(), "error: --out: cannot write in ")
    assert os.strerror(errno.EACCES) in line
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------- a write that fails after the work

def disk_full(monkeypatch):
    """Every Parquet file fails as on a full disk."""
    def to_parquet(self, *args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(pd.DataFrame, "to_parquet", to_parquet)


def test_a_full_disk_is_one_line_exit_74_and_earlier_outputs_stay(tmp_path, monkeypatch, capsys):
    assert main(["trace", str(WARD), "--out", str(tmp_path)]) == 0
    capsys.readouterr()
    before = snapshot(tmp_path)
    disk_full(monkeypatch)
    assert main(["trace", str(WARD), "--rows", "3", "--out", str(tmp_path)]) == 74
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and err[0].startswith("error: --out: could not write "), err
    assert os.strerror(errno.ENOSPC) in err[0]
    assert snapshot(tmp_path) == before  # every earlier file as it was, nothing new


def test_a_full_disk_on_a_first_run_leaves_nothing(tmp_path, monkeypatch, capsys):
    disk_full(monkeypatch)
    assert main(["validate", str(WARD), "--patients", "20", "--histories",
                 "--out", str(tmp_path / "out")]) == 74
    assert capsys.readouterr().err.startswith("error: --out: could not write ")
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------- histories land with the run

def test_histories_land_with_the_run(tmp_path, capsys):
    assert main(["validate", str(WARD), "--patients", "30", "--histories",
                 "--out", str(tmp_path)]) == 0
    folder = tmp_path / WARD.stem / "latest"
    record = json.loads((folder / "manifest.json").read_text())
    assert "histories.parquet" in record["files"]
    histories = pd.read_parquet(folder / "histories.parquet")
    assert set(histories.patient) == set(range(30))
    assert sorted(p.name for p in tmp_path.iterdir()) == [WARD.stem]  # no scratch left
    assert sorted(p.name for p in (tmp_path / WARD.stem).iterdir()) == [
        folder.resolve().name, "latest"]


def test_histories_of_a_refused_validation_are_not_left_behind(tmp_path, monkeypatch, capsys):
    """The comparison refuses after the simulation streamed every history."""
    from microsim.results.comparison import ComparisonSums
    from microsim.scenario import ScenarioError

    def refuse(self):
        raise ScenarioError("simulation.grid", "refused after simulating (test)")

    monkeypatch.setattr(ComparisonSums, "finish", refuse)
    out = tmp_path / "out"
    assert main(["validate", str(WARD), "--patients", "30", "--histories", "--out", str(out)]) == 2
    refused(capsys.readouterr(), "error: simulation.grid: refused after simulating")
    assert list(tmp_path.iterdir()) == []


# -------------------------------------------------------------------------- interrupts

def interrupt(*args, **kwargs):
    raise KeyboardInterrupt


def test_an_interrupted_run_without_psa_says_nothing_was_written(tmp_path, monkeypatch, capsys):
    import microsim.workflow
    monkeypatch.setattr(microsim.workflow, "run_main", interrupt)
    assert main(["run", str(WARD), "--out", str(tmp_path)]) == 130
    err = capsys.readouterr().err
    assert err.splitlines() == ["interrupted: nothing was written; outputs already there are "
                                "unchanged"]
    assert "PSA" not in err and list(tmp_path.iterdir()) == []


def test_ctrl_c_during_a_psa_keeps_its_draws_and_says_where(tmp_path):
    """SIGINT (what Ctrl-C sends) to the installed entry point once a draw is on disk."""
    out = tmp_path / "out"
    root = out / WARD.stem / "psa"  # each PSA's folder in it is named by its settings
    process = subprocess.Popen(
        [ENTRY_POINT, "run", WARD, "--patients", "20", "--psa", "--draws", "5000",
         "--patients-per-draw", "100", "--out", out], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        text=True)
    try:
        deadline = time.monotonic() + 120
        while not any(root.glob("*/draws/draw-*.parquet")) and process.poll() is None:
            assert time.monotonic() < deadline, "no PSA draw finished in time"
            time.sleep(0.05)
        process.send_signal(signal.SIGINT)
        stdout, stderr = process.communicate(timeout=120)
    finally:
        process.kill()
    assert process.returncode == 130, stderr
    assert stderr.splitlines()[-1] == (f"interrupted: the PSA draws finished so far are kept in "
                                       f"{out / WARD.stem / 'psa'}; run the same command again "
                                       "to resume")
    assert "Traceback" not in stderr and stdout == ""
    assert any(root.glob("*/draws/draw-*.parquet"))
    assert not (out / WARD.stem / "manifest.json").exists()  # the run's own files: none


# ------------------------------------------------------------- the seed given is the seed used

def test_population_and_sensitivity_use_the_seed_given(tmp_path, capsys):
    tables = {}
    for seed in (1, 2):
        for command, table in (("population", "population"), ("sensitivity", "one_way")):
            out = tmp_path / f"{command}-{seed}"
            assert main([command, str(DEMO), "--patients", "60", "--seed", str(seed),
                         "--out", str(out)]) == 0
            folder = out / DEMO.stem / "latest"
            assert json.loads((folder / "manifest.json").read_text())["seed"] == seed
            tables[command, seed] = pd.read_parquet(folder / f"{table}.parquet")
    capsys.readouterr()
    assert not tables["population", 1].equals(tables["population", 2])
    assert not tables["sensitivity", 1].equals(tables["sensitivity", 2])


def test_a_psa_with_another_seed_runs_beside_the_first(tmp_path, capsys):
    command = ["run", str(WARD), "--patients", "20", "--psa", "--draws", "2",
               "--patients-per-draw", "20", "--out", str(tmp_path)]
    assert main([*command, "--seed", "1"]) == 0
    assert main([*command, "--seed", "2"]) == 0
    assert len(list((tmp_path / WARD.stem / "psa").iterdir())) == 2


def test_an_engine_the_model_cannot_use_is_refused_before_any_work(tmp_path, capsys):
    service = ROOT / "scenarios" / "fenmoor_joint_waiting.toml"
    assert main(["run", str(service), "--engine", "vectorised",
                 "--out", str(tmp_path / "out")]) == 2
    refused(capsys.readouterr(), "error: --engine: patients who share capacity run on the "
                                 "SimPy capacity engine")
    assert list(tmp_path.iterdir()) == []


def test_a_reader_that_closes_the_pipe_ends_the_command_quietly(tmp_path):
    # `microsim trace ... | head -2`: no traceback, the shell's code for a closed pipe,
    # and nothing half-written: the run's files are all there (with their manifest) or none
    # a trace of some 200 kB, far more than a pipe holds, so the write that follows
    # head's exit fails whatever the timing (a short one may be written whole before)
    scenario = tmp_path / "long.toml"
    scenario.write_text(scenario_text(horizon(8000), start(well=1.0), state("well"),
                                      state("dead", absorbing=True),
                                      probability("well", "dead", 1e-5),
                                      probability("well", "well", "remainder")))
    command = (f"'{ENTRY_POINT}' trace '{scenario}' --out '{tmp_path / 'out'}' --rows 8000 "
               "| head -2")
    done = subprocess.run(["bash", "-c", f"{command}; echo ${{PIPESTATUS[0]}} >&2"],
                          capture_output=True, text=True, timeout=120)
    assert "Traceback" not in done.stderr and done.stderr.split()[-1] == "141", done.stderr
    written = list((tmp_path / "out").rglob("*.csv"))
    assert not written or (written[0].parent / "manifest.json").is_file()


def test_a_strategys_validation_names_it_and_its_histories_carry_the_treatment(tmp_path, capsys):
    assert main(["validate", str(DEMO), "--strategy", "protein_lowering", "--patients", "200",
                 "--histories", "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("Validation — Chronic kidney disease progression in Lakemoor, "
                          "strategy protein_lowering: 200 patients")
    assert "histories.parquet and manifest.json" in out
    histories = pd.read_parquet(tmp_path / DEMO.stem / "latest" / "histories.parquet")
    assert set(histories.strategy) == {"protein_lowering"}
    treated = histories.dropna(subset=["treatment_start"])
    # the eligibility rule of the demo's strategy: biomarker at least 1.0 and age below 80
    assert len(treated) and (treated.biomarker >= 1.0).all() and (treated.age < 80).all()


def test_rows_prints_exactly_that_many_rows(tmp_path, capsys):
    assert main(["trace", str(DEMO), "--rows", "3", "--out", str(tmp_path)]) == 0
    lines = capsys.readouterr().out.splitlines()
    header = next(k for k, line in enumerate(lines) if line.split()[:1] == ["time"])
    shown = lines[header + 1:header + 5]
    assert [line.split()[0] for line in shown] == ["0", "1", "...", "40"]
    assert shown[2] == "... (38 rows not shown)"
