"""A claim stated at other conditions than the measurement is not decidable (exit 3), unless
the operator overrides it explicitly, and the override is written into the report.

Why [common practice; science notes 1 and 8]: class-2 capacitance moves with the AC level
(Rayleigh behaviour) and with temperature (the EIA-198 class code bounds C(T)/C(25 degC)), and
the measurement frequency matters too, so a measurement at 25 degC, 1 kHz, 1 Vrms says nothing
about a curve claimed at 85 degC, 100 Hz or 0.5 Vrms. Tolerances for "same conditions":
frequency +-10 %, AC level +-20 % [standard: IEC 60384-1 4.2.2 as quoted], temperature
+-2 degC (benchkit/verify/compare.py).
"""

import json

import numpy as np
import pytest

from benchkit.cli import main
from benchkit.errors import EXIT_OK, EXIT_UNDECIDED

BIAS = np.arange(0.0, 25.0 + 1e-9, 2.5)


def johnson(V):
    # C(V) = C0/(1 + (V/Vk)^2)^(1/3), K. M. Johnson, J. Appl. Phys. 33, 2826 (1962) (fitted as
    # the "landau" model), restated
    # in our notes; C0 = 1 uF, Vk = 20 V (demo numbers)
    return 1e-6 / (1.0 + (np.asarray(V, dtype=float) / 20.0) ** 2) ** (1.0 / 3.0)


@pytest.fixture
def run(tmp_path, tools):
    # measured at 25 degC, 1 kHz, 1 Vrms set (0.85 Vrms across the part)
    return tools.write_run(tmp_path / "run", [("S-01", "BD-1004", 1, tools.part_dict(), johnson)],
                           BIAS, temp_C=25.0)


@pytest.mark.parametrize("conditions, word", [
    (dict(temp_C=85), "temperature"), (dict(temp_C=-40), "temperature"),
    (dict(freq_Hz=100), "frequency"), (dict(ac_level_Vrms=0.5), "AC level"),
])
def test_claim_at_other_conditions_is_not_decidable(tmp_path, tools, run, capsys, conditions, word):
    claim = tmp_path / "claim.csv"
    claim.write_text(tools.claim_text("BD-1004", BIAS, johnson(BIAS), **conditions))
    code = main(["verify", "--claim", str(claim), str(run), "--model", "landau", "--out", str(tmp_path / "r")])
    out = capsys.readouterr().out
    assert code == EXIT_UNDECIDED, out
    assert "not decidable: measured at other conditions" in out and word in out
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    assert doc["verdict"] == "not decidable"
    # the override: judged, and the report says so
    code = main(["verify", "--claim", str(claim), str(run), "--model", "landau",
                 "--accept-other-conditions", "--out", str(tmp_path / "o")])
    assert code == EXIT_OK, capsys.readouterr().out
    doc = json.loads((tmp_path / "o" / "report.json").read_text())
    assert any(n.startswith("OVERRIDE") for n in doc["notes"])
    assert any("--accept-other-conditions" in f for f in doc["samples"][0]["flags"])


def test_claim_at_the_measured_conditions_is_judged(tmp_path, tools, run, capsys):
    claim = tmp_path / "claim.csv"
    claim.write_text(tools.claim_text("BD-1004", BIAS, johnson(BIAS)))
    code = main(["verify", "--claim", str(claim), str(run), "--model", "landau", "--out", str(tmp_path / "r")])
    assert code == EXIT_OK, capsys.readouterr().out
