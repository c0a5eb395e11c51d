"""The layer rules of DEVELOPERS.md: instruments and fits never import each other or benchkit,
and nothing but the entry points that start a simulated bench imports instruments.sim.

Read from the source with the stdlib ast module, so a lazy import inside a function counts too.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FORBIDDEN = {"instruments": {"fits", "benchkit"}, "fits": {"instruments", "benchkit"}}


# The entry points that start a simulated bench (DEVELOPERS.md, "Layers"); benchkit/commands/sim.py
# is also the bridge that hands the simulator the catalogue's parts.
SIM_ENTRY_POINTS = ("benchkit/commands/sim.py", "benchkit/commands/measure.py", "benchkit/demo.py",
                    "benchkit/benchmarks/")


def _imported_modules(path: Path) -> set[str]:
    """Every absolute module name the file imports, with `from a import b` also as `a.b`."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module)
            names.update(f"{node.module}.{alias.name}" for alias in node.names)
    return names


def _imported_top_levels(path: Path) -> set[str]:
    return {name.split(".")[0] for name in _imported_modules(path)}


def _imports_sim(path: Path) -> bool:
    return any(n == "instruments.sim" or n.startswith("instruments.sim.")
               for n in _imported_modules(path))


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_layer_does_not_import_its_neighbours(package):
    offenders = []
    files = sorted((ROOT / package).rglob("*.py"))
    assert files, f"no modules found under {package}/"
    for path in files:
        bad = _imported_top_levels(path) & FORBIDDEN[package]
        if bad:
            offenders.append(f"{path.relative_to(ROOT)} imports {sorted(bad)}")
    assert not offenders, "; ".join(offenders)


def test_the_checker_sees_a_forbidden_import(tmp_path):
    # The check itself must be able to fail: a module that imports benchkit is caught.
    mod = tmp_path / "m.py"
    mod.write_text("def f():\n    from benchkit.errors import UserError\n    return UserError\n")
    assert "benchkit" in _imported_top_levels(mod)


def test_only_the_simulated_bench_entry_points_import_the_simulator():
    offenders = []
    for package in ("benchkit", "fits"):
        for path in sorted((ROOT / package).rglob("*.py")):
            rel = path.relative_to(ROOT).as_posix()
            if rel.startswith(SIM_ENTRY_POINTS):
                continue
            if _imports_sim(path):
                offenders.append(rel)
    assert not offenders, f"import instruments.sim without starting a simulated bench: {offenders}"


def test_the_simulator_rule_sees_every_spelling(tmp_path):
    # negative controls: each way of naming the simulator is caught, a neighbour is not
    for text in ("import instruments.sim.bench\n", "from instruments.sim import SimBench\n",
                 "from instruments import sim\n", "def f():\n    from instruments.sim.physics import x\n"):
        mod = tmp_path / "m.py"
        mod.write_text(text)
        assert _imports_sim(mod), text
    mod.write_text("from instruments.simple import x\nfrom instruments.drivers import y\n")
    assert not _imports_sim(mod)
