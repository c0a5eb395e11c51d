"""Progress: a bar with ETA on a terminal, plain lines otherwise (common practice for CLIs:
no control characters when the output is a file or a pipe)."""

import io

from benchkit.sweep.progress import Progress, format_duration


class _Wall:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


def test_plain_lines_with_eta_when_not_a_terminal():
    out, wall = io.StringIO(), _Wall()
    p = Progress(stream=out, wall=wall)  # StringIO is not a terminal
    p.start(4)
    wall.t = 10.0
    p.point(1, "FX-01 rising +0 V")
    p.finish("complete")
    lines = out.getvalue().splitlines()
    assert lines[0] == "sweep: 4 points planned"
    # 10 s for the first point, 3 to go: 30 s left
    assert lines[1] == "point 1/4 (25%): FX-01 rising +0 V; ETA 30s"
    assert "\r" not in out.getvalue() and lines[-1] == "sweep complete: 1/4 points"


def test_bar_on_a_terminal_and_eta_ignores_points_of_an_earlier_session():
    out, wall = io.StringIO(), _Wall()
    p = Progress(stream=out, tty=True, width=10, wall=wall)
    p.start(10, done=5)  # resumed with 5 points already on disk
    wall.t = 4.0
    p.point(7, "x")  # 2 points in 4 s this session, 3 to go
    text = out.getvalue()
    assert text.startswith("\r[#######...] 7/10  70% ETA 6s")


def test_format_duration():
    assert [format_duration(s) for s in (5, 75, 3700)] == ["5s", "1m15s", "1h01m"]
