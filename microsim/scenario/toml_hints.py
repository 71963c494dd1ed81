"""A short hint for a TOML syntax error whose common cause can be told from the parser's
message and the text where it stopped (a word without quotes, an array, inline table or
string left open), so that a person who writes scenarios by hand sees the fix, not only
the parser's words. No hint when the cause is not recognisable."""
from __future__ import annotations

import re

WORD = re.compile(r"[A-Za-z_][\w.-]*")
TWICE = re.compile(r"cannot declare (\[.*\]) twice")
KEY_TUPLE = re.compile(r"\(((?:'[^']*',? ?)+)\)")


def plain(detail: str) -> str:
    """tomllib's message with a table's key written as in the file ([time], not
    ('time',))."""
    return KEY_TUPLE.sub(lambda m: "[" + ".".join(re.findall(r"'([^']*)'", m.group(1))) + "]",
                         detail)


def syntax_hint(detail: str, text: str, line: int | None, column: int | None) -> str:
    """The fix for the syntax error `detail` (tomllib's message, lower case) found at
    `line`, `column` (1-based; None at the end of the file) of `text`, or ""."""
    lines = text.splitlines()
    here = lines[line - 1] if line is not None and line <= len(lines) else ""
    rest = here[column - 1:] if column is not None else ""
    if detail.startswith("invalid value"):
        if here.count("{") > here.count("}"):  # a line break inside an inline table
            return "an inline table { ... } stays on one line, closed with '}' on it"
        return value_hint(rest.strip())
    declared = TWICE.match(detail)
    if declared:
        return f"put the keys of {declared.group(1)} under one header"
    if detail.startswith("unclosed array"):
        return "close the array with ']' (it may have been opened on an earlier line)"
    if detail.startswith("unclosed inline table"):
        return "close the inline table with '}' on the line it opens"
    if detail.startswith("invalid initial character for a key part") and "{" in here:
        return ("an inline table { ... } stays on one line, with no comma after its "
                "last entry")
    if detail.startswith(("unterminated string", "illegal character '\\n'", 'expected "\'"')):
        return "close the text with its quote on the same line"
    if detail.startswith("cannot overwrite a value"):
        return "this key is given twice in its table; keep one"
    if detail.startswith("expected newline or end of document after a statement"):
        return "one value per line: text in quotes, decimals with a point, comments after '#'"
    return ""


def value_hint(value: str) -> str:
    """Why the text after '=' is not a value."""
    if not value or value.startswith("#"):
        return "give a value after '='"
    word = WORD.match(value)
    if word is None:
        return ""
    if word.group().lower() in ("true", "false"):
        return f"write {word.group().lower()} in lower case"
    return f'put text in quotes: "{word.group()}"'
