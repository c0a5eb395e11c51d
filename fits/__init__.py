"""fits: compact C(V) models of ceramic capacitors, fitting with honest uncertainties, and
curve documents.

    from fits import models, fit_sweep, fit_branches, Curve, FitError, OutOfRange
    out = fit_sweep(bias_V, C_F, sigma_F, model="auto")   # -> FitOutcome
    out.curve.C(3.3), out.curve.u_C(3.3), out.ranking, print(out.report)
    out.curve.save("curve.json"); Curve.load("curve.json")

fits never imports instruments/ or benchkit/ (reading run directories is benchkit's job).
"""

from fits import models
from fits.curve import Curve
from fits.errors import CurveDocumentError, FitError, FitsError, ModelError, OutOfRange
from fits.fitting import AUTO_MODELS, BranchOutcome, FitOutcome, fit_branches, fit_sweep

__all__ = [
    "AUTO_MODELS",
    "BranchOutcome",
    "Curve",
    "CurveDocumentError",
    "FitError",
    "FitOutcome",
    "FitsError",
    "ModelError",
    "OutOfRange",
    "fit_branches",
    "fit_sweep",
    "models",
]
