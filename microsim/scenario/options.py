"""Command-line options that override scenario keys.

One vocabulary: an option is named after the key it overrides (`--budget-years` sets
economics.budget_years), its value is put in the file's place before the file is read, so
the key's own rules read it, and a refusal names the option instead of the key.
"""
from __future__ import annotations

import copy
import re
from typing import Any, Mapping

from .errors import ScenarioError

KEYS = {  # key -> its section
    "incidence": "economics", "evpi_years": "economics", "evpi_discount": "economics",
    "prevalent_patients": "economics", "budget_years": "economics",
    "evppi": "uncertainty", "basis": "uncertainty", "invalid_draws": "uncertainty", "two_way": "sensitivity", "break_even": "sensitivity",
    "grid": "sensitivity",
}
LISTS = ("two_way", "break_even")  # always lists, even of one item
NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")


def option(key: str) -> str:
    """The option that overrides `key`: `--budget-years` for budget_years."""
    return "--" + key.replace("_", "-")


def value(text: str) -> Any:
    """One word of an option as TOML would hold it: a whole number, a number, or text."""
    text = text.strip()
    if re.fullmatch(r"[+-]?\d+", text):
        return int(text)
    return float(text) if NUMBER.fullmatch(text) else text


def items(text: str) -> Any:
    """An option's value: "a,b" is a list, a single word its value."""
    words = [value(word) for word in text.split(",")]
    return words if len(words) > 1 else words[0]


def toml_values(given: Mapping[str, Any]) -> dict[str, Any]:
    """Options as parsed by the command line (None: not given) -> {key: TOML value}.
    `--evppi` may be given several times, one group each."""
    found = {}
    for key, text in given.items():
        if text is None or key not in KEYS:
            continue
        if key == "evppi":
            found[key] = [items(group) for group in text]
        elif key in LISTS:
            parsed = items(text)
            found[key] = parsed if isinstance(parsed, list) else [parsed]
        else:
            found[key] = items(text)
    return found


def with_options(data: dict[str, Any], options: Mapping[str, Any]) -> dict[str, Any]:
    """The parsed file with each option's value in its key's place."""
    if not options:
        return data
    merged = copy.deepcopy(data)
    for key, given in options.items():
        section = merged.setdefault(KEYS[key], {})
        if isinstance(section, dict):  # a section that is not a table is refused by its reader
            section[key] = given
    return merged


def named_by_option(error: ScenarioError, options: Mapping[str, Any]) -> ScenarioError:
    """A refusal of an overridden key, named by the option that gave the value."""
    for key in options:
        path = f"{KEYS[key]}.{key}"
        if error.path == path or error.path.startswith(path + "["):
            return ScenarioError(option(key), error.message)
    return error
