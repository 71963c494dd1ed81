"""The command line, through microsim.cli.main and once through `python -m microsim`.

References outside the project: hashlib.sha256 of the scenario file's bytes and the
installed versions from importlib.metadata (the manifest); json.loads (the --json
output); pandas reading back the CSV and Parquet tables; argparse's own --help exit code 0.
The rules checked are DESIGN.md's: bad input gives one line on stderr starting with
"error: " that names the field, exit code 2, no traceback, and nothing written.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import pandas as pd
import pytest

from microsim import CAUTION
from microsim.cli import build_parser, main
from microsim.scenario import read_scenario
from support import horizon, probability, rate, scenario_text, start, state

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = sorted((ROOT / "scenarios").glob("*.toml"))
DEMO = ROOT / "scenarios" / "lakemoor_kidney.toml"
WARD = ROOT / "scenarios" / "ward_recovery.toml"


def python_m(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "microsim", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


# ------------------------------------------------------------------------------- check

@pytest.mark.parametrize("path", SCENARIOS, ids=[p.name for p in SCENARIOS])
def test_check_accepts_every_shipped_scenario(path, capsys):
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr()
    assert out.out.startswith("ok: ") and out.err == ""


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
WRITING = [["trace"], ["summary"], ["run", "--patients", "10"], ["population", "--patients", "10"],
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
    folder = tmp_path / WARD.stem
    names = {p.name for p in folder.iterdir()}
    assert {"cohort_trace.csv", "cohort_trace.parquet", "manifest.json"} <= names
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


def test_trace_through_python_m_records_the_command(tmp_path):
    done = python_m("trace", WARD, "--out", tmp_path)
    assert done.returncode == 0, done.stderr
    record = json.loads((tmp_path / WARD.stem / "manifest.json").read_text())
    assert record["command"] == f"microsim trace {WARD} --out {tmp_path}"


def test_trace_through_main_records_the_command(tmp_path):
    assert main(["trace", str(WARD), "--out", str(tmp_path)]) == 0
    record = json.loads((tmp_path / WARD.stem / "manifest.json").read_text())
    assert record["command"] == f"microsim trace {WARD} --out {tmp_path}"


# --------------------------------------------------------------------------------- run

def test_run_writes_the_summary_and_shows_the_caution(tmp_path, capsys):
    assert main(["run", str(WARD), "--patients", "300", "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert CAUTION in out
    folder = tmp_path / WARD.stem
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
    assert {"check", "trace", "summary", "population", "run", "sensitivity",
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
    (["summary"], {"expected_outcomes"}),
    (["sensitivity", "--patients", "100"], {"one_way"}),
])
def test_demo_commands_run_and_write(command, tables, tmp_path, capsys):
    assert main([command[0], str(DEMO), *command[1:], "--out", str(tmp_path)]) == 0
    assert capsys.readouterr().err == ""
    folder = tmp_path / DEMO.stem
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
