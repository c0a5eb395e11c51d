"""Security: what a file, a part name or the network can make the bench do.

- The simulated bench listens on loopback only unless told otherwise (read back from the
  kernel's socket table, /proc/net/tcp [Linux proc(5)], not from the code's own record).
- Nothing from a plan, a parts or fixture file, a bench file or a profile reaches an
  instrument as a second command: SCPI separates message units with ';' and ends a message
  with a newline (IEEE 488.2, SCPI-1999 vol. 1, from memory), so neither may pass.
- SQL in the library is parameterised: no f-string, % or .format() puts a value into SQL.
- File names made from part or sample ids stay inside the output folder ('../../etc/x').
"""

from __future__ import annotations

import ast
import inspect
import re
import socket
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchkit.cli import build_parser, main
from benchkit.sweep.plan import load_plan
from benchkit.sweep import run_sweep
from instruments.clock import VirtualClock
from instruments.sim import SimBench
from benchkit.catalogue import DEMO_FIXTURE, DEMO_PARTS, load_fixture, load_parts

from fault_kit import Spy, read_rows, write_plan
from benchkit.commands.sim import demo_bench, sim_bench

REPO = Path(__file__).resolve().parents[2]


# -- the simulated bench listens on loopback -------------------------------------------------


def listening_addresses(port: int) -> set[str]:
    """Local IPv4 addresses with a socket in state LISTEN (0A) on `port` (/proc/net/tcp)."""
    found = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        fields = line.split()
        addr, port_hex = fields[1].split(":")
        if int(port_hex, 16) == port and fields[3] == "0A":
            # little-endian hex of the IPv4 address
            found.add(socket.inet_ntoa(bytes.fromhex(addr)[::-1]))
    return found


@pytest.mark.skipif(not Path("/proc/net/tcp").exists(), reason="needs Linux /proc/net/tcp")
def test_sim_bench_listens_on_loopback_only_by_default():
    assert inspect.signature(SimBench).parameters["host"].default == "127.0.0.1"
    with demo_bench(clock=VirtualClock()) as bench:
        for role, resource in bench.resources.items():
            port = int(resource.split("::")[2])
            assert listening_addresses(port) == {"127.0.0.1"}, role
            assert resource.startswith("TCPIP0::127.0.0.1::")
        assert "0.0.0.0" not in bench.bench_file_text()


def test_benchkit_sim_defaults_to_loopback():
    args = build_parser().parse_args(["sim"])
    assert args.host == "127.0.0.1" and args.port == 0


# -- nothing from a file reaches an instrument as a command ------------------------------------

INJECTED_PART = "BD-1001;*RST;OUTP:ON"      # the parts file allows any id without spaces
INJECTED_SAMPLE = 'FX-01";SYST:ERR?;*RST'  # printable text; control characters are refused at load


def test_ids_in_parts_fixture_and_plan_never_reach_an_instrument(tmp_path):
    parts_file = tmp_path / "parts.toml"
    parts_file.write_text(DEMO_PARTS.read_text().replace('id = "BD-1001"', f'id = "{INJECTED_PART}"'))
    fixture_file = tmp_path / "fixture.toml"
    fixture_file.write_text(DEMO_FIXTURE.read_text().replace('part_id = "BD-1001"', f'part_id = "{INJECTED_PART}"')
                            .replace('sample_id = "FX-01"', 'sample_id = "FX-01;OUTP:ON"'))
    parts = load_parts(parts_file)
    slots = load_fixture(fixture_file, parts)
    plan = load_plan(write_plan(tmp_path / "plan.toml", samples=[
        {"sample_id": INJECTED_SAMPLE, "part_id": INJECTED_PART, "channel": 1}]), parts)
    clock = VirtualClock()
    with sim_bench(parts, slots, clock=clock) as bench:
        spy = Spy(bench)
        result = run_sweep(bench, plan, tmp_path / "run", clock, parts=parts, handle_signals=False)
        errors = {role: inst.errors.entries() for role, inst in bench.instruments.items()}
    assert result.status == "complete"
    sent = [text for _, text in spy.log]
    assert sent and not any(";" in t or "\n" in t or "BD-" in t or "FX-" in t for t in sent)
    assert not any(t.startswith("*RST") for t in sent)
    assert all(entries == [] for entries in errors.values()), errors  # no command the sim refused
    rows = read_rows(tmp_path / "run")  # the ids are data, kept as written
    assert {r["sample_id"] for r in rows} == {INJECTED_SAMPLE} and {r["part_id"] for r in rows} == {INJECTED_PART}


