"""The bench run: plan, bench file, engine, dwell policies, safety, run log, progress, and the
run-directory reader.

    plan.py        validated plans (before any output)      benchfile.py  bench files, instruments
    run.py         start, resume, the shutdown to 0 V      engine.py     the loop over points
    point.py       one point's measurement and row          passes.py     adaptive passes
    recovery.py    link-recovery bookkeeping                resume.py     what a resume checks
    dwell.py       fixed dwell / settle detection          settle.py     the settle rules
    adaptive.py    where the next points go                 safety.py     signals, last resort
    runlog.py      points.csv and run.json                  progress.py   the progress line
    sources.py     where the instruments come from          rundir.py     reading a run directory

The public entry points load on first use, so that `benchkit.sweep.plan` can be imported (by
the CLI, to reject bad input) without numpy.
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "RunResult": "benchkit.sweep.run",
    "run_sweep": "benchkit.sweep.run",
    "resume_sweep": "benchkit.sweep.run",
    "stored_bench": "benchkit.sweep.run",
    "measured_point": "benchkit.sweep.adaptive",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'benchkit.sweep' has no attribute {name!r}")
