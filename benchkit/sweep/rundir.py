"""A run directory read for fitting: the points of each sample, checked, weighted, ready for fits.

One reader for `benchkit fit`, the curve library and verification, so all three fit the very
same points of a run (DEVELOPERS.md, "File formats": run directory). x = bias_set_V, y = C_F, sigma = C_std_F /
sqrt(n_readings) (the standard deviation of the mean of the point's readings, JCGM 100:2008
4.2.3) when every point has it. A partial last line of an aborted run is dropped (it is the
point in progress when the run stopped, benchkit.sweep.runlog.read_points); points flagged with a
word of LEFT_OUT_FLAGS are left out of every fit and counted; points edited after the run
ended (sha256 differs from run.json) are refused.

The turning point belongs to both branches. The engine reads the top of a loop once, on the
way up (labelled rising); the falling leg starts from that very state, so the reading at the
top is also the falling branch's first point (a hysteresis loop's legs meet at its turning
points [common practice]) and a falling curve covers the range that was swept. Per sample and
polarity: when the falling readings stop below the highest rising bias, the rising readings
at that bias are given to the falling branch as well (SamplePoints.turning marks the copies).
Each branch is fitted on its own, so no fit counts a reading twice; the joint tanh fit of
both branches does, for that one bias.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterable

import numpy as np

from benchkit.sweep import runlog
from benchkit.errors import UserError

# common practice: a point is no sample of C(bias_set_V) when the bias the part saw was not the
# set value (the supply was limiting current, or its read-back missed the set value) or when
# the meter marked the reading overrange; such points are left out of every fit.
LEFT_OUT_FLAGS = frozenset({"overload", "current_limit", "bias_readback"})
if not LEFT_OUT_FLAGS <= runlog.FLAGS.keys():  # a word renamed in runlog.FLAGS must be renamed here
    raise ImportError(f"benchkit.sweep.rundir.LEFT_OUT_FLAGS: {sorted(LEFT_OUT_FLAGS - runlog.FLAGS.keys())} "
                      "not in benchkit.sweep.runlog.FLAGS")

BRANCHES = ("rising", "falling")


def flags_of(row: dict) -> set[str]:
    """The flag words of one points row."""
    return set(filter(None, row["flags"].split(";")))


def column(rows: Iterable[dict], col: str) -> np.ndarray:
    """One numeric column of rows as floats, NaN where empty or not a number (for conditions)."""
    out = []
    for r in rows:
        try:
            out.append(float(r[col]))
        except (TypeError, ValueError):
            out.append(math.nan)
    return np.array(out, dtype=float)


@dataclass(frozen=True)
class SamplePoints:
    """The points of one sample kept for the fit (arrays in row order) and those left out."""

    sample_id: str
    part_id: str | None
    bias_V: np.ndarray
    C_F: np.ndarray
    C_std_F: np.ndarray  # NaN where not recorded
    n_readings: np.ndarray  # NaN where not recorded
    temp_C: np.ndarray  # NaN where not recorded
    branch: np.ndarray  # "rising" | "falling", dtype object
    rows: list[dict] = field(default_factory=list)  # the kept rows as read (text fields)
    lines: tuple[int, ...] = ()  # their line numbers in points.csv
    left_out_rows: list[dict] = field(default_factory=list)
    left_out_lines: tuple[int, ...] = ()
    #: True where a point is the loop's turning point given to the falling branch too
    turning: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))

    @property
    def n_points(self) -> int:
        return len(self.rows)

    @property
    def left_out(self) -> int:
        return len(self.left_out_rows)

    @property
    def sigma_F(self) -> np.ndarray | None:
        """C_std_F/sqrt(n_readings) per point when every point has a positive one, else None
        (then the fit weighs from repeated biases)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            s = np.where(self.n_readings >= 1, self.C_std_F / np.sqrt(self.n_readings), np.nan)
        return s if s.size and np.all(np.isfinite(s) & (s > 0)) else None

    def branches(self) -> list[str]:
        """Branch labels of the sample in the order first measured, left-out points included."""
        seen = sorted(zip(self.lines + self.left_out_lines,
                          [r["branch"] for r in self.rows + self.left_out_rows]))
        return list(dict.fromkeys(b for _, b in seen))

    def take(self, keep: np.ndarray, left_out: list[int]) -> "SamplePoints":
        """The same sample with only the points where `keep` is True, and the left-out points
        at the indexes `left_out`: every per-point column in one place."""
        idx = np.flatnonzero(keep)
        return replace(self, bias_V=self.bias_V[keep], C_F=self.C_F[keep],
                       C_std_F=self.C_std_F[keep], n_readings=self.n_readings[keep],
                       temp_C=self.temp_C[keep], branch=self.branch[keep],
                       rows=[self.rows[i] for i in idx], lines=tuple(self.lines[i] for i in idx),
                       left_out_rows=[self.left_out_rows[i] for i in left_out],
                       left_out_lines=tuple(self.left_out_lines[i] for i in left_out),
                       turning=self.turning[keep])

    def select(self, branch: str) -> "SamplePoints":
        """The same sample restricted to one branch (kept and left-out points)."""
        return self.take(self.branch == branch,
                         [i for i, r in enumerate(self.left_out_rows) if r["branch"] == branch])