def test_a_profile_with_a_second_command_is_refused_before_the_bias(tmp_path, capsys):
    profiles = REPO / "instruments" / "drivers" / "profiles"
    bad = tmp_path / "sneaky-lcr.toml"
    bad.write_text((profiles / "generic-lcr.toml").read_text()
                   .replace('set = "SOURce:FREQuency {value}"', 'set = "SOURce:FREQuency {value};:OUTP ON"'))
    with demo_bench(clock=VirtualClock()) as bench:
        spy = Spy(bench)
        doc = tomllib.loads(bench.bench_file_text())
        bench_file = tmp_path / "bench.toml"
        bench_file.write_text(bench.bench_file_text().replace('profile = "generic-lcr"', f'profile = "{bad}"'))
        assert doc["instrument"]["meter"]["profile"] == "generic-lcr"
        plan = write_plan(tmp_path / "plan.toml")
        code = main(["measure", "--bench", str(bench_file), "--plan", str(plan), "--out", str(tmp_path / "run")])
        state = bench.supply_state()
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and str(bad) in err[0]
    assert spy.log == [] and state["output_on"] is False  # refused before a single message
    assert not (tmp_path / "run").exists()


# -- SQL is parameterised ------------------------------------------------------------------------

# SQL text in this code base is written in upper case and starts with its keyword
SQL_START = re.compile(r"^\s*(SELECT|INSERT|UPDATE|DELETE|PRAGMA|CREATE|DROP|ALTER|WITH|REPLACE|"
                       r"WHERE|AND|OR|ORDER BY|LIMIT|VALUES|SET|JOIN)\b")


def _is_sql(text: str) -> bool:
    return bool(SQL_START.match(text))


def _constant_like(expr: ast.AST, local_consts: set[str]) -> bool:
    """A formatted value that cannot carry outside data: a module or class constant (UPPER
    case), a number made with int(), a join of constants, or a local built only from them."""
    if isinstance(expr, ast.Constant):
        return True
    if isinstance(expr, ast.Name):
        return expr.id.lstrip("_").isupper() or expr.id in local_consts
    if isinstance(expr, ast.Attribute):
        return expr.attr.lstrip("_").isupper()
    if isinstance(expr, ast.Call) and isinstance(expr.func, ast.Name) and expr.func.id == "int":
        return True
    if isinstance(expr, ast.BinOp):
        return _constant_like(expr.left, local_consts) and _constant_like(expr.right, local_consts)
    if isinstance(expr, (ast.Tuple, ast.List)):
        return all(_constant_like(e, local_consts) for e in expr.elts)
    if isinstance(expr, ast.Call) and isinstance(expr.func, ast.Attribute) and expr.func.attr == "join":
        return all(_constant_like(a, local_consts) for a in expr.args)
    if isinstance(expr, (ast.GeneratorExp, ast.ListComp)):
        targets = {n.id for g in expr.generators for n in ast.walk(g.target) if isinstance(n, ast.Name)}
        return (all(_constant_like(g.iter, local_consts) for g in expr.generators)
                and _constant_like(expr.elt, local_consts | targets))
    if isinstance(expr, ast.JoinedStr):
        return all(_constant_like(v.value, local_consts) for v in expr.values if isinstance(v, ast.FormattedValue))
    return False


