"""Helpers of the fits tests: synthetic sweeps and run directories in the format of
DEVELOPERS.md ("File formats"), written here independently of benchkit's own run writer.

All numbers are invented for the tests (Brackwater Dynamics demo part BD-1001).
"""

from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

import numpy as np

POINTS_COLUMNS = (
    "run_id,sample_id,part_id,channel,step_index,branch,repeat,bias_set_V,bias_meas_V,"
    "bias_current_A,function,freq_Hz,ac_level_set_Vrms,ac_level_dut_Vrms,C_F,C_std_F,D,Rs_ohm,"
    "n_readings,temp_C,t_s,dwell_s,settle_s,drift_pct_per_s,flags,utc"
).split(",")


def write_run(run_dir: Path, points: list[dict], *, run_id: str = "RUN-TEST-1",
              status: str = "complete", sha: str | None = "auto", header=POINTS_COLUMNS) -> Path:
    """Write run.json and points.csv; each point dict needs sample_id, branch, bias_set_V, C_F
    (optional: C_std_F, n_readings, flags, part_id, temp_C)."""
    run_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for i, p in enumerate(points):
        row = {c: "" for c in header}
        row.update(run_id=run_id, sample_id=p["sample_id"], part_id=p.get("part_id", "BD-1001"),
                   channel=str(p.get("channel", 1)), step_index=str(i), branch=p["branch"],
                   repeat=str(p.get("repeat", 0)), bias_set_V=repr(float(p["bias_set_V"])),
                   bias_meas_V=repr(float(p["bias_set_V"])), bias_current_A="1e-09",
                   function="CPD", freq_Hz="1000.0", ac_level_set_Vrms="1.0",
                   ac_level_dut_Vrms="0.157", C_F=p["C_F"] if isinstance(p["C_F"], str)
                   else repr(float(p["C_F"])),
                   C_std_F=p.get("C_std_F", ""), D="0.01", Rs_ohm="0.05",
                   n_readings=str(p.get("n_readings", 5)), temp_C=str(p.get("temp_C", 25.0)),
                   t_s=str(float(i)), dwell_s="1.0", settle_s="0.5", drift_pct_per_s="",
                   flags=p.get("flags", ""), utc="2026-01-01T00:00:00.000Z")
        rows.append({c: row[c] for c in header})
    path = run_dir / "points.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(header), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    digest = hashlib.sha256(path.read_bytes()).hexdigest() if sha == "auto" else sha
    meta = {
        "format": "benchkit-run", "version": 1, "run_id": run_id, "software_version": "test",
        "status": status, "reason": None, "start_utc": "2026-01-01T00:00:00Z",
        "end_utc": "2026-01-01T01:00:00Z", "clock": "virtual", "plan": {}, "instruments": {},
        "samples": [], "conditions": {"function": "CPD", "freq_Hz": 1000.0,
                                      "ac_level_Vrms": 1.0, "conditions_source": "plan"},
        "points_file": "points.csv", "points_sha256": digest, "events": [],
    }
    (run_dir / "run.json").write_text(json.dumps(meta, indent=2), encoding="utf-8")
    return run_dir


def tanh_branch_points(sample_id, *, V_off=0.3, rel_noise=0.002, seed=0, n=13, V_max=6.0,
                       both=True, truth=(1.0e-6, 10.0e-6, 2.0)):
    """Points of a hysteretic tanh-type sample: rising peak at +V_off, falling at -V_off."""
    from fits import models

    spec = models.get("tanh")
    rng = np.random.default_rng(seed)
    C_inf, C_pk, V0 = truth
    out = []
    branches = (("rising", V_off), ("falling", -V_off)) if both else (("rising", V_off),)
    for branch, off in branches:
        Vs = np.linspace(0.0, V_max, n)
        if branch == "falling":
            Vs = Vs[::-1]
        for v in Vs:
            c = float(spec.C(v, C_inf, C_pk, V0, off))
            s = rel_noise * c
            out.append({"sample_id": sample_id, "branch": branch, "bias_set_V": float(v),
                        "C_F": c + rng.normal() * s, "C_std_F": repr(float(s * np.sqrt(5))),
                        "n_readings": 5})
    return out
