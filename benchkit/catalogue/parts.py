"""The in-house parts catalogue: what each part is, as the bench, the library and verify see it.

A part's `[part.sim]` table is physics for the simulated bench only; the catalogue keeps it as
the raw table it read and never interprets it (the simulator parses its own physics, handed
to it by whoever starts a simulated bench). A real bench needs nothing of it.

Parts file (TOML, DEVELOPERS.md "File formats")::

    company = "Brackwater Dynamics"
    [[part]]
    id, description, nominal_C_F, tolerance, rated_V, class_code, case, supplier
    [part.sim]      # optional: physics of the simulated part (parsed by the simulator)
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Mapping

from benchkit.catalogue.codes import (
    ABSOLUTE_TOLERANCE_MAX_C_F, CASE_CODES, TOLERANCE_LETTERS, parse_class_code,
    tolerance_limits_F,
)
from benchkit.catalogue.tomlfile import Checker, PartsFileError, read_toml
from benchkit.errors import UserError

_DATA = Path(__file__).resolve().parents[2] / "data"
DEMO_PARTS = _DATA / "parts.toml"
DEMO_FIXTURE = _DATA / "fixture.toml"
DEMO_LOT = _DATA / "lot.toml"


@dataclass(frozen=True)
class PartSpec:
    """One catalogue entry of the parts file (DEVELOPERS.md, "File formats").

    `sim` is the raw `[part.sim]` table (or None); `where` names the entry in its file
    ("data/parts.toml: part 3 (BD-1003)") so that whoever reads `sim` can say where a problem is.
    """

    id: str
    description: str
    nominal_C_F: float
    tolerance: str
    rated_V: float
    class_code: str
    case: str
    supplier: str
    sim: Mapping[str, Any] | None = field(default=None, compare=False, repr=False)
    where: str = field(default="", compare=False, repr=False)

    @property
    def dielectric_class(self) -> int:
        return parse_class_code(self.class_code).dielectric_class

    def tolerance_limits_F(self) -> tuple[float, float]:
        """(lowest, highest) capacitance the tolerance letter allows [standard: IEC 60062]."""
        return tolerance_limits_F(self.nominal_C_F, self.tolerance)


CATALOGUE_FIELDS = tuple(f.name for f in fields(PartSpec) if f.name not in ("sim", "where"))
_PART_FIELDS = CATALOGUE_FIELDS + ("sim",)


def load_parts(path: Path | str) -> dict[str, PartSpec]:
    """Read a parts file into {part id: PartSpec}, in file order; PartsFileError if bad."""
    ck = Checker(path)
    doc = read_toml(path)
    ck.known(doc, ("company", "part"), "")
    ck.string(doc, "company", "")
    parts: dict[str, PartSpec] = {}
    for n, entry in enumerate(ck.array_of_tables(doc, "part"), start=1):
        pid = entry.get("id")
        where = f"part {n} ({pid})" if isinstance(pid, str) and pid.strip() else f"part {n}"
        spec = _parse_part(ck, entry, where)
        if spec.id in parts:
            raise ck.field_fail(where, "id", "duplicate part id (each id once)", spec.id)
        parts[spec.id] = spec
    return parts


def load_catalogue(path: str | Path | None = None) -> dict[str, PartSpec]:
    """The parts catalogue (default: the demo parts); a bad file is a UserError."""
    try:
        return load_parts(DEMO_PARTS if path is None else path)
    except PartsFileError as exc:
        raise UserError(str(exc)) from None


def _parse_part(ck: Checker, e: dict, where: str) -> PartSpec:
    ck.known(e, _PART_FIELDS, where)
    pid = ck.string(e, "id", where, max_len=64)
    if any(c.isspace() for c in pid):
        raise ck.field_fail(where, "id", "must not contain spaces", pid)
    description = ck.string(e, "description", where)
    nominal = ck.number(e, "nominal_C_F", where)
    if not 1e-15 <= nominal <= 10.0:  # 1 fF .. 10 F: beyond any ceramic capacitor [common practice]
        raise ck.field_fail(where, "nominal_C_F", "must be from 1e-15 to 10 F", nominal)
    tol = ck.string(e, "tolerance", where)
    if tol not in TOLERANCE_LETTERS:
        raise ck.field_fail(where, "tolerance", f"must be an IEC 60062 letter "
                            f"({''.join(TOLERANCE_LETTERS)})", tol)
    if TOLERANCE_LETTERS[tol][0] == "pF" and nominal >= ABSOLUTE_TOLERANCE_MAX_C_F:
        raise ck.field_fail(where, "tolerance", "B, C and D are for values below 10 pF; use "
                            "a percentage letter (F G J K M Z)", tol)
    rated = ck.number(e, "rated_V", where)
    if rated > 1000.0:  # the sweep's bias bound (benchkit/sweep/plan.py MAX_BIAS_V)
        raise ck.field_fail(where, "rated_V", "must be at most 1000 V", rated)
    code = ck.string(e, "class_code", where)
    try:
        parse_class_code(code)
    except UserError:
        raise ck.field_fail(where, "class_code", "must be an EIA-198 code such as X7R, X5R, "
                            "Y5V or C0G", code) from None
    case = ck.string(e, "case", where)
    if case not in CASE_CODES:
        raise ck.field_fail(where, "case", f"must be an EIA inch case code "
                            f"({', '.join(CASE_CODES)})", case)
    supplier = ck.string(e, "supplier", where)
    sim = None
    if "sim" in e:
        if not isinstance(e["sim"], dict):
            raise ck.field_fail(where, "sim", "must be a table [part.sim]", e["sim"],
                                show=False)
        sim = dict(e["sim"])
    return PartSpec(pid, description, nominal, tol, rated, code, case, supplier, sim,
                    where=f"{ck.file}: {where}")


def catalogue_dict(spec: PartSpec) -> dict[str, Any]:
    """The catalogue fields of a part as plain data (for run.json 'samples[].part')."""
    return {name: getattr(spec, name) for name in CATALOGUE_FIELDS}
