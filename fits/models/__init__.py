"""Registry of C(V) models by name.

    from fits import models
    spec = models.get("tanh")            # or get("poly", degree=4, even=True)
    spec.C(V, **params); spec.Q(V, **params); spec.spice_charge(params, "V(a,b)")
    f, free = spec.as_positional(fixed)  # for scipy.optimize.curve_fit(f, V, C, p0=...)
    models.names()    # ['genjohnson', 'landau', 'poly', 'spline', 'table', 'tanh']

A new model is one module with a ModelSpec subclass and one register() call below.
"""

from __future__ import annotations

from fits.errors import ModelError
from fits.models.base import ModelSpec, Variant
from fits.models.genjohnson import GenJohnsonModel
from fits.models.landau import LandauModel
from fits.models.poly import PolyModel
from fits.models.spline import SplineModel
from fits.models.table import TableModel
from fits.models.tanh import TanhModel

_REGISTRY: dict[str, ModelSpec] = {}


def register(spec: ModelSpec) -> ModelSpec:
    """Add a model under spec.name; a name can be registered once."""
    if not spec.name:
        raise ModelError("a model needs a name to be registered")
    if spec.name in _REGISTRY and _REGISTRY[spec.name] is not spec:
        raise ModelError(f"a model named '{spec.name}' is already registered")
    _REGISTRY[spec.name] = spec
    return spec


def get(name: str, **options) -> ModelSpec:
    """The model registered as `name`, configured by options (e.g. poly degree)."""
    try:
        spec = _REGISTRY[name]
    except KeyError:
        raise KeyError(f"no model named '{name}'; known models: {', '.join(names())}") from None
    return spec.configure(**options) if options else spec


def names() -> list[str]:
    """Registered model names, sorted."""
    return sorted(_REGISTRY)


for _spec in (TanhModel(), PolyModel(), LandauModel(), GenJohnsonModel(), SplineModel(),
              TableModel()):
    register(_spec)

__all__ = ["ModelSpec", "Variant", "register", "get", "names"]
