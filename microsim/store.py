"""Writing results: tidy CSV and Parquet tables plus a run manifest, all atomically.

A run's files appear together or not at all: everything is written into a hidden
staging folder beside the target and moved into place only when every file is complete,
so an interrupted or refused run never leaves half-written outputs. A write that fails (a
full disk, say) raises `OutputError` and leaves the files already there as they were.
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

PACKAGES = ("microsim", "numpy", "scipy", "pandas", "pyarrow", "simpy", "tqdm", "dask",
            "distributed")


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


def write_run(out_dir: Path, tables: dict[str, pd.DataFrame], record: dict,
              formats: tuple[str, ...] = ("csv", "parquet"),
              documents: dict[str, dict] | None = None,
              files: dict[str, Path] | None = None) -> list[Path]:
    """Write each table as `<name>.<format>`, each document as `<name>.json`, and
    `manifest.json` into out_dir, atomically, with `files` (name: a finished file, such as
    streamed histories) moved in beside them.

    Each file is complete before it is moved in; files of the same names already in
    out_dir are replaced, other files are left alone. An OSError becomes OutputError.
    """
    out_dir = Path(out_dir)
    created, staging, moved = missing_folders(out_dir), None, False
    try:
        with writing(out_dir):
            out_dir.parent.mkdir(parents=True, exist_ok=True)
            staging = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}-", dir=out_dir.parent))
            paths = stage(staging, tables, record, formats, documents or {}, files or {})
            out_dir.mkdir(exist_ok=True)
            move_all(paths, out_dir, staging / ".previous")
        moved = True
        return [out_dir / p.name for p in paths]
    finally:
        # kept only if it holds replaced files that could not be put back (OutputError says so)
        if staging is not None and (moved or not any((staging / ".previous").glob("*"))):
            shutil.rmtree(staging, ignore_errors=True)
        if not moved:
            remove_empty(created)


def stage(staging: Path, tables: dict[str, pd.DataFrame], record: dict,
          formats: tuple[str, ...], documents: dict[str, dict],
          files: dict[str, Path]) -> list[Path]:
    """Write the run into the staging folder; the paths in the order they move in."""
    for name, table in tables.items():
        for fmt in formats:
            target = staging / f"{name}.{fmt}"
            if fmt == "csv":
                table.to_csv(target, index=False)
            elif fmt == "parquet":
                table.to_parquet(target, index=False)
            else:
                raise ValueError(f"unknown output format {fmt!r}")
    for name, document in documents.items():
        (staging / f"{name}.json").write_text(json.dumps(document, indent=2) + "\n")
    for name, source in files.items():
        shutil.move(source, staging / name)
    record = {**record, "files": sorted(p.name for p in staging.iterdir())}
    (staging / "manifest.json").write_text(json.dumps(record, indent=2) + "\n")
    # The manifest moves last: its presence says the run's files are complete.
    return sorted(staging.iterdir(), key=lambda p: (p.name == "manifest.json", p.name))


def move_all(paths: list[Path], out_dir: Path, backup: Path) -> None:
    """Move every path into out_dir, or none: files they replace are set aside first and
    put back if any move fails."""
    backup.mkdir()
    done: list[tuple[Path, Path | None]] = []
    try:
        for path in paths:
            target = out_dir / path.name
            kept = None
            if target.is_file():
                kept = backup / path.name
                os.replace(target, kept)
            done.append((target, kept))
            os.replace(path, target)
    except BaseException as error:
        stuck = []
        for target, kept in reversed(done):
            if target.is_file():
                target.unlink()
            if kept is not None:
                try:
                    os.replace(kept, target)
                except OSError:
                    stuck.append(target.name)
        if stuck:
            raise OutputError(getattr(error, "errno", None), f"{error}; the earlier "
                              f"{', '.join(stuck)} could not be put back and are kept in "
                              f"{backup}", str(out_dir)) from error
        raise
