"""Several benches writing one library file at once, and merging libraries without duplicates.

The library relies on SQLite's write-ahead log and its busy timeout for concurrent writers
(SQLite documentation: WAL mode, BEGIN IMMEDIATE); the checks are that nothing is lost,
duplicated or corrupted (PRAGMA integrity_check), whatever the interleaving.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import textwrap
import time

import pytest

from benchkit.library import Library

WRITER = textwrap.dedent(
    """
    import json, sys, time
    from pathlib import Path
    import fits  # imported before the start signal, so both writers really start together
    from benchkit.library import Library
    path, parts_json, first, last, go, me, other = sys.argv[1:8]
    first, last, go = int(first), int(last), Path(go)
    while not go.exists():          # start both writers together
        time.sleep(0.005)
    with Library(path, busy_timeout_s=60) as lib:   # a fresh file: both race to create the schema
        lib.add_parts(json.loads(parts_json))
        for i in range(first, last):               # one transaction per curve: many lock hand-overs
            doc = {"format": "benchkit-curve", "version": 1, "model": "landau",
                   "param_names": ["C0_F", "V_k_V", "C_p_F"],
                   "params": {"C0_F": 1e-6 * (1 + i / 100), "V_k_V": 5.0, "C_p_F": 0.0},
                   "covariance": [[1e-16, 0, 0], [0, 1e-2, 0], [0, 0, 0]], "valid_range_V": [0.0, 10.0],
                   "conditions": {"temp_C": 25.0}, "origin": "measured", "part_id": "BD-1001",
                   "sample_id": f"S{i}", "branch": "rising"}
            lib.add_curve(doc)
            if i == first:                         # rendezvous: both have written before either goes on
                Path(me).touch()
                deadline = time.monotonic() + 20
                while not Path(other).exists() and time.monotonic() < deadline:
                    time.sleep(0.002)
    print("done", first, last)
    """
)


@pytest.mark.slow
def test_two_processes_add_at_once(tmp_path, parts):
    # both complete, nothing lost, nothing duplicated (the overlap 20..39 is added by both)
    path = tmp_path / "shared.sqlite"
    go = tmp_path / "go"
    flags = [str(tmp_path / "ready-a"), str(tmp_path / "ready-b")]
    procs = [subprocess.Popen([sys.executable, "-c", WRITER, str(path), json.dumps(parts), str(a), str(b), str(go),
                               me, other], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for (a, b), me, other in (((0, 40), flags[0], flags[1]), ((20, 60), flags[1], flags[0]))]
    time.sleep(0.2)
    go.touch()
    outs = [p.communicate(timeout=120) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0, err
        assert out.startswith("done")
    with Library(path) as lib:
        recs = lib.curves()
        # both wrote before either finished: the first ids hold one curve of each writer
        firsts = [r.sample_id for r in sorted(recs, key=lambda r: r.curve_id)[:2]]
        assert sorted(firsts) == ["S0", "S20"]
        assert len(recs) == 60
        assert sorted(r.sample_id for r in recs) == sorted(f"S{i}" for i in range(60))
        assert len({r.content_sha256 for r in recs}) == 60
        assert lib.summary()["part"] == 3
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()


def test_import_twice_adds_nothing_the_second_time(tmp_path, parts, mk):
    src_path = tmp_path / "bench2.sqlite"
    run_dir = mk.write_run(tmp_path / "run-a")
    with Library(src_path) as src:
        src.add_parts(parts)
        src.add_run(run_dir, "BD-1001")
        src.add_curve(mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.0}, valid=(0.0, 16.0),
                                    part_id="BD-1002"))
        n_src = src.summary()
    with Library(tmp_path / "main.sqlite") as lib:
        lib.add_part(parts[0])
        first = lib.import_library(src_path)
        assert (first.parts_added, first.runs_added, first.curves_added) == (2, 1, n_src["curve"])
        after_first = lib.summary()
        second = lib.import_library(src_path)
        assert (second.parts_added, second.runs_added, second.curves_added) == (0, 0, 0)
        assert second.curves_present == n_src["curve"]
        assert lib.summary() == after_first
        # the run came along: adding the same run directory here adds nothing either
        again = lib.add_run(run_dir, "BD-1001")
        assert again.already_present and lib.summary() == after_first


def test_import_refuses_itself_and_non_libraries(tmp_path, lib):
    from benchkit.errors import UserError

    with pytest.raises(UserError, match="itself"):
        lib.import_library(lib.target)
    junk = tmp_path / "junk.sqlite"
    junk.write_text("not sqlite")
    with pytest.raises(UserError, match="not a benchkit library"):
        lib.import_library(junk)
    with pytest.raises(UserError, match="no library"):
        lib.import_library(tmp_path / "absent.sqlite")


def test_busy_library_waits_then_gives_one_line(tmp_path, parts):
    # another connection holds the write lock: a writer with a short busy timeout retries, then
    # reports one line; once the lock is released the same write goes through
    from benchkit.errors import UserError

    path = tmp_path / "busy.sqlite"
    with Library(path) as lib:
        lib.add_parts(parts[:1])
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")
    try:
        with Library(path, busy_timeout_s=0.3) as lib:
            with pytest.raises(UserError, match="busy") as exc:
                lib.add_parts(parts[1:])
            assert "\n" not in str(exc.value)
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    with Library(path, busy_timeout_s=0.3) as lib:
        lib.add_parts(parts[1:])
        assert lib.summary()["part"] == 3
