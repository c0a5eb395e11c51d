"""The identity block of a verification report: when, from which files, on which instruments,
with which software and by whom, and an id derived from the content.

Why: a report read months later, or a copy sent to a supplier, must say exactly what it
judged. Each input file is named with its sha256; each run with its id and the *IDN? answers
its instruments gave (recorded in run.json); the report id is a sha256 prefix over the input
hashes, the software version, the operator and the results (file paths left out), so the
same inputs judged the same way keep their id wherever the files lie, and any changed byte of
an input gives another one. The
report's date is not part of the id: rendering twice is not a new result.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from pathlib import Path

from benchkit import __version__
from benchkit.bounded import check_free_text
from benchkit.sweep import runlog

NOT_RECORDED = "not recorded"
REPORT_ID_HEX = 16  # 64 bits: enough to tell reports apart, short enough to quote


def check_operator(name: str | None, where: str = "--operator") -> str | None:
    """The operator's name as given (one printable line), or None."""
    if name is None:
        return None
    name = name.strip()
    if not name:
        return None
    return check_free_text(name, where, "operator")


def _file(role: str, path: Path) -> dict:
    return {"role": role, "path": str(path), "sha256": runlog.sha256_file(path)}


def _run(run_dir: Path) -> tuple[dict, list[dict]]:
    meta = runlog.read_run(run_dir)
    files = [_file("run.json", run_dir / runlog.RUN_FILE),
             _file("points.csv", run_dir / runlog.POINTS_FILE)]
    instruments = []
    for role, inst in sorted((meta.get("instruments") or {}).items()):
        if isinstance(inst, dict):
            instruments.append({"role": role, "idn": inst.get("idn") or NOT_RECORDED,
                                "profile": inst.get("profile"), "resource": inst.get("resource")})
    plan = meta.get("plan") if isinstance(meta.get("plan"), dict) else {}
    operator = meta.get("operator") or plan.get("operator")
    run = {"run_id": meta.get("run_id"), "path": str(run_dir), "status": meta.get("status"),
           "start_utc": meta.get("start_utc"), "software_version": meta.get("software_version"),
           "operator": str(operator) if operator else None, "instruments": instruments}
    return run, files


def gather(v, inputs=None, operator: str | None = None) -> dict:
    """Everything of the identity but the report id and date (see finish()).

    `inputs`: the run directories and curve documents given to verify (default: those the
    samples came from). `operator`: the name given on the command line, which wins over the
    names recorded in the runs."""
    if inputs is None:
        inputs = list(dict.fromkeys(s.sample.path for s in v.samples if s.sample.path))
    files = [_file("claim", Path(v.claim.path))]
    runs = []
    for raw in inputs:
        p = Path(raw)
        if p.is_dir():
            run, fs = _run(p)
            runs.append(run)
            files += fs
        else:
            files.append(_file("curve document", p))
    run_ids = list(dict.fromkeys([r["run_id"] for r in runs if r["run_id"]]
                                 + [s.sample.run_id for s in v.samples if s.sample.run_id]))
    if operator:
        who, how = operator, "given with --operator"
    else:
        names = list(dict.fromkeys(r["operator"] for r in runs if r["operator"]))
        who, how = (", ".join(names), "recorded in run.json") if names else (NOT_RECORDED, None)
    return {"software": f"benchkit {__version__}", "software_version": __version__,
            "operator": who, "operator_source": how, "run_ids": run_ids, "runs": runs,
            "inputs": files}


PLACE_KEYS = ("path", "origin")  # where the files lay: not part of what was judged


def _without_places(o):
    if isinstance(o, dict):
        return {k: _without_places(x) for k, x in o.items() if k not in PLACE_KEYS}
    if isinstance(o, list):
        return [_without_places(x) for x in o]
    return o


def report_id(identity: dict, results: dict) -> str:
    """sha256 prefix over the input hashes, software, operator and the results document (file
    paths left out, so the same files judged in another folder keep their id)."""
    basis = {"inputs": [[f["role"], f["sha256"]] for f in identity["inputs"]],
             "software_version": identity["software_version"], "operator": identity["operator"],
             "results": _without_places(results)}
    text = json.dumps(basis, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                      allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()[:REPORT_ID_HEX]


def finish(identity: dict, results: dict, now: _dt.datetime | None = None) -> dict:
    """The identity with its report id (from `results`, the JSON-safe document) and UTC date."""
    now = now or _dt.datetime.now(_dt.timezone.utc)
    utc = now.astimezone(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")
    return {"report_id": report_id(identity, results), "report_utc": utc, **identity}
