"""Writing results: tidy CSV and Parquet tables plus a run manifest, all atomically.

A run's files appear together or not at all: everything is written into a hidden
staging folder beside the target and moved into place only when every file is complete,
so an interrupted or refused run never leaves half-written outputs.
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
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Callable

import pandas as pd

PACKAGES = ("microsim", "numpy", "scipy", "pandas", "pyarrow", "simpy", "tqdm", "dask",
            "distributed")


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
              documents: dict[str, dict] | None = None) -> list[Path]:
    """Write each table as `<name>.<format>`, each document as `<name>.json`, and
    `manifest.json` into out_dir, atomically.

    Each file is complete before it is moved in; files of the same names already in
    out_dir are replaced, other files are left alone.
    """
    out_dir = Path(out_dir)
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}-", dir=out_dir.parent))
    try:
        for name, table in tables.items():
            for fmt in formats:
                target = staging / f"{name}.{fmt}"
                if fmt == "csv":
                    table.to_csv(target, index=False)
                elif fmt == "parquet":
                    table.to_parquet(target, index=False)
                else:
                    raise ValueError(f"unknown output format {fmt!r}")
        for name, document in (documents or {}).items():
            (staging / f"{name}.json").write_text(json.dumps(document, indent=2) + "\n")
        record = {**record, "files": sorted(p.name for p in staging.iterdir())}
        (staging / "manifest.json").write_text(json.dumps(record, indent=2) + "\n")
        out_dir.mkdir(exist_ok=True)
        # The manifest moves last: its presence says the run's files are complete.
        paths = sorted(staging.iterdir(), key=lambda p: (p.name == "manifest.json", p.name))
        move_all(paths, out_dir, staging / ".previous")
        return [out_dir / p.name for p in paths]
    finally:
        shutil.rmtree(staging, ignore_errors=True)


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
    except BaseException:
        for target, kept in reversed(done):
            if target.is_file():
                target.unlink()
            if kept is not None:
                os.replace(kept, target)
        raise
