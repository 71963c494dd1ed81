"""Writing results: one new folder per run, with tidy CSV and Parquet tables and a
manifest, written atomically.

Every command that writes makes a new run folder `<root>/<run id>/` (the id sorts by time:
`20261201T213015.123456Z-run`) and points `<root>/latest` at it, so files of an earlier
run never mix with a new one's. The run is written into a hidden staging folder beside it
and renamed into place only when every file is complete, so an interrupted, refused or
failed run leaves no half-written outputs, and earlier runs are never touched. The
manifest lists every file of the run with its SHA-256, beside the scenario's hash (a copy
of the scenario file is in the folder), the command line, the seed, package versions and
timings. A write that fails (a full disk, say) raises `OutputError`.
"""
from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Callable, Iterator

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

PACKAGES = ("microsim", "numpy", "scipy", "pandas", "pyarrow", "simpy", "tqdm", "dask",
            "distributed", "matplotlib", "jinja2", "networkx")
LATEST = "latest"  # the pointer (a symbolic link) to a root's newest run folder
MANIFEST = "manifest.json"
SCENARIO_COPY = "scenario.toml"


class OutputError(OSError):
    """Results could not be stored (a full disk, a folder gone or locked). Not bad input:
    the same command gives the same results once the place can take them."""


@contextmanager
def writing(target: Path) -> Iterator[None]:
    """Turn an OSError while writing `target` into an OutputError naming it."""
    try:
        yield
    except OutputError:
        raise
    except OSError as error:
        raise OutputError(error.errno, error.strerror or str(error), str(target)) from error


def missing_folders(path: Path) -> list[Path]:
    """The folders of `path` (itself and its parents) that do not exist yet, deepest first."""
    path = Path(path).absolute()
    return [p for p in (path, *path.parents) if not p.exists()]


def remove_empty(folders: list[Path]) -> None:
    """Remove the folders (deepest first) a failed write created, as long as they are empty."""
    for folder in folders:
        try:
            folder.rmdir()
        except FileNotFoundError:
            continue  # not made after all
        except OSError:
            return  # holds something: it and its parents stay


def nearest_folder(path: Path) -> Path:
    """`path` itself, or the nearest of its parents that exists."""
    path = Path(path).absolute()
    while not path.exists() and path != path.parent:
        path = path.parent
    return path


def unwritable(out_dir: Path) -> str | None:
    """Why write_run could not put files into out_dir (a file in the way, a folder that takes
    no files), or None. It tries for real with a probe file that vanishes on closing, since
    permission bits do not tell it for every user (they do not bind root)."""
    out_dir = Path(out_dir).absolute()
    existing = nearest_folder(out_dir)
    if not existing.is_dir():
        return f"{existing} is a file, not a folder; give a folder"
    # write_run stages beside out_dir and moves the files into it
    for place in [existing.parent, existing] if existing == out_dir else [existing]:
        try:
            with tempfile.TemporaryFile(dir=place):
                pass
        except OSError as error:
            return f"cannot write in {place} ({error.strerror}); give a folder you can write to"
    return None


