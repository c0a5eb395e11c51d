"""The layer rule of DEVELOPERS.md: instruments and fits never import each other or benchkit.

Read from the source with the stdlib ast module, so a lazy import inside a function counts too.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FORBIDDEN = {"instruments": {"fits", "benchkit"}, "fits": {"instruments", "benchkit"}}


def _imported_top_levels(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module.split(".")[0])
    return names


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
