"""The PSA run folder: one Parquet file per finished draw, the run's fingerprint, the total.

    run_dir/psa.json                 fingerprint + hash of the parameter draws (written first)
    run_dir/draws/draw-000017.parquet  results of draw 17 (appears only when complete)
    run_dir/psa_draws.parquet        every draw's results, in draw order (written last)

Every file is written to a temporary name beside its target and moved into place with
os.replace, so a file that exists is complete and an interrupted run can resume from
whatever it finds.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from ..scenario.errors import ScenarioError
from ..store import missing_folders, remove_empty, write_atomically

RECORD = "psa.json"
RESULTS = "psa_draws.parquet"
DRAWS = "draws"


def write_table(table: pd.DataFrame, target: Path) -> None:
    write_atomically(target, lambda path: table.to_parquet(path, index=False))


def draws_hash(draws: pd.DataFrame) -> str:
    """SHA-256 of the parameter draws (names and float64 values, in draw order)."""
    ordered = draws.sort_values("draw", kind="stable")
    digest = hashlib.sha256(json.dumps(list(map(str, ordered.columns))).encode())
    digest.update(np.ascontiguousarray(ordered.to_numpy(dtype="<f8")).tobytes())
    return digest.hexdigest()


def claim(run_dir: Path, fingerprint: dict, draws: pd.DataFrame) -> list[Path]:
    """Write psa.json, or refuse a folder whose psa.json describes a different run.
    Returns the folders it created, deepest first, for `release`."""
    record = json.loads(json.dumps({"fingerprint": fingerprint, "parameter_draws_sha256": draws_hash(draws)}))
    path = run_dir / RECORD
    created = missing_folders(run_dir / DRAWS)
    if path.exists():
        found = json.loads(path.read_text())
        if found != record:
            raise ScenarioError("psa", f"{run_dir} holds draws of a different PSA "
                                f"({differences(found, record)}); run with the same settings "
                                "to resume it, or use another --out (or remove the folder)")
    else:
        run_dir.mkdir(parents=True, exist_ok=True)
        write_atomically(path, lambda p: p.write_text(json.dumps(record, indent=2) + "\n"))
    (run_dir / DRAWS).mkdir(exist_ok=True)
    for leftover in (run_dir / DRAWS).glob(".*.tmp"):  # from a run killed mid-write
        leftover.unlink(missing_ok=True)
    return created


def differences(found: dict, wanted: dict) -> str:
    """Which settings of a PSA folder differ from this run's, in words."""
    old, new = found.get("fingerprint", {}), wanted["fingerprint"]
    changed = [f"{key} {old.get(key)!r} there, {new[key]!r} now" for key in new
               if old.get(key) != new[key]]
    if not changed and found.get("parameter_draws_sha256") != wanted["parameter_draws_sha256"]:
        changed = ["the parameters' values or distributions"]
    return "; ".join(changed) or "its record"


def release(run_dir: Path, created: list[Path]) -> None:
    """Undo a claim that finished no draw (the run failed or was stopped before its first):
    remove its psa.json and the folders it created, so a refused run leaves nothing."""
    if run_dir.absolute() not in created or any((run_dir / DRAWS).glob("draw-*.parquet")):
        return
    (run_dir / RECORD).unlink(missing_ok=True)
    remove_empty(created)


def draw_path(run_dir: Path, draw: int) -> Path:
    return run_dir / DRAWS / f"draw-{draw:06d}.parquet"


def read_draws(run_dir: Path, draws: Iterable[int]) -> pd.DataFrame:
    """All the given draws' results, sorted by draw, rows within a draw as evaluated."""
    tables = [pd.read_parquet(draw_path(run_dir, d)) for d in sorted(draws)]
    return pd.concat(tables, ignore_index=True)
