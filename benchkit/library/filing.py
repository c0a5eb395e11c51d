"""Filing a whole run over HTTP: the body a bench sends, and what the server does with it.

Why: benches at other desks or sites file their runs into one shared library without a login
to the server. The server accepts run.json, points.csv and points.chain as they are on the
bench's disk, checks them with the very readers `benchkit library add RUN_DIR` uses (run.json
format, the points header, every row, the sha256 of a complete run, the hash chain of the rows,
benchkit/sweep/rundir.py), then fits and files them as that command would
(ingest.add_run_parts). The run's identity is its points.csv sha256, so the same run filed
twice, by one bench or four at once, is stored once.

Nothing from the request names a file: the three texts are written under their fixed names
into a private folder the server makes (tempfile) for the duration of the reading, which is
removed afterwards, and messages name the files as `run/points.csv`, never that folder.

The client (file_run) sends them with httpx; a token never crosses a network in clear (plain
http only to a loopback address).
"""

from __future__ import annotations

import ipaddress
import json
import tempfile
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from benchkit.bounded import MAX_DEPTH, MAX_ID_CHARS, check_id, check_text, data_depth, unknown_key
from benchkit.errors import UserError

MAX_RUN_BYTES = 64_000_000  # a whole filing: a 200,000-point soak's points.csv is about 40 MB
RUN_FILE, POINTS_FILE, CHAIN_FILE = "run.json", "points.csv", "points.chain"
FIELDS = (RUN_FILE, POINTS_FILE, CHAIN_FILE, "part", "all_parts", "model", "allow_incomplete")
LABEL = "run"  # how messages name the filed run's folder
API_PATH = "/api/runs"


def is_http_url(target: Any) -> bool:
    return isinstance(target, str) and target.lower().startswith(("http://", "https://"))


def _loopback(host: str | None) -> bool:
    if not host:
        return False
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


# -- the bench's side ------------------------------------------------------------------------------
def run_body(run_dir: str | Path, *, part_id: str | None = None, all_parts: bool = False, model: str = "auto",
             allow_incomplete: bool = False) -> dict[str, Any]:
    """The JSON body of a filing: the run directory's three files as text, and the options."""
    d = Path(run_dir)
    body: dict[str, Any] = {"model": model, "all_parts": bool(all_parts), "allow_incomplete": bool(allow_incomplete)}
    if part_id is not None:
        body["part"] = part_id
    total = 0
    for name in (RUN_FILE, POINTS_FILE, CHAIN_FILE):
        path = d / name
        if name == CHAIN_FILE and not path.exists():
            continue
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            raise UserError(f"{path}: not found; is {d} a run directory?") from None
        except OSError as exc:
            raise UserError(f"{path}: unreadable ({exc.strerror or exc})") from None
        total += len(data)
        if total > MAX_RUN_BYTES:
            raise UserError(f"{d}: the run is more than {MAX_RUN_BYTES // 1_000_000} MB, more than a server "
                            f"takes in one filing; file it with the library's file or postgresql:// URL")
        try:
            body[name] = data.decode("utf-8")
        except UnicodeDecodeError:
            raise UserError(f"{path}: not UTF-8 text; the run directory is damaged") from None
    return body


def file_run(url: str, token: str, run_dir: str | Path, *, part_id: str | None = None, all_parts: bool = False,
             model: str = "auto", allow_incomplete: bool = False, timeout_s: float = 300.0) -> dict[str, Any]:
    """File a run directory through a `benchkit serve` write API; returns the server's answer
    ({"library": where, "runs": [{part_id, points_sha256, already_present, curves: [...]}]})."""
    import httpx

    parts = urlsplit(url)
    if parts.scheme.lower() == "http" and not _loopback(parts.hostname):
        raise UserError(f"{url}: plain http would send the write token across the network in clear; "
                        f"use https:// or a loopback address (127.0.0.1)")
    body = run_body(run_dir, part_id=part_id, all_parts=all_parts, model=model, allow_incomplete=allow_incomplete)
    target = url.rstrip("/") + API_PATH
    try:
        r = httpx.post(target, json=body, headers={"Authorization": f"Bearer {token}"}, timeout=timeout_s)
    except httpx.HTTPError as exc:
        raise UserError(f"{url}: cannot file the run ({type(exc).__name__}: {exc}); is 'benchkit serve' "
                        f"running there with a write token?") from None
    try:
        answer = r.json()
    except ValueError:
        answer = {}
    if r.status_code != 200:
        why = answer.get("error") if isinstance(answer, dict) else None
        raise UserError(f"{url}: the server refused the run (HTTP {r.status_code}): "
                        f"{why or r.reason_phrase or 'no reason given'}")
    if not isinstance(answer, dict) or not isinstance(answer.get("runs"), list):
        raise UserError(f"{url}: the answer is not a filing receipt; is this a benchkit server?")
    return answer


