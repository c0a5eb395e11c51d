"""Fixtures and lots: which sample sits on which scanner channel, and an incoming lot's samples.

fixture file::

    fixture_id = "..."              # optional
    description = "..."             # optional
    [[channel]]
    channel = 1                     # scanner channel 1..16
    sample_id = "FX-01"
    part_id = "BD-1001"

lot file::

    lot_id = "LOT-2611"
    part_id = "BD-1004"             # the part every sample of the lot is
    description = "..."             # optional
    [[sample]]
    sample_id = "LOT-2611-01"
    channel = 1
    C_scale = 1.03                  # this sample's C at 0 V, 25 degC, 1000 h / nominal
    field_scale = 0.97              # multiplies the part's characteristic field (shape spread)
    hours_since_heat_h = 400.0      # optional; default the part's own

`C_scale` and `field_scale` describe the lot's spread for the simulated bench; a real lot
file may leave them at 1.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from benchkit.catalogue.parts import PartSpec
from benchkit.catalogue.tomlfile import Checker, read_toml

SCANNER_CHANNELS = range(1, 17)  # the fixture's scanner has 16 channels (instruments/COMMANDS.md)


@dataclass(frozen=True)
class FixtureSlot:
    """One sample sitting on one scanner channel of the bias fixture."""

    channel: int
    sample_id: str
    part_id: str


@dataclass(frozen=True)
class LotSample:
    """One sample of an incoming lot, with its own part-to-part spread."""

    channel: int
    sample_id: str
    part_id: str
    lot_id: str
    C_scale: float                     # C(0 V, 25 degC, 1000 h) / nominal_C_F
    field_scale: float = 1.0           # multiplies the part's characteristic field
    hours_since_heat_h: float | None = None  # None: the part's own


def _check_part_ref(ck, where, part_id, parts):
    if parts is not None and part_id not in parts:
        ids = list(parts)
        known = ", ".join(ids[:12]) + (", ..." if len(ids) > 12 else "") if ids else "none"
        raise ck.field_fail(where, "part_id", f"unknown part (parts on file: {known})", part_id)


def _slot_common(ck, entry, where, seen_ch, seen_ids):
    ch = ck.integer(entry, "channel", where, SCANNER_CHANNELS)
    if ch in seen_ch:
        raise ck.field_fail(where, "channel", f"channel already used by {seen_ch[ch]}", ch)
    sid = ck.string(entry, "sample_id", where)
    if sid in seen_ids:
        raise ck.field_fail(where, "sample_id", "duplicate sample id", sid)
    seen_ch[ch] = sid
    seen_ids.add(sid)
    return ch, sid


def load_fixture(path: Path | str, parts: Mapping[str, PartSpec] | None = None
                 ) -> list[FixtureSlot]:
    """Read a fixture file into slots sorted by channel.

    With `parts` every part_id must be on file; without, that cross-check is skipped.
    """
    ck = Checker(path)
    doc = read_toml(path)
    ck.known(doc, ("fixture_id", "description", "channel"), "")
    for name in ("fixture_id", "description"):
        if name in doc:
            ck.string(doc, name, "")
    slots, seen_ch, seen_ids = [], {}, set()
    for n, entry in enumerate(ck.array_of_tables(doc, "channel"), start=1):
        sid_raw = entry.get("sample_id")
        where = f"channel entry {n} ({sid_raw})" if isinstance(sid_raw, str) else \
            f"channel entry {n}"
        ck.known(entry, ("channel", "sample_id", "part_id"), where)
        ch, sid = _slot_common(ck, entry, where, seen_ch, seen_ids)
        pid = ck.string(entry, "part_id", where)
        _check_part_ref(ck, where, pid, parts)
        slots.append(FixtureSlot(ch, sid, pid))
    return sorted(slots, key=lambda s: s.channel)


def load_lot(path: Path | str, parts: Mapping[str, PartSpec] | None = None
             ) -> list[LotSample]:
    """Read a lot file into samples sorted by channel (a lot is one part, many samples)."""
    ck = Checker(path)
    doc = read_toml(path)
    ck.known(doc, ("lot_id", "part_id", "description", "sample"), "")
    lot_id = ck.string(doc, "lot_id", "")
    pid = ck.string(doc, "part_id", "")
    _check_part_ref(ck, "", pid, parts)
    if "description" in doc:
        ck.string(doc, "description", "")
    samples, seen_ch, seen_ids = [], {}, set()
    for n, entry in enumerate(ck.array_of_tables(doc, "sample"), start=1):
        sid_raw = entry.get("sample_id")
        where = f"sample {n} ({sid_raw})" if isinstance(sid_raw, str) else f"sample {n}"
        ck.known(entry, ("sample_id", "channel", "C_scale", "field_scale",
                         "hours_since_heat_h"), where)
        ch, sid = _slot_common(ck, entry, where, seen_ch, seen_ids)
        c_scale = ck.number(entry, "C_scale", where)
        f_scale = ck.number(entry, "field_scale", where)
        hours = None
        if "hours_since_heat_h" in entry:
            hours = ck.number(entry, "hours_since_heat_h", where)
        samples.append(LotSample(ch, sid, pid, lot_id, c_scale, f_scale, hours))
    return sorted(samples, key=lambda s: s.channel)
