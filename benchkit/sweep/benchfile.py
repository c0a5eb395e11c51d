"""The bench file: which instrument answers at which address, and which sample sits where.

Read by `benchkit measure --bench`, written by `benchkit sim --bench-file` (DEVELOPERS.md,
"File formats"). Opening the bench checks every instrument answers (*IDN?) before any voltage is
applied; an address that is malformed, refused or silent is bad input: one line, exit 2.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from benchkit.bounded import check_id, loads_toml, safe_repr, unknown_key
from benchkit.errors import UserError
from benchkit.sweep.plan import MAX_CHANNEL, SampleRef
from instruments.roles import ALL_ROLES, DEFAULT_PROFILES, OPTIONAL_ROLES, ROLES

DEFAULT_VISA_LIBRARY = "@py"   # pyvisa-py; a lab's vendor VISA: "@ivi" or the library's path


@dataclass(frozen=True)
class InstrumentRef:
    role: str
    resource: str
    profile: str  # shipped profile name or absolute path of a profile file
    timeout_s: float | None = None
    visa_library: str | None = None  # None: the bench file's

    def to_dict(self) -> dict:
        out = {"resource": self.resource, "profile": self.profile, "timeout_s": self.timeout_s}
        if self.visa_library is not None:
            out["visa_library"] = self.visa_library
        return out


@dataclass(frozen=True)
class BenchFile:
    source: str
    instruments: Mapping[str, InstrumentRef]
    channels: tuple[SampleRef, ...] = field(default_factory=tuple)
    visa_library: str = DEFAULT_VISA_LIBRARY
    bias_source: str = "supply"  # "meter": no supply, the meter's internal bias biases the part

    def to_dict(self) -> dict:
        return {
            "source": self.source,
            "visa_library": self.visa_library,
            "bias_source": self.bias_source,
            "instruments": {r: i.to_dict() for r, i in self.instruments.items()},
            "channels": [{"channel": c.channel, "sample_id": c.sample_id, "part_id": c.part_id}
                         for c in self.channels],
        }


_CHANNEL_KEYS = ("channel", "sample_id", "part_id", "hours_since_heat_h")


def load_bench(path: str | Path) -> BenchFile:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{p}: bench file not found; write one with 'benchkit sim --bench-file' or by hand") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: cannot read bench file ({exc})") from None
    return parse_bench_text(text, str(p), base_dir=p.resolve().parent)


def parse_bench_text(text: str, where: str, base_dir: Path | None = None) -> BenchFile:
    raw = loads_toml(text, where, "bench file")
    return bench_from_dict(raw, where, base_dir)


def bench_from_dict(raw: Mapping[str, Any], where: str, base_dir: Path | None = None) -> BenchFile:
    """Validate a bench mapping (TOML layout, or the 'bench' record of run.json)."""
    if not isinstance(raw, Mapping):
        raise UserError(f"{where}: a bench must be a table with [instrument.*] and [[channel]]")
    unknown = sorted(set(raw) - {"instrument", "instruments", "channel", "channels", "source", "kind",
                                 "visa_library", "bias_source"}, key=str)
    if unknown:
        raise unknown_key(where, unknown[0], ("instrument", "channel", "visa_library"), "table")
    visa_library = _visa_library(raw.get("visa_library", DEFAULT_VISA_LIBRARY), where)
    inst_raw = raw.get("instrument", raw.get("instruments"))
    if not isinstance(inst_raw, Mapping):
        raise UserError(f"{where}: missing [instrument.meter], [instrument.supply], [instrument.scanner], [instrument.thermometer]")
    instruments: dict[str, InstrumentRef] = {}
    for role in ROLES + tuple(r for r in OPTIONAL_ROLES if r in inst_raw):  # a chamber is optional
        t = inst_raw.get(role)
        if t is None and role == "supply":
            continue   # no supply: the meter's internal bias (checked below)
        if not isinstance(t, Mapping):
            raise UserError(f"{where}: missing table [instrument.{role}] with resource = \"...\"")
        extra = sorted(set(t) - {"resource", "profile", "timeout_s", "visa_library"}, key=str)
        if extra:
            raise unknown_key(f"{where}: [instrument.{role}]", extra[0],
                              ("resource", "profile", "timeout_s", "visa_library"))
        res = t.get("resource")
        if not isinstance(res, str) or not res.strip() or len(res) > 256:
            raise UserError(f"{where}: [instrument.{role}]: field 'resource' must be a VISA resource string, e.g. TCPIP0::127.0.0.1::5025::SOCKET")
        check_resource_string(res, f"{where}: [instrument.{role}]")
        prof = t.get("profile", DEFAULT_PROFILES[role])
        if not isinstance(prof, str) or not prof.strip() or len(prof) > 4096 or "\x00" in prof:
            raise UserError(f"{where}: [instrument.{role}]: field 'profile' must be a profile name or a .toml path")
        if (prof.endswith(".toml") or "/" in prof) and base_dir is not None and not Path(prof).is_absolute():
            prof = str((base_dir / prof).resolve())
        tmo = t.get("timeout_s")
        if tmo is not None and (isinstance(tmo, bool) or not isinstance(tmo, (int, float))
                                or not 0 < tmo <= 600):
            raise UserError(f"{where}: [instrument.{role}]: field 'timeout_s' must be a positive number "
                            "of seconds, at most 600")
        lib = t.get("visa_library")
        lib = None if lib is None else _visa_library(lib, f"{where}: [instrument.{role}]")
        instruments[role] = InstrumentRef(role, res.strip(), prof, None if tmo is None else float(tmo), lib)
    extra_roles = sorted(set(inst_raw) - set(ALL_ROLES), key=str)
    if extra_roles:
        raise unknown_key(where, extra_roles[0], ALL_ROLES, "instrument role")
    chans_raw = raw.get("channel", raw.get("channels", []))
    if not isinstance(chans_raw, list):
        raise UserError(f"{where}: 'channel' must be an array of [[channel]] tables")
    channels: list[SampleRef] = []
    seen_ch: set[int] = set()
    seen_id: set[str] = set()
    for i, c in enumerate(chans_raw, 1):
        if not isinstance(c, Mapping):
            raise UserError(f"{where}: channel entry {i}: must be a table with channel, sample_id, part_id")
        extra = sorted(set(c) - set(_CHANNEL_KEYS), key=str)
        if extra:
            raise unknown_key(f"{where}: channel entry {i}", extra[0], _CHANNEL_KEYS)
        ch, sid, pid = c.get("channel"), c.get("sample_id"), c.get("part_id")
        if isinstance(ch, bool) or not isinstance(ch, int) or not 1 <= ch <= MAX_CHANNEL:
            raise UserError(f"{where}: channel entry {i}: field 'channel' must be a positive whole number "
                            f"at most {MAX_CHANNEL} (got {safe_repr(ch)})")
        for name, v in (("sample_id", sid), ("part_id", pid)):
            if not isinstance(v, str) or not v.strip():
                raise UserError(f"{where}: channel entry {i}: field '{name}' must be a non-empty string")
            check_id(v, f"{where}: channel entry {i}", name)
        if ch in seen_ch or sid in seen_id:
            raise UserError(f"{where}: channel entry {i}: channel {ch} or sample {sid!r} appears twice")
        age = c.get("hours_since_heat_h")
        if age is not None and (isinstance(age, bool) or not isinstance(age, (int, float))
                                or not math.isfinite(age) or not 0 < age <= 1e6):
            raise UserError(f"{where}: channel entry {i}: field 'hours_since_heat_h' must be a "
                            "positive number of hours since the last de-aging heat")
        seen_ch.add(ch)
        seen_id.add(sid)
        channels.append(SampleRef(sid, pid, ch, None if age is None else float(age)))
    bias_source = "supply" if "supply" in instruments else _meter_bias_source(instruments["meter"], where)
    return BenchFile(where, instruments, tuple(sorted(channels, key=lambda s: s.channel)),
                     visa_library, bias_source)


def _visa_library(value: Any, where: str) -> str:
    if not isinstance(value, str) or not value.strip() or "\n" in value:
        raise UserError(f"{where}: visa_library must name a VISA library: \"@py\" (pyvisa-py, the "
                        "default), \"@ivi\" (the vendor VISA installed here) or a library's path")
    return value.strip()


def _meter_bias_source(meter: InstrumentRef, where: str) -> str:
    """A bench without a supply biases with the meter: its profile must allow it."""
    from instruments.drivers import load_profile
    from instruments.drivers.errors import ProfileError

    try:
        prof = load_profile(meter.profile, kind="lcr-meter")
    except ProfileError as exc:
        raise UserError(f"{where}: [instrument.meter]: {exc}") from None
    if not prof.may_use("internal_bias"):
        raise UserError(f"{where}: missing table [instrument.supply], and the meter's profile "
                        f"'{prof.name}' has no internal bias the engine may use (bias_V, bias_on and "
                        "[capabilities] engine_may_use, PROFILES.md); add a supply to the bench file")
    return "meter"


def check_resource_string(resource: str, where: str) -> None:
    """Refuse what pyvisa cannot parse, with an example of what it can."""
    from pyvisa import rname

    from instruments.drivers import normalise_resource

    example = "write e.g. TCPIP0::127.0.0.1::5025::SOCKET"
    try:
        parsed = rname.parse_resource_name(normalise_resource(resource))
    except Exception as exc:  # pyvisa raises InvalidResourceName (a ValueError) or others
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise UserError(f"{where}: resource {resource!r} is not a VISA resource string ({detail}); {example}") from None
    port = getattr(parsed, "port", None)
    if port is not None and not (str(port).isdigit() and 1 <= int(port) <= 65535):
        raise UserError(f"{where}: resource {resource!r}: port {port!r} is not a TCP port number 1 .. 65535; {example}")


# --------------------------------------------------------------------------- opening


@dataclass
class Instruments:
    """The four open drivers of one bench (and, for the record, what they said they are)."""

    meter: Any
    supply: Any
    scanner: Any
    thermometer: Any
    refs: Mapping[str, InstrumentRef] = field(default_factory=dict)
    chamber: Any = None   # optional: a bench without a chamber measures at room temperature

    def by_role(self) -> dict[str, Any]:
        return {r: getattr(self, r) for r in ALL_ROLES if getattr(self, r) is not None}

    def record(self) -> dict:
        """run.json 'instruments': resource, profile and *IDN? answer per role."""
        out = {}
        for role, drv in self.by_role().items():
            ref = self.refs.get(role)
            out[role] = {
                "resource": ref.resource if ref else getattr(drv, "resource", None),
                "profile": ref.profile if ref else getattr(getattr(drv, "profile", None), "source", None),
                "idn": getattr(drv, "idn", None),
            }
            if hasattr(drv, "meter"):   # MeterBias: the bias source is the meter's own
                out[role]["bias_source"] = "meter internal bias"
        return out


@contextlib.contextmanager
def open_instruments(bench: BenchFile, timeout_s: float | None = None):
    """Open and identify all four instruments; bad address or silence -> UserError.

    Each instrument is reached through its VISA library (its own visa_library, else the bench
    file's); a bench without a supply gets the meter's internal bias as its bias source.
    """
    import pyvisa

    from instruments.drivers import BiasSupply, LCRMeter, MeterBias, Scanner, TemperatureChamber, Thermometer

    classes = {"meter": LCRMeter, "supply": BiasSupply, "scanner": Scanner, "thermometer": Thermometer,
               "chamber": TemperatureChamber}
    with contextlib.ExitStack() as stack:
        managers: dict[str, Any] = {}

        def manager(lib: str, role: str):
            if lib not in managers:
                try:
                    managers[lib] = pyvisa.ResourceManager(lib)
                except Exception as exc:
                    raise UserError(f"{bench.source}: [instrument.{role}]: VISA library {lib!r} did not "
                                    f"load ({_one_line(exc)}); check visa_library in the bench file "
                                    "(\"@py\" is pyvisa-py) and that this library is installed") from None
                stack.callback(_close_quietly, managers[lib])
            return managers[lib]

        opened: dict[str, Any] = {}
        for role in (r for r in ALL_ROLES if r in bench.instruments or (r == "supply" and bench.bias_source == "meter")):
            if role == "supply" and bench.bias_source == "meter":
                opened[role] = stack.enter_context(MeterBias(opened["meter"]))
                continue
            ref = bench.instruments[role]
            tmo = ref.timeout_s if ref.timeout_s is not None else timeout_s
            rm = manager(ref.visa_library or bench.visa_library, role)
            kwargs = {"profile": ref.profile, "rm": rm, "role": role}
            if tmo is not None:
                kwargs["timeout_s"] = tmo
            try:
                drv = classes[role](ref.resource, **kwargs)
                opened[role] = stack.enter_context(drv)
            except UserError:
                raise
            except Exception as exc:
                text = _one_line(exc)
                hint = "" if "check" in text else "; check the address, that the instrument is on and answers, and the profile"
                raise UserError(f"{bench.source}: [instrument.{role}]: {text}{hint}") from None
        yield Instruments(refs=dict(bench.instruments), **opened)


def _close_quietly(obj) -> None:
    try:
        obj.close()
    except Exception:
        pass


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__
