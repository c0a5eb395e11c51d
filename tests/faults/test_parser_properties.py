"""Property tests: no input crashes a parser with anything but its own clear error.

For every parser that takes a file or a value from outside, hypothesis feeds it (a) random
text and (b) good documents with a few random edits (a span deleted, text inserted, a value
swapped for a troublesome one: nan, inf, 1e400, a huge integer, a quote, a bracket, a NUL...),
seeded from the demo data and from the malformed corpora. The parser must either accept the
input or raise its documented error with a one-line message. Examples are kept modest (100-200
a parser) and derandomised, so a failure is the same failure on every run.

The SCPI parser of the simulated bench must never raise at all: a real instrument's parser
survives any input and only queues errors (SCPI-1999 vol. 2, 21.8: the error queue; common
practice), with the queue bounded (16 entries, COMMANDS.md).
"""

from __future__ import annotations

import json
import math
import shutil
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchkit.sweep import runlog
from benchkit.sweep.benchfile import bench_from_dict, parse_bench_text
from benchkit.errors import UserError
from benchkit.sweep.plan import Plan, load_plan, parse_plan
from benchkit.units import parse_value
from benchkit.verify.claims import parse_claim
from instruments.sim.faults import Fault, FaultSpecError
from benchkit.catalogue import (DEMO_FIXTURE, DEMO_LOT, DEMO_PARTS, PartsFileError, load_fixture,
                                   load_lot, load_parts)

from fault_kit import PARTS
from benchkit.commands.sim import demo_bench

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
CORPUS = HERE / "corpus"
SETTINGS = dict(max_examples=150, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

TROUBLE = ["nan", "inf", "-inf", "1e400", "-1", "0", "1e-400", "99999999999999999999999999",
           '"', "'", "[", "]", "{", "}", "[[", "=", ",", ";", "\n", "\r", "\x00", "\t", "#", "\\",
           "true", '"x"', "[]", "{}", "1979-05-27", "-0", "0x10", "\u00b5", "\ufeff", ":", "::"]


def texts_from(*files: Path) -> list[str]:
    out = []
    for f in files:
        out.append(f.read_bytes().decode("utf-8", errors="replace"))
    return out


@st.composite
def edited(draw, seeds: list[str]):
    """A seed document with one to three random edits."""
    text = draw(st.sampled_from(seeds))
    for _ in range(draw(st.integers(1, 3))):
        n = len(text)
        i = draw(st.integers(0, n))
        op = draw(st.sampled_from(["insert", "delete", "replace", "trouble"]))
        if op == "insert":
            text = text[:i] + draw(st.text(max_size=12)) + text[i:]
        elif op == "delete":
            j = draw(st.integers(i, min(n, i + 40)))
            text = text[:i] + text[j:]
        elif op == "replace":
            j = draw(st.integers(i, min(n, i + 12)))
            text = text[:i] + draw(st.text(max_size=6)) + text[j:]
        else:
            j = draw(st.integers(i, min(n, i + 8)))
            text = text[:i] + draw(st.sampled_from(TROUBLE)) + text[j:]
    return text


def documents(seeds: list[str]):
    return st.one_of(edited(seeds), st.text(max_size=300))


def one_line(exc: BaseException, where: str | None = None) -> None:
    msg = str(exc)
    assert msg and "\n" not in msg and "Traceback" not in msg, msg
    if where is not None:
        assert msg.startswith(where), msg


json_leaf = st.one_of(st.none(), st.booleans(), st.integers(-10**30, 10**30),
                      st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8))
json_values = st.recursive(json_leaf, lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=6), c, max_size=4),
                           max_leaves=12)


