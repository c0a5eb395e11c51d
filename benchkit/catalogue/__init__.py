"""The in-house catalogue: parts, fixtures, lots, the codes of the trade and the standard
measurement conditions. A real bench, the library and verification read it; the simulated
bench is handed what it simulates by whoever starts it (benchkit/commands/sim.py)."""

from benchkit.catalogue.fixture import FixtureSlot, LotSample, load_fixture, load_lot
from benchkit.catalogue.parts import (
    DEMO_FIXTURE, DEMO_LOT, DEMO_PARTS, PartSpec, catalogue_dict, load_catalogue, load_parts,
)
from benchkit.catalogue.tomlfile import PartsFileError

__all__ = [
    "DEMO_FIXTURE", "DEMO_LOT", "DEMO_PARTS", "FixtureSlot", "LotSample", "PartSpec",
    "PartsFileError", "catalogue_dict", "load_catalogue", "load_fixture", "load_lot",
    "load_parts",
]