def sql_formatting(path: Path) -> list[str]:
    """Places where SQL text is built with f-strings, % or .format() from non-constants."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    problems = []
    for scope in [tree, *[n for n in ast.walk(tree) if isinstance(n, (ast.FunctionDef, ast.ClassDef))]]:
        local_consts: set[str] = set()
        parents = {child: node for node in ast.walk(scope) for child in ast.iter_child_nodes(node)}
        for node in ast.walk(scope):
            if isinstance(node, ast.Assign) and len(node.targets) == 1 and isinstance(node.targets[0], ast.Name):
                if _constant_like(node.value, local_consts):
                    local_consts.add(node.targets[0].id)
        for node in ast.walk(scope):
            if isinstance(node, ast.JoinedStr):
                first = node.values[0] if node.values else None
                head = first.value if isinstance(first, ast.Constant) else ""
                # loop variables of the loops and comprehensions around it, innermost first
                names, up = set(local_consts), parents.get(node)
                loops = []
                while up is not None:
                    if isinstance(up, ast.For):
                        loops.append(up)
                    elif isinstance(up, (ast.ListComp, ast.SetComp, ast.DictComp, ast.GeneratorExp)):
                        loops.extend(up.generators)
                    up = parents.get(up)
                for loop in reversed(loops):  # outermost first, so inner ones override
                    bound = {n.id for n in ast.walk(loop.target) if isinstance(n, ast.Name)}
                    names = names | bound if _constant_like(loop.iter, names) else names - bound
                if _is_sql(head) and not _constant_like(node, names):
                    problems.append(f"{path.name}:{node.lineno}: f-string SQL with a value")
            elif isinstance(node, ast.BinOp) and isinstance(node.op, ast.Mod) and \
                    isinstance(node.left, ast.Constant) and isinstance(node.left.value, str):
                if _is_sql(node.left.value):
                    problems.append(f"{path.name}:{node.lineno}: %-formatted SQL")
            elif isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "format" \
                    and isinstance(node.func.value, ast.Constant) and isinstance(node.func.value.value, str):
                if _is_sql(node.func.value.value):
                    problems.append(f"{path.name}:{node.lineno}: .format() SQL")
    return sorted(set(problems))


def test_library_sql_takes_values_as_parameters_only():
    files = sorted((REPO / "benchkit" / "library").glob("*.py"))
    assert files
    assert [p for f in files for p in sql_formatting(f)] == []


def test_the_sql_check_finds_values_formatted_into_sql(tmp_path):
    bad = tmp_path / "bad.py"
    bad.write_text(
        "COLS = 'a, b'\n"
        "def f(conn, part_id, n):\n"
        "    conn.execute(f'SELECT {COLS} FROM part')\n"                       # fine: a constant
        "    conn.execute(f\"SELECT * FROM part WHERE part_id = '{part_id}'\")\n"  # value in SQL
        "    conn.execute('DELETE FROM part WHERE id = %s' % n)\n"
        "    conn.execute('UPDATE part SET x = {}'.format(n))\n"
        "    [conn.execute(f'SELECT COUNT(*) FROM {t}') for t in ('part', 'run')]\n"  # fine
        "    [conn.execute(f'SELECT COUNT(*) FROM {t}') for t in part_id]\n"
        "    conn.execute(f'PRAGMA user_version = {int(n) + 1}')\n"  # fine: a number
        "    msg = f'create one with {part_id}'\n")  # not SQL
    assert len(sql_formatting(bad)) == 4


# -- file names from ids stay inside the output folder ---------------------------------------------

ESCAPING = ["../../etc/x", "..", "/etc/passwd", "..\\..\\win", "a/../../b", ".hidden", "x\x00y"]


def snapshot(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def test_library_export_and_plot_names_stay_in_their_folder(tmp_path, monkeypatch, capsys):
    from fits import Curve

    work = tmp_path / "work"
    work.mkdir()
    lib = work / "lib.sqlite"
    parts = work / "parts.toml"
    part_id = "../../etc/x"
    parts.write_text(DEMO_PARTS.read_text().replace('id = "BD-1001"', f'id = "{part_id}"'))
    assert main(["library", "add-parts", str(parts), "--library", str(lib)]) == 0
    for k, C in enumerate(([10e-6, 6e-6, 3e-6], [9e-6, 5e-6, 2e-6])):
        doc = work / f"c{k}.json"
        Curve.from_points([0.0, 3.0, 6.0], C, part_id=part_id).save(doc)
        assert main(["library", "add", str(doc), "--library", str(lib), "--part", part_id]) == 0
    out = work / "exports"
    before = snapshot(tmp_path)
    assert main(["library", "export", part_id, "--format", "json", "--out", str(out), "--library", str(lib)]) == 0
    monkeypatch.chdir(work)
    assert main(["library", "show", part_id, "--library", str(lib)]) == 0  # default plot ./<id>.png
    new = snapshot(tmp_path) - before
    assert {n for n in new if n.startswith("work/exports/")} and all(
        n.startswith("work/") for n in new), new
    exported = sorted(p.name for p in out.iterdir())
    assert len(exported) == 2 and all("/" not in n and not n.startswith(".") for n in exported)
    assert not (tmp_path.parent / "etc").exists() and not Path("/etc/x.png").exists()


def test_fit_output_names_from_sample_ids_stay_in_the_folder(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml", samples=[
        {"sample_id": "../../etc/x", "part_id": "BD-1001", "channel": 1},
        {"sample_id": "..", "part_id": "BD-1003", "channel": 3}],
        bias={"stop_V": 6.0, "step_V": 1.0})
    run = tmp_path / "run"
    assert main(["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(run)]) == 0
    out = tmp_path / "curves"
    before = snapshot(tmp_path)
    assert main(["fit", str(run), "--out", str(out) + "/", "--model", "table"]) == 0
    new = snapshot(tmp_path) - before
    assert new and all(n == "curves" or n.startswith("curves/") for n in new), new
    assert all(p.parent == out for p in out.iterdir())


@settings(max_examples=200, deadline=None, derandomize=True)
@given(text=st.one_of(st.sampled_from(ESCAPING), st.text(max_size=40)))
def test_safe_stem_never_leaves_the_folder(text):
    from benchkit.exports.paths import inside, safe_stem

    folder = Path("/srv/exports")
    stem = safe_stem(text)
    assert stem and "/" not in stem and "\\" not in stem and not stem.startswith(".")
    assert inside(folder, stem + ".json").parent == folder
