"""Benchmark of the library query: vectorised by model against a per-curve Python loop.

Not a test (times are never asserted): `make bench` calls benchmark_query(n) and prints it.
The synthetic library is invented data: n curves spread over n/20 parts, half tanh and half
landau-type, at four temperatures, with a diagonal covariance of 1 % per parameter.
"""

from __future__ import annotations

import gc
import json
import tempfile
import time
from pathlib import Path

import numpy as np

from benchkit.library.store import Library

TEMPS_C = (-55.0, 25.0, 85.0, 125.0)
COLD_MEANS = ("a new Library object opened on a new connection (SQLite file opened anew, PostgreSQL "
              "connection made anew; its open is inside the time) and its first query: parts and packed "
              "arrays read from the store and evaluated, nothing cached in the process; worst of 3; "
              "the OS file cache and the server's buffers as the build left them; the benchmark's own "
              "synthetic documents left out of garbage collection (gc.freeze)")
WARM_MEANS = "the same query again on that Library (arrays cached in the object, evaluated anew); best of 9"


def synthetic_documents(n_curves: int, seed: int = 0) -> tuple[list[dict], list[dict]]:
    """(parts, curve documents) of an invented library (parts BD-Sxxxxx)."""
    rng = np.random.default_rng(seed)
    n_parts = max(1, n_curves // 20)
    parts = []
    for i in range(n_parts):
        c0 = float(rng.choice([1e-6, 2.2e-6, 4.7e-6, 10e-6, 22e-6]))
        parts.append({"id": f"BD-S{i:05d}", "description": "synthetic benchmark part", "nominal_C_F": c0,
                      "tolerance": "K", "rated_V": float(rng.choice([6.3, 10, 16, 25, 50])),
                      "class_code": str(rng.choice(["X5R", "X7R"])),
                      "case": str(rng.choice(["0402", "0603", "0805", "1206"])), "supplier": "invented"})
    docs = []
    for j in range(n_curves):
        part = parts[j % n_parts]
        c0 = part["nominal_C_F"] * float(rng.uniform(0.8, 1.2))
        hi = part["rated_V"]
        if j % 2 == 0:
            params = {"C_inf_F": c0 * float(rng.uniform(0.05, 0.3)), "C_pk_F": c0,
                      "V0_V": hi * float(rng.uniform(0.2, 0.8)), "V_off_V": float(rng.uniform(-0.2, 0.2))}
            model = "tanh"
        else:
            params = {"C0_F": c0, "V_k_V": hi * float(rng.uniform(0.1, 0.5)), "C_p_F": c0 * 0.05}
            model = "landau"
        names = list(params)
        cov = np.diag([(0.01 * abs(v)) ** 2 if v else 1e-8 for v in params.values()]).tolist()
        docs.append({
            "format": "benchkit-curve", "version": 1, "model": model, "param_names": names, "params": params,
            "covariance": cov, "valid_range_V": [0.0, hi],
            "conditions": {"freq_Hz": 1000.0, "ac_level_Vrms": 1.0, "temp_C": TEMPS_C[(j // n_parts) % 4],
                           "function": "CPD"},
            "stats": {"n_points": 20}, "source": {"run_id": f"synthetic-{j}", "sample_id": f"S{j}",
                                                  "part_id": part["id"], "branch": "rising",
                                                  "points_sha256": None},
            "origin": "measured", "part_id": part["id"], "sample_id": f"S{j}", "branch": "rising",
        })
    return parts, docs


def benchmark_query(n_curves: int = 100_000, *, bias_V: float = 5.0, temp_C: float = 85.0,
                    seed: int = 0, folder: str | Path | None = None, postgres_url: str | None = None,
                    loop: bool = True) -> dict:
    """Build a library of n synthetic curves; time the query (cold and warm) and a per-curve loop.

    On SQLite (a temporary file) and, when postgres_url is given, on that PostgreSQL database
    too (its tables are dropped and built anew: give a throwaway database). Returns per backend
    build_s, query_cold_s (COLD_MEANS; imports done beforehand), open_s (the open alone, worst
    of 3), query_warm_s (WARM_MEANS); then loop_s (one Curve.C(bias) call per curve inside its valid range) and
    loop_over_query (loop_s / the SQLite warm query), and the sizes. Top-level query_cold_s
    and query_warm_s are the slowest backend's.
    """
    from benchkit.library import query, table  # noqa: F401 - imported before timing: not query time
    from benchkit.library.fitsbridge import model_spec

    model_spec("tanh")  # imports fits (numpy/scipy) before any clock starts
    model_spec("landau")
    parts, docs = synthetic_documents(n_curves, seed)
    # The documents are the benchmark's own (some 800,000 objects for 100,000 curves), not a
    # querying process's: a full garbage collection of them that fell inside a timed query
    # cost it about 0.4 s. Frozen, the collector leaves them out (gc.freeze) until the end.
    # gc.unfreeze releases every frozen object, so it is only called when this froze the
    # first ones: a caller's own frozen objects stay frozen (and so, then, do these, which
    # reference counting still frees: plain dicts and lists, no cycles).
    caller_froze = gc.get_freeze_count() > 0
    gc.collect()
    gc.freeze()
    try:
        return _measure(parts, docs, bias_V, temp_C, folder, postgres_url, loop)
    finally:
        if not caller_froze:
            gc.unfreeze()


def _measure(parts, docs, bias_V, temp_C, folder, postgres_url, loop) -> dict:
    from benchkit.library.fitsbridge import curve_from_dict

    n_curves = len(docs)
    out: dict = {"n_curves": n_curves, "n_parts": len(parts), "bias_V": bias_V, "temp_C": temp_C,
                 "cold_means": COLD_MEANS, "warm_means": WARM_MEANS}
    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        targets = {"sqlite": str(Path(tmp) / "bench.sqlite")}
        if postgres_url:
            _empty_postgres(postgres_url)
            targets["postgresql"] = postgres_url
        answers = {}
        for name, target in targets.items():
            t0 = time.perf_counter()
            with Library(target) as lib:
                lib.add_parts(parts)
                lib._insert_trusted(docs)  # invented, self-generated documents: no per-curve validation
                build_s = time.perf_counter() - t0
            colds, opens, warms = [], [], []
            for _ in range(3):  # three fresh opens: the cold figure is the worst of them
                t0 = time.perf_counter()
                with Library(target, create=False) as lib:
                    t1 = time.perf_counter()
                    results = lib.query(bias_V, temp_C)
                    colds.append(time.perf_counter() - t0)
                    opens.append(t1 - t0)
                    for _ in range(3):
                        t0 = time.perf_counter()
                        lib.query(bias_V, temp_C)
                        warms.append(time.perf_counter() - t0)
            answers[name] = [(r.part_id, r.C_F) for r in results]
            out[name] = {"build_s": build_s, "query_cold_s": max(colds), "open_s": max(opens),
                         "query_warm_s": min(warms),
                         "covered_parts": sum(1 for r in results if r.covered)}
        if postgres_url:
            _empty_postgres(postgres_url)
        out["same_answer_on_both"] = len({json.dumps(a) for a in answers.values()}) == 1
        if loop:
            curves = [curve_from_dict(d, "benchmark") for d in docs]
            t0 = time.perf_counter()
            total = 0.0
            for c in curves:
                lo, hi = c.valid_range_V
                if lo <= bias_V <= hi:
                    total += float(c.C(bias_V))
            out["loop_s"] = time.perf_counter() - t0
    warm_sqlite = out["sqlite"]["query_warm_s"]
    out["covered_parts"] = out["sqlite"]["covered_parts"]
    out["query_cold_s"] = max(out[k]["query_cold_s"] for k in targets)
    out["query_warm_s"] = max(out[k]["query_warm_s"] for k in targets)
    if loop:
        out["loop_over_query"] = out["loop_s"] / warm_sqlite if warm_sqlite > 0 else float("inf")
    out["backends"] = list(targets)
    return out


def _empty_postgres(url: str) -> None:
    """Drop the library's tables in a throwaway benchmark database."""
    import psycopg

    with psycopg.connect(url, autocommit=True) as conn:
        for t in ("curve_pack", "revision", "verdict", "curve_doc", "curve", "sample", "run", "part", "meta"):
            conn.execute(f"DROP TABLE IF EXISTS {t} CASCADE")  # constant names


if __name__ == "__main__":  # pragma: no cover
    import sys

    import os

    print(json.dumps(benchmark_query(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000,
                                     postgres_url=os.environ.get("BENCHKIT_BENCH_POSTGRES")), indent=2))
