"""Many benches filing and many clients querying one PostgreSQL library at once.

What must hold whatever the interleaving (PostgreSQL documentation: advisory locks,
REPEATABLE READ snapshots): every record filed is there once, none twice, no client sees an
error, and every answer a client gets is that of one committed state (its curves a subset of
what was filed). Invented curves of invented parts.
"""

from __future__ import annotations

import threading
import time

import pytest

from benchkit.library import Library

WRITERS = 4
PER_WRITER = 50
CLIENTS = 50


def _doc(i: int) -> dict:
    return {"format": "benchkit-curve", "version": 1, "model": "landau", "param_names": ["C0_F", "V_k_V", "C_p_F"],
            "params": {"C0_F": 1e-6 * (1 + i / 1000), "V_k_V": 5.0, "C_p_F": 0.0},
            "covariance": [[1e-16, 0, 0], [0, 1e-2, 0], [0, 0, 0]], "valid_range_V": [0.0, 10.0],
            "conditions": {"temp_C": 25.0}, "origin": "measured", "part_id": f"BD-{2001 + i % 4}",
            "sample_id": f"S{i}", "branch": "rising"}


@pytest.mark.slow
def test_four_benches_file_while_fifty_clients_query(postgres_url):
    parts = [{"id": f"BD-{2001 + k}", "description": "invented", "nominal_C_F": 1e-6, "rated_V": 10.0,
              "class_code": "X7R", "case": "0603"} for k in range(4)]
    with Library(postgres_url) as lib:
        lib.add_parts(parts)
    errors: list[str] = []
    answers: list[int] = []
    start = threading.Barrier(WRITERS + CLIENTS)
    writers_done = threading.Event()
    lock = threading.Lock()

    def writer(w: int):
        try:
            with Library(postgres_url) as lib:
                start.wait()
                mine = range(w * PER_WRITER, (w + 1) * PER_WRITER)
                neighbour = range(((w + 1) % WRITERS) * PER_WRITER, ((w + 1) % WRITERS) * PER_WRITER + 10)
                for i in list(mine) + list(neighbour):  # the neighbour's first 10 again: duplicates refused
                    lib.add_curve(_doc(i))
        except Exception as exc:  # noqa: BLE001 - collected and asserted below
            with lock:
                errors.append(f"writer {w}: {exc!r}")

    def client(c: int):
        try:
            with Library(postgres_url, readonly=True) as lib:
                start.wait()
                while True:
                    done = writers_done.is_set()
                    res = lib.query(5.0, 25.0)
                    with lock:
                        answers.append(sum(r.n_curves for r in res))
                    if done:
                        break
                    time.sleep(0.1)  # a client asks now and then, not in a tight loop
        except Exception as exc:  # noqa: BLE001
            with lock:
                errors.append(f"client {c}: {exc!r}")

    threads = [threading.Thread(target=writer, args=(w,)) for w in range(WRITERS)]
    clients = [threading.Thread(target=client, args=(c,)) for c in range(CLIENTS)]
    for t in threads + clients:
        t.start()
    for t in threads:
        t.join(120)
    writers_done.set()
    for t in clients:
        t.join(120)
    assert errors == []
    assert all(0 <= a <= WRITERS * PER_WRITER for a in answers) and len(answers) >= CLIENTS
    with Library(postgres_url) as lib:
        conn = lib._db.conn
        assert conn.execute("SELECT COUNT(*), COUNT(DISTINCT content_sha256) FROM curve").fetchone() == (200, 200)
        assert conn.execute("SELECT SUM(n) FROM curve_pack").fetchone()[0] == 200
        assert sorted(r.sample_id for r in lib.curves()) == sorted(f"S{i}" for i in range(200))
        assert sum(r.n_curves for r in lib.query(5.0, 25.0)) == 200  # the final answer sees all
