"""The one Jinja2 environment of benchkit: the web pages and the HTML verification report.

Autoescaping is on for every .html template, so part ids, file names and notes (free text)
are always escaped; filters give numbers in engineering form with their unit.
"""

from __future__ import annotations

import functools
import math

from benchkit.units import format_value


def _eng(x, unit: str = "") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format_value(float(x), unit) if unit else f"{float(x):.6g}"


def _num(x, scale: float = 1.0, digits: int = 5) -> str:
    """x*scale to `digits` significant digits; '-' for none or not finite (the report's style)."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x * scale:.{digits}g}"


def _cls(verdict) -> str:
    """CSS class of a verdict ('not decidable' -> 'notdecidable')."""
    return str(verdict).replace(" ", "")


@functools.lru_cache(maxsize=1)
def environment():
    """The shared environment (templates in benchkit/web/templates)."""
    from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

    env = Environment(loader=PackageLoader("benchkit.web", "templates"),
                      autoescape=select_autoescape(["html"]), undefined=StrictUndefined,
                      trim_blocks=True, lstrip_blocks=True)
    env.filters.update(eng=_eng, num=_num, verdict_class=_cls)
    return env


def render(name: str, **context) -> str:
    return environment().get_template(name).render(**context)
