"""Walking a TOML document with a field path, so that every refusal names where it happened.

A `Node` wraps one TOML table and its path (`transitions.early->advanced`); its typed
getters (`number`, `ref`, `name`, ...) return checked values or raise `ScenarioError`
with the path of the offending key. Names used in number slots are collected as
`Reference`s in the shared `Reading`, to be resolved by the second pass (checks.py).
"""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field
from typing import Any, Iterable, NoReturn, Sequence

import numpy as np

from .errors import ScenarioError
from .spec import REMAINDER, Ref

MAX_PATIENTS = 100_000_000  # patients a run may ask for; beyond, memory runs out first

IDENTIFIER = re.compile(r"[a-z][a-z0-9_]*")
TOLERANCE = 1e-9  # for sums that must be 1, whole numbers of cycles, matrix symmetry
AGE = "age"  # the attribute, clock and table axis of attained age
REQUIRED: Any = object()  # default meaning "the key must be present"


def show(x: float) -> str:
    """A number as a person would write it (no float noise such as 0.9300000000000001)."""
    return f"{x:.12g}"


def describe(value: Any) -> str:
    """A short picture of a bad value for an error message."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return repr(value if len(value) <= 40 else value[:37] + "...")
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return show(value)
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return f"{type(value).__name__} {value}"


def closest(word: str, choices: Iterable[str]) -> str | None:
    """The choice closest to `word`, ignoring case (so 'B' finds 'b'): the only choice that
    starts with it or contains it ('West' finds 'West Side', 'inhaler' finds
    'targeted_inhaler'), else the nearest by difflib, if any is near."""
    folded = {choice.lower(): choice for choice in reversed(list(choices))}  # first wins
    key = word.lower()
    for found in ([c for c in folded if c.startswith(key)], [c for c in folded if key in c]):
        if key and len(found) == 1:
            return folded[found[0]]
    close = difflib.get_close_matches(key, list(folded), n=1)
    return folded[close[0]] if close else None


RENAMED = {  # keys of earlier versions -> their names now, so that an old file is told
    "population.size": "patients",  # --patients
    "uncertainty.patients": "patients_per_draw",  # --patients-per-draw
}


def unquoted_number(value: Any) -> str:
    """'; write the number without quotes' when text where a number belongs reads as one
    (`cost = "1500"`): TOML keeps quoted digits as text."""
    if not isinstance(value, str):
        return ""
    try:
        number = float(value.strip())
    except ValueError:
        return ""
    return "; write the number without quotes" if math.isfinite(number) else ""


def number_hint(value: Any) -> str:
    """The fix for text where only a number belongs: drop the quotes of digits, or write
    a word (`lifetime_cap = "forty"`) in digits."""
    if not isinstance(value, str):
        return ""
    return unquoted_number(value) or "; write it in digits, without quotes"


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """' (did you mean 'x'?)' when a choice is close to `word`, else ''."""
    close = closest(word, choices)
    return f" (did you mean {close!r}?)" if close else ""


def listing(names: Iterable[str]) -> str:
    names = list(names)
    return ", ".join(names) if names else "(none)"


def undefined(what: str, name: str, known: list[str], words: Sequence[str] = ()) -> str:
    """Why a name of a parameter (or table) cannot be used: none is defined by that name;
    `words` are the fixed words the slot also takes ("remainder"), suggested like names."""
    return (f"no {what} named {name!r}{did_you_mean(name, [*known, *words])}; "
            f"defined: {listing(known)}")


@dataclass(frozen=True)
class Role:
    """What a number stands for, and so which values it may take.

    A `named` role (a probability, a rate, ...) says so in its messages; a plain bound
    (a shape, a cycle length) only says the bound."""
    noun: str
    lower: float = -math.inf
    upper: float = math.inf
    lower_open: bool = False
    named: bool = True
    upper_open: bool = False

    @property
    def bounds(self) -> str:
        low = f"above {show(self.lower)}" if self.lower_open else f"at least {show(self.lower)}"
        high = f"below {show(self.upper)}" if self.upper_open else f"at most {show(self.upper)}"
        if math.isinf(self.upper):
            return low if math.isfinite(self.lower) else "any number"
        if math.isinf(self.lower):
            return high
        if self.lower_open or self.upper_open:
            return f"{low} and {high}"
        return f"between {show(self.lower)} and {show(self.upper)}"

    @property
    def rule(self) -> str:
        return f"{self.noun if self.named else 'it'} must be {self.bounds}"

    def problem(self, x: float) -> str | None:
        """Why `x` cannot play this role, or None when it can (no role takes a number
        larger than LARGEST in size)."""
        too_low = x < self.lower or (self.lower_open and x == self.lower)
        too_high = x > self.upper or (self.upper_open and x == self.upper)
        if not too_low and not too_high:
            if abs(x) > LARGEST:
                return (f"{show(x)} is larger than {show(LARGEST)} in size, beyond what the "
                        "model's sums hold reliably (a slip in the exponent?); give a value "
                        f"within {show(LARGEST)}")
            return None
        if not self.named:
            return f"must be {self.bounds}, got {show(x)}"
        if too_low:
            relation = "not above" if self.lower_open else "below"
            return f"{show(x)} is {relation} {show(self.lower)}; {self.rule}"
        relation = "not below" if self.upper_open else "above"
        return f"{show(x)} is {relation} {show(self.upper)}; {self.rule}"

    def holds_on(self, low: float, high: float) -> bool:
        """True when every value strictly between low and high is allowed."""
        return low >= self.lower and high <= self.upper

    def outside(self, x: np.ndarray) -> np.ndarray:
        """Which of the values `x` cannot play this role (vectorised `problem`)."""
        return (np.isnan(x) | (x < self.lower) | (x > self.upper) | (np.abs(x) > LARGEST)
                | (self.lower_open & (x == self.lower))
                | (self.upper_open & (x == self.upper)))

    def clip(self, x: np.ndarray) -> np.ndarray:
        """The nearest values that can play this role (open ends: the nearest float inside)."""
        low = np.nextafter(self.lower, math.inf) if self.lower_open else self.lower
        high = np.nextafter(self.upper, -math.inf) if self.upper_open else self.upper
        return np.clip(x, max(low, -LARGEST), min(high, LARGEST))


LARGEST = 1e12  # no number of a scenario is larger in size: a cost of 1e308 a day sums to
# inf, a rate of 1e20 breaks the matrix exponential; rates to 1e12 still validate exactly

ANY = Role("a number")
PROBABILITY = Role("a probability", 0.0, 1.0)
SHARE = Role("a share", 0.0, 1.0)
RATE = Role("a rate", 0.0)
NON_NEGATIVE = Role("a number of at least 0", 0.0, named=False)
POSITIVE = Role("a positive number", 0.0, lower_open=True, named=False)
HAZARD_RATIO = Role("a hazard ratio", 0.0, lower_open=True)
TIME_RATIO = Role("a time ratio", 0.0, lower_open=True)
ODDS_RATIO = Role("an odds ratio", 0.0, lower_open=True)
MULTIPLIER = Role("a multiplier", 0.0, lower_open=True)
UTILITY = Role("a utility weight", upper=1.0)
CORRELATION = Role("a correlation", -1.0, 1.0)
COMPETING_PROBABILITY = Role("a probability of a move that competes with others", 0.0, 1.0,
                             upper_open=True)
"""Under the competing rule a move beside other moves needs p < 1: p = 1 is an infinite rate
that would leave the others nothing to compete for."""


VALUE_TABLE_AXES = (None, "age", "time")
"""The `by` of a table that may give a cost or a utility: by level alone, by attained age or
by time since the start (each with or without level); each patient reads its own value."""


@dataclass(frozen=True)
class Reference:
    """A name found where a number belongs: resolved and checked by the second pass.
    `table_axes` (when tables are allowed) limits the `by` of the table (None: any)."""
    name: str
    path: str
    role: Role
    tables_allowed: bool = False
    table_axes: tuple[str | None, ...] | None = None
    remainder_allowed: bool = False  # so that a near miss of "remainder" is told


@dataclass
class Reading:
    """What the first pass hands to the second besides the specs."""
    references: list[Reference] = field(default_factory=list)
    # a population file's columns -> (kind, levels) as in checks.attribute_kinds: kind
    # "column" (any use accepted) from the header, the file's own kinds once it is read
    file_columns: dict[str, tuple[str, tuple[str, ...]]] | None = None


class Node:
    """One TOML table with its field path and typed, checking getters."""

    def __init__(self, data: Any, path: str, reading: Reading,
                 allowed: Iterable[str] | None = None, expect: str = "a table"):
        if not isinstance(data, dict):
            raise ScenarioError(path, f"must be {expect}, got {describe(data)}")
        self.data = data
        self.path = path
        self.reading = reading
        if allowed is not None:
            self.only(allowed)

    # -- paths and failures -------------------------------------------------------------
    def at(self, key: str | None) -> str:
        if key is None:
            return self.path
        return f"{self.path}.{key}" if self.path else key

    def fail(self, key: str | None, message: str) -> NoReturn:
        raise ScenarioError(self.at(key), message)

    def only(self, allowed: Iterable[str], where: str = "") -> None:
        """Refuse keys outside `allowed` (typos): say which keys are allowed, or the new
        name of a renamed key."""
        allowed = list(allowed)
        for key in self.data:
            if self.at(key) in RENAMED:
                self.fail(key, f"is now called {RENAMED[self.at(key)]!r} (the name its "
                               "command-line option has); rename the key")
            if key not in allowed:
                self.fail(key, f"unknown key{where}{did_you_mean(key, allowed)}; "
                               f"allowed keys: {listing(allowed)}")

    def above(self, key: str, value: float, lower_key: str, lower: float) -> None:
        """Refuse `value` (at `key`) unless it is above `lower` (the value at `lower_key`)."""
        if value <= lower:
            self.fail(key, f"must be above {lower_key} ({show(lower)}), got {show(value)}")

    def has(self, key: str) -> bool:
        return key in self.data

    def raw(self, key: str, default: Any = REQUIRED, expect: str = "a value") -> Any:
        if key in self.data:
            return self.data[key]
        if default is REQUIRED:
            self.fail(key, f"is required ({expect})")
        return default

    def one_of(self, keys: tuple[str, ...]) -> str:
        """The single key of `keys` that is present; refuse none or several."""
        present = [k for k in keys if k in self.data]
        if not present:
            self.fail(None, f"needs one of: {listing(keys)}")
        if len(present) > 1:
            self.fail(present[1], f"cannot be combined with {present[0]}; give only one of: "
                                  f"{listing(keys)}")
        return present[0]

    # -- scalars ------------------------------------------------------------------------
    def number(self, key: str, default: Any = REQUIRED, role: Role = ANY,
               expect: str = "a number") -> float:
        if key not in self.data:
            return self.raw(key, default, expect)
        return self._number(self.data[key], key, role, expect)

    def _number(self, value: Any, key: str, role: Role, expect: str = "a number") -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(key, f"must be {expect}, got {describe(value)}{number_hint(value)}")
        x = float(value)
        if not math.isfinite(x):
            self.fail(key, f"must be a finite number, got {describe(value)}")
        problem = role.problem(x)
        if problem:
            self.fail(key, problem)
        return x

    def number_in(self, value: Any, key: str, expect: str = "a number") -> float:
        """`value`, found at `key` (which may be a list item, `values[2]`), as a finite
        number."""
        return self._number(value, key, ANY, expect)

    def number_or(self, key: str, word: str, role: Role, expect: str) -> float | None:
        """A number, or None for the one `word` allowed in its place ("lifetime" for a
        horizon): other text is refused with the word suggested when it is close."""
        expect = f'{expect} or "{word}"'
        value = self.raw(key, expect=expect)
        if value == word:
            return None
        if isinstance(value, str):
            self.fail(key, f"must be {expect}, got {describe(value)}{did_you_mean(value, [word])}")
        return self._number(value, key, role, expect)

    def whole(self, key: str, default: Any = REQUIRED, minimum: int = 0,
              maximum: int | None = None) -> int:
        if key not in self.data:
            return self.raw(key, default, "a whole number")
        value = self.data[key]
        if (isinstance(value, bool) or not isinstance(value, (int, float))
                or (isinstance(value, float) and not value.is_integer())):
            self.fail(key, f"must be a whole number, got {describe(value)}"
                           f"{number_hint(value)}")
        n = int(value)
        if n < minimum:
            self.fail(key, f"must be at least {minimum}, got {n}")
        if maximum is not None and n > maximum:
            self.fail(key, f"must be at most {maximum}, got {n}")
        return n

    def text(self, key: str, default: Any = REQUIRED, choices: tuple[str, ...] | None = None,
             nonempty: bool = False) -> str:
        expect = "one of " + listing(f'"{c}"' for c in choices) if choices else "text"
        if key not in self.data:
            return self.raw(key, default, expect)
        value = self.data[key]
        if not isinstance(value, str):
            self.fail(key, f"must be {'text' if choices is None else expect}, "
                           f"got {describe(value)}")
        if choices is not None and value not in choices:
            self.fail(key, f"must be {expect}, got {describe(value)}"
                           f"{did_you_mean(value, choices)}")
        if nonempty and not value.strip():
            self.fail(key, "must not be empty")
        return value

    def entry_name(self, taken: Iterable[str], what: str, section: str) -> str:
        """The `name` of an entry of [[section]], refused when already `taken`; the entry's
        path becomes `section.<name>`."""
        name = self.name("name")
        if name in taken:
            self.fail("name", f"duplicate {what} name {name!r}; {what} names must be distinct")
        self.path = f"{section}.{name}"
        return name

    def name(self, key: str, default: Any = REQUIRED) -> str:
        if key not in self.data:
            return self.raw(key, default, "a name")
        return self._name(self.data[key], key)

    def _name(self, value: Any, key: str) -> str:
        if not isinstance(value, str) or not IDENTIFIER.fullmatch(value):
            self.fail(key, "must be a name of lowercase letters, digits and underscores "
                           f"that starts with a letter (like 'early_stage'), got {describe(value)}")
        return value

    def flag(self, key: str, default: bool) -> bool:
        value = self.data.get(key, default)
        if not isinstance(value, bool):
            self.fail(key, f"must be true or false, got {describe(value)}")
        return value

    def ref(self, key: str, role: Role, default: Any = REQUIRED, *,
            tables: bool | tuple[str | None, ...] = False, remainder: bool = False) -> Ref:
        """A number, or a parameter (or table) name recorded for the second pass; `tables`
        True allows any table, a tuple only tables by those axes (VALUE_TABLE_AXES)."""
        expect = "a number, a parameter name or a table name" if tables else \
            "a number or a parameter name"
        if remainder:
            expect += ' or "remainder"'
        if key not in self.data:
            return self.raw(key, default, expect)
        return self._ref(self.data[key], key, role, expect, tables, remainder)

    def _ref(self, value: Any, key: str, role: Role, expect: str,
             tables: bool | tuple[str | None, ...], remainder: bool) -> Ref:
        if not isinstance(value, str):
            return self._number(value, key, role, expect)
        if value == REMAINDER:
            if remainder:
                return REMAINDER
            self.fail(key, '"remainder" is only valid as the probability of a transition')
        if not IDENTIFIER.fullmatch(value):
            self.fail(key, f"must be {expect}, got {describe(value)}{unquoted_number(value)}")
        axes = tables if isinstance(tables, tuple) else None
        self.reading.references.append(Reference(value, self.at(key), role, bool(tables), axes,
                                                 remainder))
        return value

    # -- lists --------------------------------------------------------------------------
    def _list(self, key: str, default: Any, expect: str, nonempty: bool) -> list | None:
        if key not in self.data:
            return self.raw(key, default, expect)
        value = self.data[key]
        if not isinstance(value, list):
            self.fail(key, f"must be {expect}, got {describe(value)}")
        if nonempty and not value:
            self.fail(key, f"must not be empty ({expect})")
        return value

    def numbers(self, key: str, default: Any = REQUIRED, role: Role = ANY,
                open_start: bool = False, increasing: bool = False) -> tuple[float, ...]:
        """A non-empty list of numbers; `open_start` lets the first be -inf; `increasing`
        refuses a list that is not strictly increasing."""
        values = self._list(key, default, "a list of numbers", nonempty=True)
        if values is default:
            return default
        numbers = tuple(-math.inf if open_start and i == 0 and v == -math.inf
                        else self._number(v, f"{key}[{i}]", role) for i, v in enumerate(values))
        for i in range(1, len(numbers) if increasing else 0):
            if numbers[i] <= numbers[i - 1]:
                self.fail(key, f"must be strictly increasing; {show(numbers[i])} follows "
                               f"{show(numbers[i - 1])}")
        return numbers

    def matrix(self, key: str, size: int, role: Role, per: str, empty_as_short: bool = False
               ) -> tuple[tuple[float, ...], ...]:
        """A square `size` x `size` list of rows of numbers, one row per `per` (an
        attribute, a parameter); `empty_as_short` refuses [] as too few rows, not as empty."""
        rows = self._list(key, REQUIRED, f"a list of {size} rows", nonempty=not empty_as_short)
        if len(rows) != size:
            self.fail(key, f"has {len(rows)} rows; it needs {size} (one per {per})")
        for i, row in enumerate(rows):
            if not isinstance(row, list) or len(row) != size:
                got = f"{len(row)} value(s)" if isinstance(row, list) else describe(row)
                self.fail(f"{key}[{i}]", f"must be a row of {size} numbers, got {got}")
        return tuple(tuple(self._number(v, f"{key}[{i}][{j}]", role) for j, v in enumerate(row))
                     for i, row in enumerate(rows))

    def refs(self, key: str, role: Role) -> tuple[Ref, ...]:
        values = self._list(key, REQUIRED, "a list of numbers or parameter names", nonempty=True)
        return tuple(self._ref(v, f"{key}[{i}]", role, "a number or a parameter name",
                               False, False) for i, v in enumerate(values))

    def names(self, key: str) -> tuple[str, ...]:
        """A non-empty list of distinct names."""
        values = self._list(key, REQUIRED, "a list of names", nonempty=True)
        names = tuple(self._name(v, f"{key}[{i}]") for i, v in enumerate(values))
        self.distinct(key, names)
        return names

    def texts(self, key: str) -> tuple[str, ...]:
        """A non-empty list of distinct, non-empty strings (levels, labels)."""
        values = self._list(key, REQUIRED, "a list of text", nonempty=True)
        for i, v in enumerate(values):
            if not isinstance(v, str) or not v.strip():
                self.fail(f"{key}[{i}]", f"must be non-empty text, got {describe(v)}")
        self.distinct(key, values)
        return tuple(values)

    def distinct(self, key: str, items: Iterable[str]) -> None:
        seen: set[str] = set()
        for i, item in enumerate(items):
            if item in seen:
                self.fail(f"{key}[{i}]", f"{item!r} appears twice; each entry must be distinct")
            seen.add(item)

    # -- nested tables ------------------------------------------------------------------
    def node(self, key: str, allowed: Iterable[str] | None, default: Any = REQUIRED) -> Node:
        if key not in self.data:
            return self.raw(key, default, f"a table [{self.at(key)}]")
        return Node(self.data[key], self.at(key), self.reading, allowed,
                    expect=f"a table ([{self.at(key)}] or {key} = {{...}})")

    def nodes(self, key: str, allowed: Iterable[str] | None, required: bool = False
              ) -> list[Node]:
        """An array of tables ([[key]]); paths are `key[i]` until a name is known."""
        expect = f"a list of tables ([[{self.at(key)}]])"
        values = self._list(key, REQUIRED if required else [], expect, nonempty=required)
        return [Node(v, self.at(f"{key}[{i}]"), self.reading, allowed) for i, v in
                enumerate(values)]
