"""Helpers for the export tests: fitted curves of invented data, and running ngspice in batch mode."""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp


def invented_sweep(model: str = "tanh", seed: int = 3, v_max: float = 10.0, n: int = 21):
    """Bias and capacitance of an invented 10 uF part (0.1 % noise), and the sigma of each point."""
    rng = np.random.default_rng(seed)
    V = np.linspace(0.0, v_max, n)
    if model == "landau":
        C = 10e-6 / (1.0 + (V / 4.0) ** 2) ** (1.0 / 3.0) + 0.3e-6
    else:
        C = 1.5e-6 + 8.5e-6 / np.cosh(V / 3.0) ** 2
    C = C * (1.0 + 1e-3 * rng.standard_normal(V.size))
    return V, C, 1e-3 * C


def fitted_curve(model: str = "tanh", **kw):
    """fits.fit_sweep on the invented sweep: the curve a user would export."""
    from fits import fit_sweep

    V, C, s = invented_sweep("landau" if model == "landau" else "tanh", **kw)
    out = fit_sweep(V, C, sigma_F=s, model=model, conditions={"freq_Hz": 1000.0, "ac_level_Vrms": 1.0,
                                                                 "temp_C": 25.0, "function": "CSRS"},
                    source={"run_id": "run-invented-7", "points_sha256": "0" * 64}, part_id="BD-1001",
                    sample_id="FX-01")
    return out.curve


def need_ngspice() -> str:
    exe = shutil.which("ngspice")
    if exe is None:
        if os.environ.get("CI") == "true":  # under CI a missing package is a failure, not a skip
            pytest.fail("ngspice not installed (CI=true: .ci/run installs it)")
        pytest.skip("ngspice not installed")
    return exe


def run_ngspice(netlist: str, folder: Path, probe: str = "v(out)") -> tuple[np.ndarray, np.ndarray]:
    """Run `ngspice -b` on a netlist whose .control block writes wrdata to out.txt; (time, value)."""
    exe = need_ngspice()
    cir = folder / "test.cir"
    cir.write_text(netlist, encoding="utf-8")
    proc = subprocess.run([exe, "-b", cir.name], cwd=folder, capture_output=True, text=True, timeout=120)
    data_file = folder / "out.txt"
    assert proc.returncode == 0 and data_file.exists(), proc.stdout[-2000:] + proc.stderr[-2000:]
    data = np.loadtxt(data_file, skiprows=1)
    return data[:, 0], data[:, 1]


def transient_netlist(subckt_text: str, name: str, *, step_V: float, R_ohm: float, t_stop_s: float,
                      t_max_step_s: float) -> str:
    """Voltage step (1 ns rise) through R into the subcircuit; v(out) written at 15 digits."""
    return (
        f"* benchkit export test: RC charge of a nonlinear capacitor\n"
        f"{subckt_text}"
        f"V1 in 0 PWL(0 0 1n {step_V!r} 1 {step_V!r})\n"
        f"R1 in out {R_ohm!r}\n"
        f"X1 out 0 {name}\n"
        f".control\n"
        f"set wr_singlescale\n"
        f"set wr_vecnames\n"
        f"option numdgt=15\n"
        f"tran {t_max_step_s!r} {t_stop_s!r} 0 {t_max_step_s!r}\n"
        f"wrdata out.txt v(out)\n"
        f"quit\n"
        f".endc\n"
        f".end\n"
    )


def rc_charge_reference(C_of_V, *, step_V: float, R_ohm: float, esr_ohm: float, t_eval: np.ndarray):
    """Node voltage between R and the capacitor from scipy.integrate.solve_ivp of the same circuit.

    The capacitor (behind its ESR) charges as dVc/dt = (Vs - Vc) / ((R + ESR) C(Vc)); the node
    after R sits at (R Vc + ESR Vs) / (R + ESR).
    """
    Rt = R_ohm + esr_ohm

    def f(t, y):
        return [(step_V - y[0]) / (Rt * C_of_V(y[0]))]

    sol = solve_ivp(f, (0.0, float(t_eval[-1])), [0.0], method="LSODA", rtol=1e-10, atol=1e-12 * step_V,
                    dense_output=True)
    assert sol.success
    Vc = sol.sol(t_eval)[0]
    return (R_ohm * Vc + esr_ohm * step_V) / Rt


class _Helpers:
    fitted_curve = staticmethod(fitted_curve)
    invented_sweep = staticmethod(invented_sweep)
    run_ngspice = staticmethod(run_ngspice)
    transient_netlist = staticmethod(transient_netlist)
    rc_charge_reference = staticmethod(rc_charge_reference)
    need_ngspice = staticmethod(need_ngspice)


@pytest.fixture
def ex():
    return _Helpers
