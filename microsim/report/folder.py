"""A finished run folder, read by name: its result tables, its documents, and the scenario
its manifest names.

The report reads nothing else, so a change in where runs are written changes only the path
handed in here.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from microsim.scenario import Scenario, ScenarioError, parse_scenario
from microsim.store import SCENARIO_COPY

SUMMARY, MANIFEST = "summary.json", "manifest.json"


@dataclass(frozen=True)
class RunFolder:
    path: Path
    summary: dict
    manifest: dict

    @classmethod
    def open(cls, path: Path) -> "RunFolder":
        """The run folder at `path`, or a one-line refusal when it is not one."""
        path = Path(path)
        if not path.is_dir():
            raise ScenarioError(str(path), "no such folder; give the folder a run wrote "
                                           "(e.g. outputs/<scenario>/latest)")
        for name in (SUMMARY, MANIFEST):
            if not (path / name).is_file():
                raise ScenarioError(str(path), f"not a run folder: it has no {name}; "
                                               "`microsim run FILE` writes one")
        return cls(path, json.loads((path / SUMMARY).read_text()),
                   json.loads((path / MANIFEST).read_text()))

    def table(self, name: str) -> pd.DataFrame | None:
        """A result table by name (Parquet, else CSV), or None when the run has none."""
        for suffix, read in ((".parquet", pd.read_parquet), (".csv", pd.read_csv)):
            if (self.path / f"{name}{suffix}").is_file():
                return read(self.path / f"{name}{suffix}")
        return None

    def scenario(self) -> tuple[Scenario | None, str]:
        """The run's own copy of its scenario (read as if it stood where the run read it,
        so relative paths still resolve); else None and the reason in words."""
        copy = self.path / SCENARIO_COPY
        if not copy.is_file():
            return None, f"the run folder holds no copy of its scenario ({SCENARIO_COPY})"
        try:
            return parse_scenario(copy.read_text(), source=self.manifest.get("scenario")), ""
        except ScenarioError as error:
            return None, f"the run's scenario no longer reads ({error})"
