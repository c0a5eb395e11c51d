"""Wideband exports: Touchstone read back by scikit-rf, the AC subcircuit run by ngspice, the
impedance table and the CLI.

Sources: Touchstone File Format Specification 2.0 (IBIS Open Forum, 2009) for the keywords and
their order [standard; order from memory]; scikit-rf's Touchstone reader and its Y/Z-matrix
networks for the S-parameters of series and shunt elements; ngspice (.ac) for the subcircuit;
handbook relation f_srf = 1/(2*pi*sqrt(ESL*C)) for the table's resonance.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import skrf

from benchkit.errors import UserError
from benchkit.exports import export_curve, render
from benchkit.exports.impedance_csv import COLUMNS
from benchkit.exports.touchstone import V2_KEYWORD_ORDER
from benchkit.exports.wideband_spice import ladder, ladder_impedance

from .conftest import need_ngspice, wideband_curve

Z0 = 50.0


@pytest.fixture(scope="module")
def curve():
    return wideband_curve()


def _expected_s(freq, Z, fixture):
    """S of the part in the fixture, built by scikit-rf from Y or Z matrices (independent)."""
    n = Z.size
    if fixture == "series-through":
        y = np.zeros((n, 2, 2), complex)
        y[:, 0, 0] = y[:, 1, 1] = 1 / Z
        y[:, 0, 1] = y[:, 1, 0] = -1 / Z
        return skrf.Network(frequency=freq, y=y, z0=Z0).s
    z = np.ones((n, 2, 2), complex) * Z[:, None, None]
    return skrf.Network(frequency=freq, z=z, z0=Z0).s


@pytest.mark.parametrize("name,fixture,version", [
    ("part.s1p", None, "1"), ("part.s2p", "series-through", "1"), ("part.s2p", "shunt-through", "1"),
    ("part.ts", "shunt-through", "2"), ("part1.ts", None, "2")])
def test_touchstone_read_back_by_scikit_rf_equals_the_model(curve, tmp_path, name, fixture, version):
    out = export_curve(curve, "touchstone", tmp_path / name, bias_V=12.0, fixture=fixture,
                       touchstone_version=version)
    net = skrf.Network(str(out))
    fit = curve.wideband.at(12.0)
    f = net.f
    assert f[0] == pytest.approx(fit.freq_range_Hz[0]) and f[-1] == pytest.approx(fit.freq_range_Hz[1])
    Z = fit.Z(f)
    if net.nports == 1:
        assert np.max(np.abs(net.z[:, 0, 0] / Z - 1)) < 1e-9
    else:
        want = _expected_s(net.frequency, Z, fixture)
        assert np.max(np.abs(net.s - want)) < 1e-9
        # and Z back from S21 (science notes: shunt Z = Z0*S21/(2(1 - S21)), series 2*Z0*(1 - S21)/S21)
        s21 = net.s[:, 1, 0]
        back = Z0 * s21 / (2 * (1 - s21)) if fixture == "shunt-through" else 2 * Z0 * (1 - s21) / s21
        assert np.max(np.abs(back / Z - 1)) < 1e-9


def test_version_2_keywords_in_the_order_the_standard_requires(curve, tmp_path):
    text = (export_curve(curve, "touchstone", tmp_path / "p.ts", bias_V=12.0,
                         fixture="shunt-through", touchstone_version="2")).read_text()
    lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not ln.startswith("!")]
    seen = [k for ln in lines for k in V2_KEYWORD_ORDER if ln.lower().startswith(k.lower())]
    assert seen == list(V2_KEYWORD_ORDER)
    assert lines[0].startswith("[Version] 2.0")  # the first non-comment line [standard]
    assert "[Number of Frequencies] 201" in lines and lines[-1] == "[End]"
    one = (export_curve(curve, "touchstone", tmp_path / "p1.ts", bias_V=12.0,
                        touchstone_version="2")).read_text()
    assert "[Two-Port Data Order]" not in one  # required for 2-port files only [standard]


def test_touchstone_needs_a_bias_and_a_fixture_for_s2p(curve, tmp_path):
    with pytest.raises(UserError, match="needs --bias"):
        render(curve, "touchstone")
    with pytest.raises(UserError, match="name the fixture"):
        export_curve(curve, "touchstone", tmp_path / "p.s2p", bias_V=12.0)
    with pytest.raises(UserError, match="outside the wideband model"):
        export_curve(curve, "touchstone", tmp_path / "p.s1p", bias_V=20.0)
    assert not list(tmp_path.iterdir())  # nothing half written


def test_ladder_reproduces_the_constant_phase_dielectric(curve):
    fit = curve.wideband.at(12.0)
    f = np.logspace(2, 7, 101)
    C_inf, br = ladder(fit, 1e2, 1e7)
    Z = ladder_impedance(f, fit.params["esr_ohm"], fit.esl_H, C_inf, br)
    assert np.max(np.abs(np.abs(Z) / fit.Z_abs(f) - 1)) < 0.002
    assert C_inf >= 0 and all(r > 0 and c > 0 for r, c in br)  # passive


@pytest.mark.parametrize("bias", [12.0, 3.0])
def test_ngspice_ac_within_2_percent_of_the_model(curve, tmp_path, bias):
    exe = need_ngspice()
    sub = render(curve, "spice", bias_V=bias, name="BD-1006", n_points=None)
    # ngspice .ac: 1 A AC current into the subcircuit, so v(out) is Z (common practice)
    net = (f"* benchkit wideband subcircuit under ngspice AC\n{sub}"
           "I1 0 out DC 0 AC 1\nX1 out 0 BD_1006\n"
           ".control\nset wr_singlescale\nset wr_vecnames\noption numdgt=15\n"
           "ac dec 20 100 10meg\nwrdata out.txt vm(out) vp(out)\nquit\n.endc\n.end\n")
    (tmp_path / "t.cir").write_text(net)
    proc = subprocess.run([exe, "-b", "t.cir"], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    data = np.loadtxt(tmp_path / "out.txt", skiprows=1)
    f, mag = data[:, 0], data[:, 1]
    assert f[0] == pytest.approx(100.0) and f[-1] == pytest.approx(1e7) and f.size >= 100
    model = curve.wideband.at(bias).Z_abs(f)
    err = np.abs(mag / model - 1)
    print(f"{bias} V: worst ngspice/model |Z| difference {100 * err.max():.4f} %")
    assert err.max() < 0.02


def test_impedance_csv_against_the_handbook_resonance(curve):
    text = render(curve, "csv", bias_V=12.0, n_points=401)
    rows = [ln.split(",") for ln in text.strip().splitlines()]
    assert tuple(rows[0]) == COLUMNS
    a = np.array([[float(x) for x in r] for r in rows[1:]])
    fit = curve.wideband.at(12.0)
    i = int(np.argmin(a[:, 1]))
    # |Z| is lowest near 1/(2 pi sqrt(ESL C)) [handbook], and equals ESR there
    f_hb = 1 / (2 * np.pi * np.sqrt(fit.esl_H * fit.C_F(a[i, 0])))
    assert a[i, 0] == pytest.approx(f_hb, rel=0.03)
    assert a[i, 1] == pytest.approx(a[i, 3], rel=0.01)
    assert a[0, 6] == 1 and a[i, 6] == 0  # C reported only well below resonance


def test_cli_export_touchstone(curve, tmp_path):
    src = tmp_path / "curve.json"
    src.write_text(curve.to_json())
    out = tmp_path / "part.s2p"
    cmd = [sys.executable, "-m", "benchkit", "export", str(src), "--format", "touchstone",
           "--bias", "12", "--out", str(out), "--fixture", "shunt-through"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert skrf.Network(str(out)).nports == 2
    bad = subprocess.run(cmd[:-2], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "fixture" in bad.stderr and len(bad.stderr.strip().splitlines()) == 1


def test_library_exports_touchstone_by_part_id(curve, tmp_path):
    from benchkit.cli import main

    src = tmp_path / "curve.json"
    src.write_text(curve.to_json())
    lib = str(tmp_path / "lib.sqlite")
    assert main(["library", "--library", lib, "add-parts", "data/parts.toml"]) == 0
    assert main(["library", "--library", lib, "add", str(src)]) == 0
    out = tmp_path / "BD-1006.s2p"
    assert main(["library", "--library", lib, "export", "BD-1006", "--format", "touchstone",
                 "--bias", "12", "--fixture", "series-through", "--out", str(out)]) == 0
    net = skrf.Network(str(out))
    fit = curve.wideband.at(12.0)
    s21 = net.s[:, 1, 0]
    assert np.max(np.abs(2 * Z0 * (1 - s21) / s21 / fit.Z(net.f) - 1)) < 1e-9
