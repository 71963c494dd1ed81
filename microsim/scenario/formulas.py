"""Derived parameters: a parameter computed from others by a small arithmetic formula.

The language is our own and deliberately small: numbers, parameter names, + - * /, powers
(`^` or `**`, right-associative, binding tighter than unary minus, so -2^2 is -4), unary
minus, parentheses, and the functions in `FUNCTIONS`. It is parsed by recursive descent
into a tree of frozen nodes, never evaluated as Python. A formula is evaluated with numpy,
so the same tree computes one base case (floats) or every PSA draw at once (arrays);
`strict` evaluation refuses the first operation whose result is not a finite number and
says which operation, at which column of the text.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Iterator, Mapping

import numpy as np

from .errors import ScenarioError
from .fields import did_you_mean, listing, show


def rate_from_probability(p, period):
    """-ln(1 - p) / period: the constant rate that gives probability p over `period`
    (common practice; Fleurence & Hollenbeak 2007, "Rates and probabilities in economic
    modelling", PharmacoEconomics; from memory). p in [0, 1), period > 0."""
    ok = (p >= 0) & (p < 1) & (period > 0)
    return np.where(ok, -np.log1p(-np.where(ok, p, 0.0)) / np.where(ok, period, 1.0), np.nan)


def probability_from_rate(r, period):
    """1 - exp(-r * period): the probability of at least one event over `period` at the
    constant rate r (the same source). r >= 0, period > 0."""
    ok = (r >= 0) & (period > 0)
    return np.where(ok, -np.expm1(-np.where(ok, r * period, 0.0)), np.nan)


def _log(x):
    return np.where(x > 0, np.log(np.where(x > 0, x, 1.0)), np.nan)


FUNCTIONS = {  # name -> (function, fewest arguments, most arguments (None: any), domain)
    "exp": (np.exp, 1, 1, "its result is too large"),
    "log": (_log, 1, 1, "the natural log needs a number above 0"),
    "min": (np.minimum.reduce, 2, None, ""),
    "max": (np.maximum.reduce, 2, None, ""),
    "rate_from_probability": (rate_from_probability, 2, 2,
                              "it needs a probability from 0 up to (not including) 1 and a "
                              "period above 0"),
    "probability_from_rate": (probability_from_rate, 2, 2,
                              "it needs a rate of at least 0 and a period above 0"),
}
TOKEN = re.compile(r"\s*(?:(?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)"
                   r"|(?P<name>[A-Za-z_][A-Za-z0-9_]*)|(?P<symbol>\*\*|[-+*/^(),]))")


class FormulaError(Exception):
    """What is wrong with a formula, and where (a 1-based column of its text)."""

    def __init__(self, column: int, message: str):
        self.column, self.message = column, message
        super().__init__(f"{message} (column {column})")


@dataclass(frozen=True)
class Number:
    value: float
    column: int


@dataclass(frozen=True)
class Name:
    name: str
    column: int


@dataclass(frozen=True)
class Negative:
    operand: Any
    column: int


@dataclass(frozen=True)
class Operation:
    symbol: str  # + - * / ^
    left: Any
    right: Any
    column: int


@dataclass(frozen=True)
class Call:
    function: str
    arguments: tuple
    column: int


@dataclass(frozen=True)
class Formula:
    text: str
    tree: Any

    @property
    def names(self) -> tuple[Name, ...]:
        """Every parameter name the formula reads, in order of appearance."""
        found, stack = [], [self.tree]
        while stack:
            node = stack.pop()
            if isinstance(node, Name):
                found.append(node)
            elif isinstance(node, Negative):
                stack.append(node.operand)
            elif isinstance(node, Operation):
                stack += [node.right, node.left]
            elif isinstance(node, Call):
                stack += reversed(node.arguments)
        return tuple(found)


class _Parser:
    """Recursive descent over the tokens:
    sum := product (("+" | "-") product)*;  product := unary (("*" | "/") unary)*;
    unary := "-" unary | "+" unary | power;  power := atom (("^" | "**") unary)?;
    atom := number | name | name "(" sum ("," sum)* ")" | "(" sum ")"."""

    def __init__(self, text: str):
        self.tokens: list[tuple[str, str, int]] = []
        position = 0
        while text[position:].strip():
            match = TOKEN.match(text, position)
            if match is None:
                column = position + len(text[position:]) - len(text[position:].lstrip()) + 1
                raise FormulaError(column, f"unexpected character {text[column - 1]!r}")
            kind = match.lastgroup
            start = match.start(kind)
            self.tokens.append((kind, match.group(kind), start + 1))
            position = match.end()
        self.tokens.append(("end", "", len(text) + 1))
        self.at = 0

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.at]

    def take(self) -> tuple[str, str, int]:
        token = self.tokens[self.at]
        self.at += 1
        return token

    def expect(self, symbol: str, why: str) -> None:
        kind, text, column = self.take()
        if text != symbol or kind != "symbol":
            raise FormulaError(column, f"expected {symbol!r} {why}, got {describe(kind, text)}")

    def formula(self):
        tree = self.sum()
        kind, text, column = self.peek()
        if kind != "end":
            raise FormulaError(column, f"unexpected {describe(kind, text)} after a complete "
                                       "expression (a missing operator?)")
        return tree

    def sum(self):
        tree = self.product()
        while self.peek()[1] in ("+", "-") and self.peek()[0] == "symbol":
            _, symbol, column = self.take()
            tree = Operation(symbol, tree, self.product(), column)
        return tree

    def product(self):
        tree = self.unary()
        while self.peek()[1] in ("*", "/") and self.peek()[0] == "symbol":
            _, symbol, column = self.take()
            tree = Operation(symbol, tree, self.unary(), column)
        return tree

    def unary(self):
        kind, text, column = self.peek()
        if kind == "symbol" and text in ("-", "+"):
            self.take()
            operand = self.unary()
            return Negative(operand, column) if text == "-" else operand
        return self.power()

    def power(self):
        tree = self.atom()
        kind, text, column = self.peek()
        if kind == "symbol" and text in ("^", "**"):
            self.take()
            return Operation("^", tree, self.unary(), column)  # right-associative
        return tree

    def atom(self):
        kind, text, column = self.take()
        if kind == "number":
            return Number(float(text), column)
        if kind == "name":
            if self.peek()[1] != "(":
                return Name(text, column)
            if text not in FUNCTIONS:
                raise FormulaError(column, f"unknown function {text!r}"
                                           f"{did_you_mean(text, FUNCTIONS)}; functions: "
                                           f"{listing(FUNCTIONS)}")
            self.take()
            arguments = [self.sum()]
            while self.peek()[1] == ",":
                self.take()
                arguments.append(self.sum())
            self.expect(")", f"to close {text}(")
            _, fewest, most, _ = FUNCTIONS[text]
            if len(arguments) < fewest or (most is not None and len(arguments) > most):
                wanted = str(fewest) if most == fewest else f"at least {fewest}"
                raise FormulaError(column, f"{text} takes {wanted} argument"
                                           f"{'s' if wanted != '1' else ''}, got "
                                           f"{len(arguments)}")
            return Call(text, tuple(arguments), column)
        if kind == "symbol" and text == "(":
            tree = self.sum()
            self.expect(")", f"to close the '(' at column {column}")
            return tree
        raise FormulaError(column, f"expected a number, a name or '(', got "
                                   f"{describe(kind, text)}")


