"""A claim at a temperature is compared with the points measured at that temperature.

The run measures BD-1009 (demo part whose C drops about 22 % from 25 to 125 degC) at 25 and
125 degC in the simulated chamber; the claim is the simulated bench's own truth at 125 degC
(its oracle true_settled_C_F, an independent truth), stated once at 125 degC (conforming) and
once, wrongly, at 25 degC (then compared with the 25 degC points: nonconforming). Decision
rules as in `verify`: ILAC-G8:09/2019 guarded acceptance.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from benchkit.cli import main
from benchkit.sweep import run_sweep

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sweep"))
from temp_helpers import chamber_bench, write_temp_plan  # noqa: E402

BIAS = [0.0, 6.0, 12.0]


@pytest.fixture(scope="module")
def hot_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("hot")
    plan = write_temp_plan(tmp / "plan.toml", points=(25.0, 125.0), step_V=2.0)
    with chamber_bench() as bench:
        res = run_sweep(bench, plan, tmp / "run", handle_signals=False)
        truth = [bench.true_settled_C_F(2, v, temp_C=125.0, function="CSD")  # channel 2: BD-1009
                 for v in BIAS]
    assert res.status == "complete"
    return tmp / "run", truth


def test_claim_at_125_is_met_by_the_125_points_not_by_the_25_ones(hot_run, tmp_path, tools, capsys):
    run_dir, truth = hot_run
    for temp, want in ((125, 0), (25, 1)):
        claim = tmp_path / f"claim-{temp}.csv"
        claim.write_text(tools.claim_text("BD-1009", BIAS, truth, tolerance="+-5%", temp_C=temp))
        out = tmp_path / f"report-{temp}"
        # the claim states the set level, the part sees less (100 ohm source): accepted here,
        # the temperature is what this test is about
        code = main(["verify", "--claim", str(claim), str(run_dir), "--out", str(out),
                     "--accept-other-conditions"])
        assert code == want, capsys.readouterr().out
        rep = json.loads((out / "report.json").read_text())
        text = json.dumps(rep)
        assert "temperature differs" not in text          # like was compared with like
    capsys.readouterr()


def test_a_claim_at_a_temperature_not_measured_skips_the_sample(hot_run, tmp_path, tools, capsys):
    run_dir, truth = hot_run
    claim = tmp_path / "claim-85.csv"
    claim.write_text(tools.claim_text("BD-1009", BIAS, truth, temp_C=85))
    code = main(["verify", "--claim", str(claim), str(run_dir), "--out", str(tmp_path / "r")])
    assert code == 2
    assert "no sample of part BD-1009" in capsys.readouterr().err
