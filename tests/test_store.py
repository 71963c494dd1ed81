"""Writing a run: every table as CSV and Parquet plus the manifest, all or nothing.

References outside the project: pandas (read_csv) and pyarrow (read_parquet) reading the
files back, json.loads for the manifest, pyarrow's own refusal of a column type it
cannot store (complex numbers), and errno/os.strerror for the operating system's ENOSPC.
The rule checked is DESIGN.md's: outputs are written atomically, so a failed write leaves
neither new files nor a staging folder behind, and the files already there as they were.
"""
from __future__ import annotations

import errno
import json
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from pathlib import Path

from microsim import store
from microsim.store import OutputError, scratch_folder, unwritable, write_run

TABLES = {
    "trace": pd.DataFrame({"time": [0.0, 1.0, 2.0], "state": ["well", "sick", "dead"],
                           "share": [1.0, 0.25, 0.125]}),
    "counts": pd.DataFrame({"patient": np.arange(4, dtype=np.int64), "events": [0, 2, 1, 5]}),
}
RECORD = {"scenario": "x.toml", "seed": 3}


def listing(folder):
    return sorted(p.name for p in folder.iterdir())


def test_write_run_writes_every_table_document_and_the_manifest(tmp_path):
    target = tmp_path / "run"
    written = write_run(target, TABLES, RECORD, documents={"summary": {"answer": 42}})
    expected = ["counts.csv", "counts.parquet", "manifest.json", "summary.json",
                "trace.csv", "trace.parquet"]
    assert listing(target) == expected
    assert sorted(p.name for p in written) == expected
    assert written[-1].name == "manifest.json"  # moved in last: its presence means complete
    for name, table in TABLES.items():
        pd.testing.assert_frame_equal(pd.read_parquet(target / f"{name}.parquet"), table)
        pd.testing.assert_frame_equal(pd.read_csv(target / f"{name}.csv"), table,
                                      check_dtype=False)
    manifest = json.loads((target / "manifest.json").read_text())
    assert manifest["seed"] == 3 and manifest["scenario"] == "x.toml"
    assert manifest["files"] == [n for n in expected if n != "manifest.json"]
    assert json.loads((target / "summary.json").read_text()) == {"answer": 42}
    assert listing(tmp_path) == ["run"]  # no staging folder left


def unsupported_column(tables):
    """pyarrow cannot store complex numbers: to_parquet raises (pyarrow as reference)."""
    return {**tables, "zz_bad": pd.DataFrame({"z": np.array([1 + 2j, 3j])})}


