"""The curve document (JSON): its fields and their checks.

    {"format": "benchkit-curve", "version": 1, "model", "param_names", "params",
     "covariance", "valid_range_V", "model_error_F", "model_choice_u_F", "conditions", "stats",
     "source", "origin", "part_id", "sample_id", "branch", "wideband" (optional: fits/wideband.py)}

model_error_F (optional, 0 when absent): the model-error term in farads that a fit adds to
the band when its law does not describe the data (fits.quality); u_C includes it.
model_choice_u_F (optional, null when absent): the model-choice term in farads, values at
equally spaced biases from the low to the high end of valid_range_V (straight lines between
them): where other laws predict the points as well as the chosen one, how far they part
(fits.fitting._model_choice_profile); u_C includes it.

A curve family (fits/family.py) holds such documents, one per temperature, under
{"format": "benchkit-curve-family", "version", "interpolation", "temp_range_C", "curves"}.

A curve is stored as plain data (model name, parameters, covariance, version), never as a
pickled function, so any later version can read it. Every check failure raises
CurveDocumentError naming the field: "<where>: field 'covariance': must be a 3x3 matrix ...".
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from fits import models
from fits.errors import CurveDocumentError

FORMAT = "benchkit-curve"
FAMILY_FORMAT = "benchkit-curve-family"   # C(V, T): member curves at several temperatures (fits/family.py)
VERSION = 1
ORIGINS = ("measured", "supplier claim", "lot summary")
BRANCHES = ("rising", "falling")
CONDITION_KEYS = ("freq_Hz", "ac_level_Vrms", "temp_C", "function")
STATS_KEYS = ("r2", "rms_pct_C0", "max_resid_pct_C0", "n_points", "aic", "bic")
SOURCE_KEYS = ("points_sha256", "run_id", "sample_id", "part_id", "branch")
REQUIRED = ("format", "version", "model", "param_names", "params", "covariance",
            "valid_range_V")


def _fail(where: str, field: str, problem: str):
    raise CurveDocumentError(f"{where}: field '{field}': {problem}")


def _number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(
        value, (bool, np.bool_))


def _finite(value: Any) -> bool:
    return _number(value) and math.isfinite(float(value))


def check_header(doc: Any, where: str) -> None:
    if not isinstance(doc, Mapping):
        raise CurveDocumentError(f"{where}: a curve document is a JSON object, got "
                                 f"{type(doc).__name__}")
    for key in REQUIRED:
        if key not in doc:
            _fail(where, key, "missing")
    if doc["format"] != FORMAT:
        _fail(where, "format", f"expected '{FORMAT}', got {doc['format']!r}")
    version = doc["version"]
    if not isinstance(version, int) or isinstance(version, bool) or version < 1:
        _fail(where, "version", f"must be a positive integer, got {version!r}")
    if version > VERSION:
        _fail(where, "version", f"version {version} is newer than this software reads "
                                f"(up to {VERSION}); update benchkit")


def check_model(model: Any, param_names: Any, where: str):
    """The model spec for these parameter names."""
    if not isinstance(model, str) or model not in models.names():
        _fail(where, "model", f"unknown model {model!r}; known: {', '.join(models.names())}")
    if (not isinstance(param_names, (list, tuple)) or not param_names
            or not all(isinstance(n, str) for n in param_names)):
        _fail(where, "param_names", "must be a non-empty list of parameter names")
    if len(set(param_names)) != len(param_names):
        _fail(where, "param_names", "lists a parameter twice")
    try:
        return models.get(model).for_params(tuple(param_names))
    except ValueError as exc:
        _fail(where, "param_names", str(exc))


def check_params(spec, params: Any, where: str) -> dict[str, float]:
    if not isinstance(params, Mapping):
        _fail(where, "params", "must be an object of parameter values")
    missing = [n for n in spec.param_names if n not in params]
    extra = [n for n in params if n not in spec.param_names]
    if missing:
        _fail(where, f"params.{missing[0]}", "missing")
    if extra:
        _fail(where, f"params.{extra[0]}", f"not a parameter of model '{spec.name}'")
    for n in spec.param_names:
        if not _finite(params[n]):
            _fail(where, f"params.{n}", f"must be a finite number, got {params[n]!r}")
    values = {n: float(params[n]) for n in spec.param_names}
    try:
        spec.check_params(values)
    except ValueError as exc:
        _fail(where, "params", str(exc))
    return values


def check_covariance(cov: Any, k: int, where: str) -> np.ndarray:
    shape_msg = f"must be a {k}x{k} matrix of numbers (one row per name in param_names)"
    if cov is None:
        return np.zeros((k, k))
    if isinstance(cov, np.ndarray) and cov.dtype.kind == "f":
        # a fit's own matrix: checked whole, not number by number
        if cov.shape != (k, k):
            _fail(where, "covariance", shape_msg)
        if not np.all(np.isfinite(cov)):
            _fail(where, "covariance", shape_msg + "; all finite")
        a = np.array(cov, dtype=float)
    else:
        rows = cov.tolist() if isinstance(cov, np.ndarray) else cov
        if (not isinstance(rows, (list, tuple)) or len(rows) != k
                or not all(isinstance(r, (list, tuple)) and len(r) == k for r in rows)):
            _fail(where, "covariance", shape_msg)
        if not all(_finite(x) for r in rows for x in r):
            _fail(where, "covariance", shape_msg + "; all finite")
        a = np.array(rows, dtype=float)
    scale = np.sqrt(np.outer(np.abs(np.diag(a)), np.abs(np.diag(a))))
    if np.any(np.abs(a - a.T) > 1e-9 * scale + 1e-300):
        _fail(where, "covariance", "must be symmetric")
    if np.any(np.diag(a) < 0):
        _fail(where, "covariance", "variances on the diagonal must be >= 0")
    return a


def check_range(rng: Any, spec, params: Mapping[str, float], where: str) -> tuple[float, float]:
    if (not isinstance(rng, (list, tuple)) or len(rng) != 2 or not all(_finite(x) for x in rng)
            or not float(rng[0]) < float(rng[1])):
        _fail(where, "valid_range_V", f"must be [low, high] in volts with low < high, got {rng!r}")
    lo, hi = float(rng[0]), float(rng[1])
    if spec.name == "table":
        xs, _ = spec.points(params)
        if lo < xs[0] or hi > xs[-1]:
            _fail(where, "valid_range_V", f"a table is valid only between its points "
                                          f"({xs[0]:g} V to {xs[-1]:g} V)")
    return lo, hi


def check_model_error(value: Any, where: str) -> float:
    if value is None:
        return 0.0
    if not _finite(value) or float(value) < 0:
        _fail(where, "model_error_F", f"must be a number >= 0 in farads, got {value!r}")
    return float(value)


def check_model_choice(value: Any, where: str) -> list[float] | None:
    if value is None:
        return None
    if (not isinstance(value, (list, tuple)) or len(value) < 2
            or not all(_finite(x) and float(x) >= 0 for x in value)):
        _fail(where, "model_choice_u_F", "must be a list of two or more numbers >= 0 in farads "
                                         f"(or null), got {value!r}")
    return [float(x) for x in value]


def check_conditions(cond: Any, where: str) -> dict:
    if cond is None:
        cond = {}
    if not isinstance(cond, Mapping):
        _fail(where, "conditions", "must be an object")
    out = dict(cond)
    for key in CONDITION_KEYS:
        value = out.setdefault(key, None)
        if key == "function":
            if value is not None and not isinstance(value, str):
                _fail(where, "conditions.function", f"must be text or null, got {value!r}")
        elif value is not None and not _finite(value):
            _fail(where, f"conditions.{key}", f"must be a number or null, got {value!r}")
        elif value is not None:
            out[key] = float(value)
    return out


def check_stats(stats: Any, where: str) -> dict:
    if stats is None:
        stats = {}
    if not isinstance(stats, Mapping):
        _fail(where, "stats", "must be an object")
    out = dict(stats)
    for key in STATS_KEYS:
        value = out.get(key)
        if value is not None and not _number(value):
            _fail(where, f"stats.{key}", f"must be a number or null, got {value!r}")
        if value is not None and not math.isfinite(float(value)):
            out[key] = None
    return out


def check_source(source: Any, where: str) -> dict:
    if source is None:
        source = {}
    if not isinstance(source, Mapping):
        _fail(where, "source", "must be an object")
    out = dict(source)
    for key in SOURCE_KEYS:
        value = out.setdefault(key, None)
        if value is not None and not isinstance(value, str):
            _fail(where, f"source.{key}", f"must be text or null, got {value!r}")
    if out["branch"] is not None and out["branch"] not in BRANCHES:
        _fail(where, "source.branch", f"must be 'rising', 'falling' or null, got {out['branch']!r}")
    return out


def check_labels(origin: Any, part_id: Any, sample_id: Any, branch: Any, where: str):
    if origin not in ORIGINS:
        _fail(where, "origin", f"must be one of {', '.join(repr(o) for o in ORIGINS)}, "
                               f"got {origin!r}")
    for name, value in (("part_id", part_id), ("sample_id", sample_id)):
        if value is not None and not isinstance(value, str):
            _fail(where, name, f"must be text or null, got {value!r}")
    if branch is not None and branch not in BRANCHES:
        _fail(where, "branch", f"must be 'rising', 'falling' or null, got {branch!r}")


def check_wideband(value: Any, where: str):
    """The optional wideband model (impedance against frequency per bias), or None."""
    if value is None:
        return None
    from fits.wideband import WidebandModel

    if isinstance(value, WidebandModel):
        return value
    return WidebandModel.from_dict(value, where)


def json_safe(value):
    """NaN/inf -> None, numpy scalars -> Python, recursively (JSON has no NaN)."""
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [json_safe(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(float(value)) else None
    return value