def describe(kind: str, text: str) -> str:
    return "the end of the formula" if kind == "end" else repr(text)


MAX_DEPTH = 100  # operations nested or chained in one formula (its tree's depth)
TOO_DEEP = (f"nests or chains more than {MAX_DEPTH} operations; split it into derived "
            "parameters that each compute a part")


def parse_formula(text: str) -> Formula:
    """The formula's tree; `FormulaError` (with a column) when it is not one, or when it
    is deeper than MAX_DEPTH (evaluated by recursion, a deeper tree would exhaust the
    stack: 300 parentheses, or 1000 terms added)."""
    if not text.strip():
        raise FormulaError(1, "is empty; write an expression such as 'rate * hazard_ratio'")
    try:
        tree = _Parser(text).formula()
    except RecursionError:
        raise FormulaError(1, TOO_DEEP) from None
    if depth(tree) > MAX_DEPTH:
        raise FormulaError(1, TOO_DEEP)
    return Formula(text, tree)


def quoted(text: str, most: int = 60) -> str:
    """A formula as a message quotes it: whole when short, else its start and end around
    '...', so that a refusal stays one readable line."""
    if len(text) <= most:
        return repr(text)
    return repr(text[:most // 2 - 2] + " ... " + text[-(most // 2 - 3):])


def depth(tree) -> int:
    """The depth of a formula's tree, walked without recursion."""
    deepest, stack = 0, [(tree, 1)]
    while stack:
        node, level = stack.pop()
        deepest = max(deepest, level)
        children = (node.operand,) if isinstance(node, Negative) else (
            (node.left, node.right) if isinstance(node, Operation) else (
                node.arguments if isinstance(node, Call) else ()))
        stack += [(child, level + 1) for child in children]
    return deepest


def evaluate(formula: Formula, values: Mapping[str, Any], strict: bool = False):
    """The formula's value for `values` (floats, or arrays of draws alike): a float for
    floats, an array for arrays. Not strict: an operation without a finite result gives
    nan; strict: `FormulaError` at that operation."""
    with np.errstate(all="ignore"):
        result = _value(formula.tree, values, strict)
    return float(result) if np.ndim(result) == 0 else result


def _value(node, values, strict):
    if isinstance(node, Number):
        return np.float64(node.value)
    if isinstance(node, Name):
        return np.asarray(values[node.name], dtype=float)
    if isinstance(node, Negative):
        return -_value(node.operand, values, strict)
    if isinstance(node, Call):
        arguments = [_value(a, values, strict) for a in node.arguments]
        function, _, _, domain = FUNCTIONS[node.function]
        if node.function in ("min", "max"):
            result = function(np.broadcast_arrays(*arguments))
        else:
            result = function(*arguments)
        if strict and not np.all(np.isfinite(result)):
            shown = ", ".join(show(float(np.ravel(a)[0])) for a in arguments)
            raise FormulaError(node.column, f"{node.function}({shown}) has no finite value: "
                                            f"{domain}")
        return result
    left, right = _value(node.left, values, strict), _value(node.right, values, strict)
    result = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide,
              "^": np.power}[node.symbol](left, right)
    if strict and not np.all(np.isfinite(result)):
        raise FormulaError(node.column, operation_problem(node.symbol, float(np.ravel(left)[0]),
                                                          float(np.ravel(right)[0])))
    return result


def operation_problem(symbol: str, left: float, right: float) -> str:
    if symbol == "/" and right == 0:
        return f"division by zero ({show(left)} / 0)"
    if symbol == "^" and left == 0 and right < 0:
        return f"0 to a negative power ({show(right)})"
    if symbol == "^" and left < 0:
        return f"a negative number to a fractional power ({show(left)} ^ {show(right)})"
    return f"the result of {show(left)} {symbol} {show(right)} is too large"


# -- derived parameters of a scenario ----------------------------------------------------

def derived_order(parameters: Mapping[str, Any]) -> list[str]:
    """The derived parameters (those with a `formula`), each after the derived parameters it
    reads. A cycle is refused, naming it."""
    order: list[str] = []
    done: set[str] = set()

    def visit(name: str, path: list[str]) -> None:
        if name in done or parameters[name].formula is None:
            return
        if name in path:
            cycle = path[path.index(name):] + [name]
            raise ScenarioError(f"parameters.{cycle[0]}.formula",
                                f"derived parameters form a cycle ({' -> '.join(cycle)}); a "
                                "derived parameter cannot depend on itself: give one of them "
                                "a number")
        for used in parameters[name].formula.names:
            visit(used.name, path + [name])
        done.add(name)
        order.append(name)

    for name in parameters:
        visit(name, [])
    return order


def with_derived(parameters: Mapping[str, Any], values: Mapping[str, Any]) -> dict:
    """`values` with every derived parameter computed from them (floats or arrays of draws):
    a derived parameter is always recomputed, so a PSA draw or a sensitivity setting of its
    inputs moves it too. Without a finite value it is nan (see `check_settings`)."""
    found = dict(values)
    for name in derived_order(parameters):
        found[name] = evaluate(parameters[name].formula, found)
    return found


def inputs(parameters: Mapping[str, Any], name: str) -> list[str]:
    """The parameters without a formula that a derived parameter is computed from."""
    found: dict[str, None] = {}
    for used in parameters[name].formula.names:
        if parameters[used.name].formula is None:
            found[used.name] = None
        else:
            found.update(dict.fromkeys(inputs(parameters, used.name)))
    return list(found)


def derived_refusal(path: str, parameters: Mapping[str, Any], name: str,
                    use: str) -> ScenarioError:
    """The one refusal of a derived parameter where only its inputs can be set: the
    sensitivity grids vary inputs, EVPPI learns them (`use` says which)."""
    return ScenarioError(path, f"{name!r} is derived (computed by its formula from "
                               f"{listing(inputs(parameters, name))}); {use} the "
                               "parameters it is computed from")


def explain(parameters: Mapping[str, Any], name: str, values: Mapping[str, float]) -> str:
    """Why a derived parameter has no value at these (scalar) values of its inputs."""
    known = with_derived(parameters, values)
    try:
        evaluate(parameters[name].formula, known, strict=True)
    except FormulaError as error:
        given = ", ".join(f"{n} = {show(float(values[n]))}" for n in inputs(parameters, name))
        return f"column {error.column} of {quoted(parameters[name].formula.text)}: " \
               f"{error.message}{f' with {given}' if given else ''}"
    return "its formula has no finite value"


def settings(parameters: Mapping[str, Any]) -> Iterator[tuple[str, dict[str, float]]]:
    """The base case and every one-way setting (each ranged parameter at its low, then its
    high value), with the words naming each, derived parameters computed. A derived
    parameter without a finite value at any of them is refused."""
    base = {name: p.value for name, p in parameters.items()}
    found = [("", base)] + [
        (f" with parameters.{p.name} at its {end} value {show(getattr(p, end))} (one-way "
         "range)", {**base, p.name: getattr(p, end)})
        for p in parameters.values() if p.low is not None for end in ("low", "high")]
    for label, values in found:
        values = with_derived(parameters, values)
        for name in derived_order(parameters):
            if not np.isfinite(values[name]):
                raise ScenarioError(f"parameters.{name}.formula",
                                    f"{explain(parameters, name, values)}{label}; change the "
                                    "formula or the values it reads")
        yield label, values
