"""A supplier's claimed C(V) curve, read from a small CSV with a header block.

Format (ours), UTF-8 text:

    # format = benchkit-claim
    # version = 1
    # part_id = BD-1001
    # supplier = free text
    # freq_Hz = 1000
    # ac_level_Vrms = 0.5
    # temp_C = 25                 (optional)
    # age_h = 1000                (optional: hours since the last heat the claim refers to)
    # tolerance = 10%             (optional here, then --tolerance is needed: letter or band)
    # nominal_C_F = 10e-6         (required when the column is delta_C_pct)
    # source = digitised from the supplier's bias plot
    # any other line starting with '#' and without '=' is a note
    bias_V,C_F                    (or C_uF, C_nF, C_pF, or delta_C_pct relative to nominal_C_F)
    0,10.1e-6
    ...

A claim digitised from a plot has few points, so between them it is interpolated with a
monotone piecewise-cubic Hermite (PCHIP) that adds no wiggles, and never extrapolated.
Parsing is strict: every problem is one line naming the file and line.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.interpolate import PchipInterpolator

from benchkit.catalogue.codes import Tolerance, parse_tolerance
from benchkit.errors import UserError

FORMAT_NAME = "benchkit-claim"
FORMAT_VERSION = 1
MIN_POINTS = 3
C_COLUMNS = {"C_F": 1.0, "C_uF": 1e-6, "C_nF": 1e-9, "C_pF": 1e-12}
DELTA_COLUMN = "delta_C_pct"
NUMBER_KEYS = {"freq_Hz": "Hz", "ac_level_Vrms": "Vrms", "temp_C": "degC", "age_h": "h",
               "nominal_C_F": "F"}
# units benchkit.units may read after a header number (1k, 1kHz, 1u, 1uF); the others are plain
_UNIT_SYMBOL = {"freq_Hz": "Hz", "ac_level_Vrms": "Vrms", "nominal_C_F": "F"}
TEXT_KEYS = {"format", "version", "part_id", "supplier", "tolerance", "source"}
REQUIRED_KEYS = ("format", "version", "part_id", "freq_Hz", "ac_level_Vrms")
_HINTS = {"freq": "freq_Hz", "frequency": "freq_Hz", "ac_level": "ac_level_Vrms",
          "temp": "temp_C", "temperature": "temp_C", "age": "age_h", "nominal": "nominal_C_F"}


@dataclass
class Claim:
    """A claimed curve: the points as stated, the conditions they were stated at, a tolerance."""

    path: str
    part_id: str
    bias_V: np.ndarray
    C_F: np.ndarray
    freq_Hz: float
    ac_level_Vrms: float
    temp_C: float | None = None
    age_h: float | None = None
    tolerance: Tolerance | None = None
    tolerance_text: str | None = None
    nominal_C_F: float | None = None
    supplier: str = ""
    source: str = ""
    column: str = "C_F"
    notes: list[str] = field(default_factory=list)
    lines: list[int] = field(default_factory=list)

    def __post_init__(self):
        self._pchip = PchipInterpolator(self.bias_V, self.C_F, extrapolate=False)

    @property
    def valid_range_V(self) -> tuple[float, float]:
        return float(self.bias_V[0]), float(self.bias_V[-1])

    def covers(self, V) -> np.ndarray:
        v = np.asarray(V, dtype=float)
        lo, hi = self.valid_range_V
        return (v >= lo) & (v <= hi)

    def C(self, V):
        """Claimed capacitance at V (PCHIP between the stated points); outside them: error."""
        v = np.asarray(V, dtype=float)
        if not np.all(self.covers(v)):
            lo, hi = self.valid_range_V
            raise UserError(f"{self.path}: the claim covers {lo:g}..{hi:g} V only; "
                            f"it is never extrapolated")
        out = self._pchip(v)
        return float(out) if out.ndim == 0 else out

    def limits(self, V, tolerance: Tolerance | None = None):
        """Tolerance limits (lo, hi) in farads around the claimed value at V."""
        tol = tolerance or self.tolerance
        if tol is None:
            raise UserError(f"{self.path}: the claim states no tolerance; give --tolerance")
        c = np.asarray(self.C(V), dtype=float)
        if tol.kind == "pF":
            return c - tol.minus * 1e-12, c + tol.plus * 1e-12
        return c * (1 - tol.minus / 100.0), c * (1 + tol.plus / 100.0)

    def to_curve(self):
        """The claim as a fits curve document (model "table", origin "supplier claim"), e.g. to
        keep it in the library beside the measured curves."""
        from fits import Curve

        curve = Curve.from_points(self.bias_V, self.C_F, origin="supplier claim",
                                  part_id=self.part_id)
        curve.conditions.update({"freq_Hz": self.freq_Hz, "ac_level_Vrms": self.ac_level_Vrms,
                                 "temp_C": self.temp_C})
        return curve

    def conditions(self) -> dict:
        return {"freq_Hz": self.freq_Hz, "ac_level_Vrms": self.ac_level_Vrms,
                "temp_C": self.temp_C, "age_h": self.age_h}

    def to_dict(self) -> dict:
        return {
            "path": self.path, "part_id": self.part_id, "supplier": self.supplier,
            "source": self.source, "column": self.column, "conditions": self.conditions(),
            "tolerance": self.tolerance.text() if self.tolerance else None,
            "nominal_C_F": self.nominal_C_F, "bias_V": self.bias_V.tolist(),
            "C_F": self.C_F.tolist(), "notes": list(self.notes),
        }


def _number(text: str, where: str, what: str, unit: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise UserError(f"{where}: {what} {text.strip()!r} is not a plain number in {unit}; "
                        f"write the number alone in {unit}") from None
    if not math.isfinite(value):
        raise UserError(f"{where}: {what} is {text.strip()!r}; write a finite number in {unit}")
    return value


def _header_number(text: str, where: str, key: str, unit: str) -> float:
    """A header value: plain number, or with an SI prefix / the key's own unit (1k, 1 kHz)."""
    from benchkit.units import parse_value

    if key not in _UNIT_SYMBOL:
        return _number(text, where, key, unit)
    try:
        return parse_value(text, _UNIT_SYMBOL[key], key)
    except UserError as exc:
        raise UserError(f"{where}: {exc} (in {unit})") from None


