"""Run every benchmark, collect one JSON of results and a readable table.

A benchmark that fails does not stop the others: its entry holds {"error": "..."} and the
command exits 1 at the end.
"""

from __future__ import annotations

import json
import math
import os
import platform
import subprocess
import sys
import traceback
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

from benchkit.atomic import write_text_atomic

FORMAT = "benchkit-bench"
VERSION = 1
QUICK_CURVES = 2_000
FULL_CURVES = 100_000


def _bench_time(out_dir, quick, parts, log):
    from benchkit.benchmarks import bench_time

    return bench_time.run(out_dir, quick=quick, parts=parts, log=log)


def _overhead(out_dir, quick, parts, log):
    from benchkit.benchmarks import overhead

    return overhead.run(out_dir, quick=quick, log=log)


def _floor(out_dir, quick, parts, log):
    from benchkit.benchmarks import floor

    return floor.run(out_dir, quick=quick, log=log)


def _fits(out_dir, quick, parts, log):
    from benchkit.benchmarks import fit_speed

    return fit_speed.run(out_dir, quick=quick, log=log)


def _strd(out_dir, quick, parts, log):
    from benchkit.benchmarks import strd

    return strd.run(out_dir, quick=quick, log=log)


def _truths(out_dir, quick, parts, log):
    from benchkit.benchmarks import independent_truths

    return independent_truths.run(out_dir, quick=quick, log=log)


def _library(out_dir, quick, parts, log):
    try:
        from benchkit.library import benchmark_query
    except ImportError as exc:
        raise RuntimeError(f"benchkit.library.benchmark_query is not there ({exc})") from None
    n = QUICK_CURVES if quick else FULL_CURVES
    url = os.environ.get("BENCHKIT_BENCH_POSTGRES")  # a throwaway server (`make bench` starts one)
    if not url:
        log("library query: BENCHKIT_BENCH_POSTGRES not set, PostgreSQL not measured")
    res = benchmark_query(n, postgres_url=url)
    for name in res["backends"]:
        r = res[name]
        log(f"library query over {n} curves on {name}: {r['query_warm_s'] * 1e3:.1f} ms warm, "
            f"{r['query_cold_s'] * 1e3:.1f} ms cold, open included (build {r['build_s']:.1f} s)")
    log(f"cold = {res['cold_means']}")
    log(f"per-curve loop {res.get('loop_s', float('nan')):.2f} s")
    return dict(res, what="vectorised library query against a per-curve Python loop "
                          "(benchkit.library.benchmark_query)")


def _soak(out_dir, quick, parts, log):
    from benchkit.benchmarks import soak

    return soak.run(out_dir, quick=quick, log=log)


BENCHMARKS: dict[str, Callable] = {
    "bench_time": _bench_time,
    "overhead": _overhead,
    "floor": _floor,
    "fits": _fits,
    "strd": _strd,
    "independent_truths": _truths,
    "library_query": _library,
    "soak": _soak,
}


def git_commit(repo: Path) -> dict:
    """HEAD and whether the tree has changes (read-only git commands)."""
    def git(*args):
        try:
            return subprocess.run(["git", *args], cwd=repo, capture_output=True, text=True,
                                  timeout=20).stdout.strip()
        except (OSError, subprocess.SubprocessError):
            return ""
    return {"commit": git("rev-parse", "HEAD") or None,
            "dirty": bool(git("status", "--porcelain", "--untracked-files=no"))}


def machine() -> dict:
    return {"platform": platform.platform(), "machine": platform.machine(),
            "processor": platform.processor() or None, "python": platform.python_version(),
            "cpu_count": os.cpu_count()}


def run_all(out_dir: str | Path, quick: bool = False, only=None, parts=None,
            log: Callable[[str], None] = print) -> tuple[dict, str]:
    """Run the benchmarks (all, or those named in `only`); return (results, table)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    repo = Path(__file__).resolve().parents[2]
    results = {
        "format": FORMAT,
        "version": VERSION,
        "date_utc": datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z"),
        "git": git_commit(repo),
        "machine": machine(),
        "quick": quick,
        "benchmarks": {},
    }
    for name, fn in BENCHMARKS.items():
        if only and name not in only:
            continue
        try:
            results["benchmarks"][name] = fn(out_dir, quick, parts, log)
        except Exception as exc:  # one failing benchmark must not hide the others
            log(f"benchmark {name} failed: {type(exc).__name__}: {exc}")
            results["benchmarks"][name] = {"error": f"{type(exc).__name__}: {exc}",
                                           "traceback": traceback.format_exc(limit=8)}
    from benchkit.benchmarks.table import format_table

    table = format_table(results)
    write_text_atomic(out_dir / "bench.json", json.dumps(_finite(results), indent=2,
                                                         allow_nan=False, default=_jsonable) + "\n")
    write_text_atomic(out_dir / "bench.txt", table)
    return results, table


def _finite(v):
    """Non-finite numbers become null (JSON has no inf or NaN)."""
    if isinstance(v, dict):
        return {k: _finite(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_finite(x) for x in v]
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def _jsonable(v):
    if hasattr(v, "item"):
        return v.item()  # numpy scalars
    raise TypeError(f"not JSON: {type(v).__name__}")


def failed(results: dict) -> list[str]:
    return [n for n, r in results["benchmarks"].items() if isinstance(r, dict) and "error" in r]


__all__ = ["BENCHMARKS", "run_all", "failed", "machine", "git_commit"]

if __name__ == "__main__":  # pragma: no cover
    sys.exit("run: python -m benchkit.benchmarks --out DIR")
