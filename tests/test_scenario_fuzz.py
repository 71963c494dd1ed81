"""Property: whatever a person does to a valid scenario (delete keys, change types, put in
negative, huge or NaN numbers, swap names, truncate the text, type stray characters),
parse_scenario either returns a Scenario or raises ScenarioError; nothing else escapes.

Mutated documents are written back to TOML with a small writer (TOML 1.0 inline tables,
https://toml.io/en/v1.0.0), checked first to round-trip through tomllib.
"""
from __future__ import annotations

import copy
import math
import re
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from microsim.scenario import Scenario, ScenarioError, parse_scenario

SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"
TEXTS = [(SCENARIOS / name).read_text() for name in ("lakemoor_kidney.toml", "ward_recovery.toml",
                                                        "ward_length_of_stay.toml")]
DOCUMENTS = [tomllib.loads(text) for text in TEXTS]
BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
FUZZ = settings(max_examples=100, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow])


def toml_string(s: str) -> str:
    escaped = []
    for ch in s:
        if ch in '"\\':
            escaped.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            escaped.append(f"\\u{ord(ch):04x}")
        else:
            escaped.append(ch)
    return '"' + "".join(escaped) + '"'


def toml_key(key: str) -> str:
    return key if BARE_KEY.fullmatch(key) else toml_string(key)


def toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return "{" + ", ".join(f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + "}"


def toml_document(data: dict) -> str:
    return "".join(f"{toml_key(k)} = {toml_value(v)}\n" for k, v in data.items())


def paths(value: Any, prefix: tuple = ()) -> list[tuple]:
    """Every position in a nested document, containers included (the root excluded)."""
    found = []
    items = value.items() if isinstance(value, dict) else \
        enumerate(value) if isinstance(value, list) else ()
    for key, child in items:
        found.append(prefix + (key,))
        found.extend(paths(child, prefix + (key,)))
    return found


def strings(value: Any) -> list[str]:
    if isinstance(value, str):
        return [value]
    children = value.values() if isinstance(value, dict) else value if isinstance(value, list) \
        else ()
    return [s for child in children for s in strings(child)]


def parent_of(doc: Any, path: tuple) -> Any:
    for key in path[:-1]:
        doc = doc[key]
    return doc


ODD_VALUES = [-1, -0.5, 0, 0.0, 1e308, -1e308, 2**63 - 1, math.nan, math.inf, -math.inf,
              True, False, "", "abc", "remainder", "lifetime", "age", [], {}, [1, 2],
              {"x": 1}, [[1.0]], 5e-324]
ALL_NAMES = sorted({s for doc in DOCUMENTS for s in strings(doc) if len(s) < 40})
replacements = st.one_of(
    st.sampled_from(ODD_VALUES), st.sampled_from(ALL_NAMES), st.text(max_size=8),
    st.floats(allow_nan=True, allow_infinity=True), st.integers(-2**63, 2**63 - 1))


@st.composite
def mutated_documents(draw) -> dict:
    doc = copy.deepcopy(draw(st.sampled_from(DOCUMENTS)))
    for _ in range(draw(st.integers(1, 3))):
        where = paths(doc)
        if not where:
            break
        path = draw(st.sampled_from(where))
        parent, key = parent_of(doc, path), path[-1]
        action = draw(st.sampled_from(["delete", "replace", "add key", "swap", "duplicate"]))
        if action == "delete":
            del parent[key]
        elif action == "replace":
            parent[key] = draw(replacements)
        elif action == "add key" and isinstance(parent[key], dict):
            parent[key][draw(st.sampled_from(["extra", "nme", "rate", "probability", "level",
                                              "clock", "file", "comparator", "hazard_ratio",
                                              "cost", "equals", "while_treated"]))] = \
                draw(replacements)
        elif action == "swap":
            other = draw(st.sampled_from(where))
            nested = other[:len(path)] == path or path[:len(other)] == other
            if not nested:  # swapping a value with its own descendant would make a cycle
                other_parent = parent_of(doc, other)
                parent[key], other_parent[other[-1]] = other_parent[other[-1]], parent[key]
        elif action == "duplicate" and isinstance(parent, list):
            parent.append(copy.deepcopy(parent[key]))
    return doc


@st.composite
def mutated_texts(draw) -> str:
    text = draw(st.sampled_from(TEXTS))
    for _ in range(draw(st.integers(1, 3))):
        lines = text.splitlines(keepends=True)
        action = draw(st.sampled_from(["truncate", "insert", "delete line", "swap lines"]))
        at = draw(st.integers(0, len(text)))
        line = draw(st.integers(0, max(0, len(lines) - 1)))
        if action == "truncate":
            text = text[:at]
        elif action == "insert":
            junk = draw(st.text(alphabet='[]{}="\'#.,-_0123456789e\n abc', min_size=1,
                                max_size=6))
            text = text[:at] + junk + text[at:]
        elif action == "delete line" and lines:
            text = "".join(lines[:line] + lines[line + 1:])
        elif action == "swap lines" and lines:
            other = draw(st.integers(0, len(lines) - 1))
            lines[line], lines[other] = lines[other], lines[line]
            text = "".join(lines)
    return text


def outcome(text: str) -> Scenario | ScenarioError:
    try:
        return parse_scenario(text)
    except ScenarioError as error:
        assert isinstance(error.path, str) and "\n" not in str(error)
        return error


@pytest.mark.parametrize("index", range(len(DOCUMENTS)))
def test_writer_round_trips_the_examples(index):
    text = toml_document(DOCUMENTS[index])
    assert tomllib.loads(text) == DOCUMENTS[index]
    assert isinstance(parse_scenario(text), Scenario)


@FUZZ
@given(mutated_documents())
def test_mutated_documents_are_read_or_refused(doc):
    assert isinstance(outcome(toml_document(doc)), (Scenario, ScenarioError))


@FUZZ
@given(mutated_texts())
def test_mutated_texts_are_read_or_refused(text):
    assert isinstance(outcome(text), (Scenario, ScenarioError))
