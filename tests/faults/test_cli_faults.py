"""Fault injection from the command line: `benchkit sim --fault` and `benchkit measure --sim --fault`.

The spec is `KIND[:after=N]` (instruments.sim.faults.Fault.parse); a bad spec is bad input:
one line, exit 2, nothing started or written (benchkit/errors.py).
"""

from __future__ import annotations

import pytest

from benchkit.cli import main

from fault_kit import flags_of, planned_keys, read_meta, read_rows, row_keys, write_plan
from sweep_helpers import start_benchkit, stop_benchkit, wait_for  # beside fault_kit on sys.path


@pytest.mark.parametrize("spec,words", [
    ("explode", "kind 'explode' is unknown"),
    ("drop:after=x", "must be an integer"),
    ("drop:after=-1", "must be 0 or more"),
    ("timeout:when=3", "option 'when' is unknown"),
    ("", "empty fault spec"),
    ("overload:rate=2", "applies only to temp-drift"),
])
def test_measure_refuses_a_bad_fault_spec_before_anything_runs(tmp_path, capsys, spec, words):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    code = main(["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out),
                 "--fault", spec])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and words in err[0] and "--sim" in err[0]
    assert not out.exists()


def test_fault_needs_the_simulated_bench(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    bench = tmp_path / "bench.toml"
    bench.write_text("")
    code = main(["measure", "--bench", str(bench), "--plan", str(plan), "--out", str(tmp_path / "r"),
                 "--fault", "drop"])
    assert code == 2 and "--fault works with --sim only" in capsys.readouterr().err


def test_several_faults_in_one_run(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    code = main(["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out),
                 "--io-timeout-s", "0.3", "--fault", "garble:after=20", "--fault", "overload:after=50",
                 "--fault", "drop:role=supply:after=40"])
    assert code == 0, capsys.readouterr().err
    rows = read_rows(out)
    assert row_keys(rows) == planned_keys(plan)
    flags = set().union(*(flags_of(r) for r in rows))
    assert {"retried", "overload"} <= flags
    meta = read_meta(out)
    assert meta["sim"]["faults"] == ["garble:after=20", "overload:after=50", "drop:role=supply:after=40"]
    roles = {e["role"] for e in meta["events"] if e["event"] == "link_recovered"}
    assert roles == {"meter", "supply"}


@pytest.mark.slow
def test_sim_process_with_a_fault_and_measure_over_its_bench_file(tmp_path, capsys):
    """`benchkit sim --fault drop:after=26` in its own process, measured over the bench file."""
    bench_file = tmp_path / "bench.toml"
    proc = start_benchkit("sim", "--fault", "drop:after=26", "--bench-file", str(bench_file))
    try:
        wait_for(bench_file.exists, 60, "the bench file of benchkit sim", proc)
        # a real clock here: no dwell and a fast ramp keep the run short
        plan = write_plan(tmp_path / "plan.toml", measure={"dwell_s": 0.0},
                          limits={"max_ramp_V_per_s": 1000.0, "discharge_wait_s": 0.0})
        out = tmp_path / "run"
        code = main(["measure", "--bench", str(bench_file), "--plan", str(plan), "--out", str(out),
                     "--io-timeout-s", "0.5"])
        assert code == 0, capsys.readouterr().err
        rows = read_rows(out)
        assert row_keys(rows) == planned_keys(plan)
        assert sum("retried" in flags_of(r) for r in rows) == 1
        assert any(e["event"] == "link_recovered" and e["reconnects"] == 1
                   for e in read_meta(out)["events"])
    finally:
        code = stop_benchkit(proc)
    assert code == 0


@pytest.mark.parametrize("kind", ["timeout", "drop", "garble", "error", "current-limit", "overload",
                                  "late", "temp-drift"])
def test_benchkit_sim_arms_every_fault_kind(kind):
    from benchkit.cli import build_parser
    from benchkit.commands import sim

    args = build_parser().parse_args(["sim", "--virtual-clock", "--fault", f"{kind}:after=7"])
    bench = sim._build_bench(args)
    with bench:
        pending = bench.faults.pending()
    assert [(f.kind, f.after) for f in pending] == [(kind, 7)]
