"""Writing a run: a new folder per run, every table as CSV and Parquet plus the manifest
with every file's hash, all or nothing, earlier runs untouched.

References outside the project: pandas (read_csv) and pyarrow (read_parquet) reading the
files back, json.loads for the manifest, hashlib.sha256 for the hashes, pyarrow's own
refusal of a column type it cannot store (complex numbers), and errno/os.strerror for the
operating system's ENOSPC. The rule checked is DESIGN.md's: outputs are written atomically,
so a failed write leaves neither new files nor a staging folder behind, and earlier runs as
they were.
"""
from __future__ import annotations

import errno
import hashlib
import json
import os
import re

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from microsim import store
from microsim.store import (LATEST, OutputError, add_to_manifest, latest_run, run_id,
                            scratch_folder, unwritable, write_run)

TABLES = {
    "trace": pd.DataFrame({"time": [0.0, 1.0, 2.0], "state": ["well", "sick", "dead"],
                           "share": [1.0, 0.25, 0.125]}),
    "counts": pd.DataFrame({"patient": np.arange(4, dtype=np.int64), "events": [0, 2, 1, 5]}),
}
RECORD = {"scenario": "x.toml", "seed": 3}


def listing(folder):
    return sorted(p.name for p in folder.iterdir())


def sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_write_run_makes_a_new_folder_with_every_file_and_its_hash(tmp_path):
    root = tmp_path / "scenario"
    scenario = tmp_path / "x.toml"
    scenario.write_text("title = 'x'\n")
    folder = write_run(root, "run", TABLES, RECORD, documents={"summary": {"answer": 42}},
                       scenario=scenario)
    expected = ["counts.csv", "counts.parquet", "manifest.json", "scenario.toml",
                "summary.json", "trace.csv", "trace.parquet"]
    assert listing(folder) == expected
    assert listing(root) == sorted([folder.name, LATEST])  # no staging folder left
    assert re.fullmatch(r"\d{8}T\d{6}\.\d{6}Z-run", folder.name)
    assert latest_run(root) == folder.resolve()
    for name, table in TABLES.items():
        pd.testing.assert_frame_equal(pd.read_parquet(folder / f"{name}.parquet"), table)
        pd.testing.assert_frame_equal(pd.read_csv(folder / f"{name}.csv"), table,
                                      check_dtype=False)
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["seed"] == 3 and manifest["scenario"] == "x.toml"
    assert manifest["files"] == {name: sha256(folder / name) for name in expected
                                 if name != "manifest.json"}
    assert (folder / "scenario.toml").read_bytes() == scenario.read_bytes()
    assert json.loads((folder / "summary.json").read_text()) == {"answer": 42}


def test_run_ids_sort_by_time():
    from datetime import datetime, timedelta, timezone
    now = datetime(2026, 12, 1, 9, 5, 7, 120, tzinfo=timezone.utc)
    names = [run_id("run", now + timedelta(microseconds=k)) for k in (0, 1, 999_999, 10**7)]
    assert names == sorted(names) and len(set(names)) == 4


def test_a_second_run_gets_its_own_folder_and_the_first_stays_as_it_was(tmp_path):
    root = tmp_path / "scenario"
    first = write_run(root, "run", TABLES, {"seed": 1})
    before = {p: p.read_bytes() for p in first.iterdir()}
    second = write_run(root, "trace", {"trace": TABLES["trace"]}, {"seed": 2})
    assert first != second and latest_run(root) == second.resolve()
    assert {p: p.read_bytes() for p in first.iterdir()} == before
    assert "counts.csv" not in listing(second)  # nothing of the first run mixes in


def unsupported_column(tables):
    """pyarrow cannot store complex numbers: to_parquet raises (pyarrow as reference)."""
    return {**tables, "zz_bad": pd.DataFrame({"z": np.array([1 + 2j, 3j])})}


