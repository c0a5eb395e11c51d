"""The two backends hold the same schema and give the same answers; records are immutable and
merges are order-free; the packed column store answers as the curves themselves do.

Invented parts and curves (Brackwater Dynamics). The independent truth for the query is
fits.Curve's own evaluation of each stored document, one curve at a time.
"""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest

from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.library import Library, pack, postgres, schema


def _columns_sqlite(path):
    conn = sqlite3.connect(path)
    try:
        tables = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
        return {t: sorted(r[1].lower() for r in conn.execute(f"PRAGMA table_info({t})")) for t in tables}
    finally:
        conn.close()


def _columns_pg(url):
    import psycopg

    with psycopg.connect(url) as conn:
        rows = conn.execute("SELECT table_name, column_name FROM information_schema.columns "
                            "WHERE table_schema = current_schema()").fetchall()
    out: dict[str, list[str]] = {}
    for t, c in rows:
        out.setdefault(t, []).append(c.lower())
    return {t: sorted(c) for t, c in out.items()}


def test_same_schema_version_and_tables_on_both(tmp_path, postgres_url):
    assert len(schema.MIGRATIONS) == len(postgres.MIGRATIONS) == schema.latest_version()
    Library(tmp_path / "a.sqlite").close()
    Library(postgres_url).close()
    assert _columns_sqlite(tmp_path / "a.sqlite") == _columns_pg(postgres_url)


def test_same_answers_on_both_backends(tmp_path, postgres_url, parts, mk):
    curves = [mk.make_curve(params=mk.tanh_params(c_pk=c, v0=v0), sample_id=f"S{i}", temp_C=t, part_id=p)
              for i, (c, v0, t, p) in enumerate([(10e-6, 2.5, 25.0, "BD-1001"), (9e-6, 3.0, 25.0, "BD-1001"),
                                                  (4.7e-6, 6.0, 25.0, "BD-1002"), (4.4e-6, 5.0, 85.0, "BD-1002"),
                                                  (2.2e-6, 9.0, 85.0, "BD-1003")])]
    answers = []
    for target in (tmp_path / "a.sqlite", postgres_url):
        with Library(target) as lib:
            lib.add_parts(parts)
            for c in curves:
                lib.add_curve(c)
            answers.append([(r.part_id, r.covered, r.C_F, r.u_C_F, r.reason, r.origin, r.temps_C)
                            for T in (25.0, 55.0, 85.0) for r in lib.query(5.0, T)])
    assert answers[0] == answers[1]


def test_packed_table_matches_each_curve(lib, mk, monkeypatch):
    # more writes than segments allowed, so merges of segments happen; then a removal rebuilds
    monkeypatch.setattr(pack, "MAX_SEGMENTS", 3)
    ids = []
    for i in range(9):
        cid, _ = lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=(5 + i) * 1e-6), sample_id=f"S{i}"))
        ids.append(cid)
    lib.add_curve(mk.make_curve("landau", {"C0_F": 3e-6, "V_k_V": 4.0, "C_p_F": 1e-7}, sample_id="L",
                                part_id="BD-1002"))
    n_seg = lib._db.conn.execute("SELECT COUNT(*) FROM curve_pack").fetchone()[0]
    assert n_seg <= 3 + 1  # tanh segments merged, one landau segment
    lib.remove_curve(ids[4])

    from benchkit.library.query import table_for

    t = table_for(lib)
    C, _ = t.evaluate(3.0)
    assert sorted(t.curve_id.tolist()) == sorted(r.curve_id for r in lib.curves())
    for row, cid in enumerate(t.curve_id.tolist()):
        truth = float(lib.curve(cid).curve.C(3.0))  # fits.Curve, one document at a time
        assert C[row] == pytest.approx(truth, rel=1e-12)


def test_revision_is_a_new_record_with_history(lib, mk):
    old, _ = lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=10e-6), sample_id="S1"))
    first = lib.query(2.0)[0]
    new, added = lib.revise_curve(old, mk.make_curve(params=mk.tanh_params(c_pk=8e-6), sample_id="S1"))
    assert added and new != old
    assert [r.curve_id for r in lib.history(new)] == [new, old]  # the old record stays
    assert lib.superseded_ids() == {old}
    answer = lib.query(2.0)[0]
    assert answer.curve_ids == (new,) and answer.C_F < first.C_F


def test_verdict_records(lib):
    doc = {"format": "benchkit-verification", "version": 1, "verdict": "conforming", "rule": "guarded",
           "claim": {"part_id": "BD-1002"}}
    vid, added = lib.add_verdict(doc)
    again, added2 = lib.add_verdict(json.loads(json.dumps(doc)))
    assert added and not added2 and again == vid
    assert [v["verdict"] for v in lib.verdicts("BD-1002")] == ["conforming"]
    with pytest.raises(UserError, match="not in the library"):
        lib.add_verdict(dict(doc, claim={"part_id": "BD-9999"}))


