"""The simulated bench: an LCR meter, a DC bias supply, a scanner and a thermometer over TCP.

    from instruments.sim import SimBench, Fault
    with SimBench(parts, slots, clock=VirtualClock()) as bench:   # parts: {id: SimPart}
        bench.resources["meter"]   # "TCPIP0::127.0.0.1::PORT::SOCKET"

The bench has no catalogue of its own: whoever starts it hands it the parts it simulates
(instruments.sim.simpart.SimPart). The names are loaded on first use, so that
`instruments.sim.faults` or `.simpart` can be imported without numpy and scipy (a CLI rejects
bad input before loading the physics).
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "SimBench": "instruments.sim.bench",
    "SimBenchError": "instruments.sim.bench",
    "SimPart": "instruments.sim.simpart",
    "SimPartError": "instruments.sim.simpart",
    "Fault": "instruments.sim.faults",
    "FaultSpecError": "instruments.sim.faults",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'instruments.sim' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
