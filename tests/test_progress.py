"""Progress bars: on a terminal the long commands show them, and anything else (a pipe, a
file, a test's captured stream) gets none, so output read by programs stays clean."""
from __future__ import annotations

import io
import sys

from microsim.cli import main
from support import horizon, parameters, rate, scenario_text, section, start, state

MODEL = scenario_text(
    horizon(5), start(well=1.0), state("well", utility=1, cost="c"),
    state("dead", absorbing=True), rate("well", "dead", 0.2),
    parameters(c=dict(value=100.0, low=50.0, high=150.0)))


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def run(tmp_path, monkeypatch, stream, *command) -> str:
    path = tmp_path / "model.toml"
    path.write_text(MODEL)
    monkeypatch.setattr(sys, "stderr", stream)
    assert main([*command, str(path), "--patients", "200", "--out", str(tmp_path / "out")]) == 0
    return stream.getvalue()


def test_a_terminal_sees_the_patients_and_the_settings_counted(tmp_path, monkeypatch):
    shown = run(tmp_path, monkeypatch, Terminal(), "run", "--sensitivity")
    assert "Patients simulated" in shown and "Sensitivity settings evaluated" in shown


def test_anything_but_a_terminal_gets_no_bar(tmp_path, monkeypatch):
    assert run(tmp_path, monkeypatch, io.StringIO(), "run", "--sensitivity") == ""
