"""Seeded mutation fuzz of every operator-facing input: 200 mutants per kind.

Each mutant of a good file (a plan, parts, bench, claim, curve, points.csv, run.json) is read
in-process the way the command line reads it, up to the last check before any instrument is
opened or anything written. A mutant may be accepted or refused, but only with the readers'
one-line error (UserError and the layer errors benchkit words as one line); any other
exception is a traceback for the operator and fails the test. Nothing may be written on
error: the folder holding the input is compared before and after.

The rule checked [the project's bad-input rule, benchkit/errors.py]: bad input gets one clear
line and exit 2, and nothing is half written. Seeds are fixed, so a failure reproduces.
"""

from __future__ import annotations

import json
import random
import shutil
from pathlib import Path

import pytest

from benchkit.catalogue import DEMO_PARTS, PartsFileError, load_catalogue, load_parts
from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.sweep import runlog
from benchkit.sweep.benchfile import load_bench
from benchkit.sweep.limits import BenchRanges, check_bench_limits
from benchkit.sweep.plan import build_sweeps, discharge_wait_s, load_plan, resolve_samples
from benchkit.sweep.rundir import read_run_dir
from benchkit.verify.claims import load_claim

REPO = Path(__file__).resolve().parents[2]
N_MUTANTS = 200
PARTS = load_catalogue()
# the generic profiles' ranges (instruments/drivers/profiles/generic-*.toml)
RANGES = BenchRanges((-60.0, 60.0), (1e-4, 1.0), (1, 16))

TOKENS = [
    "[" * 1000, "{a=" * 400, "a" + ".a" * 600, "1e999", "-1e999", "nan", "inf", "-inf", "1_0",
    "0x10", "1e-324", "5e-324", "1e300", "-0", "\x00", "\x1b[2J", "\n", "\r", ",", '"', "'",
    "=", "[]", "{}", "true", "#", "\u2028", "X" * 300_000, "X" * 70, "[[channel]]", "[[part]]",
    "[limits]", "repeats = 1000", "current_limit_A = 100", "9" * 400, "\\", '"""',
]


def mutate(text: str, rng: random.Random) -> bytes:
    """One to three random edits: flips, cuts, duplicated or swapped lines, inserted tokens,
    extreme numbers, renamed keys, truncation, invalid UTF-8."""
    s = text
    for _ in range(rng.randint(1, 3)):
        op = rng.randrange(9)
        pos = rng.randrange(len(s) + 1)
        if op == 0 and s:
            s = s[:pos] + rng.choice(TOKENS)[:1] + s[pos + 1:]
        elif op == 1:
            s = s[:pos] + s[pos + rng.randint(1, 40):]
        elif op == 2:
            lines = s.splitlines(keepends=True)
            if lines:
                i = rng.randrange(len(lines))
                lines.insert(i, lines[i])
                s = "".join(lines)
        elif op == 3:
            lines = s.splitlines(keepends=True)
            if len(lines) > 1:
                i, j = rng.randrange(len(lines)), rng.randrange(len(lines))
                lines[i], lines[j] = lines[j], lines[i]
                s = "".join(lines)
        elif op == 4:
            s = s[:pos] + rng.choice(TOKENS) + s[pos:]
        elif op == 5:  # a number becomes an extreme one
            digits = [i for i, c in enumerate(s) if c.isdigit()]
            if digits:
                i = rng.choice(digits)
                s = s[:i] + rng.choice(["1e308", "-1", "0", "1e-300", "1e18", "100", "nan", "1_0"]) + s[i + 1:]
        elif op == 6:  # a key gets a typo
            i = s.find("_", pos)
            if i > 0:
                s = s[:i] + s[i + 1:]
        elif op == 7:
            s = s[:pos]
        else:
            return (s[:pos].encode("utf-8", "surrogatepass") + b"\xff\xfe"
                    + s[pos:].encode("utf-8", "surrogatepass"))
    return s.encode("utf-8", "surrogatepass")


