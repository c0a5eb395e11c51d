"""Curve: a fitted (or tabulated) C(V) with its uncertainty, conditions and provenance.

The measured thing is the centre of the API: a Curve knows its model and parameters, the
covariance of the parameters, the bias range it was measured over (and refuses to answer
outside it unless told to extrapolate), the conditions (frequency, AC level, temperature,
meter function) and where it came from (sha256 of the raw points, run, sample, part, branch).

Which capacitance (Costinett, Maksimovic, Zane, IEEE Trans. Power Electron. 30(2), 985
(2015)): C(V) is the differential capacitance dQ/dV that an LCR meter reads under bias;
C_Q(V) = Q(V)/V the charge-equivalent and C_E(V) = 2*W(V)/V^2 the energy-equivalent
capacitance, with Q = int C dv and W = int v*C(v) dv from 0 to V.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Mapping

import numpy as np

from fits import document as doc
from fits._atomic import write_bytes_atomic
from fits.errors import CurveDocumentError, OutOfRange


def _out(values, V):
    """A float for scalar input, an array otherwise."""
    return float(values) if np.ndim(V) == 0 else np.asarray(values, dtype=float)


class Curve:
    """C(V) of one sample and branch (or a claim / lot summary), never extrapolated silently."""

    def __init__(self, model: str, params: Mapping[str, float], covariance=None,
                 valid_range_V=None, *, conditions: Mapping | None = None,
                 stats: Mapping | None = None, source: Mapping | None = None,
                 origin: str = "measured", part_id: str | None = None,
                 sample_id: str | None = None, branch: str | None = None,
                 param_names=None, wideband=None, model_error_F: float = 0.0,
                 model_choice_u_F=None, _where: str = "Curve"):
        where = _where
        names = param_names if param_names is not None else list(params)
        self.spec = doc.check_model(model, names, where)
        self.model = model
        self.param_names = self.spec.param_names
        self.params = doc.check_params(self.spec, params, where)
        self.covariance = doc.check_covariance(covariance, len(self.param_names), where)
        self.valid_range_V = doc.check_range(
            list(valid_range_V) if valid_range_V is not None else None, self.spec, self.params,
            where)
        self.model_error_F = doc.check_model_error(model_error_F, where)
        #: the model-choice term, equally spaced over valid_range_V (None: no rival law)
        self.model_choice_u_F = doc.check_model_choice(model_choice_u_F, where)
        self.conditions = doc.check_conditions(conditions, where)
        self.stats = doc.check_stats(stats, where)
        self.source = doc.check_source(source, where)
        doc.check_labels(origin, part_id, sample_id, branch, where)
        self.origin = origin
        self.part_id = part_id
        self.sample_id = sample_id
        self.branch = branch
        self.wideband = doc.check_wideband(wideband, where)  # fits.wideband.WidebandModel or None

    # ---- construction from points (supplier claims, lot summaries) -----------------------
    @classmethod
    def from_points(cls, bias_V, C_F, u_C_F=None, *, origin: str = "supplier claim",
                    **labels) -> "Curve":
        """A table curve (PCHIP) through the given points; u_C_F = standard uncertainty of
        each point's capacitance (zero covariance when None). Valid over the points' range."""
        from fits import models

        V = np.asarray(bias_V, dtype=float)
        C = np.asarray(C_F, dtype=float)
        order = np.argsort(V)
        V, C = V[order], C[order]
        spec = models.get("table", n_points=V.size)
        k = len(spec.param_names)
        cov = np.zeros((k, k))
        if u_C_F is not None:
            u = np.asarray(u_C_F, dtype=float)[order]
            idx = np.arange(V.size) + V.size
            cov[idx, idx] = u**2
        return cls("table", spec.params_from_points(V, C), cov, (float(V[0]), float(V[-1])),
                   origin=origin, param_names=spec.param_names, **labels)

    # ---- range ---------------------------------------------------------------------------
    def _check(self, V, extrapolate: bool, from_zero: bool = False, what: str = "C"):
        V = np.asarray(V, dtype=float)
        lo, hi = self.valid_range_V
        tol = 1e-9 * max(1.0, abs(lo), abs(hi))
        test = np.append(V.ravel(), 0.0) if from_zero else V.ravel()
        if not np.all(np.isfinite(test)):
            raise OutOfRange(f"{what}: bias must be a finite number of volts")
        outside = (test < lo - tol) | (test > hi + tol)
        if not outside.any():
            return V
        other = self.unmeasured_polarity(test)
        if other.any():
            worst = float(test[other][np.argmax(np.abs(test[other]))])
            raise OutOfRange(f"{what}: bias {worst:g} V is of the polarity this curve was not "
                             f"measured at (it covers {lo:g} V to {hi:g} V): refused, even "
                             "with extrapolate=True; a sweep of one polarity says nothing "
                             "about the other")
        if extrapolate and self.model != "table":
            return V
        worst = float(test[outside][np.argmax(np.abs(test[outside] - (lo + hi) / 2))])
        who = " ".join(str(x) for x in (self.part_id, self.sample_id, self.branch) if x)
        need = " (it integrates from 0 V)" if from_zero else ""
        hint = ("a table curve is never extrapolated" if self.model == "table"
                else "pass extrapolate=True to evaluate the model outside it anyway")
        raise OutOfRange(f"{what}{need}: bias {worst:g} V is outside the valid range "
                         f"{lo:g} V to {hi:g} V of curve {self.model}{' ' + who if who else ''} "
                         f"(the measured range); {hint}")

    @property
    def measured_polarity(self) -> str:
        """"positive", "negative" or "both": the sign of the bias the curve was measured at."""
        lo, hi = self.valid_range_V
        tol = 1e-9 * max(1.0, abs(lo), abs(hi))
        if lo >= -tol:
            return "positive"
        if hi <= tol:
            return "negative"
        return "both"

    def unmeasured_polarity(self, V) -> np.ndarray:
        """True where a bias has the sign the curve was never measured at."""
        V = np.asarray(V, dtype=float)
        lo, hi = self.valid_range_V
        tol = 1e-9 * max(1.0, abs(lo), abs(hi))
        pol = self.measured_polarity
        if pol == "positive":
            return V < -tol
        if pol == "negative":
            return V > tol
        return np.zeros(V.shape, dtype=bool)

    # ---- capacitance, charge, energy -----------------------------------------------------
    def C(self, V, extrapolate: bool = False):
        """Differential (small-signal) capacitance in farads at bias V."""
        V = self._check(V, extrapolate)
        return _out(self.spec.C(V, **self.params), V)

    @property
    def C0_F(self) -> float:
        """Capacitance at 0 V (needs 0 V inside the valid range)."""
        return float(self.C(0.0))

    def delta_pct(self, V, extrapolate: bool = False):
        """Change of capacitance against 0 V, in percent (negative = loss)."""
        return _out(100.0 * (np.asarray(self.C(V, extrapolate)) / self.C0_F - 1.0), V)

    def Q(self, V, extrapolate: bool = False):
        """Charge in coulombs moved from 0 V to V: integral of C, closed form per model."""
        V = self._check(V, extrapolate, from_zero=True, what="Q")
        return _out(self.spec.Q(V, **self.params), V)

    def energy_J(self, V, extrapolate: bool = False):
        """Energy in joules stored when charged from 0 V to V: integral of v*C(v) dv."""
        V = self._check(V, extrapolate, from_zero=True, what="energy")
        return _out(self.spec.W(V, **self.params), V)

    def C_Q(self, V, extrapolate: bool = False):
        """Charge-equivalent capacitance Q(V)/V (C(0) at 0 V)."""
        Va = np.asarray(V, dtype=float)
        q = np.asarray(self.Q(Va, extrapolate))
        c = np.asarray(self.C(Va, extrapolate))
        safe = np.where(Va == 0, 1.0, Va)
        return _out(np.where(Va == 0, c, q / safe), V)

    def C_E(self, V, extrapolate: bool = False):
        """Energy-equivalent capacitance 2*W(V)/V^2 (C(0) at 0 V)."""
        Va = np.asarray(V, dtype=float)
        w = np.asarray(self.energy_J(Va, extrapolate))
        c = np.asarray(self.C(Va, extrapolate))
        safe = np.where(Va == 0, 1.0, Va)
        return _out(np.where(Va == 0, c, 2.0 * w / safe**2), V)

    # ---- uncertainty ---------------------------------------------------------------------
    def u_C(self, V, extrapolate: bool = False):
        """Standard uncertainty of C(V) in farads from the parameter covariance (delta
        method: u^2 = J Sigma J^T with J = dC/dp, the model's jacobian), plus the square of
        the model-error term when the fit found that its law does not describe the data
        (fits.quality), plus the square of the model-choice term at V where other laws
        predict the points as well (model_choice_u_F, linear between its equally spaced
        values, the end values beyond the range). The band covers the fitted curve's
        uncertainty, not the scatter of single readings."""
        V = self._check(V, extrapolate)
        # parameters without a variance (fixed, held) add nothing: their columns are skipped
        keep = np.flatnonzero(np.diag(self.covariance) > 0.0)
        J = self.spec.jacobian_of(np.ravel(V), self.params, [self.param_names[i] for i in keep])
        cov = self.covariance[np.ix_(keep, keep)]
        var = np.einsum("ij,jk,ik->i", J, cov, J) + self.model_error_F**2
        if self.model_choice_u_F is not None:
            var = var + self.model_choice_at(np.ravel(V)) ** 2
        u = np.sqrt(np.clip(var, 0.0, None)).reshape(np.shape(V))
        return _out(u, V)

    def model_choice_at(self, V) -> np.ndarray:
        """The model-choice term in farads at bias V (0 where no rival law entered the band)."""
        V = np.asarray(V, dtype=float)
        if self.model_choice_u_F is None:
            return np.zeros(V.shape)
        lo, hi = self.valid_range_V
        nodes = np.linspace(lo, hi, len(self.model_choice_u_F))
        return np.interp(V, nodes, self.model_choice_u_F)

    @property
    def stderr(self) -> dict[str, float]:
        """Standard uncertainty of each parameter (0 for fixed ones)."""
        d = np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))
        return dict(zip(self.param_names, (float(x) for x in d)))

    @property
    def correlation(self) -> np.ndarray:
        """Correlation matrix of the parameters (0 rows/columns for fixed ones)."""
        d = np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))
        with np.errstate(invalid="ignore", divide="ignore"):
            r = self.covariance / np.outer(d, d)
        r = np.where(np.outer(d, d) > 0, r, 0.0)
        np.fill_diagonal(r, np.where(d > 0, 1.0, 0.0))
        return r

    def spice_charge(self, v: str) -> str:
        """SPICE expression of Q in terms of the voltage expression v (e.g. "V(a,b)")."""
        return self.spec.spice_charge(self.params, v)

    # ---- documents -----------------------------------------------------------------------
    def to_dict(self) -> dict:
        extra = {} if self.wideband is None else {"wideband": self.wideband.to_dict()}
        return doc.json_safe({
            "format": doc.FORMAT,
            "version": doc.VERSION,
            "model": self.model,
            "param_names": list(self.param_names),
            "params": {n: self.params[n] for n in self.param_names},
            "covariance": self.covariance.tolist(),
            "valid_range_V": list(self.valid_range_V),
            "model_error_F": self.model_error_F,
            "model_choice_u_F": self.model_choice_u_F,
            "conditions": self.conditions,
            "stats": self.stats,
            "source": self.source,
            "origin": self.origin,
            "part_id": self.part_id,
            "sample_id": self.sample_id,
            "branch": self.branch,
            **extra,
        })

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False) + "\n"

    @classmethod
    def from_dict(cls, d: Mapping, where: str = "curve document") -> "Curve":
        doc.check_header(d, where)
        return cls(d["model"], d["params"], d["covariance"], d["valid_range_V"],
                   conditions=d.get("conditions"), stats=d.get("stats"),
                   source=d.get("source"), origin=d.get("origin", "measured"),
                   part_id=d.get("part_id"), sample_id=d.get("sample_id"),
                   branch=d.get("branch"), param_names=d["param_names"],
                   wideband=d.get("wideband"), model_error_F=d.get("model_error_F", 0.0),
                   model_choice_u_F=d.get("model_choice_u_F"), _where=where)

    @classmethod
    def from_json(cls, text: str, where: str = "curve document") -> "Curve":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise CurveDocumentError(f"{where}: not valid JSON ({exc.msg} at line {exc.lineno}, "
                                     f"column {exc.colno})") from None
        except RecursionError:
            raise CurveDocumentError(f"{where}: not valid JSON (nested too deeply to be a curve document)") from None
        return cls.from_dict(data, where)

    def save(self, path) -> Path:
        """Write the JSON document atomically (temporary file, fsync, rename)."""
        return write_bytes_atomic(path, self.to_json().encode("utf-8"))

    @classmethod
    def load(cls, path) -> "Curve":
        p = Path(path)
        try:
            text = p.read_text(encoding="utf-8")
        except OSError as exc:
            raise CurveDocumentError(f"{p}: cannot read the curve document "
                                     f"({exc.strerror or exc})") from None
        except UnicodeDecodeError:
            raise CurveDocumentError(f"{p}: not a UTF-8 text file") from None
        return cls.from_json(text, where=str(p))

    # ---- plotting ------------------------------------------------------------------------
    def plot(self, ax=None, band_k: float = 2.0, **line_kws):
        """Draw C(V) over the valid range with a k*u_C band on a matplotlib Axes."""
        from fits import plots

        return plots.plot_curve(self, ax=ax, band_k=band_k, **line_kws)

    def __repr__(self) -> str:
        lo, hi = self.valid_range_V
        who = " ".join(str(x) for x in (self.part_id, self.sample_id, self.branch) if x)
        return f"<Curve {self.model} {who} {lo:g}..{hi:g} V>"
