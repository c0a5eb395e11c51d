"""Filing whole runs over HTTP (POST /api/runs, `library add RUN --library http://...`), both backends.

Independent truths: the CLI's own `benchkit library add RUN_DIR --all-parts` on a library file
is the reference (the same records, compared by Library.fingerprint, which leaves out local
bookkeeping); the hash chain and sha256 of points.csv as DEVELOPERS.md ("File formats": run
directory) defines them (a changed row is refused); RFC 9110 status codes (401 without valid
credentials, 413 content too large, 400 a malformed request). The runs are swept on the
simulated bench with the demo plan (invented parts of Brackwater Dynamics).
"""

from __future__ import annotations

import json
import threading
from pathlib import Path

import pytest
from starlette.testclient import TestClient

from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.library import Library, filing
from benchkit.web import create_app

DATA = Path(__file__).resolve().parents[2] / "data"
TOKEN = "a-long-bench-token-0123456789"


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> list[Path]:
    """Four runs of the demo fixture on the simulated bench (four benches' worth of filings)."""
    out = tmp_path_factory.mktemp("filing-runs")
    made = []
    for i in range(4):
        run = out / f"run-{i}"
        assert main(["measure", "--sim", "--virtual-clock", "--plan", str(DATA / "plans" / "demo.toml"),
                     "--out", str(run)]) == 0
        made.append(run)
    return made


@pytest.fixture(params=["sqlite", "postgresql"])
def target(request, tmp_path):
    """A fresh, empty library for the server: an SQLite file or a schema on the PostgreSQL server."""
    if request.param == "sqlite":
        return str(tmp_path / "served.sqlite")
    return request.getfixturevalue("postgres_url")


@pytest.fixture
def token_file(tmp_path) -> Path:
    path = tmp_path / "token"
    path.write_text(TOKEN + "\n", encoding="utf-8")
    return path


def _fingerprint(target) -> str:
    with Library(target, create=False) as lib:
        return lib.fingerprint()


def test_http_filing_stores_what_the_cli_stores(runs, target, token_file, tmp_path, capsys, live_server):
    reference = tmp_path / "cli.sqlite"
    assert main(["library", "--library", str(reference), "add", str(runs[0]), "--all-parts"]) == 0
    app = create_app(target, token=TOKEN)
    try:
        with live_server(app) as server:
            argv = ["library", "--library", server.url, "add", str(runs[0]), "--all-parts",
                    "--token-file", str(token_file)]
            assert main(argv) == 0
            assert "over HTTP" in capsys.readouterr().out
            assert main(argv) == 0  # the same run again: stored once
            assert "nothing added" in capsys.readouterr().out
    finally:
        app.state.library.close()
    assert _fingerprint(target) == _fingerprint(reference)
    with Library(target, create=False) as lib, Library(reference, create=False) as ref:
        assert lib.summary() == ref.summary() and lib.summary()["curve"] > 0
        assert [r.path for r in lib.runs()] == [None]  # no folder of the server is recorded


def test_writes_need_the_token(runs, target):
    body = filing.run_body(runs[0], all_parts=True)
    app = create_app(target, token=TOKEN)
    try:
        client = TestClient(app)
        r = client.post("/api/runs", json=body)
        assert r.status_code == 401 and "token" in r.json()["error"]
        r = client.post("/api/runs", json=body, headers={"Authorization": "Bearer " + TOKEN[:-1] + "x"})
        assert r.status_code == 401
        assert app.state.library.summary()["curve"] == 0
    finally:
        app.state.library.close()
    # a server without a token has no write route at all
    read_only = create_app(target)
    try:
        r = TestClient(read_only).post("/api/runs", json=body, headers={"Authorization": f"Bearer {TOKEN}"})
        assert r.status_code in (404, 405)
    finally:
        read_only.state.library.close()


def test_oversize_and_bad_bodies_are_refused_with_one_message(runs, target, tmp_path, monkeypatch):
    body = filing.run_body(runs[0], all_parts=True)
    auth = {"Authorization": f"Bearer {TOKEN}"}
    app = create_app(target, token=TOKEN)
    try:
        client = TestClient(app)
        r = client.post("/api/runs", content=b"{not json", headers=auth)
        assert r.status_code == 400 and "not JSON" in r.json()["error"]
        r = client.post("/api/runs", json=dict(body, points_csv=body["points.csv"]), headers=auth)
        assert r.status_code == 400 and "did you mean 'points.csv'" in r.json()["error"]
        r = client.post("/api/runs", json={k: v for k, v in body.items() if k != "points.csv"}, headers=auth)
        assert r.status_code == 400 and "points.csv" in r.json()["error"]
        # one changed reading: the sha256 in run.json and the chain no longer match the rows
        lines = body["points.csv"].split("\n")
        fields = lines[4].split(",")
        col = lines[0].split(",").index("C_F")
        fields[col] = repr(float(fields[col]) * 1.001)
        edited = dict(body, **{"points.csv": "\n".join(lines[:4] + [",".join(fields)] + lines[5:])})
        r = client.post("/api/runs", json=edited, headers=auth)
        assert r.status_code == 400
        assert r.json()["error"].startswith("run/points.csv: ") and "benchkit-filing-" not in r.json()["error"]
        # a run whose run.json names a chain must come with it
        r = client.post("/api/runs", json={k: v for k, v in body.items() if k != "points.chain"}, headers=auth)
        assert r.status_code == 400 and "points.chain" in r.json()["error"]
        # more than the limit: refused before the body is read (413)
        monkeypatch.setattr(filing, "MAX_RUN_BYTES", 10_000)
        r = client.post("/api/runs", json=body, headers=auth)
        assert r.status_code == 413 and "too large" in r.json()["error"]
        assert app.state.library.summary()["curve"] == 0  # nothing half filed
    finally:
        app.state.library.close()


def test_the_client_refuses_to_send_a_token_in_clear_across_a_network(runs):
    # 192.0.2.1 is TEST-NET-1 (RFC 5737): never reached, the refusal comes first
    with pytest.raises(UserError, match="in clear"):
        filing.file_run("http://192.0.2.1:8750", TOKEN, runs[0])


def test_four_benches_filing_at_once_store_each_run_once(runs, target, live_server):
    app = create_app(target, token=TOKEN)
    receipts, errors = [], []

    def bench(k: int) -> None:
        try:
            for run in runs[k:] + runs[:k]:  # every bench files every run, each in its own order
                receipts.append((run.name, filing.file_run(server.url, TOKEN, run, all_parts=True)))
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    try:
        with live_server(app) as server:
            threads = [threading.Thread(target=bench, args=(k,)) for k in range(4)]
            for t in threads:
                t.start()
            for t in threads:
                t.join(600)
    finally:
        app.state.library.close()
    assert errors == []
    assert len(receipts) == 16
    filed = [(name, run["part_id"]) for name, answer in receipts for run in answer["runs"]
             if not run["already_present"]]
    assert len(filed) == len(set(filed))  # each run's part filed by exactly one bench
    added = sum(c["added"] for _, answer in receipts for run in answer["runs"] for c in run["curves"])
    with Library(target, create=False) as lib:
        assert len(lib.runs()) == 4
        assert {r.run_id for r in lib.runs()} == {json.loads((run / "run.json").read_text())["run_id"] for run in runs}
        assert lib.summary()["curve"] == added > 0
        shas = [r.content_sha256 for r in lib.curves()]
        assert len(shas) == len(set(shas))
