"""Plain records the Library hands out: a part of the catalogue, a stored curve, a query answer."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Callable

from benchkit.errors import UserError

PART_FIELDS = ("part_id", "description", "nominal_C_F", "tolerance", "rated_V", "class_code", "case", "supplier")


def check_part_id(pid: Any, where: Any = None) -> str:
    """Part ids are free text (stored and matched literally) but never empty and never hold
    control characters: those cannot be typed, printed on one line or used as separators."""
    if not isinstance(pid, str) or not pid:
        raise UserError(f"part {where if where is not None else pid!r}: needs a non-empty text id")
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in pid):
        raise UserError(f"part id {pid!r}: control characters (line breaks, tabs...) are not allowed in a part id")
    return pid


@dataclass(frozen=True)
class PartRecord:
    """Catalogue fields of one in-house part number (DEVELOPERS.md, "File formats": parts file, `case` as the EIA inch code)."""

    part_id: str
    description: str = ""
    nominal_C_F: float | None = None
    tolerance: str | None = None
    rated_V: float | None = None
    class_code: str | None = None
    case: str | None = None
    supplier: str | None = None

    @classmethod
    def from_any(cls, obj: Any) -> "PartRecord":
        """From a PartSpec (benchkit.catalogue), a mapping with `id` or `part_id`, or a PartRecord."""
        if isinstance(obj, PartRecord):
            return obj
        if isinstance(obj, dict):
            get = obj.get
        else:
            get = lambda k, d=None: getattr(obj, k, d)  # noqa: E731 - a dataclass like PartSpec
        pid = check_part_id(get("part_id") or get("id"), obj)
        def num(name):
            v = get(name)
            if v is None:
                return None
            try:
                return float(v)
            except (TypeError, ValueError):
                raise UserError(f"part {pid}: field {name!r} must be a number, got {v!r}") from None
        def text(name):
            v = get(name)
            return None if v is None else str(v)
        return cls(pid, text("description") or "", num("nominal_C_F"), text("tolerance"), num("rated_V"),
                   text("class_code"), text("case"), text("supplier"))

    def as_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in PART_FIELDS}


@dataclass
class CurveRecord:
    """A curve as stored: identity, where it came from, and its JSON document (the curve itself)."""

    curve_id: int
    part_id: str
    origin: str
    model: str
    sample_id: str | None
    branch: str | None
    temp_C: float
    valid_range_V: tuple[float, float]
    freq_Hz: float | None
    ac_level_Vrms: float | None
    function: str | None
    esr_ohm: float | None
    content_sha256: str
    points_sha256: str | None
    run_path: str | None
    document: str
    _curve: Any = field(default=None, repr=False, compare=False)

    @property
    def curve(self):
        """The fits.Curve object (loaded once): it evaluates itself, C(V), u_C(V), Q(V)..."""
        if self._curve is None:
            from benchkit.library.fitsbridge import curve_from_json

            self._curve = curve_from_json(self.document, f"library curve {self.curve_id}")
        return self._curve

    def document_dict(self) -> dict[str, Any]:
        return json.loads(self.document)


@dataclass
class QueryResult:
    """One part's answer at a bias and temperature.

    `C_F` is the effective (differential, as the meter reads it) capacitance and `u_C_F` its
    standard uncertainty. Not covered: C_F and u_C_F are None and `reason` says why.
    """

    part: PartRecord
    covered: bool
    C_F: float | None
    u_C_F: float | None
    reason: str = ""
    origin: str | None = None
    n_curves: int = 0
    curve_ids: tuple[int, ...] = ()
    temps_C: tuple[float, ...] = ()
    _loader: Callable[[int], CurveRecord] | None = field(default=None, repr=False, compare=False)

    @property
    def part_id(self) -> str:
        return self.part.part_id

    @property
    def retained_pct(self) -> float | None:
        """C at the bias as a percentage of the nominal value (None if either is unknown)."""
        if self.C_F is None or not self.part.nominal_C_F:
            return None
        return 100.0 * self.C_F / self.part.nominal_C_F

    def curves(self) -> list[CurveRecord]:
        """The stored curves this answer was computed from (each evaluates itself)."""
        if self._loader is None:
            return []
        return [self._loader(cid) for cid in self.curve_ids]
