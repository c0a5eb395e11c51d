"""`benchkit measure` refuses bad input with one clear line and exit 2, before any output.

Refusing a plan above the part's rated voltage before the supply is switched on, and
cautioning the operator before a real bench is biased, are common practice for bench safety.
"""

import socket
import threading
import tomllib

import pytest

from benchkit.cli import SAFETY_NOTE, build_parser, main
from instruments.clock import VirtualClock
from instruments.sim import SimBench

from sweep_helpers import REPO, CtrlCAfter, read_meta, read_rows, write_plan
from benchkit.commands.sim import demo_bench

DEMO_PLAN = REPO / "data" / "plans" / "demo.toml"


def _one_line_exit_2(capsys, argv):
    code = main(argv)
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, err
    assert len(lines) == 1 and lines[0].startswith("benchkit: error: "), err
    return lines[0]


@pytest.fixture
def bench():
    with demo_bench(clock=VirtualClock()) as b:
        yield b


def _bench_file(tmp_path, bench, **override):
    """The sim's bench file with some roles' resources replaced."""
    text = bench.bench_file_text()
    for role, res in override.items():
        old = bench.resources[role]
        text = text.replace(f'"{old}"', f'"{res}"')
    p = tmp_path / "bench.toml"
    p.write_text(text)
    assert tomllib.loads(text)["instrument"]["meter"]["resource"]
    return p