def load_claim(path) -> Claim:
    """Read and check a claim file; any problem raises UserError('<file>:<line>: ...')."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")  # a spreadsheet's byte-order mark is fine
    except FileNotFoundError:
        raise UserError(f"{p}: claim file not found; check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: cannot read the claim file ({exc}); give a UTF-8 CSV") from None
    return parse_claim(text, str(p))


def parse_claim(text: str, name: str = "<claim>") -> Claim:
    from benchkit.bounded import check_text, control_char

    check_text(text, name, "claim file")
    header: dict[str, tuple[str, int]] = {}
    notes: list[str] = []
    columns: list[str] | None = None
    col_line = 0
    rows: list[tuple[int, list[str]]] = []
    for lineno, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        where = f"{name}:{lineno}"
        if not line:
            continue
        if line.startswith("#"):
            if columns is not None:
                raise UserError(f"{where}: header line after the column row; put every '# ...' "
                                f"line above 'bias_V,...'")
            body = line.lstrip("#").strip()
            if "=" not in body:
                if body:
                    notes.append(body)
                continue
            key, value = (s.strip() for s in body.split("=", 1))
            if key in header:
                raise UserError(f"{where}: header key {key!r} given twice (first at line "
                                f"{header[key][1]}); keep one")
            if key not in NUMBER_KEYS and key not in TEXT_KEYS:
                hint = _HINTS.get(key.split("_")[0].lower())
                known = ", ".join(sorted(set(NUMBER_KEYS) | TEXT_KEYS))
                raise UserError(f"{where}: unknown header key {key!r}"
                                + (f"; did you mean {hint!r} (units are part of the name)?" if hint
                                   else f"; known keys: {known}"))
            bad = control_char(value)
            if bad is not None:
                raise UserError(f"{where}: header key {key!r}: contains the control character "
                                f"{bad}; retype it")
            header[key] = (value, lineno)
            continue
        cells = _cells(line, where)
        if columns is None:
            columns, col_line = cells, lineno
            _check_columns(columns, where)
            continue
        if len(cells) != len(columns):
            raise UserError(f"{where}: {len(cells)} fields, expected {len(columns)} "
                            f"({','.join(columns)})")
        rows.append((lineno, cells))

    meta = _check_header(header, name)
    if columns is None:
        raise UserError(f"{name}: no column row; add 'bias_V,C_F' (or C_uF, C_nF, C_pF, "
                        f"{DELTA_COLUMN}) after the header")
    ycol = columns[1]
    bias, ys, lines = [], [], []
    for lineno, cells in rows:
        where = f"{name}:{lineno}"
        v = _number(cells[0], where, "bias_V", "V")
        y = _number(cells[1], where, ycol, "%" if ycol == DELTA_COLUMN else ycol.split("_")[1])
        if bias:
            if v == bias[-1]:
                raise UserError(f"{where}: duplicate bias {v:g} V (also at line {lines[-1]}); "
                                f"give each bias once")
            if v < bias[-1]:
                dup = [ln for b, ln in zip(bias, lines) if b == v]
                if dup:
                    raise UserError(f"{where}: duplicate bias {v:g} V (also at line {dup[0]}); "
                                    f"give each bias once")
                raise UserError(f"{where}: bias {v:g} V is below the previous {bias[-1]:g} V; "
                                f"list the points with bias strictly increasing")
        if ycol == DELTA_COLUMN:
            if y <= -100.0:
                raise UserError(f"{where}: {DELTA_COLUMN} {y:g} leaves no capacitance; must be > -100")
        elif y <= 0:
            raise UserError(f"{where}: {ycol} {y:g} must be positive")
        bias.append(v)
        ys.append(y)
        lines.append(lineno)
    if len(bias) < MIN_POINTS:
        raise UserError(f"{name}:{lines[-1] if lines else col_line}: only {len(bias)} point(s); "
                        f"a claim needs at least {MIN_POINTS} to be interpolated")
    y_arr = np.asarray(ys, dtype=float)
    if ycol == DELTA_COLUMN:
        if meta.get("nominal_C_F") is None:
            raise UserError(f"{name}:{col_line}: column {DELTA_COLUMN} needs the header key "
                            f"'nominal_C_F' (the capacitance the percentages refer to)")
        C = meta["nominal_C_F"] * (1.0 + y_arr / 100.0)
    else:
        C = y_arr * C_COLUMNS[ycol]
    return Claim(path=name, bias_V=np.asarray(bias, dtype=float), C_F=C, column=ycol,
                 notes=notes, lines=lines, **meta)


def _cells(line: str, where: str) -> list[str]:
    """One CSV row by the stdlib reader, so a spreadsheet's quoted cells ("0.5","9.8e-6") read."""
    try:
        return [c.strip() for c in next(csv.reader([line], strict=True))]
    except csv.Error as exc:
        raise UserError(f"{where}: not a CSV row ({exc}); write cells separated by commas, "
                        f"quotes around a cell only if it needs them") from None