@dataclass(frozen=True)
class RunData:
    """A run directory as the fits see it."""

    run_dir: Path
    meta: dict  # run.json
    points_path: Path
    points_sha256: str  # of points.csv as read (the run's identity)
    samples: dict[str, SamplePoints]  # every sample of the selection, in the order measured
    left_out_flags: frozenset[str]  # the flags that left points out

    @property
    def left_out(self) -> int:
        return sum(s.left_out for s in self.samples.values())

    def with_points(self) -> dict[str, SamplePoints]:
        """The samples that kept at least one point (the ones there is anything to fit of)."""
        return {sid: s for sid, s in self.samples.items() if s.n_points}


# the numbers benchkit writes (repr of a float, str of an int): no "1_0", "nan", "inf", "0x1"
_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")


def _num(row: dict, col: str, path: Path, line: int, required: bool = True) -> float:
    text = row[col]
    if text == "":
        if required:
            raise UserError(f"{path}: line {line}: column '{col}' is empty; every used point "
                            "needs it")
        return math.nan
    if len(text) > 40 or not _NUMBER.fullmatch(text):
        raise UserError(f"{path}: line {line}: column '{col}': {text[:40]!r} is not a number "
                        "(benchkit writes finite decimals); the file was edited or damaged")
    v = float(text)
    if not math.isfinite(v):
        raise UserError(f"{path}: line {line}: column '{col}': {text[:40]!r} is out of range")
    return v


def _sample(sid: str, items: list[tuple[int, dict]], dropped: list[tuple[int, dict]],
            path: Path) -> SamplePoints:
    V, C, std, n, temp, labels = [], [], [], [], [], []
    for line, r in items:
        if r["branch"] not in BRANCHES:
            raise UserError(f"{path}: line {line}: column 'branch': {r['branch']!r} is not "
                            "'rising' or 'falling'")
        v = _num(r, "bias_set_V", path, line)
        c = _num(r, "C_F", path, line)
        if not (math.isfinite(v) and math.isfinite(c)):
            raise UserError(f"{path}: line {line}: bias_set_V/C_F must be finite numbers")
        if c <= 0:
            raise UserError(f"{path}: line {line}: C_F = {c!r} is not a positive "
                            "capacitance; check the meter function and range")
        sd = _num(r, "C_std_F", path, line, required=False)
        if sd < 0:
            raise UserError(f"{path}: line {line}: C_std_F = {sd!r} is negative; a standard "
                            "deviation is >= 0: the file was edited or damaged")
        k = _num(r, "n_readings", path, line, required=False)
        if not math.isnan(k) and (k < 0 or k != int(k)):
            raise UserError(f"{path}: line {line}: n_readings = {r['n_readings']!r} is not a "
                            "whole number of readings")
        V.append(v)
        C.append(c)
        std.append(sd)
        n.append(k)
        temp.append(_num(r, "temp_C", path, line, required=False))
        labels.append(r["branch"])
    first = (items or dropped)[0][1]
    n_read = len(items)
    items = list(items)  # the caller's list stays as read
    for i in _turning_points(V, labels):  # the top of each loop, for the falling branch too
        items.append((items[i][0], dict(items[i][1], branch="falling")))
        for col in (V, C, std, n, temp):
            col.append(col[i])
        labels.append("falling")
    turning = np.arange(len(items)) >= n_read
    return SamplePoints(
        sample_id=sid, part_id=first["part_id"] or None,
        bias_V=np.array(V, dtype=float), C_F=np.array(C, dtype=float),
        C_std_F=np.array(std, dtype=float), n_readings=np.array(n, dtype=float),
        temp_C=np.array(temp, dtype=float), branch=np.array(labels, dtype=object),
        rows=[r for _, r in items], lines=tuple(line for line, _ in items),
        left_out_rows=[r for _, r in dropped], left_out_lines=tuple(line for line, _ in dropped),
        turning=turning)


def _turning_points(V: list[float], labels: list[str]) -> list[int]:
    """Indexes of the rising readings at a loop's top that the falling branch lacks: per
    polarity, those at the highest rising |bias| when every falling reading of that polarity
    lies below it (to a part in 10^9 of the bias)."""
    out = []
    for sign in (1.0, -1.0):
        rising = [i for i, (v, b) in enumerate(zip(V, labels)) if b == "rising" and sign * v > 0]
        falling = [sign * v for v, b in zip(V, labels) if b == "falling" and sign * v > 0]
        if not rising or not falling:
            continue
        top = max(sign * V[i] for i in rising)
        tol = 1e-9 * top
        if max(falling) < top - tol:
            out += [i for i in rising if sign * V[i] >= top - tol]
    return out


