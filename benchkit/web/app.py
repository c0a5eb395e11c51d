"""The web application: pages to rank, inspect and compare parts; downloads; the benches' write API.

Rules: every page reads the library through its parameterised queries; nothing a request holds
becomes a path (download names are made file-safe; the only files written are a filed run's
three texts, under fixed names in a private temporary folder, while it is read); the write API
(filing parts, curves and whole runs) exists only when the server was given a token, and each
write must carry it (`Authorization: Bearer TOKEN`); a body is read no further than its limit.
A whole run (POST /api/runs, benchkit.library.filing) is checked by the readers `benchkit
library add RUN_DIR` uses, and fitted and filed as that command does. One Library object
serves every request under a lock: the query's cached arrays are shared, and each request
sees one consistent state.
"""

from __future__ import annotations

import hmac
import json
import threading
from typing import Any

from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import HTMLResponse, JSONResponse, Response
from starlette.routing import Route

from benchkit.errors import UserError
from benchkit.units import parse_value
from benchkit.web import plots
from benchkit.web.templating import render

MAX_BODY_BYTES = 4_000_000
MAX_COMPARE = 8
MEDIA = {"csv": "text/csv", "json": "application/json"}  # every other export: text/plain


class _Shared:
    """The library and its lock (one per application)."""

    def __init__(self, target, writable: bool):
        from benchkit.library import Library

        self.lib = Library(target, create=writable, readonly=not writable)
        self.lock = threading.Lock()


def _page(name: str, status: int = 200, **context) -> HTMLResponse:
    return HTMLResponse(render(name, **context), status_code=status)


def _error(request: Request, message: str, status: int = 400):
    if request.url.path.startswith("/api/"):
        return JSONResponse({"error": message}, status_code=status)
    return _page("error.html", status, message=message, title="error")


def _value(request: Request, name: str, unit: str | None, default: float | None) -> float | None:
    text = request.query_params.get(name, "").strip()
    if not text:
        return default
    return parse_value(text, unit, name)


def _filters(request: Request) -> dict[str, Any]:
    q = request.query_params
    return {
        "bias_V": _value(request, "bias", "V", 5.0),
        "temp_C": _value(request, "temp", None, 25.0),
        "class_code": q.get("class") or None,
        "case": q.get("case") or None,
        "min_rated_V": _value(request, "rated", "V", None),
        "nominal_C_F": _value(request, "nominal", "F", None),
    }