@st.composite
def leaf_swapped(draw, doc):
    """`doc` with one value somewhere inside replaced by a random JSON value (or removed)."""
    doc = json.loads(json.dumps(doc))
    paths = []

    def walk(node, path):
        if isinstance(node, dict):
            for k, v in node.items():
                paths.append(path + (k,))
                walk(v, path + (k,))
        elif isinstance(node, list):
            for k, v in enumerate(node):
                paths.append(path + (k,))
                walk(v, path + (k,))

    walk(doc, ())
    for _ in range(draw(st.integers(1, 2))):
        path = draw(st.sampled_from(paths))
        node = doc
        try:
            for k in path[:-1]:
                node = node[k]
            if draw(st.booleans()) or not isinstance(node, dict):
                node[path[-1]] = draw(json_values)
            else:
                del node[path[-1]]
        except (KeyError, IndexError, TypeError):
            pass  # an earlier swap removed this path
    return doc


@pytest.fixture(scope="module")
def scratch(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


# -- plans -----------------------------------------------------------------------------------

PLAN_SEEDS = texts_from(REPO / "data" / "plans" / "demo.toml", CORPUS / "plan" / "_good.toml",
                        *sorted((CORPUS / "plan").glob("*.toml"))[:8])


@settings(**SETTINGS)
@given(text=documents(PLAN_SEEDS))
def test_load_plan_accepts_or_gives_one_line(scratch, text):
    path = scratch / "plan.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        plan = load_plan(path, PARTS)
    except UserError as exc:
        one_line(exc, f"{path}: ")
    else:
        assert isinstance(plan, Plan) and len(plan.sha256) == 64


GOOD_PLAN = tomllib.loads((CORPUS / "plan" / "_good.toml").read_text())


@settings(**SETTINGS)
@given(raw=leaf_swapped(GOOD_PLAN))
def test_parse_plan_on_any_values(raw):
    try:
        plan = parse_plan(raw, "plan.toml")
    except UserError as exc:
        one_line(exc, "plan.toml: ")
    else:  # what is accepted can be planned without surprises
        for sw in plan.sequence(6.3):
            assert math.isfinite(sw[1])


# -- parts, fixture and lot files -----------------------------------------------------------

PARTS_SEEDS = texts_from(DEMO_PARTS, *sorted((HERE.parent / "catalogue" / "malformed_parts").glob("[!fl]*.toml"))[:6])
FIXTURE_SEEDS = texts_from(DEMO_FIXTURE, *sorted((HERE.parent / "catalogue" / "malformed_parts").glob("fixture_*.toml")))
LOT_SEEDS = texts_from(DEMO_LOT, *sorted((HERE.parent / "catalogue" / "malformed_parts").glob("lot_*.toml")))


@settings(**{**SETTINGS, "max_examples": 100})
@given(text=documents(PARTS_SEEDS))
def test_load_parts_accepts_or_gives_one_line(scratch, text):
    path = scratch / "parts.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        load_parts(path)
    except PartsFileError as exc:
        one_line(exc, f"{path}")


@settings(**SETTINGS)
@given(kind=st.sampled_from(["fixture", "lot"]), data=st.data())
def test_load_fixture_and_lot_accept_or_give_one_line(scratch, kind, data):
    text = data.draw(documents(FIXTURE_SEEDS if kind == "fixture" else LOT_SEEDS))
    path = scratch / f"{kind}.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        (load_fixture if kind == "fixture" else load_lot)(path, PARTS)
    except PartsFileError as exc:
        one_line(exc, f"{path}")


# -- bench files ------------------------------------------------------------------------------

BENCH_SEEDS = texts_from(*sorted((CORPUS / "bench").glob("*.toml")))


@settings(**SETTINGS)
@given(text=documents(BENCH_SEEDS))
def test_parse_bench_text_accepts_or_gives_one_line(text):
    try:
        bench = parse_bench_text(text, "bench.toml")
    except UserError as exc:
        one_line(exc, "bench.toml: ")
    else:
        assert set(bench.instruments) == {"meter", "supply", "scanner", "thermometer"}


GOOD_BENCH = tomllib.loads((CORPUS / "bench" / "bad_port.toml").read_text().replace("99999", "5026"))


@settings(**SETTINGS)
@given(raw=leaf_swapped(GOOD_BENCH))
def test_bench_record_on_any_values(raw):
    # the 'bench' record of run.json goes through the same check when a run is resumed
    try:
        bench_from_dict(raw, "run.json bench")
    except UserError as exc:
        one_line(exc, "run.json bench: ")


# -- supplier claims ------------------------------------------------------------------------

CLAIM_SEEDS = texts_from(*sorted((REPO / "data" / "claims").glob("*.csv")),
                         *sorted((HERE.parent / "verify" / "malformed_claims").glob("*.csv"))[:5])


@settings(**SETTINGS)
@given(text=documents(CLAIM_SEEDS))
def test_parse_claim_accepts_or_gives_one_line(text):
    try:
        claim = parse_claim(text, "claim.csv")
    except UserError as exc:
        one_line(exc, "claim.csv")
    else:
        assert len(claim.bias_V) >= 3 and all(math.isfinite(v) for v in claim.C_F)


# -- curve documents (fits) -------------------------------------------------------------------

def _good_curve_doc() -> dict:
    from fits import Curve

    return Curve.from_points([0.0, 2.0, 4.0, 6.0], [10e-6, 8e-6, 5e-6, 3e-6], part_id="BD-1001",
                             u_C_F=[1e-8] * 4).to_dict()


def _tanh_doc() -> dict:
    from fits import fit_sweep
    import numpy as np

    V = np.linspace(0.0, 6.0, 13)
    C = 1e-6 + 9e-6 / np.cosh(V / 2.5)  # an invented tanh-type curve, noise-free
    return fit_sweep(V, C, model="tanh").curve.to_dict()


@pytest.fixture(scope="module")
def curve_docs():
    return [_good_curve_doc(), _tanh_doc()]


def _check_curve(build, where="curve.json"):
    from fits import CurveDocumentError

    try:
        curve = build()
    except CurveDocumentError as exc:
        one_line(exc, f"{where}: ")
        return None
    return curve


@settings(**SETTINGS)
@given(data=st.data())
def test_curve_from_dict_on_any_values(curve_docs, data):
    from fits import Curve

    doc = data.draw(leaf_swapped(data.draw(st.sampled_from(curve_docs))))
    curve = _check_curve(lambda: Curve.from_dict(doc, "curve.json"))
    if curve is not None:  # accepted: it round-trips and answers inside its range
        lo, hi = curve.valid_range_V
        assert Curve.from_json(curve.to_json()).to_dict() == curve.to_dict()
        assert math.isfinite(float(curve.C(lo)))


@settings(**SETTINGS)
@given(data=st.data())
def test_curve_from_json_on_any_text(curve_docs, data):
    from fits import Curve

    seeds = [json.dumps(d, indent=1) for d in curve_docs]
    text = data.draw(documents(seeds))
    _check_curve(lambda: Curve.from_json(text, "curve.json"))


# -- run directories ------------------------------------------------------------------------

POINTS_SEEDS = texts_from(CORPUS / "run_json" / "_base_points.csv", *sorted((CORPUS / "points").glob("*.csv"))[:6])
RUN_SEEDS = texts_from(CORPUS / "points" / "_base_run.json")


@pytest.fixture(scope="module")
def run_folder(scratch):
    d = scratch / "run"
    d.mkdir()
    shutil.copy(CORPUS / "points" / "_base_run.json", d / "run.json")
    shutil.copy(CORPUS / "run_json" / "_base_points.csv", d / "points.csv")
    return d


@settings(**SETTINGS)
@given(data=st.data())
def test_points_reader_accepts_or_gives_one_line(run_folder, data):
    from benchkit.sweep.rundir import read_run_dir  # the reader of `benchkit fit`, library and verify

    raw = data.draw(st.one_of(documents(POINTS_SEEDS).map(lambda t: t.encode("utf-8", "surrogatepass")),
                              st.binary(max_size=400)))
    (run_folder / "points.csv").write_bytes(raw)
    where = f"{run_folder / 'points.csv'}: "
    try:
        rows, end = runlog.read_points(run_folder)
    except UserError as exc:
        one_line(exc, where)
        return
    assert end <= len(raw) and all(len(r) == len(runlog.COLUMNS) for r in rows)
    try:
        read_run_dir(run_folder)
    except UserError as exc:
        one_line(exc)


@settings(**SETTINGS)
@given(text=documents(RUN_SEEDS))
def test_run_json_reader_accepts_or_gives_one_line(run_folder, text):
    (run_folder / "run.json").write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        meta = runlog.read_run(run_folder)
    except UserError as exc:
        one_line(exc, f"{run_folder / 'run.json'}: ")
    else:
        assert meta["format"] == "benchkit-run"


# -- engineering values, fault specs -----------------------------------------------------------

VALUE_SEEDS = ["4.7u", "4u7", "10uF", "100n", "2.2e-6", "1k5", "4R7", "R47", "2.2 kohm", "1.5 MHz", "12V"]


@settings(**{**SETTINGS, "max_examples": 200})
@given(text=st.one_of(edited(VALUE_SEEDS), st.text(max_size=16)),
       unit=st.sampled_from([None, "F", "ohm", "V", "A", "Hz", "Vrms", "s"]))
def test_parse_value_accepts_or_gives_one_line(text, unit):
    try:
        v = parse_value(text, unit, "--value")
    except UserError as exc:
        one_line(exc, "--value")
    else:
        assert isinstance(v, float) and math.isfinite(v)


@settings(**{**SETTINGS, "max_examples": 200})
@given(text=st.one_of(edited(["drop:after=40", "late:after=10:delay=1.5", "temp-drift:rate=0.5",
                              "current-limit:limit=1e-6", "error:code=-222:role=supply"]),
                      st.text(max_size=30)))
def test_fault_spec_accepts_or_gives_one_line(text):
    try:
        fault = Fault.parse(text)
    except FaultSpecError as exc:
        one_line(exc)
    else:
        assert Fault.parse(fault.spec()) == fault


# -- the SCPI parser of the simulated bench: never raises ------------------------------------

SCPI_SEEDS = ["*IDN?", "FUNCtion CPD", "SOURce:FREQuency 1000;:SOUR:VOLT 0.5", "INIT;FETC?", "READ?",
              "VOLTage 2.5", "CURR 0.01", "OUTP ON", "MEAS:VOLT?", "ROUT:CLOS (@3)", "ROUT:OPEN:ALL",
              "ROUT:CLOS? (@1:4)", "MEAS:TEMP?", "SYST:ERR?", "*CLS;*OPC?", "SOUR:FREQ? MAX",
              "VOLT DEF", "*RST"]


@pytest.fixture(scope="module")
def sim_instruments():
    from instruments.clock import VirtualClock
    from instruments.sim import SimBench

    bench = demo_bench(clock=VirtualClock())  # not started: the parsers alone
    return bench.instruments


@settings(**{**SETTINGS, "max_examples": 200})
@given(role=st.sampled_from(["meter", "supply", "scanner", "thermometer"]),
       message=st.one_of(edited(SCPI_SEEDS), st.text(max_size=60),
                         st.binary(max_size=60).map(lambda b: b.decode("latin-1"))))
def test_scpi_parser_never_raises_and_keeps_a_bounded_queue(sim_instruments, role, message):
    inst = sim_instruments[role]
    reply = inst.handle(message)
    assert reply is None or (isinstance(reply, str) and "\n" not in reply)
    assert len(inst.errors) <= 16
    assert inst.handle("*IDN?").startswith("benchkit-sim,")
    inst.handle("*CLS")