def failing_parquet(monkeypatch):
    """Every table after the first fails to become Parquet (a full disk, say)."""
    original, calls = pd.DataFrame.to_parquet, []

    def to_parquet(self, *args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return original(self, *args, **kwargs)

    monkeypatch.setattr(pd.DataFrame, "to_parquet", to_parquet)
    return TABLES, {}, OutputError


FAILURES = {  # each gives (tables, documents, the error) of a write that must fail
    "unsupported column type": lambda monkeypatch: (unsupported_column(TABLES), {},
                                                    pa.ArrowException),
    "full disk while writing a table": failing_parquet,
    "document not JSON": lambda monkeypatch: (TABLES, {"summary": {"n": np.int64(1)}}, TypeError),
}


def test_complex_numbers_really_are_refused_by_pyarrow(tmp_path):
    with pytest.raises(pa.ArrowException):
        unsupported_column({})["zz_bad"].to_parquet(tmp_path / "x.parquet")


@pytest.mark.parametrize("failure", FAILURES)
def test_a_failed_write_leaves_nothing_behind(failure, tmp_path, monkeypatch):
    tables, documents, error = FAILURES[failure](monkeypatch)
    with pytest.raises(error):
        write_run(tmp_path / "out" / "scenario", "run", tables, RECORD, documents=documents)
    assert listing(tmp_path) == []  # not even the folders it would have made


def snapshot(folder):
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


@pytest.mark.parametrize("failure", FAILURES)
def test_earlier_runs_and_the_latest_pointer_survive_a_failed_write(failure, tmp_path,
                                                                    monkeypatch):
    root = tmp_path / "scenario"
    first = write_run(root, "run", {"trace": TABLES["trace"].head(1)}, {"seed": 1})
    before = snapshot(tmp_path)
    tables, documents, error = FAILURES[failure](monkeypatch)
    with pytest.raises(error):
        write_run(root, "run", tables, RECORD, documents=documents)
    assert snapshot(tmp_path) == before and latest_run(root) == first.resolve()
    assert listing(root) == sorted([first.name, LATEST])


def test_a_full_disk_at_the_rename_is_an_output_error_and_leaves_nothing(tmp_path, monkeypatch):
    root = tmp_path / "scenario"
    first = write_run(root, "run", TABLES, RECORD)

    def rename(source, target):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(store.os, "rename", rename)
    with pytest.raises(OutputError) as caught:
        write_run(root, "run", TABLES, RECORD)
    assert caught.value.errno == errno.ENOSPC and caught.value.filename == str(root)
    assert listing(root) == sorted([first.name, LATEST])


def test_files_move_in_with_the_tables(tmp_path):
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    (scratch / "histories.parquet").write_bytes(b"streamed")
    folder = write_run(tmp_path / "run", "validate", TABLES, RECORD,
                       files={"histories.parquet": scratch / "histories.parquet"})
    assert (folder / "histories.parquet").read_bytes() == b"streamed"
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["files"]["histories.parquet"] == sha256(folder / "histories.parquet")
    assert listing(scratch) == []


def test_a_report_added_later_is_hashed_into_the_manifest(tmp_path):
    folder = write_run(tmp_path / "run", "run", TABLES, RECORD)
    (folder / "figures").mkdir()
    (folder / "figures" / "trace.svg").write_text("<svg/>")
    (folder / "report.html").write_text("<html/>")
    add_to_manifest(folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["seed"] == 3
    assert manifest["files"]["report.html"] == sha256(folder / "report.html")
    assert manifest["files"]["figures/trace.svg"] == sha256(folder / "figures" / "trace.svg")


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


def test_the_newest_run_of_a_command_is_found_past_later_commands(tmp_path):
    root = tmp_path / "scenario"
    first = write_run(root, "run", TABLES, RECORD)
    write_run(root, "sensitivity", TABLES, RECORD)  # latest now points here
    assert latest_run(root, "run") == first and latest_run(root).name.endswith("-sensitivity")
    assert latest_run(root, "validate") is None


def test_a_large_table_is_written_in_row_groups_and_reads_back_whole(tmp_path, monkeypatch):
    from microsim import store
    monkeypatch.setattr(store, "PARQUET_ROWS", 7)
    table = pd.DataFrame({"patient": np.arange(30), "strategy": ["a", "b", "c"] * 10,
                          "costs": np.linspace(0, 1, 30)})
    store.write_parquet(table, tmp_path / "t.parquet")
    back = pd.read_parquet(tmp_path / "t.parquet")
    pd.testing.assert_frame_equal(back, table)
    import pyarrow.parquet as pq
    assert pq.ParquetFile(tmp_path / "t.parquet").num_row_groups == 5