def _diverged(make_target, parts, mk):
    """Two libraries with a shared curve, curves of their own, and a part changed on one side."""
    a, b = make_target("a"), make_target("b")
    shared = mk.make_curve(sample_id="SH")
    with Library(a) as la:
        la.add_parts(parts)
        la.add_curve(shared)
        la.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=9e-6), sample_id="A1"))
    with Library(b) as lb:
        lb.add_parts(parts)
        lb.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=8e-6), sample_id="B1"))
        lb.add_curve(shared)
        lb.add_part(dict(parts[1], description="4.7 uF 16 V X7R 0603, revised datasheet"))
        lb.add_verdict({"format": "benchkit-verification", "version": 1, "verdict": "conforming",
                        "claim": {"part_id": "BD-1002"}})
    return a, b


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_merge_in_either_order_gives_the_same_library(backend, tmp_path, parts, mk, request):
    if backend == "sqlite":
        def make(name):
            return str(tmp_path / f"{name}.sqlite")
    else:
        make_url = request.getfixturevalue("postgres_url_factory")

        def make(name):
            return make_url()
    a, b = _diverged(make, parts, mk)
    ab, ba = make("ab"), make("ba")
    with Library(ab) as x:
        x.import_library(a)
        x.import_library(b)
        fp_ab = x.fingerprint()
        n = x.summary()
    with Library(ba) as y:
        y.import_library(b)
        y.import_library(a)
        fp_ba = y.fingerprint()
    assert fp_ab == fp_ba
    assert n["curve"] == 3 and n["verdict"] == 1  # the shared curve once
    with Library(a) as la:  # merging b into a diverged a directly gives the same again
        la.import_library(b)
        assert la.fingerprint() == fp_ab
        assert la.part("BD-1002").description.endswith("revised datasheet")  # changed last wins


def test_add_run_to_a_new_library_files_its_part(tmp_path, capsys, mk, parts):
    # the run records its parts' catalogue fields (run.json samples[].part): no add-parts step
    run = mk.write_run(tmp_path / "run-1", catalogue={"BD-1001": parts[0]})
    path = tmp_path / "new.sqlite"
    assert main(["library", "--library", str(path), "add", str(run), "--part", "BD-1001"]) == 0
    with Library(path) as lib:
        assert lib.part("BD-1001").nominal_C_F == 10e-6 and len(lib.curves("BD-1001")) == 2


def test_add_run_without_catalogue_fails_cleanly(tmp_path, capsys, mk):
    run = mk.write_run(tmp_path / "run-1")  # no catalogue copy in run.json
    path = tmp_path / "new.sqlite"
    code = main(["library", "--library", str(path), "add", str(run), "--part", "BD-1001"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "not in the library" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run-1"]  # no empty library left behind


def test_postgres_url_through_the_cli_and_env(postgres_url, parts_toml, capsys, monkeypatch, mk, tmp_path):
    assert main(["library", "--library", postgres_url, "add-parts", str(parts_toml)]) == 0
    monkeypatch.setenv("BENCHKIT_LIBRARY", postgres_url)
    curve = tmp_path / "c.json"
    mk.make_curve().save(curve)
    assert main(["library", "add", str(curve)]) == 0
    capsys.readouterr()
    assert main(["library", "query", "--bias", "3", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [r["part_id"] for r in out if r["covered"]] == ["BD-1001"]


def test_unreachable_server_one_line(capsys):
    code = main(["library", "--library", "postgresql://nobody@127.0.0.1:1/none", "list"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "cannot connect" in err


def test_sql_translation_keeps_parameters():
    assert postgres.translate("SELECT 1 FROM part WHERE part_id = ?") == "SELECT 1 FROM part WHERE part_id = %s"
    assert postgres.translate("INSERT OR IGNORE INTO run(a) VALUES (?)") == \
        "INSERT INTO run(a) VALUES (%s) ON CONFLICT DO NOTHING"
    assert postgres.redact("postgresql://u:secret@h:5/db") == "postgresql://u:***@h:5/db"


def test_query_cold_and_warm_agree(lib, mk):
    for i in range(5):
        lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=(6 + i) * 1e-6), sample_id=f"S{i}"))
    warm = [(r.part_id, r.C_F) for r in lib.query(4.0)]
    with Library(lib.target) as fresh:
        cold = [(r.part_id, r.C_F) for r in fresh.query(4.0)]
    assert cold == warm and np.isfinite(cold[0][1])
