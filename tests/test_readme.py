"""Every example in README.md runs as written, from a fresh state, on the simulated bench.

The shell blocks run line by line in a new temporary folder holding a copy of data/ (what a
fresh clone has), with a fresh HOME and no BENCHKIT_LIBRARY, each line through bash with the
venv's `benchkit` first on PATH; every line must exit 0. The TOML blocks that name a file in
their first line must equal that file, so the plans a reader copies are the ones that run.
Two lines are not run here, and say why: `make demo` (tests/test_demo.py runs the demo) and
`make test` (this suite itself).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
NOT_RUN_HERE = {"make demo": "tests/test_demo.py runs the demo", "make test": "this suite"}

_FENCE = re.compile(r"^```(\w*)\n(.*?)^```", re.S | re.M)


def blocks(kind: str) -> list[str]:
    return [body for lang, body in _FENCE.findall(README.read_text(encoding="utf-8")) if lang == kind]


def shell_lines() -> list[str]:
    lines = []
    for body in blocks("sh"):
        for raw in body.splitlines():
            line = raw.split("  #")[0].strip()  # a trailing comment explains the line
            if line and not line.startswith("#"):
                lines.append(line)
    return lines


def test_the_readme_has_examples_to_walk():
    lines = shell_lines()
    assert len(lines) >= 10 and len(blocks("toml")) >= 2
    words = " ".join(lines)
    for needed in ("library add-parts", "lot sample-size", "--plan data/plans/points.toml",
                   "--plan data/plans/steps.toml"):
        assert needed in words


def test_plans_shown_in_the_readme_equal_the_shipped_files():
    named = 0
    for body in blocks("toml"):
        first = body.splitlines()[0]
        m = re.fullmatch(r"# (data/\S+\.toml)", first)
        if m:
            named += 1
            shown = "\n".join(body.splitlines()[1:]) + "\n"
            assert (ROOT / m.group(1)).read_text(encoding="utf-8") == shown, m.group(1)
    assert named >= 2
    from benchkit.catalogue import DEMO_PARTS, load_parts
    from benchkit.sweep.plan import load_plan

    parts = load_parts(DEMO_PARTS)
    points = load_plan(ROOT / "data/plans/points.toml", parts)
    steps = load_plan(ROOT / "data/plans/steps.toml", parts)
    assert points.bias["points_V"] == [0, 0.5, 1, 2, 3, 4, 5, 6.3]
    assert (steps.bias["start_V"], steps.bias["stop_V"], steps.bias["step_V"]) == (0.0, 25.0, 2.5)


def test_every_command_named_in_the_readme_table_exists():
    from benchkit.cli import build_parser

    table = re.findall(r"`benchkit ([a-z-]+(?: [a-z-]+)?)", README.read_text(encoding="utf-8"))
    parser = build_parser()
    commands = parser._subparsers._group_actions[0].choices  # noqa: SLF001 - argparse's own map
    for words in set(table):
        head, *rest = words.split()
        assert head in commands or head == "COMMAND", words
        sub = commands.get(head)
        if rest and sub is not None and sub._subparsers is not None:  # noqa: SLF001
            actions = sub._subparsers._group_actions[0].choices  # noqa: SLF001
            assert rest[0] in actions or rest[0].startswith("-") or rest[0].isupper(), words


@pytest.mark.slow
def test_every_readme_shell_line_runs_as_written(tmp_path):
    work = tmp_path / "clone"
    work.mkdir()
    shutil.copytree(ROOT / "data", work / "data")
    home = tmp_path / "home"
    home.mkdir()
    env = {k: v for k, v in os.environ.items() if not k.startswith("BENCHKIT")}
    env.update(HOME=str(home), XDG_DATA_HOME=str(home / ".local/share"),
               PATH=f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}")
    ran = 0
    for line in shell_lines():
        if line in NOT_RUN_HERE:
            continue
        r = subprocess.run(["bash", "-c", line], cwd=work, env=env, capture_output=True,
                           text=True, timeout=300)
        assert r.returncode == 0, f"{line}\nstdout:\n{r.stdout[-2000:]}\nstderr:\n{r.stderr[-2000:]}"
        ran += 1
    assert ran >= 10
    # what the walk-through says it makes is there
    for made in ("run-points/points.csv", "curve.json", "fit.png", "lib.sqlite", "BD-1003.png",
                 "BD-1003.csv", "run-lot/run.json", "report/report.html"):
        assert (work / made).exists(), made
    assert not (home / ".local/share/benchkit").exists()  # every library line named its file
