"""Shared pieces for the library tests: invented parts, curves and a run directory.

All parts, numbers and data here are invented for the tests (company "Brackwater Dynamics").
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from benchkit.sweep import runlog

PARTS = [
    {"id": "BD-1001", "description": "10 uF 6.3 V X5R 0402", "nominal_C_F": 10e-6, "tolerance": "M",
     "rated_V": 6.3, "class_code": "X5R", "case": "0402", "supplier": "invented supplier A"},
    {"id": "BD-1002", "description": "4.7 uF 16 V X7R 0603", "nominal_C_F": 4.7e-6, "tolerance": "K",
     "rated_V": 16.0, "class_code": "X7R", "case": "0603", "supplier": "invented supplier B"},
    {"id": "BD-1003", "description": "2.2 uF 25 V X7R 0805", "nominal_C_F": 2.2e-6, "tolerance": "K",
     "rated_V": 25.0, "class_code": "X7R", "case": "0805", "supplier": "invented supplier B"},
]


def tanh_params(c_pk=10e-6, c_inf=1.5e-6, v0=2.5, v_off=0.0):
    return {"C_inf_F": c_inf, "C_pk_F": c_pk, "V0_V": v0, "V_off_V": v_off}


def make_curve(model="tanh", params=None, *, rel_u=0.01, valid=(0.0, 6.3), temp_C=25.0, part_id="BD-1001",
               sample_id="FX-01", branch="rising", origin="measured", covariance=None):
    """A fits.Curve with a diagonal covariance of rel_u per parameter (invented numbers)."""
    from fits import Curve

    params = params or tanh_params()
    names = list(params)
    if covariance is None:
        covariance = np.diag([(rel_u * abs(v)) ** 2 for v in params.values()])
    return Curve(model, params, covariance, valid,
                 conditions={"freq_Hz": 1000.0, "ac_level_Vrms": 1.0, "temp_C": temp_C, "function": "CPD"},
                 source={"run_id": None, "sample_id": sample_id, "part_id": part_id, "branch": branch,
                         "points_sha256": None},
                 origin=origin, part_id=part_id, sample_id=sample_id, branch=branch, param_names=names)


def tanh_C(V, C_inf_F, C_pk_F, V0_V, V_off_V):
    """Invented truth for the synthetic run: C_inf + (C_pk - C_inf) sech^2((V - V_off)/V0)."""
    return C_inf_F + (C_pk_F - C_inf_F) / np.cosh((np.asarray(V) - V_off_V) / V0_V) ** 2


def write_run(run_dir: Path, *, part_id="BD-1001", samples=("FX-01",), seed=0, noise=0.002, v_max=6.0,
              n_steps=13, temp_C=25.0, params=None, rs_ohm=0.02, part_of=None, catalogue=None) -> Path:
    """A complete run directory (run.json + points.csv) of invented, noisy tanh-type data.

    part_of: {sample_id: part_id} for a run over several parts (default: every sample is part_id).
    catalogue: {part_id: catalogue fields} recorded in run.json (samples[].part), as a bench does.
    """
    catalogue = catalogue or {}
    part_of = part_of or {}
    rng = np.random.default_rng(seed)
    params = params or tanh_params()
    meta = {
        "format": runlog.RUN_FORMAT, "version": runlog.RUN_VERSION, "run_id": f"run-{run_dir.name}",
        "software_version": "test", "status": "running", "reason": None, "start_utc": runlog.utc_now(),
        "end_utc": None, "clock": "virtual", "plan": {}, "instruments": {},
        "samples": [{"sample_id": s, "part_id": part_of.get(s, part_id), "channel": i + 1,
                     "part": dict(catalogue.get(part_of.get(s, part_id), {}))}
                    for i, s in enumerate(samples)],
        "conditions": {"function": "CPD", "freq_Hz": 1000.0, "ac_level_Vrms": 1.0, "conditions_source": "test"},
        "points_file": runlog.POINTS_FILE, "points_sha256": None, "events": [],
    }
    log = runlog.RunLog.create(run_dir, meta)
    try:
        t = 0.0
        for ch, sample in enumerate(samples, start=1):
            up = np.linspace(0.0, v_max, n_steps)
            steps = [("rising", v) for v in up] + [("falling", v) for v in up[::-1][1:]]
            for i, (branch, v) in enumerate(steps):
                c_true = tanh_C(v, **params) * (1.0 + (0.01 if branch == "falling" else 0.0))
                c = c_true * (1.0 + noise * rng.standard_normal())
                t += 1.0
                log.append_point({
                    "run_id": meta["run_id"], "sample_id": sample, "part_id": part_of.get(sample, part_id),
                    "channel": ch,
                    "step_index": i, "branch": branch, "repeat": 0, "bias_set_V": float(v),
                    "bias_meas_V": float(v), "bias_current_A": 1e-9, "function": "CPD", "freq_Hz": 1000.0,
                    "ac_level_set_Vrms": 1.0, "ac_level_dut_Vrms": 0.5, "C_F": float(c),
                    "C_std_F": float(noise * c_true * 2.0), "D": 0.02, "Rs_ohm": rs_ohm, "n_readings": 4,
                    "temp_C": temp_C, "t_s": t, "dwell_s": 1.0, "settle_s": 0.5, "drift_pct_per_s": 0.0,
                    "flags": "", "utc": runlog.utc_now(),
                })
        log.set_status("complete")
    finally:
        log.close()
    return run_dir


@pytest.fixture
def parts():
    return [dict(p) for p in PARTS]


@pytest.fixture(params=["sqlite", "postgresql"])
def library_target(request, tmp_path):
    """Where a test's library lives: an SQLite file, or a fresh schema on the PostgreSQL server."""
    if request.param == "sqlite":
        return tmp_path / "lib.sqlite"
    return request.getfixturevalue("postgres_url")


@pytest.fixture
def lib(library_target, parts):
    """A library holding the three invented parts, on each backend in turn."""
    from benchkit.library import Library

    with Library(library_target) as library:
        library.add_parts(parts)
        yield library


@pytest.fixture
def parts_toml(tmp_path) -> Path:
    """A parts file in the parts-file layout of DEVELOPERS.md (no [part.sim]: catalogue only)."""
    lines = ['company = "Brackwater Dynamics"']
    for p in PARTS:
        lines.append("[[part]]")
        for k, v in p.items():
            lines.append(f"{k} = {json.dumps(v)}")
    path = tmp_path / "parts.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


class _Helpers:
    """The helpers above as one fixture (test modules cannot import conftest under importlib mode)."""

    make_curve = staticmethod(make_curve)
    tanh_params = staticmethod(tanh_params)
    tanh_C = staticmethod(tanh_C)
    write_run = staticmethod(write_run)
    PARTS = PARTS


@pytest.fixture
def mk():
    return _Helpers
