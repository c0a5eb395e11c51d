"""The age of each sample since its last de-aging heat travels from the bench into run.json.

Class-2 capacitance falls with the logarithm of the time since the last heat (common practice;
IEC 60384-22 informative annex on ageing), so verification needs the age to refer a reading
to the age a claim refers to. Logging the time since the last heat is common practice.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sweep_helpers import read_meta, write_plan  # noqa: E402

from benchkit.sweep.benchfile import parse_bench_text
from benchkit.errors import UserError
from benchkit.sweep.plan import load_plan
from benchkit.sweep import run_sweep
from instruments.clock import VirtualClock
from instruments.sim import SimBench
from benchkit.catalogue import DEMO_LOT, DEMO_PARTS, load_lot, load_parts
from benchkit.commands.sim import demo_bench


def test_plan_sample_age_is_recorded(tmp_path):
    plan = load_plan(write_plan(tmp_path / "p.toml", samples=[
        {"sample_id": "FX-04", "part_id": "BD-1004", "channel": 4, "hours_since_heat_h": 500.0}]))
    with demo_bench(clock=VirtualClock()) as bench:
        result = run_sweep(bench, plan, tmp_path / "run", handle_signals=False)
    assert result.status == "complete"
    (entry,) = read_meta(tmp_path / "run")["samples"]
    assert entry["hours_since_heat_h"] == 500.0


def test_simulated_lot_reports_its_ages_in_the_bench_file(tmp_path):
    parts = load_parts(DEMO_PARTS)
    want = {s.sample_id: s.hours_since_heat_h for s in load_lot(DEMO_LOT, parts)}
    with demo_bench(clock=VirtualClock(), lot=True) as bench:
        bench_file = parse_bench_text(bench.bench_file_text(), "sim")
        result = run_sweep(bench, load_plan(write_plan(tmp_path / "p.toml")), tmp_path / "run",
                           handle_signals=False)
    got = {c.sample_id: c.hours_since_heat_h for c in bench_file.channels}
    assert got == pytest.approx(want)
    assert result.status == "complete"
    ages = {s["sample_id"]: s["hours_since_heat_h"] for s in read_meta(tmp_path / "run")["samples"]}
    assert ages == pytest.approx(want)


@pytest.mark.parametrize("bad", ["-3", "0", '"old"'])
def test_bad_age_in_a_bench_file_is_one_clear_line(bad):
    roles = {"meter": "generic-lcr", "supply": "generic-dc-supply", "scanner": "generic-scanner",
             "thermometer": "generic-thermometer"}
    text = "".join(f'[instrument.{r}]\nresource = "TCPIP0::127.0.0.1::{5025 + i}::SOCKET"\nprofile = "{p}"\n'
                   for i, (r, p) in enumerate(roles.items()))
    text += (f'[[channel]]\nchannel = 1\nsample_id = "S1"\npart_id = "BD-1001"\nhours_since_heat_h = {bad}\n')
    with pytest.raises(UserError, match=r"bench\.toml: channel entry 1: field 'hours_since_heat_h'"):
        parse_bench_text(text, "bench.toml")


def test_bad_age_in_a_plan_is_one_clear_line(tmp_path):
    path = write_plan(tmp_path / "p.toml", samples=[
        {"sample_id": "S1", "part_id": "BD-1001", "channel": 1, "hours_since_heat_h": -1.0}])
    with pytest.raises(UserError, match=r"field 'samples\.hours_since_heat_h'|field 'samples\[1\]\.hours_since_heat_h'"):
        load_plan(path)
