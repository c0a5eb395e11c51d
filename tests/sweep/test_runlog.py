"""Run directory: rows on disk before the next step, partial tails dropped, status recorded."""

import csv
import hashlib
import json
import os
import signal

import pytest

from benchkit.errors import UserError
from benchkit.sweep.runlog import COLUMNS, FLAGS, RunLog, join_flags, read_points, read_run
from benchkit.sweep.safety import Interrupted, SignalGuard

# DEVELOPERS.md, "File formats": run directory (the interface the fitting and verification code reads)
CONTRACT_COLUMNS = (
    "run_id,sample_id,part_id,channel,step_index,branch,repeat,bias_set_V,bias_meas_V,"
    "bias_current_A,function,freq_Hz,ac_level_set_Vrms,ac_level_dut_Vrms,C_F,C_std_F,D,Rs_ohm,"
    "n_readings,temp_C,t_s,dwell_s,settle_s,drift_pct_per_s,flags,utc"
).split(",")


def _meta():
    return {"format": "benchkit-run", "version": 1, "run_id": "run-x", "status": "running",
            "reason": None, "events": []}


def _row(i):
    r = {c: "" for c in COLUMNS}
    r.update(run_id="run-x", sample_id="S", step_index=i, C_F=1e-6 + i * 1e-9, flags="")
    return r


def test_columns_are_the_contract():
    assert list(COLUMNS) == CONTRACT_COLUMNS


def test_each_point_is_on_disk_when_append_returns(tmp_path):
    log = RunLog.create(tmp_path / "run", _meta())
    try:
        for i in range(3):
            log.append_point(_row(i))
            # another reader sees the row at once (flushed; fsync'ed by the writer)
            rows, _ = read_points(tmp_path / "run")
            assert len(rows) == i + 1
        assert float(rows[2]["C_F"]) == 1e-6 + 2e-9  # full precision kept (repr)
    finally:
        log.close()


def test_partial_trailing_line_is_dropped_on_reopen(tmp_path):
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    log.append_point(_row(0))
    log.close()
    with open(d / "points.csv", "a") as fh:
        fh.write("run-x,S,,,1,ris")  # what a kill -9 in mid-write leaves
    log = RunLog.reopen(d)
    try:
        assert len(log.rows) == 1
        assert (d / "points.csv").read_bytes().endswith(b"\n")  # the tail is gone from the file
        log.append_point(_row(1))
    finally:
        log.close()
    with open(d / "points.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["step_index"] for r in rows] == ["0", "1"]


def test_reopen_streams_the_stored_rows_and_continues_their_chain(tmp_path):
    # a resume must not hold a long run's rows in memory (issue: constant memory per point);
    # the rows come back from disk on every pass, the same each time, and a row appended
    # after the reopen extends the same hash chain (sha256 chain, hashlib as the reference)
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    for i in range(5):
        log.append_point(_row(i))
    log.close()
    log = RunLog.reopen(d)
    try:
        assert not isinstance(log.rows, list) and len(log.rows) == 5
        first, second = list(log.rows), list(log.rows)
        assert first == second and [r["step_index"] for r in first] == [str(i) for i in range(5)]
        assert log.rows.last == first[-1]
        log.append_point(_row(5))
    finally:
        log.close()
    h = hashlib.sha256(b"benchkit-points-chain\nrun-x").digest()
    with open(d / "points.csv", "rb") as fh:
        lines = fh.readlines()
    digests = (d / "points.chain").read_text().split()
    assert len(lines) == len(digests) == 7
    for line, want in zip(lines, digests):
        h = hashlib.sha256(h + line).digest()
        assert h.hex() == want


def test_status_complete_records_sha256(tmp_path):
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    log.append_point(_row(0))
    log.set_status("complete")
    log.close()
    meta = read_run(d)
    assert meta["status"] == "complete" and meta["end_utc"]
    # the hash names exactly the bytes of points.csv (hashlib as the reference)
    assert meta["points_sha256"] == hashlib.sha256((d / "points.csv").read_bytes()).hexdigest()


def test_existing_directory_is_not_overwritten(tmp_path):
    d = tmp_path / "run"
    d.mkdir()
    (d / "something").write_text("x")
    with pytest.raises(UserError, match="already exists and is not empty"):
        RunLog.create(d, _meta())


def test_second_writer_is_refused(tmp_path):
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    try:
        with pytest.raises(UserError, match="another benchkit process is writing this run"):
            RunLog.reopen(d)
    finally:
        log.close()


def test_damaged_row_is_reported(tmp_path):
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    log.close()
    with open(d / "points.csv", "a") as fh:
        fh.write("a,b,c\n")
    with pytest.raises(UserError, match="line 2 has 3 fields"):
        read_points(d)


def test_flags_vocabulary_is_closed():
    assert join_flags(["bias_readback", "current_limit", "bias_readback"]) == "bias_readback;current_limit"
    assert set(FLAGS) >= {"bias_readback", "current_limit"}
    with pytest.raises(ValueError):
        join_flags(["made_up"])


def test_run_json_is_valid_json_after_every_save(tmp_path):
    d = tmp_path / "run"
    log = RunLog.create(d, _meta())
    for status in ("running", "aborted"):
        log.set_status(status, "because" if status == "aborted" else None)
        json.loads((d / "run.json").read_text())
    log.close()
    assert not [p for p in d.iterdir() if p.name.endswith(".tmp")]  # no temporary left behind


# The first Ctrl-C waits for the transaction in flight; a second one stops at once
# [common practice, as in the instrument-control libraries that defer the first interrupt].
def test_first_signal_is_deferred_to_the_end_of_the_transaction():
    with SignalGuard() as g:
        done = []
        with pytest.raises(Interrupted) as e:
            with g.transaction():
                os.kill(os.getpid(), signal.SIGINT)
                done.append("transaction finished")
        assert done == ["transaction finished"] and e.value.deferred
    with SignalGuard() as g:
        with pytest.raises(Interrupted) as e:
            with g.transaction():
                os.kill(os.getpid(), signal.SIGTERM)
                os.kill(os.getpid(), signal.SIGTERM)  # the operator insists
                pytest.fail("a second signal must interrupt at once")
        assert e.value.forced and e.value.signal_name == "SIGTERM"


def test_signal_outside_a_transaction_stops_at_once_and_is_ignored_while_stopping():
    with SignalGuard() as g:
        with pytest.raises(Interrupted):
            os.kill(os.getpid(), signal.SIGINT)
            pytest.fail("not deferred outside a transaction")
        g.stopping()
        os.kill(os.getpid(), signal.SIGINT)  # during shutdown: only noted
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # handlers restored