def snapshot(folder: Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


def fuzz(tmp_path: Path, good: str, name: str, read, seed: int, setup=None) -> dict:
    """Feed N_MUTANTS mutants of `good` to `read`; returns counts of accepted and refused."""
    from fits import CurveDocumentError

    rng = random.Random(seed)
    counts = {"accepted": 0, "refused": 0}
    for i in range(N_MUTANTS):
        d = tmp_path / f"m{i}"
        d.mkdir()
        if setup is not None:
            setup(d)
        (d / name).write_bytes(mutate(good, rng))
        before = snapshot(d)
        try:
            read(d / name)
            counts["accepted"] += 1
        except (UserError, PartsFileError, CurveDocumentError) as exc:
            msg = str(exc)
            assert msg and "\n" not in msg and "\x1b" not in msg and "\x00" not in msg, (i, msg[:200])
            assert len(msg) < 2000, (i, msg[:200])
            counts["refused"] += 1
            assert snapshot(d) == before, f"mutant {i}: files changed on error"
        assert sorted(p.name for p in d.iterdir()) == sorted(before), f"mutant {i}: files written"
        shutil.rmtree(d)
    assert counts["refused"] > 0  # the mutants do reach the checks
    return counts


# --------------------------------------------------------------------------- the kinds


def read_plan(path: Path) -> None:
    """What measure checks before it opens anything."""
    plan = load_plan(path, PARTS)
    samples = resolve_samples(plan, [])
    sweeps = build_sweeps(plan, samples, PARTS, RANGES.voltage_V)
    discharge_wait_s(plan, sweeps)
    check_bench_limits(plan, sweeps, RANGES)


GOOD_PLAN = """name = "fuzz"
description = "mutated"
[[samples]]
sample_id = "FX-01"
part_id = "BD-1001"
channel = 1
[[samples]]
sample_id = "FX-04"
part_id = "BD-1004"
channel = 4
[bias]
start_V = 0.0
stop_V = 4.0
step_V = 1.0
branches = ["rising", "falling"]
polarity = "positive"
repeats = 2
[measure]
dwell_s = 1.0
n_readings = 2
freq_Hz = 1000.0
[limits]
current_limit_A = 0.01
max_ramp_V_per_s = 5.0
discharge_R_ohm = 110e3
safe_V = 1.0
bias_tolerance_V = 0.05
temp_tolerance_C = 2.0
"""

GOOD_BENCH = "\n".join(
    f'[instrument.{r}]\nresource = "TCPIP0::127.0.0.1::{5025 + i}::SOCKET"\ntimeout_s = 2.0\n'
    for i, r in enumerate(("meter", "supply", "scanner", "thermometer"))) + "".join(
    f'\n[[channel]]\nchannel = {c}\nsample_id = "FX-0{c}"\npart_id = "BD-100{c}"\nhours_since_heat_h = 48.0\n'
    for c in (1, 2, 3))


def test_fuzz_plan(tmp_path):
    read_plan(_write(tmp_path / "good.toml", GOOD_PLAN))  # the good one is good
    fuzz(tmp_path, GOOD_PLAN, "plan.toml", read_plan, seed=1)


def test_fuzz_parts(tmp_path):
    good = DEMO_PARTS.read_text(encoding="utf-8")
    fuzz(tmp_path, good, "parts.toml", load_parts, seed=2)


def test_fuzz_bench(tmp_path):
    load_bench(_write(tmp_path / "good.toml", GOOD_BENCH))
    fuzz(tmp_path, GOOD_BENCH, "bench.toml", load_bench, seed=3)


def test_fuzz_claim(tmp_path):
    good = (REPO / "data" / "claims" / "BD-1004-typical.csv").read_text(encoding="utf-8")
    fuzz(tmp_path, good, "claim.csv", load_claim, seed=4)


# --------------------------------------------------------------------------- run directories


@pytest.fixture(scope="module")
def good_run(tmp_path_factory):
    """A complete run of the simulated bench, and the curve fitted from it."""
    tmp = tmp_path_factory.mktemp("fuzzrun")
    plan = _write(tmp / "plan.toml", GOOD_PLAN.replace("repeats = 2", "repeats = 1"))
    assert main(["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(tmp / "run")]) == 0
    assert main(["fit", str(tmp / "run"), "--sample", "FX-04", "--model", "table",
                 "--out", str(tmp / "curve.json")]) == 0
    return tmp


def test_fuzz_curve(tmp_path, good_run):
    from fits import Curve

    good = (good_run / "curve.json").read_text(encoding="utf-8")
    Curve.load(good_run / "curve.json")
    fuzz(tmp_path, good, "curve.json", Curve.load, seed=5)


@pytest.mark.parametrize("chain", [True, False], ids=["with-digests", "without-digests"])
def test_fuzz_points_csv(tmp_path, good_run, chain):
    run = good_run / "run"
    meta = json.loads((run / "run.json").read_text())
    if not chain:  # let the mutants reach the row checks instead of the digests
        meta.pop("points_chain")
        meta["points_sha256"] = None
    meta_text = json.dumps(meta)

    def setup(d):
        (d / "run.json").write_text(meta_text)
        if chain:
            shutil.copy(run / runlog.CHAIN_FILE, d / runlog.CHAIN_FILE)

    fuzz(tmp_path, (run / "points.csv").read_text(), "points.csv",
         lambda p: read_run_dir(p.parent), seed=6 if chain else 7, setup=setup)


def test_fuzz_run_json(tmp_path, good_run):
    run = good_run / "run"

    def setup(d):
        for name in ("points.csv", runlog.CHAIN_FILE):
            shutil.copy(run / name, d / name)

    fuzz(tmp_path, (run / "run.json").read_text(), "run.json",
         lambda p: read_run_dir(p.parent), seed=8, setup=setup)


def test_fuzz_run_json_on_resume(tmp_path, good_run):
    """Resume's checks of run.json up to opening the bench (its ports are closed)."""
    from benchkit.sweep import resume_sweep
    from benchkit.sweep.benchfile import parse_bench_text

    run = good_run / "run"
    meta = json.loads((run / "run.json").read_text())
    meta["status"] = "aborted"  # a complete run is not resumed: open it again
    bench = parse_bench_text(GOOD_BENCH.replace("5025", "1").replace("5026", "1").replace(
        "5027", "1").replace("5028", "1"), "bench.toml")

    def setup(d):
        for name in ("points.csv", runlog.CHAIN_FILE):
            shutil.copy(run / name, d / name)

    fuzz(tmp_path, json.dumps(meta, indent=1), "run.json",
         lambda p: resume_sweep(p.parent, bench, handle_signals=False), seed=9, setup=setup)


def _write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path