@contextmanager
def scratch_folder(out_dir: Path) -> Iterator[Path]:
    """A hidden temporary folder on out_dir's file system, for large files a command streams
    before its run is written (write_run's `files` moves them in); removed either way."""
    scratch = Path(tempfile.mkdtemp(prefix=".microsim-", dir=nearest_folder(out_dir)))
    try:
        yield scratch
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def file_hash(path: Path) -> str:
    """SHA-256 of a file's bytes: the manifest's proof of which scenario produced a run."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def package_versions() -> dict[str, str]:
    versions = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def manifest(scenario_path: Path | None, started: float, command: list[str] | None = None,
             **extra) -> dict:
    """What a reader needs to reproduce a run: scenario hash, command, versions, time.
    `command` is the argument list the run was given (default: this process's)."""
    record = {
        "scenario": str(scenario_path) if scenario_path else None,
        "scenario_sha256": file_hash(scenario_path) if scenario_path else None,
        "command": " ".join(["microsim", *(sys.argv[1:] if command is None else command)]),
        "versions": package_versions(),
        "finished_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "wall_seconds": round(time.perf_counter() - started, 3),
    }
    record.update(extra)
    return record


def write_atomically(target: Path, write: Callable[[Path], None]) -> None:
    """One file, atomically: let `write` fill a temporary file beside `target`, then
    rename it into place (what the PSA folder uses for each draw)."""
    with writing(target):
        handle, temporary = tempfile.mkstemp(prefix=f".{target.name}-", suffix=".tmp",
                                             dir=target.parent)
        os.close(handle)
        try:
            write(Path(temporary))
            os.replace(temporary, target)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise


def run_id(command: str, now: datetime | None = None) -> str:
    """A run folder's name: the UTC time to the microsecond (so names sort by time), then
    the command."""
    return f"{(now or datetime.now(timezone.utc)):%Y%m%dT%H%M%S.%fZ}-{command}"


def write_run(root: Path, command: str, tables: dict[str, pd.DataFrame], record: dict,
              formats: tuple[str, ...] = ("csv", "parquet"),
              documents: dict[str, dict] | None = None,
              files: dict[str, Path] | None = None, scenario: Path | None = None) -> Path:
    """A new run folder under `root` holding each table as `<name>.<format>`, each document
    as `<name>.json`, `files` (name: a finished file, such as streamed histories) moved in,
    a copy of the scenario file, and `manifest.json`; `root/latest` then points at it.
    Returns the run folder. An OSError becomes OutputError (nothing is left behind)."""
    root = Path(root)
    created = missing_folders(root)
    try:
        with writing(root):
            root.mkdir(parents=True, exist_ok=True)
            staging = Path(tempfile.mkdtemp(prefix=".staging-", dir=root))
            try:
                stage(staging, tables, record, formats, documents or {}, files or {}, scenario)
                folder = place(staging, root, run_id(command))
            except BaseException:
                shutil.rmtree(staging, ignore_errors=True)
                raise
            point_latest(root, folder.name)
    except BaseException:
        remove_empty(created)
        raise
    return folder


def stage(staging: Path, tables: dict[str, pd.DataFrame], record: dict,
          formats: tuple[str, ...], documents: dict[str, dict], files: dict[str, Path],
          scenario: Path | None) -> None:
    """Write the run into the staging folder, the manifest last."""
    for name, table in tables.items():
        for fmt in formats:
            target = staging / f"{name}.{fmt}"
            if fmt == "csv":
                table.to_csv(target, index=False)
            elif fmt == "parquet":
                write_parquet(table, target)
            else:
                raise ValueError(f"unknown output format {fmt!r}")
    for name, document in documents.items():
        (staging / f"{name}.json").write_text(json.dumps(document, indent=2) + "\n")
    for name, source in files.items():
        shutil.move(source, staging / name)
    if scenario is not None:
        shutil.copyfile(scenario, staging / SCENARIO_COPY)
    write_manifest(staging, record)


PARQUET_ROWS = 200_000  # rows converted to Arrow at a time


def write_parquet(table: pd.DataFrame, target: Path) -> None:
    """`table` as one Parquet file, converted and written PARQUET_ROWS rows at a time (row
    groups): converting a million patients' outcomes at once held a copy of them all."""
    if len(table) <= PARQUET_ROWS:
        table.to_parquet(target, index=False)
        return
    first = pa.Table.from_pandas(table.iloc[:PARQUET_ROWS], preserve_index=False)
    with pq.ParquetWriter(target, first.schema) as writer:
        writer.write_table(first)
        for lo in range(PARQUET_ROWS, len(table), PARQUET_ROWS):
            writer.write_table(pa.Table.from_pandas(table.iloc[lo:lo + PARQUET_ROWS],
                                                    schema=first.schema, preserve_index=False))


def file_hashes(folder: Path) -> dict[str, str]:
    """Every file under `folder` but the manifest (relative path: SHA-256), sorted."""
    return {str(p.relative_to(folder)): file_hash(p) for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != MANIFEST}


def write_manifest(folder: Path, record: dict) -> None:
    """The manifest of `folder`: `record` and the hash of every file in it, atomically."""
    content = json.dumps({**record, "files": file_hashes(folder)}, indent=2) + "\n"
    write_atomically(folder / MANIFEST, lambda path: path.write_text(content))


def add_to_manifest(folder: Path) -> None:
    """Rehash a finished run folder's files into its manifest (after a report is added)."""
    record = json.loads((folder / MANIFEST).read_text())
    record.pop("files", None)
    with writing(folder):
        write_manifest(folder, record)


def place(staging: Path, root: Path, name: str) -> Path:
    """Rename the staged run to its own name (a later one if a run of the same microsecond
    already has it): one atomic rename, so the folder appears whole."""
    for attempt in range(100):
        folder = root / (name if attempt == 0 else f"{name}-{attempt}")
        try:
            os.rename(staging, folder)  # refuses an existing non-empty folder
            return folder
        except OSError:
            if not folder.exists():
                raise
    raise OutputError(None, "too many runs with the same name", str(root))


def point_latest(root: Path, name: str) -> None:
    """Point root/latest at the run folder `name`, atomically (a new link renamed over the
    old one)."""
    link = root / f".{LATEST}-{os.getpid()}"
    link.unlink(missing_ok=True)
    os.symlink(name, link, target_is_directory=True)
    os.replace(link, root / LATEST)


def latest_run(root: Path, command: str | None = None) -> Path | None:
    """The newest run folder under root (through the latest pointer), or the newest made by
    `command`; None when there is none."""
    root = Path(root)
    if command is None:
        link = root / LATEST
        return link.resolve() if link.exists() else None
    runs = sorted(p for p in root.glob(f"*-{command}") if (p / MANIFEST).is_file())
    return runs[-1] if runs else None
