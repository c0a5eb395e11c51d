"""Inputs of the class-code check: C(V, T) families from run directories or family documents,
and the class code each part is labelled with."""

from __future__ import annotations

from pathlib import Path

from benchkit.errors import UserError

TEMP_GROUP_TOL_C = 2.0   # readings of one soak; set points of a plan lie further apart


def class_code(text: str):
    from benchkit.catalogue.codes import parse_class_code

    return parse_class_code(text)


def codes_of_parts(part_ids, parts_path=None) -> dict:
    """{part_id: ClassCode} from the parts file (default: the demo catalogue)."""
    from benchkit.catalogue.codes import parse_class_code
    from benchkit.catalogue import DEMO_PARTS, PartsFileError, load_parts

    try:
        parts = load_parts(parts_path or DEMO_PARTS)
    except PartsFileError as exc:
        raise UserError(str(exc)) from None
    out = {}
    for pid in sorted(part_ids):
        spec = parts.get(pid)
        if spec is None:
            raise UserError(f"part {pid}: not in the parts file {parts_path or '(demo)'}; "
                            "give --parts with its entry, or --code")
        out[pid] = parse_class_code(spec.class_code)
    return out


def _family_from_doc(path: Path):
    from fits.errors import FitsError
    from fits.family import CurveFamily

    try:
        return CurveFamily.load(path)
    except FitsError as exc:
        raise UserError(str(exc)) from None


def _families_from_run(run_dir: Path, branch: str, model: str):
    from benchkit.sweep import rundir as rundata
    from fits.errors import FitsError
    from fits.family import fit_family

    data = rundata.read_run_dir(run_dir, action="checked")
    out = []
    for sid, smp in data.with_points().items():
        present = smp.branches()
        use = smp.select(branch if branch in present else present[0])
        try:
            fam = fit_family(use.bias_V, use.C_F, use.temp_C, use.sigma_F, model=model,
                             tol_C=TEMP_GROUP_TOL_C, part_id=smp.part_id, sample_id=sid,
                             branch=branch if branch in present else present[0],
                             conditions={k: v for k, v in rundata.fit_conditions(
                                 data.meta, use.rows).items() if k != "temp_C"})
        except FitsError as exc:
            raise UserError(f"{data.points_path}: sample {sid}: {exc}") from None
        out.append(fam)
    return out


def load_families(paths, branch: str = "rising", model: str = "auto", part_id: str | None = None):
    fams = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            fams.extend(_families_from_run(p, branch, model))
        elif p.is_file():
            fams.append(_family_from_doc(p))
        else:
            raise UserError(f"{p}: no such run directory or curve family; check the path")
    if part_id is not None:
        fams = [f for f in fams if f.part_id == part_id]
    if not fams:
        raise UserError("no sample to check in the inputs" +
                        (f" for part {part_id}" if part_id else ""))
    for f in fams:
        if not f.part_id:
            raise UserError(f"{f!r}: the family names no part; give --code to check it anyway")
    return fams