def _check_rows(rows: list[dict], path: Path) -> None:
    """What every row must be, complete run or aborted: once per key, known flags, whole
    numbers where the engine writes whole numbers."""
    seen: dict[tuple, int] = {}
    for line, r in enumerate(rows, start=2):
        for col in ("repeat", "step_index", "channel"):
            if not r[col].isdigit() or len(r[col]) > 9:
                raise UserError(f"{path}: line {line}: column '{col}': {r[col][:20]!r} is not a "
                                "whole number; the file was edited or damaged")
        key = (r["sample_id"], int(r["repeat"]), int(r["step_index"]))
        if "freq_list" in flags_of(r):  # a frequency-list row: once per (point, frequency)
            key = key + (r["freq_Hz"],)
        if key in seen:
            raise UserError(f"{path}: line {line} repeats the point of line {seen[key]} "
                            f"({key[0]} repeat {key[1]} step {key[2]}); the file was edited or "
                            "mixed with another run")
        seen[key] = line
        unknown = flags_of(r) - runlog.FLAGS.keys()
        if unknown:
            raise UserError(f"{path}: line {line}: column 'flags': {sorted(unknown)[0][:30]!r} is "
                            "not a benchkit flag; the file was edited or damaged")


def read_run_dir(run_dir: str | Path, *, sample: str | None = None,
                 extra_flags: Iterable[str] = (), action: str = "fitted") -> RunData:
    """Read RUN_DIR for fitting: every sample (or only `sample`, the --sample of the caller)
    with its kept points; points flagged LEFT_OUT_FLAGS or extra_flags are left out. Bad data
    raise one UserError line naming the file and line; `action` ends the sha256 refusal
    ("... so they are not fitted")."""
    run_dir = Path(run_dir)
    meta = runlog.read_run(run_dir)
    rows, end = runlog.read_points(run_dir, chain=False)  # the chain after the sha256, below
    path = run_dir / runlog.POINTS_FILE
    if not rows:
        raise UserError(f"{path}: no measured points; measure the run (or resume it) first")
    samples_in_run = sorted({r["sample_id"] for r in rows})
    if sample is not None and sample not in samples_in_run:
        raise UserError(f"--sample {sample}: not in {path} (samples: {', '.join(samples_in_run)})")
    if meta.get("points_chain") and not (run_dir / runlog.CHAIN_FILE).exists():
        raise UserError(f"{run_dir / runlog.CHAIN_FILE}: missing, so the rows cannot be checked "
                        f"against their digests; restore it, they are not {action}")
    _check_rows(rows, path)
    exclude = frozenset(LEFT_OUT_FLAGS | set(extra_flags))
    kept: dict[str, list[tuple[int, dict]]] = {}
    dropped: dict[str, list[tuple[int, dict]]] = {}
    for line, r in enumerate(rows, start=2):
        sid = r["sample_id"]
        if sample is not None and sid != sample:
            continue
        kept.setdefault(sid, [])
        dropped.setdefault(sid, [])
        if "freq_list" in flags_of(r):  # impedance against frequency: benchkit/sweep/impedance.py
            continue
        (dropped if exclude & flags_of(r) else kept)[sid].append((line, r))
    if not any(kept.values()):
        raise UserError(f"{path}: every point of the selection carries an excluded flag "
                        f"({', '.join(sorted(exclude))}); nothing to fit")
    samples = {sid: _sample(sid, kept[sid], dropped[sid], path) for sid in kept}
    sha = runlog.sha256_file(path)
    if meta.get("points_sha256") and meta["points_sha256"] != sha:
        raise UserError(f"{path}: sha256 differs from the one in run.json; the points "
                        f"were changed after the run ended, so they are not {action}")
    if (run_dir / runlog.CHAIN_FILE).exists():  # an aborted run has no sha256: its rows' digests
        runlog.check_chain(run_dir, end)
    return RunData(run_dir, meta, path, sha, samples, exclude)


def fit_conditions(meta: dict, rows: list[dict]) -> dict:
    """Conditions of the fitted points: the points' own columns, else run.json's conditions."""
    cond = meta.get("conditions") or {}

    def median(col):
        vals = column(rows, col)
        vals = vals[np.isfinite(vals)]
        return float(np.median(vals)) if vals.size else None

    functions = sorted({r["function"] for r in rows if r["function"]})
    freq, temp = median("freq_Hz"), column(rows, "temp_C")
    # the level the part saw, when the meter measured it; else the set (open-circuit) level
    level, level_source = median("ac_level_dut_Vrms"), "level across the part (median of the points)"
    if level is None:
        level = median("ac_level_set_Vrms")
        level_source = "set level (no level across the part recorded)"
    if level is None:
        level, level_source = cond.get("ac_level_Vrms"), "set level (run.json conditions)"
    t = temp[np.isfinite(temp)]
    return {
        "freq_Hz": freq if freq is not None else cond.get("freq_Hz"),
        "ac_level_Vrms": level,
        "ac_level_source": level_source,
        "temp_C": float(np.mean(t)) if t.size else None,
        "function": functions[0] if len(functions) == 1 else cond.get("function"),
    }