def failing_parquet(monkeypatch):
    """Every table after the first fails to become Parquet (a full disk, say)."""
    original, calls = pd.DataFrame.to_parquet, []

    def to_parquet(self, *args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise OSError("disk full (simulated)")
        return original(self, *args, **kwargs)

    monkeypatch.setattr(pd.DataFrame, "to_parquet", to_parquet)
    return TABLES, {}, OSError


FAILURES = {  # each gives (tables, documents, the error) of a write that must fail
    "unsupported column type": lambda monkeypatch: (unsupported_column(TABLES), {},
                                                    pa.ArrowException),
    "to_parquet raises": failing_parquet,
    "document not JSON": lambda monkeypatch: (TABLES, {"summary": {"n": np.int64(1)}}, TypeError),
}


def test_complex_numbers_really_are_refused_by_pyarrow(tmp_path):
    with pytest.raises(pa.ArrowException):
        unsupported_column({})["zz_bad"].to_parquet(tmp_path / "x.parquet")


@pytest.mark.parametrize("failure", FAILURES)
def test_a_failed_write_leaves_nothing_behind(failure, tmp_path, monkeypatch):
    tables, documents, error = FAILURES[failure](monkeypatch)
    target = tmp_path / "run"
    with pytest.raises(error):
        write_run(target, tables, RECORD, documents=documents)
    assert not target.exists()  # nothing appears where the run was going
    assert listing(tmp_path) == []  # and no staging folder is left beside it


@pytest.mark.parametrize("failure", FAILURES)
def test_an_existing_target_keeps_its_files_when_a_write_fails(failure, tmp_path, monkeypatch):
    target = tmp_path / "run"
    target.mkdir()
    (target / "notes.txt").write_text("mine")
    (target / "trace.csv").write_text("old")
    tables, documents, error = FAILURES[failure](monkeypatch)
    with pytest.raises(error):
        write_run(target, tables, RECORD, documents=documents)
    assert listing(target) == ["notes.txt", "trace.csv"]
    assert (target / "trace.csv").read_text() == "old"
    assert listing(tmp_path) == ["run"]


def test_a_successful_write_replaces_its_own_files_and_leaves_others_alone(tmp_path):
    target = tmp_path / "run"
    target.mkdir()
    (target / "notes.txt").write_text("mine")
    (target / "trace.csv").write_text("old")
    write_run(target, TABLES, RECORD)
    assert (target / "notes.txt").read_text() == "mine"
    pd.testing.assert_frame_equal(pd.read_csv(target / "trace.csv"), TABLES["trace"])
    assert "notes.txt" not in json.loads((target / "manifest.json").read_text())["files"]
    assert listing(tmp_path) == ["run"]


def test_a_failed_move_into_the_target_leaves_no_new_files(tmp_path):
    target = tmp_path / "run"
    (target / "trace.csv").mkdir(parents=True)  # in the way of one of the run's files
    with pytest.raises(OSError):
        write_run(target, TABLES, RECORD)
    assert listing(target) == ["trace.csv"]


def snapshot(folder):
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def earlier_run(tmp_path):
    target = tmp_path / "run"
    write_run(target, {"trace": TABLES["trace"].head(1)}, {"seed": 1},
              documents={"summary": {"old": True}})
    (target / "notes.txt").write_text("mine")
    return target, snapshot(tmp_path)


def full_disk_at_move(monkeypatch, failing: set[int]):
    """os.replace in store fails as on a full disk at the given calls (counted from 1)."""
    original, calls = os.replace, []

    def replace(source, target):
        calls.append(1)
        if len(calls) in failing:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return original(source, target)

    monkeypatch.setattr(store.os, "replace", replace)


@pytest.mark.parametrize("call", [1, 2, 5, 9])
def test_a_full_disk_while_moving_in_puts_every_earlier_file_back(call, tmp_path, monkeypatch):
    target, before = earlier_run(tmp_path)
    full_disk_at_move(monkeypatch, {call})
    with pytest.raises(OutputError) as caught:
        write_run(target, TABLES, RECORD, documents={"summary": {"new": True}})
    assert caught.value.errno == errno.ENOSPC and caught.value.filename == str(target)
    assert snapshot(tmp_path) == before  # old files back, no new one, no staging left


def test_replaced_files_that_cannot_be_put_back_are_kept_and_named(tmp_path, monkeypatch):
    target, before = earlier_run(tmp_path)
    # moves: counts.csv, counts.parquet (new), summary.json aside, summary.json in; the 5th
    # (trace.csv aside) fails, and so does putting summary.json back (the 6th call)
    full_disk_at_move(monkeypatch, {5, 6})
    with pytest.raises(OutputError) as caught:
        write_run(target, TABLES, RECORD, documents={"summary": {"new": True}})
    message = caught.value.strerror
    assert "summary.json could not be put back" in message
    kept = Path(message.split("are kept in ")[1])
    assert (kept / "summary.json").read_bytes() == before["run/summary.json"]
    assert listing(target) == ["manifest.json", "notes.txt", "trace.csv", "trace.parquet"]
    for name in ("manifest.json", "notes.txt", "trace.csv", "trace.parquet"):
        assert (target / name).read_bytes() == before[f"run/{name}"]  # the rest as it was


def test_files_move_in_with_the_tables(tmp_path):
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    (scratch / "histories.parquet").write_bytes(b"streamed")
    target = tmp_path / "run"
    write_run(target, TABLES, RECORD, files={"histories.parquet": scratch / "histories.parquet"})
    assert (target / "histories.parquet").read_bytes() == b"streamed"
    assert "histories.parquet" in json.loads((target / "manifest.json").read_text())["files"]
    assert listing(scratch) == []


def test_unwritable_names_a_file_in_the_way_and_accepts_a_new_folder(tmp_path):
    (tmp_path / "notes.txt").write_text("mine")
    assert unwritable(tmp_path / "a" / "b") is None
    assert unwritable(tmp_path) is None
    assert "notes.txt is a file, not a folder" in unwritable(tmp_path / "notes.txt" / "run")
    assert listing(tmp_path) == ["notes.txt"]  # the checks leave nothing behind


def test_a_scratch_folder_is_removed_either_way(tmp_path):
    with pytest.raises(RuntimeError):
        with scratch_folder(tmp_path / "not" / "yet") as scratch:
            (scratch / "big.parquet").write_bytes(b"x")
            raise RuntimeError
    assert listing(tmp_path) == []