# -- the server's side -----------------------------------------------------------------------------
def _check_body(body: Any) -> dict[str, Any]:
    where = "filing"
    if not isinstance(body, dict):
        raise UserError(f"{where}: send a JSON object with {RUN_FILE!r} and {POINTS_FILE!r} (and {CHAIN_FILE!r})")
    for key in body:
        if key not in FIELDS:
            raise unknown_key(where, key, FIELDS)
    for name in (RUN_FILE, POINTS_FILE):
        if not isinstance(body.get(name), str) or not body[name]:
            raise UserError(f"{where}: field {name!r} must hold the text of the run's {name}")
    check_text(body[RUN_FILE], f"{LABEL}/{RUN_FILE}", RUN_FILE)  # size, line length, NUL
    try:
        depth = data_depth(json.loads(body[RUN_FILE]))
    except (ValueError, RecursionError):
        depth = 0  # not JSON, or nested past Python's recursion: runlog.read_run says which
    if depth > MAX_DEPTH:
        raise UserError(f"{LABEL}/{RUN_FILE}: nested {depth} deep, more than the {MAX_DEPTH} allowed; "
                        f"not a benchkit run record")
    if CHAIN_FILE in body and not isinstance(body[CHAIN_FILE], str):
        raise UserError(f"{where}: field {CHAIN_FILE!r} must hold the text of the run's {CHAIN_FILE}")
    if body.get("part") is not None:
        if not isinstance(body["part"], str):
            raise UserError(f"{where}: field 'part' must be a part id")
        check_id(body["part"], where, "part")
    model = body.get("model", "auto")
    if not isinstance(model, str) or not model or len(model) > MAX_ID_CHARS:
        raise UserError(f"{where}: field 'model' must be a model name (or 'auto')")
    check_id(model, where, "model")
    for flag in ("all_parts", "allow_incomplete"):
        if not isinstance(body.get(flag, False), bool):
            raise UserError(f"{where}: field {flag!r} must be true or false")
    return body


def file_body(lib, body: Any) -> list:
    """Check and file one body (see the module docstring); returns ingest.AddRunSummary items."""
    from benchkit.atomic import write_bytes_atomic
    from benchkit.library.ingest import add_run_parts

    body = _check_body(body)
    with tempfile.TemporaryDirectory(prefix="benchkit-filing-") as tmp:
        folder = Path(tmp) / LABEL
        folder.mkdir(mode=0o700)
        for name in (RUN_FILE, POINTS_FILE, CHAIN_FILE):
            if name in body:
                write_bytes_atomic(folder / name, body[name].encode("utf-8"))
        try:
            return add_run_parts(lib, folder, body.get("part"), all_parts=body.get("all_parts", False),
                                 model=body.get("model", "auto"),
                                 allow_incomplete=body.get("allow_incomplete", False), record_path=False)
        except UserError as exc:
            raise UserError(str(exc).replace(str(folder), LABEL).replace(tmp, LABEL)) from None


def receipt(lib, summaries) -> dict[str, Any]:
    """What the server answers: per part filed, the run's hash and each curve's id and fate."""
    return {"library": lib.where, "runs": [
        {"part_id": s.part_id, "points_sha256": s.points_sha256, "already_present": s.already_present,
         "curves": [{"id": c.curve_id, "added": c.added, "sample_id": c.sample_id, "branch": c.branch,
                     "model": c.curve.model, "n_points": c.n_points} for c in s.curves]}
        for s in summaries]}