def _plan(tmp_path, **kw):
    return write_plan(tmp_path / "plan.toml", samples=[{"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1}], **kw)


def test_help_carries_the_safety_note():
    sub = build_parser()._subparsers._group_actions[0].choices["measure"]
    assert sub.epilog == SAFETY_NOTE


def test_bad_resource_string(tmp_path, capsys, bench):
    bf = _bench_file(tmp_path, bench, meter="TCPIP0::127.0.0.1::notaport::SOCKET")
    line = _one_line_exit_2(capsys, ["measure", "--bench", str(bf), "--plan", str(_plan(tmp_path)), "--out", str(tmp_path / "run")])
    assert "[instrument.meter]" in line and "notaport" in line and "TCPIP0::127.0.0.1::5025::SOCKET" in line
    assert not (tmp_path / "run").exists()  # nothing half written


def test_port_where_nothing_listens(tmp_path, capsys, bench):
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()  # the port is now free: a connection is refused
    bf = _bench_file(tmp_path, bench, supply=f"TCPIP0::127.0.0.1::{port}::SOCKET")
    line = _one_line_exit_2(capsys, ["measure", "--bench", str(bf), "--plan", str(_plan(tmp_path)), "--out", str(tmp_path / "run"),
                                     "--io-timeout-s", "0.5"])
    assert "[instrument.supply]" in line and str(port) in line
    assert not (tmp_path / "run").exists()
    assert bench.supply_state()["output_on"] is False


def test_instrument_that_accepts_and_never_replies(tmp_path, capsys, bench):
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(16)
    held = []
    stop = threading.Event()

    def accept_and_sit():
        srv.settimeout(0.1)
        while not stop.is_set():
            try:
                conn, _ = srv.accept()
                held.append(conn)  # read nothing, answer nothing
            except OSError:
                pass

    t = threading.Thread(target=accept_and_sit, daemon=True)
    t.start()
    try:
        port = srv.getsockname()[1]
        bf = _bench_file(tmp_path, bench, scanner=f"TCPIP0::127.0.0.1::{port}::SOCKET")
        line = _one_line_exit_2(capsys, ["measure", "--bench", str(bf), "--plan", str(_plan(tmp_path)),
                                         "--out", str(tmp_path / "run"), "--io-timeout-s", "0.3"])
    finally:
        stop.set()
        t.join()
        for c in held:
            c.close()
        srv.close()
    assert "[instrument.scanner]" in line and str(port) in line
    assert not (tmp_path / "run").exists()
    assert bench.supply_state()["output_on"] is False


def test_malformed_plan(tmp_path, capsys):
    p = tmp_path / "plan.toml"
    p.write_text("[bias]\nstart_V = 0\nstop_V = 4\nstep_V = 1\n[measure]\ndwell_s = 'long'\n")
    line = _one_line_exit_2(capsys, ["measure", "--sim", "--virtual-clock", "--plan", str(p), "--out", str(tmp_path / "run")])
    assert str(p) in line and "'measure.dwell_s'" in line
    assert not (tmp_path / "run").exists()


def test_above_rated_refused_before_the_supply_is_touched(tmp_path, capsys, bench):
    bf = _bench_file(tmp_path, bench)
    plan = _plan(tmp_path, bias={"stop_V": 8.0})  # BD-1001 is rated 6.3 V
    line = _one_line_exit_2(capsys, ["measure", "--bench", str(bf), "--plan", str(plan), "--out", str(tmp_path / "run")])
    assert "exceeds the rated voltage 6.3 V" in line and "allow_above_rated" in line
    # the simulated supply never received a single message, and is off
    assert bench.faults.count("supply") == 0
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


@pytest.mark.parametrize("argv, what", [
    (["measure", "--plan", "p.toml", "--out", "o"], "exactly one of --bench"),
    (["measure", "--sim", "--out", "o"], "--plan PLAN.toml and --out RUN_DIR"),
    (["measure", "--resume", "r", "--out", "o"], "drop --out"),
    (["measure", "--bench", "b.toml", "--virtual-clock", "--plan", "p", "--out", "o"], "faster than max_ramp_V_per_s"),
])
def test_bad_flag_combinations(capsys, argv, what):
    assert what in _one_line_exit_2(capsys, argv)


def test_resume_of_a_non_run(tmp_path, capsys):
    line = _one_line_exit_2(capsys, ["measure", "--resume", str(tmp_path)])
    assert "run.json" in line


def test_lot_fixture_all_channels_when_the_plan_names_no_samples(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml", bias={"start_V": None, "stop_V": None, "step_V": None,
                                                    "points_V": [0.0, 10.0], "branches": ["rising"]})
    code = main(["measure", "--sim", "--lot", "--virtual-clock", "--plan", str(plan), "--out", str(tmp_path / "run")])
    cap = capsys.readouterr()
    assert code == 0, cap.err
    rows = read_rows(tmp_path / "run")
    ids = sorted({r["sample_id"] for r in rows})
    assert len(ids) == 6 and all(i.startswith("LOT-2611-") for i in ids) and len(rows) == 12
    assert "CAUTION" not in cap.err  # the simulated bench gets no caution line
    meta = read_meta(tmp_path / "run")
    assert meta["sim"]["lot"] is True and meta["status"] == "complete"
    assert "complete" in cap.out


def test_resume_of_a_bench_file_run_uses_the_stored_bench(tmp_path, capsys, bench):
    from benchkit.sweep.benchfile import load_bench
    from benchkit.sweep.plan import load_plan
    from benchkit.sweep import run_sweep

    bf = _bench_file(tmp_path, bench)  # a bench-file run resumes on a real clock: keep it short
    plan = load_plan(_plan(tmp_path, measure={"dwell_s": 0.1}, limits={"max_ramp_V_per_s": 50.0,
                                                                        "discharge_wait_s": 0.1}), None)
    res = run_sweep(load_bench(bf), plan, tmp_path / "run", bench.clock, CtrlCAfter(2))
    assert res.status == "aborted" and len(read_rows(tmp_path / "run")) == 2
    code = main(["measure", "--resume", str(tmp_path / "run")])
    cap = capsys.readouterr()
    assert code == 0, cap.err
    assert cap.err.count("CAUTION") == 1  # a bench-file run is treated as real hardware
    rows = read_rows(tmp_path / "run")
    assert [int(r["step_index"]) for r in rows] == [0, 1, 2, 3, 4]
    assert bench.supply_state()["output_on"] is False


def test_resume_refuses_a_different_plan(tmp_path, capsys, bench):
    from benchkit.sweep.benchfile import load_bench
    from benchkit.sweep.plan import load_plan
    from benchkit.sweep import run_sweep

    plan_path = _plan(tmp_path)
    run_sweep(load_bench(_bench_file(tmp_path, bench)), load_plan(plan_path, None), tmp_path / "run",
              bench.clock, CtrlCAfter(1))
    other = write_plan(tmp_path / "other.toml", samples=[{"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1}],
                       measure={"dwell_s": 9.0})
    line = _one_line_exit_2(capsys, ["measure", "--resume", str(tmp_path / "run"), "--plan", str(other)])
    assert "plan hash differs" in line
    assert len(read_rows(tmp_path / "run")) == 1  # untouched