def _check_columns(columns: list[str], where: str) -> None:
    allowed = ", ".join([*C_COLUMNS, DELTA_COLUMN])
    if len(columns) != 2:
        raise UserError(f"{where}: column row {','.join(columns)!r} must have two columns: "
                        f"bias_V and one of {allowed}")
    if columns[0] != "bias_V":
        raise UserError(f"{where}: first column {columns[0]!r} must be 'bias_V' (bias in volts)")
    if columns[1] not in C_COLUMNS and columns[1] != DELTA_COLUMN:
        raise UserError(f"{where}: column {columns[1]!r} has no accepted unit; use one of {allowed}")


def _check_header(header: dict[str, tuple[str, int]], name: str) -> dict:
    fmt = header.get("format")
    if fmt is None or fmt[0] != FORMAT_NAME:
        raise UserError(f"{name}:{fmt[1] if fmt else 1}: not a claim file; the header must "
                        f"start with '# format = {FORMAT_NAME}' and '# version = {FORMAT_VERSION}'")
    for key in REQUIRED_KEYS:
        if key not in header:
            raise UserError(f"{name}: header key {key!r} missing; add '# {key} = ...'")
    ver, ver_line = header["version"]
    if ver != str(FORMAT_VERSION):
        raise UserError(f"{name}:{ver_line}: claim format version {ver!r} not supported "
                        f"(this benchkit reads version {FORMAT_VERSION})")
    meta: dict = {"part_id": header["part_id"][0], "supplier": header.get("supplier", ("", 0))[0],
                  "source": header.get("source", ("", 0))[0]}
    if not meta["part_id"]:
        raise UserError(f"{name}:{header['part_id'][1]}: part_id is empty")
    for key, unit in NUMBER_KEYS.items():
        if key in header:
            value, line = header[key]
            meta[key] = _header_number(value, f"{name}:{line}", key, unit)
            if key != "temp_C" and meta[key] <= 0:
                raise UserError(f"{name}:{line}: {key} must be positive, got {value}")
    if "tolerance" in header:
        value, line = header["tolerance"]
        try:
            meta["tolerance"] = parse_tolerance(value)
        except UserError as exc:
            raise UserError(f"{name}:{line}: {exc}") from None
        meta["tolerance_text"] = value
    return meta