def create_app(target, *, token: str | None = None) -> Starlette:
    """The application over the library at `target` (a file path or a postgresql:// URL).

    Without a token the library is opened read-only and there is no write route at all.
    """
    from benchkit.exports import FORMATS, SUFFIX, render as render_export
    from benchkit.exports.paths import safe_stem

    shared = _Shared(target, writable=token is not None)

    def guarded(fn):
        def endpoint(request: Request):
            try:
                with shared.lock:
                    return fn(request, shared.lib)
            except UserError as exc:
                status = 404 if "not in the library" in str(exc) else 400
                return _error(request, str(exc), status)
        return endpoint

    def rank(request: Request, lib):
        f = _filters(request)
        results = lib.query(f["bias_V"], f["temp_C"], case=f["case"], class_code=f["class_code"],
                            min_rated_V=f["min_rated_V"], nominal_C_F=f["nominal_C_F"])
        parts = lib.parts()
        choices = {
            "class": sorted({p.class_code for p in parts if p.class_code}),
            "case": sorted({p.case for p in parts if p.case}),
            "nominal": sorted({p.nominal_C_F for p in parts if p.nominal_C_F}),
        }
        return _page("rank.html", title="rank parts", f=f, q=request.query_params, results=results,
                     choices=choices, where=lib.where)

    def part(request: Request, lib):
        pid = request.query_params.get("id", "")
        rec = lib.part(pid)
        curves = lib.curves(rec.part_id)
        retired = lib.superseded_ids()
        verdicts = lib.verdicts(rec.part_id)
        bias = _value(request, "bias", "V", 5.0)
        wideband = {c.curve_id for c in curves if getattr(c.curve, "wideband", None) is not None}
        return _page("part.html", title=rec.part_id, part=rec, curves=curves, retired=retired,
                     verdicts=verdicts, formats=FORMATS, bias_V=bias, wideband=wideband)

    def compare(request: Request, lib):
        ids = [p for p in request.query_params.getlist("part") if p][:MAX_COMPARE]
        if not ids:
            raise UserError("compare: choose parts to compare (part=ID, repeated)")
        temp = _value(request, "temp", None, 25.0)
        parts = [lib.part(p) for p in ids]
        biases = sorted({0.0, *(float(b) for b in (1.0, 2.5, 5.0, 10.0, 16.0, 25.0))})
        table = []
        for b in biases:
            answers = {r.part_id: r for r in lib.query(b, temp) if r.part_id in ids}
            table.append((b, [answers.get(p.part_id) for p in parts]))
        return _page("compare.html", title="compare parts", parts=parts, temp_C=temp, table=table,
                     query=request.url.query)

    def part_png(request: Request, lib):
        rec = lib.part(request.query_params.get("id", ""))
        return Response(plots.part_png(rec, lib.curves(rec.part_id), lib.superseded_ids()), media_type="image/png")

    def compare_png(request: Request, lib):
        ids = [p for p in request.query_params.getlist("part") if p][:MAX_COMPARE]
        unit = request.query_params.get("unit", "F")
        if unit not in ("F", "pct"):
            raise UserError("compare plot: unit must be F or pct")
        retired = lib.superseded_ids()
        items = []
        for p in ids:
            rec = lib.part(p)
            items.append((rec, [c for c in lib.curves(rec.part_id) if c.curve_id not in retired]))
        temp = _value(request, "temp", None, 25.0)
        return Response(plots.compare_png(items, unit, temp), media_type="image/png")

    def download(request: Request, lib):
        fmt = request.query_params.get("format", "")
        if fmt not in FORMATS:
            raise UserError(f"download: format must be one of {', '.join(FORMATS)}")
        try:
            cid = int(request.query_params.get("curve", ""))
        except ValueError:
            raise UserError("download: curve must be a curve number") from None
        rec = lib.curve(cid)
        bias = _value(request, "bias", "V", None)  # a wideband export describes the part at one bias
        text = render_export(rec.curve, fmt, esr_ohm=rec.esr_ohm, name=rec.part_id, bias_V=bias,
                             source_note=f"benchkit library curve {rec.curve_id}")
        name = f"{safe_stem(rec.part_id)}_c{rec.curve_id}{SUFFIX[fmt]}"
        return Response(text, media_type=MEDIA.get(fmt, "text/plain"),
                        headers={"Content-Disposition": f'attachment; filename="{name}"'})

    def verdict(request: Request, lib):
        try:
            vid = int(request.query_params.get("id", ""))
        except ValueError:
            raise UserError("verification report: id must be a number") from None
        v = lib.verdict(vid)
        return _page("verdict.html", title=f"verification {vid}", v=v, doc=v["document"])

    def api_query(request: Request, lib):
        f = _filters(request)
        results = lib.query(f["bias_V"], f["temp_C"], case=f["case"], class_code=f["class_code"],
                            min_rated_V=f["min_rated_V"], nominal_C_F=f["nominal_C_F"])
        return JSONResponse([{"part_id": r.part_id, "covered": r.covered, "C_F": r.C_F, "u_C_F": r.u_C_F,
                              "origin": r.origin, "curve_ids": list(r.curve_ids), "reason": r.reason}
                             for r in results])

    routes = [Route("/", guarded(rank)), Route("/part", guarded(part)), Route("/compare", guarded(compare)),
              Route("/plot/part.png", guarded(part_png)), Route("/plot/compare.png", guarded(compare_png)),
              Route("/download", guarded(download)), Route("/verdict", guarded(verdict)),
              Route("/api/query", guarded(api_query))]

    if token is not None:
        if len(token) < 16:
            raise UserError("serve: the write token must be at least 16 characters")

        def authorised(request: Request) -> bool:
            given = request.headers.get("authorization", "")
            return hmac.compare_digest(given.encode(), f"Bearer {token}".encode())

        async def json_body(request: Request, limit: int):
            """The request's JSON, read no further than `limit` bytes; or the refusal to send."""
            declared = request.headers.get("content-length", "")
            if declared.isdigit() and int(declared) > limit:
                return None, _too_large(limit)
            chunks, size = [], 0
            async for chunk in request.stream():
                size += len(chunk)
                if size > limit:
                    return None, _too_large(limit)
                chunks.append(chunk)
            try:
                return json.loads(b"".join(chunks)), None
            except (ValueError, RecursionError) as exc:
                return None, JSONResponse({"error": f"the body is not JSON ({str(exc)[:120]}); send a JSON object"},
                                          status_code=400)

        async def api_write(request: Request):
            if not authorised(request):
                return JSONResponse({"error": "a valid token is needed to write"}, status_code=401)
            doc, refusal = await json_body(request, MAX_BODY_BYTES)
            if refusal is not None:
                return refusal
            from starlette.concurrency import run_in_threadpool

            return await run_in_threadpool(guarded(lambda req, lib: _write(request.url.path, doc, lib)), request)

        async def api_runs(request: Request):
            """A whole run (benchkit.library.filing): checked, fitted and filed as `library add` does."""
            from benchkit.library import filing

            if not authorised(request):
                return JSONResponse({"error": "a valid token is needed to write"}, status_code=401)
            body, refusal = await json_body(request, filing.MAX_RUN_BYTES)
            if refusal is not None:
                return refusal
            from starlette.concurrency import run_in_threadpool

            def file_it(req, lib):
                return JSONResponse(filing.receipt(lib, filing.file_body(lib, body)))

            return await run_in_threadpool(guarded(file_it), request)

        routes += [Route("/api/parts", api_write, methods=["POST"]),
                   Route("/api/curves", api_write, methods=["POST"]),
                   Route("/api/runs", api_runs, methods=["POST"])]

    app = Starlette(routes=routes)
    app.state.library = shared.lib
    return app


def _too_large(limit: int) -> JSONResponse:
    return JSONResponse({"error": f"request too large: more than {limit // 1_000_000} MB; "
                                  f"file a larger run with the library's file or postgresql:// URL"},
                        status_code=413)


def _write(path: str, doc: Any, lib) -> JSONResponse:
    """File parts ({"parts": [...]}) or curves ({"curves": [documents], "part": catalogue?})."""
    if not isinstance(doc, dict):
        raise UserError("write: send a JSON object")
    if path == "/api/parts":
        counts = lib.add_parts(doc.get("parts") or [])
        return JSONResponse(counts)
    curves = doc.get("curves")
    if not isinstance(curves, list) or not curves:
        raise UserError("write: send {\"curves\": [curve documents]}")
    new_parts = [doc["part"]] if isinstance(doc.get("part"), dict) else []
    ids = lib.add_curves([(c, None) for c in curves],
                         where="request", new_parts=new_parts)
    return JSONResponse({"curves": [{"id": cid, "added": added} for cid, added in ids]})
