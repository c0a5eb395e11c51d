"""Writes that cannot fail half way, and a full disk in the middle of a sweep.

A full disk is simulated by making os.write or os.fsync fail with ENOSPC for the files of
one run directory (the errno a full file system gives [POSIX write(2), fsync(2)]). What
must hold [common practice for bench software, and the project brief]: the bias is switched
off first, then the failure is reported in one line; points.csv keeps every point confirmed
on disk and no half row; the run can be resumed once there is room again.
"""

from __future__ import annotations

import ast
import errno
import os
from pathlib import Path

import pytest

from benchkit.sweep import runlog
from benchkit.atomic import write_text_atomic
from benchkit.cli import main
from benchkit.errors import UserError

from fault_kit import keep_benches, planned_keys, read_meta, read_rows, row_keys, write_plan

REPO = Path(__file__).resolve().parents[2]


def fd_path(fd: int) -> str:
    try:
        return os.readlink(f"/proc/self/fd/{fd}")
    except OSError:
        return ""


class FullDisk:
    """os.write / os.fsync fail with ENOSPC for files under `folder` once `armed` is set.

    `after_rows`: arm after this many successful points.csv row writes (the header is not a
    row); the failing row is half written first, as a disk filling up mid-write does.
    """

    def __init__(self, monkeypatch, folder: Path, after_rows: int, fsync_too: bool = False):
        self.folder = str(folder)
        self.after_rows = after_rows
        self.rows = -1  # the header comes first
        self.armed = False
        self.fsync_too = fsync_too
        self.bench_state_at_report = None
        real_write, real_fsync = os.write, os.fsync

        def write(fd, data):
            path = fd_path(fd)
            if path.startswith(self.folder) and path.endswith(runlog.POINTS_FILE):
                if self.armed:
                    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
                self.rows += 1
                if self.rows > self.after_rows:
                    self.armed = True
                    return real_write(fd, bytes(data)[: len(data) // 2])  # half a row fits
            return real_write(fd, data)

        def fsync(fd):
            if self.armed and self.fsync_too and fd_path(fd).startswith(self.folder):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real_fsync(fd)

        monkeypatch.setattr(os, "write", write)
        monkeypatch.setattr(os, "fsync", fsync)


def spy_report_order(monkeypatch, made, disk):
    """Note the simulated supply's real state when the run's end is recorded."""
    original = runlog.RunLog.set_status

    def set_status(self, status, reason=None):
        if status != "running":
            disk.bench_state_at_report = made[0].supply_state()
        return original(self, status, reason)

    monkeypatch.setattr(runlog.RunLog, "set_status", set_status)


def measure(plan, out):
    return main(["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out)])


def test_disk_full_on_points_csv_stops_the_bias_then_reports(tmp_path, monkeypatch, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    with keep_benches(monkeypatch) as made:
        disk = FullDisk(monkeypatch, out, after_rows=3)
        spy_report_order(monkeypatch, made, disk)
        code = measure(plan, out)
    err = capsys.readouterr().err
    assert code == 1
    # the bias was already off when the end of the run was recorded and reported
    assert disk.bench_state_at_report == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
    data = (out / "points.csv").read_bytes()
    assert data.endswith(b"\n")  # the half row was cut off again
    rows = read_rows(out)
    assert row_keys(rows) == planned_keys(plan)[:3]  # the three confirmed points, nothing else
    meta = read_meta(out)
    assert meta["status"] == "aborted"
    assert "cannot write" in meta["reason"] and "points.csv" in meta["reason"]
    assert "No space left on device" in meta["reason"] and "free space" in meta["reason"]
    assert "aborted" in err and "Traceback" not in err


def test_disk_full_for_run_json_too_still_stops_safely_and_the_run_resumes(tmp_path, monkeypatch, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    with monkeypatch.context() as m:
        with keep_benches(m) as made:
            disk = FullDisk(m, out, after_rows=4, fsync_too=True)
            code = measure(plan, out)
        bench = made[0]
    err = capsys.readouterr().err
    assert code == 1 and "Traceback" not in err
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
    assert "run.json could not be updated" in err  # said, since the file cannot say it
    assert read_meta(out)["status"] == "running"  # the last state that reached the disk
    assert row_keys(read_rows(out)) == planned_keys(plan)[:4]
    # room again: the run continues from its last confirmed point, no gap, nothing twice
    assert main(["measure", "--resume", str(out)]) == 0
    assert row_keys(read_rows(out)) == planned_keys(plan)
    assert read_meta(out)["status"] == "complete"


def test_a_row_whose_fsync_fails_is_cut_off_and_stops_the_run_safely(tmp_path, monkeypatch, capsys):
    # A row's fsync runs while the next point is measured (benchkit/sweep/runlog.py); when it
    # fails (EIO: the data may not be on the disk [POSIX fsync(2)]) that row is not a
    # confirmed point: it is cut off again, no later row is written, the bias goes off first,
    # and the run resumes from its last confirmed point.
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    real_fsync = os.fsync
    synced = {"n": 0}

    def failing_fsync(fd):
        if fd_path(fd).startswith(str(out)) and fd_path(fd).endswith(runlog.POINTS_FILE):
            synced["n"] += 1
            if synced["n"] == 1 + 3 + 1:  # the header, three rows, then the fourth row fails
                raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real_fsync(fd)

    with monkeypatch.context() as m:
        with keep_benches(m) as made:
            m.setattr(os, "fsync", failing_fsync)
            code = measure(plan, out)
        bench = made[0]
    err = capsys.readouterr().err
    assert code == 1 and "Traceback" not in err, err
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
    assert row_keys(read_rows(out)) == planned_keys(plan)[:3]
    assert (out / "points.csv").read_bytes().endswith(b"\n")
    # one digest per line still (points.chain is cut back with its row)
    assert len((out / runlog.CHAIN_FILE).read_bytes()) == 4 * 65
    meta = read_meta(out)
    assert meta["status"] == "aborted" and "points.csv" in meta["reason"]
    assert main(["measure", "--resume", str(out)]) == 0
    assert row_keys(read_rows(out)) == planned_keys(plan)
    assert read_meta(out)["status"] == "complete"


def test_run_directory_that_cannot_be_made_is_bad_input_and_the_supply_untouched(tmp_path, monkeypatch, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("x")
    with keep_benches(monkeypatch) as made:
        code = measure(plan, blocker / "run")
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "cannot create the run directory" in err[0]
    assert made[0].supply_state()["output_on"] is False
    assert blocker.read_text() == "x"


def test_atomic_write_failure_keeps_the_old_file_and_leaves_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "report.json"
    target.write_text("old\n")

    def no_space(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", no_space)
    with pytest.raises(UserError) as info:
        write_text_atomic(target, "new\n")
    assert str(info.value).startswith(f"{target}: cannot write (No space left on device)")
    assert target.read_text() == "old\n" and sorted(p.name for p in tmp_path.iterdir()) == ["report.json"]


def test_export_on_a_full_disk_is_one_line_and_the_old_export_stays(tmp_path, monkeypatch, capsys):
    from fits import Curve

    curve = Curve.from_points([0.0, 2.0, 4.0, 6.0], [10e-6, 8e-6, 5e-6, 3e-6], part_id="BD-1001")
    doc = tmp_path / "curve.json"
    curve.save(doc)
    out = tmp_path / "BD-1001.csv"
    assert main(["export", str(doc), "--format", "csv", "--out", str(out)]) == 0
    before = out.read_bytes()
    capsys.readouterr()

    def no_space(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", no_space)
    assert main(["export", str(doc), "--format", "spice", "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot write" in err[0] and "No space left on device" in err[0]
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["BD-1001.csv", "curve.json"]


def test_fits_curve_save_on_a_full_disk_keeps_the_old_document(tmp_path, monkeypatch):
    from fits import Curve

    old = Curve.from_points([0.0, 4.0], [10e-6, 6e-6])
    new = Curve.from_points([0.0, 4.0], [10e-6, 5e-6])
    path = tmp_path / "c.json"
    old.save(path)

    def no_space(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", no_space)
    with pytest.raises(OSError):
        new.save(path)
    assert Curve.load(path).to_dict() == old.to_dict()
    assert [p.name for p in tmp_path.iterdir()] == ["c.json"]


# ---------------------------------------------------------------------------------------------
# Every writer in benchkit/ and fits/ goes through the atomic helpers (a static check).

ATOMIC_MODULES = {"benchkit/atomic.py", "fits/_atomic.py"}
# points.csv (and its digests, points.chain) are the files written in place: appended row by
# row, fsync'ed, and on resume cut back to their last whole row (documented in benchkit/sweep/runlog.py)
APPEND_ONLY = {"benchkit/sweep/runlog.py"}


def _write_calls(path: Path) -> list[str]:
    """Calls that write a file other than through an atomic helper."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    found = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        f = node.func
        name = f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else ""
        if name == "open" and (not isinstance(f, ast.Attribute) or getattr(f.value, "id", "") in ("io", "builtins")):
            modes = [a for a in node.args[1:2]] + [k.value for k in node.keywords if k.arg == "mode"]
            for m in modes:
                if isinstance(m, ast.Constant) and isinstance(m.value, str) and set(m.value) & set("wax+"):
                    found.append(f"{path}:{node.lineno}: open(..., {m.value!r})")
        elif name in ("write_text", "write_bytes", "savetxt", "tofile", "copyfile", "copy", "copy2",
                      "move", "to_csv"):
            found.append(f"{path}:{node.lineno}: {name}(...)")
        elif name == "savefig" and node.args and not (isinstance(node.args[0], ast.Name) and node.args[0].id in ("buf", "buffer")):
            found.append(f"{path}:{node.lineno}: savefig to a path")
        elif name == "open" and getattr(f.value, "id", "") == "os":
            flags = ast.unparse(node.args[1]) if len(node.args) > 1 else ""
            if any(w in flags for w in ("O_WRONLY", "O_RDWR", "O_CREAT", "O_APPEND")):
                found.append(f"{path}:{node.lineno}: os.open({flags})")
    return found


def test_every_writer_uses_the_atomic_helpers():
    offenders = []
    for package in ("benchkit", "fits"):
        for path in sorted((REPO / package).rglob("*.py")):
            rel = path.relative_to(REPO).as_posix()
            if rel in ATOMIC_MODULES:
                continue
            calls = _write_calls(path)
            if rel in APPEND_ONLY:
                calls = [c for c in calls if ": open(..., 'a+')" not in c and "'r+" not in c]
            offenders += calls
    assert offenders == []


def test_the_static_check_finds_a_direct_write(tmp_path):
    bad = tmp_path / "bad.py"
    bad.write_text("from pathlib import Path\nPath('x').write_text('y')\nopen('z', 'w')\n"
                   "import matplotlib.pyplot as plt\nplt.savefig('p.png')\n")
    assert len(_write_calls(bad)) == 3


def test_resume_on_a_still_full_disk_is_one_line_and_touches_nothing(tmp_path, monkeypatch, capsys):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    with monkeypatch.context() as m:
        with keep_benches(m):
            FullDisk(m, out, after_rows=4, fsync_too=True)
            assert measure(plan, out) == 1
    capsys.readouterr()
    rows_before = (out / "points.csv").read_bytes()
    for fsync_too in (True, False):  # the disk is still full: run.json cannot be rewritten either
        with monkeypatch.context() as m:
            with keep_benches(m) as made:
                disk = FullDisk(m, out, after_rows=0, fsync_too=fsync_too)
                disk.armed = True
                real_replace = os.replace
                m.setattr(os, "replace", lambda a, b: (_ for _ in ()).throw(
                    OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))) if str(b).startswith(str(out))
                    else real_replace(a, b))
                code = main(["measure", "--resume", str(out)])
        err = capsys.readouterr().err
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert code == 2 and "Traceback" not in err, err
        assert len(lines) == 1 and lines[0].startswith("benchkit: error: ") and "free space" in lines[0], err
        assert (out / "points.csv").read_bytes() == rows_before
        for bench in made:  # the bias was never put on
            assert bench.supply_state()["output_on"] is False
