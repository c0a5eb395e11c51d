"""The library's one doorway into fits/: curve documents in and out, model specs, fits errors as UserError.

fits raises its own ValueError subclasses; the benchkit layer turns them into one-line user
errors here, naming where the document came from.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from benchkit.bounded import MAX_DEPTH, check_id, data_depth, loads_json
from benchkit.errors import UserError


def curve_class():
    from fits import Curve  # imported on first use: the CLI starts without scipy

    return Curve


def fit_branches(*args, **kwargs):
    from fits import fit_branches as fn

    return fn(*args, **kwargs)


def fits_errors() -> tuple[type[BaseException], ...]:
    from fits.errors import FitsError

    return (FitsError,)


def _as_user_error(exc: Exception, where: str) -> UserError:
    """fits messages already start with `where`; name the file once."""
    text = str(exc)
    return UserError(text if text.startswith(where) else f"{where}: {text}")


def _check_ids(doc: Any, where: str) -> None:
    """A curve's ids reach terminals, CSV headers and web pages: bounded, printable
    (benchkit.bounded, the same rule as the plan's and the run's ids)."""
    if isinstance(doc, dict):
        for field in ("part_id", "sample_id", "branch", "origin"):
            if isinstance(doc.get(field), str):
                check_id(doc[field], where, field)
    if data_depth(doc) > MAX_DEPTH:
        raise UserError(f"{where}: nested deeper than {MAX_DEPTH} levels; not a curve document")


def curve_from_dict(doc: dict[str, Any], where: str):
    _check_ids(doc, where)
    try:
        return curve_class().from_dict(doc, where)
    except fits_errors() as exc:
        raise _as_user_error(exc, where) from None
    except (KeyError, TypeError, ValueError) as exc:
        raise UserError(f"{where}: not a usable curve document ({exc})") from None


def curve_from_json(text: str, where: str):
    """A curve document's text, parsed once with the readers' bounds."""
    return curve_from_dict(loads_json(text, where, "curve document"), where)


def curve_document(curve) -> dict[str, Any]:
    """The curve's JSON document as plain data (what the library stores and exports)."""
    return json.loads(curve.to_json())


def canonical_json(doc: dict[str, Any]) -> str:
    """Key-sorted, compact JSON: the same curve always gives the same text (and hash)."""
    return json.dumps(doc, sort_keys=True, separators=(",", ":"), allow_nan=False)


def content_sha256(doc: dict[str, Any]) -> str:
    return hashlib.sha256(canonical_json(doc).encode("utf-8")).hexdigest()


def model_spec(model: str, param_names=None):
    """The fits ModelSpec of a stored curve (the variant matching its parameter names)."""
    from fits import models
    try:
        spec = models.get(model)
        if param_names is not None and hasattr(spec, "for_params"):
            spec = spec.for_params(tuple(param_names))
    except (KeyError, ValueError) as exc:
        raise UserError(f"curve model {model!r}: {exc}") from None
    return spec

