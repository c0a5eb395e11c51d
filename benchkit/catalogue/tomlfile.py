"""Reading the catalogue's TOML files: one-line messages naming the file, the entry and the field.

Why strict: a parts, fixture or lot file decides what a sweep may put across a part, so a
typo must not turn silently into a different capacitor or a higher voltage. Every problem is
raised as `PartsFileError` (a ValueError) that the CLI prints as one line.
"""

from __future__ import annotations

import difflib
import math
from pathlib import Path
from typing import Any, Mapping


class PartsFileError(ValueError):
    """A parts, fixture or lot file that cannot be used; the message is one line."""


def _fmt(v: Any) -> str:
    if isinstance(v, str):
        return repr(v) if len(v) <= 60 else repr(v[:57]) + "..."
    if isinstance(v, (list, tuple)):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


class Checker:
    """Builds the one-line messages: '<file>: <where>: field '<name>': <what>, got <v>'."""

    def __init__(self, path: Path | str):
        self.file = str(path)

    def fail(self, where: str, msg: str) -> PartsFileError:
        prefix = f"{self.file}: {where}: " if where else f"{self.file}: "
        return PartsFileError((prefix + msg).replace("\n", " "))

    def field_fail(self, where: str, name: str, msg: str, value: Any = None,
                   show: bool = True) -> PartsFileError:
        got = f", got {_fmt(value)}" if show else ""
        return self.fail(where, f"field {name!r}: {msg}{got}")

    def known(self, table: Mapping[str, Any], allowed: tuple[str, ...], where: str,
              prefix: str = "") -> None:
        for key in table:
            if key not in allowed:
                near = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {prefix + near[0]!r}?" if near else \
                    f"; known fields: {', '.join(allowed)}"
                raise self.fail(where, f"unknown field {_fmt(prefix + key)}{hint}")

    def get(self, table: Mapping[str, Any], name: str, where: str, prefix: str = "") -> Any:
        if name not in table:
            raise self.fail(where, f"missing field {prefix + name!r}; add it")
        return table[name]

    def string(self, table, name, where, prefix="", max_len: int = 4096) -> str:
        v = self.get(table, name, where, prefix)
        if not isinstance(v, str) or not v.strip():
            raise self.field_fail(where, prefix + name, "must be a non-empty string", v)
        if len(v) > max_len:
            raise self.field_fail(where, prefix + name, f"is {len(v)} characters, at most "
                                  f"{max_len} allowed", show=False)
        from benchkit.bounded import control_char

        bad = control_char(v)
        if bad is not None:
            raise self.field_fail(where, prefix + name, f"contains the control character {bad}; "
                                  "retype it", show=False)
        return v

    def number(self, table, name, where, prefix="", kind="positive") -> float:
        v = self.get(table, name, where, prefix)
        return self.check_number(v, prefix + name, where, kind)

    def check_number(self, v, name, where, kind="positive") -> float:
        is_num = isinstance(v, (int, float)) and not isinstance(v, bool)
        ok = is_num and math.isfinite(v)
        if kind == "positive":
            ok = ok and v > 0
            what = "must be a positive number"
        elif kind == "nonneg":
            ok = ok and v >= 0
            what = "must be a number >= 0"
        elif kind == "fraction":
            ok = ok and 0 <= v <= 1
            what = "must be a number from 0 to 1"
        else:  # any finite number
            what = "must be a number"
        if not ok:
            raise self.field_fail(where, name, what, v)
        return float(v)

    def integer(self, table, name, where, allowed: range) -> int:
        v = self.get(table, name, where)
        if not isinstance(v, int) or isinstance(v, bool) or v not in allowed:
            raise self.field_fail(where, name, f"must be an integer from {allowed.start} "
                                  f"to {allowed.stop - 1}", v)
        return v

    def array_of_tables(self, doc, name, where="") -> list[dict]:
        v = doc.get(name)
        if v is None:
            raise self.fail(where, f"no [[{name}]] entries")
        if not isinstance(v, list) or not all(isinstance(e, dict) for e in v):
            raise self.field_fail(where, name, f"must be an array of tables [[{name}]]", v,
                                  show=False)
        if not v:
            raise self.fail(where, f"no [[{name}]] entries")
        return v


def read_toml(path: Path | str) -> dict:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PartsFileError(f"{p}: file not found; give the path of a parts/fixture/lot "
                             "TOML file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise PartsFileError(f"{p}: cannot read: {exc}".replace("\n", " ")) from None
    from benchkit.bounded import loads_toml
    from benchkit.errors import UserError

    try:
        return loads_toml(text, str(p), "catalogue file", syntax="TOML syntax error")
    except UserError as exc:
        raise PartsFileError(str(exc)) from None
