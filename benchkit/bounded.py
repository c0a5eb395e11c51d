"""Bounds every reader of operator files applies before it trusts a byte of them.

Why: a plan, parts, bench or claim file decides what a sweep does and what a report says; a
file nested a thousand deep, a line of megabytes or an id with an escape sequence in it must
be refused with one line (what, where, what to do), never become a traceback, a cleared
terminal or a run that later cannot be read back. The limits are far above any real file.
"""

from __future__ import annotations

import difflib
import json
import tomllib
from typing import Any, Iterable

from benchkit.errors import UserError

MAX_FILE_CHARS = 4_000_000  # a plan with 10000 points_V is about 100 kB
MAX_LINE_CHARS = 200_000
MAX_DEPTH = 32  # nested tables/arrays; benchkit's own files need 4
MAX_ID_CHARS = 64  # sample, part and run ids: they go into CSV fields and file names
MAX_TEXT_CHARS = 4096  # free text (descriptions, names)


def check_text(text: str, where: str, what: str = "file") -> None:
    """Size and line length of a text file, and no NUL; UserError naming the line."""
    if len(text) > MAX_FILE_CHARS:
        raise UserError(f"{where}: {what} is {len(text)} characters, more than the "
                        f"{MAX_FILE_CHARS} allowed; is it the right file?")
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise UserError(f"{where}: line {line}: NUL character; the {what} is damaged or binary")
    start = 0
    n = 1
    while start < len(text):
        end = text.find("\n", start)
        end = len(text) if end < 0 else end
        if end - start > MAX_LINE_CHARS:
            raise UserError(f"{where}: line {n}: longer than {MAX_LINE_CHARS} characters; "
                            f"split it or check the {what}")
        start = end + 1
        n += 1


def _bracket_depth(text: str) -> tuple[int, int]:
    """Deepest nesting of [ and { outside strings and comments, and the line it occurs on."""
    depth = best = 0
    line = best_line = 1
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c == "\n":
            line += 1
        elif c == "#":
            j = text.find("\n", i)
            i = n if j < 0 else j
            continue
        elif c in "\"'":
            q3 = text[i:i + 3]
            if q3 in ('"""', "'''"):
                j = text.find(q3, i + 3)
                j = n if j < 0 else j + 3
                line += text.count("\n", i, j)
                i = j
                continue
            j = i + 1
            while j < n and text[j] != c and text[j] != "\n":
                j += 2 if (c == '"' and text[j] == "\\") else 1
            i = j + 1
            continue
        elif c in "[{":
            depth += 1
            if depth > best:
                best, best_line = depth, line
        elif c in "]}":
            depth = max(0, depth - 1)
        i += 1
    return best, best_line


def data_depth(obj: Any) -> int:
    """Nesting depth of parsed data (tables and arrays), without recursion."""
    best = 0
    stack = [(obj, 1)]
    while stack:
        o, d = stack.pop()
        if isinstance(o, dict):
            best = max(best, d)
            if d <= MAX_DEPTH:
                stack.extend((v, d + 1) for v in o.values())
        elif isinstance(o, (list, tuple)):
            best = max(best, d)
            if d <= MAX_DEPTH:
                stack.extend((v, d + 1) for v in o)
    return best


def loads_toml(text: str, where: str, what: str = "file", syntax: str = "not valid TOML") -> dict:
    """tomllib.loads with the bounds above; every problem is one UserError line."""
    check_text(text, where, what)
    depth, line = _bracket_depth(text)
    if depth > MAX_DEPTH:
        raise UserError(f"{where}: line {line}: nested more than {MAX_DEPTH} deep; "
                        f"not a benchkit {what}")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{where}: {syntax}: {' '.join(str(exc).split())}; "
                        f"fix the {what}") from None
    except RecursionError:
        raise UserError(f"{where}: nested too deeply; not a benchkit {what}") from None
    if data_depth(data) > MAX_DEPTH:
        raise UserError(f"{where}: tables nested more than {MAX_DEPTH} deep (dotted keys); "
                        f"not a benchkit {what}")
    return data


def loads_json(text: str, where: str, what: str = "file") -> Any:
    """json.loads with the bounds above; every problem is one UserError line."""
    check_text(text, where, what)
    try:
        data = json.loads(text)
    except ValueError as exc:
        raise UserError(f"{where}: not valid JSON ({exc})") from None
    except RecursionError:
        raise UserError(f"{where}: not valid JSON (nested too deeply to be a {what})") from None
    if data_depth(data) > MAX_DEPTH:
        raise UserError(f"{where}: nested deeper than {MAX_DEPTH} levels; not a {what}")
    return data


def control_char(text: str) -> str | None:
    """The first control character of `text` as an escape (e.g. '\\x1b'), or None."""
    for ch in text:
        o = ord(ch)
        if o < 0x20 or 0x7F <= o < 0xA0 or ch in "\u2028\u2029":
            return repr(ch)[1:-1]
    return None


def check_id(value: str, where: str, field: str) -> str:
    """An id (sample, part, run): short, one printable line, no separators of the CSV."""
    if len(value) > MAX_ID_CHARS:
        raise UserError(f"{where}: field {field!r}: {len(value)} characters, at most "
                        f"{MAX_ID_CHARS} allowed in an id; shorten it")
    bad = control_char(value)
    if bad is not None:
        raise UserError(f"{where}: field {field!r}: contains the control character {bad}; "
                        "ids are printable text: retype it")
    return value


def check_free_text(value: str, where: str, field: str) -> str:
    """A name or description: bounded, and no control characters but tab."""
    if len(value) > MAX_TEXT_CHARS:
        raise UserError(f"{where}: field {field!r}: {len(value)} characters, at most "
                        f"{MAX_TEXT_CHARS} allowed; shorten it")
    bad = control_char(value.replace("\t", " "))
    if bad is not None:
        raise UserError(f"{where}: field {field!r}: contains the control character {bad}; "
                        "remove it")
    return value


def safe_repr(value: Any, limit: int = 60) -> str:
    """A value for an error message: escaped (no raw control characters) and cut short."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def did_you_mean(key: str, known: Iterable[str]) -> str:
    """'; did you mean 'x'?' or '; known: a, b, c' for an unknown key."""
    known = sorted(known)
    near = difflib.get_close_matches(str(key), known, n=1)
    if near:
        return f"; did you mean {near[0]!r}?"
    return f"; known here: {', '.join(known)}"


def unknown_key(where: str, key: Any, known: Iterable[str], what: str = "field") -> UserError:
    return UserError(f"{where}: unknown {what} {safe_repr(str(key))}{did_you_mean(key, known)}")
