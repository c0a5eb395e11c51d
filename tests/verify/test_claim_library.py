"""A supplier's claim filed in the library: origin "supplier claim", the claimed values at the
claimed biases, nothing in between invented beyond the monotone interpolant."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from benchkit.cli import main
from benchkit.library import Library
from benchkit.verify.claims import load_claim

REPO = Path(__file__).resolve().parents[2]
CLAIM = REPO / "data" / "claims" / "BD-1004-typical.csv"  # invented demo claim


def test_claim_csv_is_filed_as_a_supplier_claim(tmp_path):
    lib_path = tmp_path / "lib.sqlite"
    assert main(["library", "--library", str(lib_path), "add-parts", str(REPO / "data" / "parts.toml")]) == 0
    assert main(["library", "--library", str(lib_path), "add", str(CLAIM)]) == 0
    claim = load_claim(CLAIM)
    lib = Library(lib_path)
    (record,) = lib.curves("BD-1004")
    assert record.curve.origin == "supplier claim"
    # scipy reference: PCHIP passes through its nodes and is monotone between them
    ref = PchipInterpolator(claim.bias_V, claim.C_F)
    V = np.linspace(claim.bias_V.min(), claim.bias_V.max(), 57)
    assert np.allclose(record.curve.C(V), ref(V), rtol=1e-12)
    mid = 0.5 * (claim.bias_V[0] + claim.bias_V[1])
    (answer,) = [r for r in lib.query(bias_V=float(mid)) if r.part.part_id == "BD-1004"]
    assert answer.origin == "supplier claim" and answer.C_F == pytest.approx(float(ref(mid)), rel=1e-12)


def test_bad_claim_is_refused_and_nothing_is_filed(tmp_path, capsys):
    lib_path = tmp_path / "lib.sqlite"
    main(["library", "--library", str(lib_path), "add-parts", str(REPO / "data" / "parts.toml")])
    bad = REPO / "tests" / "verify" / "malformed_claims" / "duplicate_bias.csv"
    assert main(["library", "--library", str(lib_path), "add", str(bad)]) == 2
    assert "duplicate bias" in capsys.readouterr().err
    assert Library(lib_path).curves("BD-1004") == []
