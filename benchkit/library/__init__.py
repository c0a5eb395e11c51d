"""The in-house curve library (SQLite): parts, samples, runs, curves; a vectorised design query.

    from benchkit.library import Library
    with Library("lab.sqlite") as lib:
        lib.add_parts(load_parts("data/parts.toml").values())
        lib.add_run("out/run-001", part_id="BD-1001")     # fits every sample/branch (model auto)
        for r in lib.query(bias_V=12, temp_C=85):         # ranked, never extrapolated
            print(r.part_id, r.C_F, r.u_C_F, r.covered, r.reason)

Default file: $BENCHKIT_LIBRARY, else ~/.local/share/benchkit/library.sqlite
($XDG_DATA_HOME/benchkit/library.sqlite when XDG_DATA_HOME is set).
"""

from benchkit.library.records import CurveRecord, PartRecord, QueryResult
from benchkit.library.schema import ORIGINS, default_library_path, latest_version
from benchkit.library.store import ImportSummary, Library, RunInfo


def benchmark_query(n_curves: int = 100_000, **options) -> dict:
    """Time the vectorised query against a per-curve loop on n synthetic curves (see benchmark.py)."""
    from benchkit.library.benchmark import benchmark_query as _run

    return _run(n_curves, **options)


__all__ = ["Library", "PartRecord", "CurveRecord", "QueryResult", "RunInfo", "ImportSummary", "ORIGINS",
           "default_library_path", "latest_version", "benchmark_query"]
