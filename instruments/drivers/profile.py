"""Instrument profiles: the command strings and limits of one kind of instrument, in TOML.

A driver knows *what* a setting means (a frequency in Hz, a bias in V); the profile says
*how* this instrument spells it and which range it accepts, so that a new meter needs a
profile, not code. The rules are in PROFILES.md; every rule is checked here at load time so
that a typo in a profile fails before the bench is touched, with the file and field named.
"""

from __future__ import annotations

import functools
import math
import re
import string
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from .errors import ProfileError, UnsafeCommandError

PROFILE_DIR = Path(__file__).resolve().parent / "profiles"

KINDS = ("lcr-meter", "dc-supply", "scanner", "thermometer", "chamber")

# IEEE 488.2 common commands and the SCPI-1999 error queue; overridable per profile.
COMMON_DEFAULTS = {
    "identify": "*IDN?",
    "clear_status": "*CLS",
    "operation_complete": "*OPC?",
    "next_error": "SYSTem:ERRor?",
}

TERMINATIONS = {"\n": "LF", "\r\n": "CR LF", "\r": "CR"}
SETTING_TYPES = ("float", "enum", "bool")
MEASURE_MODES = ("init-fetch", "read")

_MNEMONIC = r"[A-Za-z][A-Za-z0-9]*"
_HEADER_RE = re.compile(rf"^(\*[A-Za-z]+\??|:?{_MNEMONIC}(:{_MNEMONIC})*\??)$")
# Characters allowed in the parameter part of a template outside the {placeholders}.
_PARAM_LITERAL_RE = re.compile(r"^[A-Za-z0-9 .,+\-()@:]*$")
# Tokens an enum or boolean may put into a command.
_TOKEN_RE = re.compile(r"^[A-Za-z0-9_+\-.]+$")
# What any finished command may contain: printable ASCII without ';' (one message unit).
_SAFE_COMMAND_RE = re.compile(r"^[\x20-\x3a\x3c-\x7e]+$")


@functools.lru_cache(maxsize=4096)
def _safe_text(command: str) -> bool:
    """The match, remembered: a sweep sends the same few texts again and again, each checked
    where it is formatted, sent and written."""
    return _SAFE_COMMAND_RE.match(command) is not None


def check_command_text(command: str, where: str = "command") -> str:
    """Refuse a command that could carry a second command, a terminator or control bytes."""
    if not isinstance(command, str) or not _safe_text(command):
        raise UnsafeCommandError(
            f"{where}: refusing to send {command!r}: a command must be one line of printable "
            "ASCII without ';' (one SCPI message unit)")
    return command


class CommandTemplate:
    """One SCPI message unit with named placeholders, e.g. ``ROUTe:CLOSe (@{channel})``."""

    def __init__(self, text: str, allowed_fields: tuple[str, ...], where: str):
        if not isinstance(text, str) or not text.strip():
            raise ProfileError(f"{where}: must be a non-empty string")
        if text != text.strip() or "  " in text:
            raise ProfileError(f"{where}: {text!r} has stray spaces; write 'HEADer <params>'")
        header, _, params = text.partition(" ")
        if not _HEADER_RE.match(header):
            raise ProfileError(
                f"{where}: {header!r} is not a SCPI header (mnemonics of letters and digits "
                "joined by ':', optional trailing '?', or a '*' common command)")
        fields: list[tuple[str, str]] = []
        try:
            parts = list(string.Formatter().parse(params))
        except ValueError as exc:
            raise ProfileError(f"{where}: {text!r}: bad placeholder ({exc})") from None
        for literal, name, spec, conversion in parts:
            if not _PARAM_LITERAL_RE.match(literal):
                raise ProfileError(
                    f"{where}: {text!r}: parameter text may hold only letters, digits, spaces "
                    "and . , + - ( ) @ : outside placeholders (no ';', quotes or newlines)")
            if name is None:
                continue
            if name not in allowed_fields or conversion:
                allowed = ", ".join("{" + f + "}" for f in allowed_fields) or "no placeholders"
                raise ProfileError(f"{where}: {text!r}: placeholder {{{name}}} not allowed "
                                   f"here (allowed: {allowed})")
            fields.append((name, spec or ""))
        self.text = text
        self.header = header
        self.is_query = header.endswith("?")
        self.fields = tuple(n for n, _ in fields)
        self.specs = dict(fields)
        self._parts = parts

    def format(self, **values: Any) -> str:
        """Fill the placeholders with already validated values and check the result."""
        return check_command_text(self.text.format(**values), self.text)

    def fill(self, **texts: str) -> str:
        """Put already formatted text into the placeholders (their format specs ignored)."""
        out = []
        for literal, name, _spec, _conv in self._parts:
            out.append(literal)
            if name is not None:
                out.append(texts[name])
        return check_command_text(self.header + (" " + "".join(out) if out else ""),
                                  self.text)

    def __repr__(self) -> str:
        return f"CommandTemplate({self.text!r})"


@dataclass(frozen=True)
class SettingSpec:
    """How one setting is spelled and limited on this instrument."""

    name: str
    type: str                          # float | enum | bool
    query: CommandTemplate
    set: CommandTemplate | None
    read_only: bool
    min: float | None = None
    max: float | None = None
    values: tuple[str, ...] = ()       # enum: driver-level names
    tokens: Mapping[str, str] = field(default_factory=dict)  # enum name -> instrument token
    true_token: str = "ON"
    false_token: str = "OFF"
    doc: str = ""

    def value_from_token(self, token: str) -> str | None:
        """Enum reply -> driver-level name (case-insensitive, quotes ignored), or None."""
        t = token.strip().strip('"').strip("'").upper()
        for name in self.values:
            if t == self.tokens[name].upper() or t == name.upper():
                return name
        return None


@dataclass(frozen=True)
class Profile:
    """A loaded, validated profile."""

    name: str
    kind: str
    description: str
    source: str
    read_termination: str
    write_termination: str
    timeout_s: float | None
    serial: Mapping[str, Any]
    common: Mapping[str, CommandTemplate]
    settings: Mapping[str, SettingSpec]
    commands: Mapping[str, CommandTemplate]
    options: Mapping[str, Any]
    setup: tuple[CommandTemplate, ...] = ()
    shutdown: tuple[CommandTemplate, ...] = ()
    capabilities: Mapping[str, bool] = field(default_factory=dict)  # present -> engine may use
    reply: "ReplyLayout | None" = None

    def has(self, capability: str) -> bool:
        """The instrument has this optional capability (its settings/commands are spelled)."""
        return capability in self.capabilities

    def may_use(self, capability: str) -> bool:
        """The instrument has it and the profile lets the engine use it."""
        return bool(self.capabilities.get(capability, False))


REPLY_FIELDS = ("primary", "secondary", "status", "ignore")
REPLY_SEPARATORS = (",", ";", " ", "\t")
UNIT_MODES = ("none", "suffix")


@dataclass(frozen=True)
class ReplyLayout:
    """How a measurement reply is laid out: fields in order, separator, status, units."""

    fields: tuple[str, ...] = ("primary", "secondary")
    separator: str = ","
    status_ok: tuple[str, ...] = ()
    status_overload: tuple[str, ...] = ()
    units: str = "none"

    @property
    def picture(self) -> str:
        return self.separator.join(f"<{f}>" for f in self.fields)


# --------------------------------------------------------------------------------------------
# loading

_TOP_KEYS = {"profile", "link", "common", "setting", "measure", "route", "sequence",
             "capabilities", "list"}
_PROFILE_KEYS = {"name", "kind", "description", "base"}
_LINK_KEYS = {"read_termination", "write_termination", "timeout_s", "baud_rate", "data_bits",
              "parity", "stop_bits"}
_SETTING_KEYS = {"type", "query", "set", "read_only", "min", "max", "values", "map", "true",
                 "false", "doc"}
_MEASURE_KEYS = {"mode", "trigger", "fetch", "read", "overload_above", "reply"}
_REPLY_KEYS = {"fields", "separator", "status_ok", "status_overload", "units"}
_SEQUENCE_KEYS = {"setup", "shutdown"}
_LIST_KEYS = {"freq", "bias", "trigger", "fetch", "max_points"}

# Optional capabilities per kind: what must be spelled for each to be present.
CAPABILITIES = {
    "lcr-meter": {
        "level_monitor": ("setting", ("ac_dut_Vrms",)),
        "level_control": ("setting", ("level_control_on",)),
        "internal_bias": ("setting", ("bias_V", "bias_on")),
        "bias_monitor": ("setting", ("bias_measured_V", "bias_current_A")),
        "list_sweep": ("list", ()),
    },
}
_ROUTE_KEYS = {"first_channel", "last_channel", "open_all", "close", "open", "is_closed"}


def resolve_profile_path(profile: str | Path, relative_to: Path | None = None) -> Path:
    """A shipped profile name ('generic-lcr') or a path to a .toml file."""
    if isinstance(profile, Path) or str(profile).endswith(".toml") or "/" in str(profile) \
            or "\\" in str(profile):
        p = Path(profile)
        if not p.is_absolute() and relative_to is not None:
            p = relative_to / p
        return p
    if not re.match(r"^[A-Za-z0-9_.\-]+$", str(profile)):
        raise ProfileError(f"profile {profile!r}: not a profile name or a .toml path")
    return PROFILE_DIR / f"{profile}.toml"


def shipped_profiles() -> list[str]:
    """Names of the profiles shipped with benchkit."""
    return sorted(p.stem for p in PROFILE_DIR.glob("*.toml"))


def _read_toml(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        hint = f"; shipped profiles: {', '.join(shipped_profiles())}"
        raise ProfileError(f"{path}: no such profile file{hint}") from None
    except OSError as exc:
        raise ProfileError(f"{path}: cannot read profile: {exc}") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{path}: not valid TOML: {exc}") from None


def _merge(base: dict, over: dict) -> dict:
    out = dict(base)
    for k, v in over.items():
        out[k] = _merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def _load_raw(path: Path, seen: tuple[Path, ...]) -> dict:
    path = path.resolve()
    if path in seen:
        chain = " -> ".join(str(p) for p in (*seen, path))
        raise ProfileError(f"{path}: profile bases form a loop: {chain}")
    raw = _read_toml(path)
    head = raw.get("profile", {})
    base = head.get("base") if isinstance(head, dict) else None
    if base is None:
        return raw
    if not isinstance(base, str):
        raise ProfileError(f"{path}: [profile] base: must be a profile name or .toml path")
    base_raw = _load_raw(resolve_profile_path(base, path.parent), (*seen, path))
    merged = _merge(base_raw, raw)
    merged["profile"] = {k: v for k, v in merged["profile"].items() if k != "base"}
    return merged


def load_profile(profile: str | Path, kind: str | None = None,
                 relative_to: str | Path | None = None) -> Profile:
    """Load and validate a profile by shipped name or path; `kind` checks what it is for.

    A relative path is taken from `relative_to` (e.g. the bench file's folder) if given.
    """
    path = resolve_profile_path(profile, Path(relative_to) if relative_to else None)
    raw = _load_raw(path, ())
    prof = _build(raw, str(path))
    if kind is not None and prof.kind != kind:
        raise ProfileError(f"{path}: profile '{prof.name}' is for a {prof.kind}, "
                           f"but a {kind} driver was asked to use it")
    return prof


def _table(raw: dict, key: str, where: str, allowed: set[str], required: bool) -> dict:
    t = raw.get(key)
    if t is None:
        if required:
            raise ProfileError(f"{where}: missing table [{key}]")
        return {}
    if not isinstance(t, dict):
        raise ProfileError(f"{where}: [{key}] must be a table")
    unknown = sorted(set(t) - allowed)
    if unknown:
        raise ProfileError(f"{where}: [{key}] unknown key(s) {', '.join(unknown)}; "
                           f"allowed: {', '.join(sorted(allowed))}")
    return t


def _string(t: dict, key: str, where: str, default: str | None = None) -> str:
    v = t.get(key, default)
    if not isinstance(v, str) or not v:
        raise ProfileError(f"{where}: '{key}' must be a non-empty string")
    return v


def _number(v: Any, where: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ProfileError(f"{where}: must be a finite number, got {v!r}")
    return float(v)


def _build(raw: dict, src: str) -> Profile:
    unknown = sorted(set(raw) - _TOP_KEYS)
    if unknown:
        raise ProfileError(f"{src}: unknown table(s) {', '.join(unknown)}; "
                           f"allowed: {', '.join(sorted(_TOP_KEYS))}")
    head = _table(raw, "profile", src, _PROFILE_KEYS, True)
    name = _string(head, "name", f"{src}: [profile]")
    kind = _string(head, "kind", f"{src}: [profile]")
    if kind not in KINDS:
        raise ProfileError(f"{src}: [profile] kind {kind!r} unknown; one of {', '.join(KINDS)}")
    description = _string(head, "description", f"{src}: [profile]")

    link = _table(raw, "link", src, _LINK_KEYS, False)
    terms = {}
    for key in ("read_termination", "write_termination"):
        v = link.get(key, "\n")
        if v not in TERMINATIONS:
            raise ProfileError(f'{src}: [link] {key} must be one of "\\n", "\\r\\n", "\\r"')
        terms[key] = v
    timeout_s = None
    if "timeout_s" in link:
        timeout_s = _number(link["timeout_s"], f"{src}: [link] timeout_s")
        if timeout_s <= 0:
            raise ProfileError(f"{src}: [link] timeout_s must be positive")
    serial = _serial(link, src)

    common_raw = _table(raw, "common", src, set(COMMON_DEFAULTS), False)
    common = {k: CommandTemplate(common_raw.get(k, d), (), f"{src}: [common] {k}")
              for k, d in COMMON_DEFAULTS.items()}
    for k in ("identify", "operation_complete", "next_error"):
        if not common[k].is_query:
            raise ProfileError(f"{src}: [common] {k} must be a query (end in '?')")

    settings_raw = raw.get("setting", {})
    if not isinstance(settings_raw, dict):
        raise ProfileError(f"{src}: [setting] must hold tables [setting.<name>]")
    settings = {n: _setting(n, t, f"{src}: [setting.{n}]") for n, t in settings_raw.items()}

    commands: dict[str, CommandTemplate] = {}
    options: dict[str, Any] = {}
    if kind == "lcr-meter":
        _measure(raw, src, commands, options)
    elif "measure" in raw:
        raise ProfileError(f"{src}: [measure] belongs in an lcr-meter profile only")
    if kind == "scanner":
        _route(raw, src, commands, options)
    elif "route" in raw:
        raise ProfileError(f"{src}: [route] belongs in a scanner profile only")

    if "list" in raw and kind != "lcr-meter":
        raise ProfileError(f"{src}: [list] belongs in an lcr-meter profile only")
    if kind == "lcr-meter" and "list" in raw:
        _list(raw, src, commands, options)
    setup, shutdown = _sequence(raw, src)
    capabilities = _capabilities(raw, src, kind, settings, commands)
    return Profile(name=name, kind=kind, description=description, source=src,
                   read_termination=terms["read_termination"],
                   write_termination=terms["write_termination"], timeout_s=timeout_s,
                   serial=serial, common=common, settings=settings, commands=commands,
                   options=options, setup=setup, shutdown=shutdown,
                   capabilities=capabilities, reply=options.get("reply"))


def _sequence(raw: dict, src: str) -> tuple[tuple[CommandTemplate, ...], ...]:
    """[sequence] setup/shutdown: lists of plain commands sent after opening / before closing."""
    t = _table(raw, "sequence", src, _SEQUENCE_KEYS, False)
    out = []
    for key in ("setup", "shutdown"):
        items = t.get(key, [])
        if not isinstance(items, list):
            raise ProfileError(f"{src}: [sequence] {key} must be a list of commands")
        cmds = []
        for i, text in enumerate(items):
            cmd = CommandTemplate(text, (), f"{src}: [sequence] {key}[{i}]")
            if cmd.is_query:
                raise ProfileError(f"{src}: [sequence] {key}[{i}] {text!r} is a query; "
                                   "setup and shutdown hold commands only")
            cmds.append(cmd)
        out.append(tuple(cmds))
    return out[0], out[1]


def _capabilities(raw: dict, src: str, kind: str, settings: dict,
                  commands: dict) -> dict[str, bool]:
    """Which optional capabilities are spelled, and which the engine may use ([capabilities])."""
    known = CAPABILITIES.get(kind, {})
    present = {}
    for cap, (how, names) in known.items():
        if how == "setting":
            have = [n for n in names if n in settings]
            if have and len(have) != len(names):
                miss = sorted(set(names) - set(have))
                raise ProfileError(f"{src}: capability {cap} needs [setting.{miss[0]}] too "
                                   f"({', '.join(names)} together)")
            if have:
                present[cap] = True
        elif "list_trigger" in commands:
            present[cap] = True
    t = raw.get("capabilities", {})
    if not isinstance(t, dict):
        raise ProfileError(f"{src}: [capabilities] must be a table")
    unknown = sorted(set(t) - {"engine_may_use"})
    if unknown:
        raise ProfileError(f"{src}: [capabilities] unknown key(s) {', '.join(unknown)}; "
                           "allowed: engine_may_use")
    use = t.get("engine_may_use", sorted(present))
    if not isinstance(use, list) or not all(isinstance(u, str) for u in use):
        raise ProfileError(f"{src}: [capabilities] engine_may_use must be a list of names")
    for u in use:
        if u not in known:
            raise ProfileError(f"{src}: [capabilities] unknown capability {u!r}; a {kind} "
                               f"knows {', '.join(known) or 'none'}")
        if u not in present:
            raise ProfileError(f"{src}: [capabilities] engine_may_use names {u!r}, but the "
                               "profile does not spell it (see PROFILES.md, Capabilities)")
    return {cap: cap in use for cap in present}


def _list(raw: dict, src: str, commands: dict, options: dict) -> None:
    """[list]: a list sweep over frequency and/or bias, one trigger, one fetch of all points."""
    t = _table(raw, "list", src, _LIST_KEYS, True)
    where = f"{src}: [list]"
    axes = []
    for axis in ("freq", "bias"):
        if axis in t:
            cmd = CommandTemplate(_string(t, axis, where), ("values",), f"{where} {axis}")
            if cmd.is_query or cmd.fields != ("values",):
                raise ProfileError(f"{where} {axis} must be a command with one {{values}}")
            commands[f"list_{axis}"] = cmd
            axes.append(axis)
    if not axes:
        raise ProfileError(f"{where} needs 'freq' or 'bias' (or both)")
    trig = CommandTemplate(_string(t, "trigger", where), (), f"{where} trigger")
    fetch = CommandTemplate(_string(t, "fetch", where), (), f"{where} fetch")
    if trig.is_query or not fetch.is_query:
        raise ProfileError(f"{where} trigger is a command and fetch a query (ending in '?')")
    commands["list_trigger"], commands["list_fetch"] = trig, fetch
    n = t.get("max_points", 201)
    if isinstance(n, bool) or not isinstance(n, int) or n < 2:
        raise ProfileError(f"{where} max_points must be a whole number >= 2")
    options["list_axes"] = tuple(axes)
    options["list_max_points"] = n


def _serial(link: dict, src: str) -> dict:
    out: dict[str, Any] = {}
    if "baud_rate" in link:
        b = link["baud_rate"]
        if isinstance(b, bool) or not isinstance(b, int) or b <= 0:
            raise ProfileError(f"{src}: [link] baud_rate must be a positive integer")
        out["baud_rate"] = b
    if "data_bits" in link:
        if link["data_bits"] not in (5, 6, 7, 8):
            raise ProfileError(f"{src}: [link] data_bits must be 5, 6, 7 or 8")
        out["data_bits"] = link["data_bits"]
    if "parity" in link:
        if link["parity"] not in ("none", "odd", "even", "mark", "space"):
            raise ProfileError(f"{src}: [link] parity must be none, odd, even, mark or space")
        out["parity"] = link["parity"]
    if "stop_bits" in link:
        if link["stop_bits"] not in (1, 1.5, 2):
            raise ProfileError(f"{src}: [link] stop_bits must be 1, 1.5 or 2")
        out["stop_bits"] = link["stop_bits"]
    return out


def _token(v: Any, where: str) -> str:
    if not isinstance(v, str) or not _TOKEN_RE.match(v):
        raise ProfileError(f"{where}: token {v!r} must be letters, digits, _ + - . only")
    return v


def _setting(name: str, t: Any, where: str) -> SettingSpec:
    if not isinstance(t, dict):
        raise ProfileError(f"{where}: must be a table")
    unknown = sorted(set(t) - _SETTING_KEYS)
    if unknown:
        raise ProfileError(f"{where}: unknown key(s) {', '.join(unknown)}; "
                           f"allowed: {', '.join(sorted(_SETTING_KEYS))}")
    if not re.match(r"^[a-z][a-z0-9_]*(_[A-Za-z]+(_per_[a-z]+)?)?$", name):
        raise ProfileError(f"{where}: setting names are snake_case with a unit suffix "
                           "(freq_Hz, voltage_V)")
    typ = t.get("type")
    if typ not in SETTING_TYPES:
        raise ProfileError(f"{where}: 'type' must be one of {', '.join(SETTING_TYPES)}")
    read_only = t.get("read_only", False)
    if not isinstance(read_only, bool):
        raise ProfileError(f"{where}: 'read_only' must be true or false")
    query = CommandTemplate(_string(t, "query", where), (), f"{where} query")
    if not query.is_query:
        raise ProfileError(f"{where}: query {query.text!r} must end its header in '?'")
    set_cmd = None
    if read_only:
        if "set" in t:
            raise ProfileError(f"{where}: a read_only setting has no 'set' command")
    else:
        set_cmd = CommandTemplate(_string(t, "set", where), ("value",), f"{where} set")
        if set_cmd.is_query or set_cmd.fields != ("value",):
            raise ProfileError(f"{where}: set {set_cmd.text!r} must be a command with "
                               "exactly one {value} placeholder")
        spec = set_cmd.specs["value"]
        if spec:
            if typ != "float":
                raise ProfileError(f"{where}: a format spec is allowed for float settings only")
            try:
                format(1.0, spec)
            except ValueError:
                raise ProfileError(f"{where}: {{value:{spec}}} is not a float format") from None
    lo = hi = None
    values: tuple[str, ...] = ()
    tokens: dict[str, str] = {}
    true_tok, false_tok = "ON", "OFF"
    if typ == "float":
        for key in ("values", "map", "true", "false"):
            if key in t:
                raise ProfileError(f"{where}: '{key}' is for enum/bool settings")
        if not read_only:
            if "min" not in t or "max" not in t:
                raise ProfileError(f"{where}: a settable float needs 'min' and 'max' "
                                   "(the instrument's accepted range)")
        if "min" in t:
            lo = _number(t["min"], f"{where} min")
        if "max" in t:
            hi = _number(t["max"], f"{where} max")
        if lo is not None and hi is not None and not lo < hi:
            raise ProfileError(f"{where}: 'min' ({lo}) must be below 'max' ({hi})")
    elif typ == "enum":
        vals = t.get("values")
        if not isinstance(vals, list) or not vals:
            raise ProfileError(f"{where}: an enum needs a non-empty 'values' list")
        values = tuple(_token(v, f"{where} values") for v in vals)
        if len({v.upper() for v in values}) != len(values):
            raise ProfileError(f"{where}: 'values' repeats an entry")
        mapping = t.get("map", {})
        if not isinstance(mapping, dict) or set(mapping) - set(values):
            raise ProfileError(f"{where}: 'map' must be a table of value = token for the "
                               "listed values")
        tokens = {v: _token(mapping.get(v, v), f"{where} map.{v}") for v in values}
        if len({x.upper() for x in tokens.values()}) != len(tokens):
            raise ProfileError(f"{where}: two values map to the same token")
        for key in ("min", "max", "true", "false"):
            if key in t:
                raise ProfileError(f"{where}: '{key}' does not apply to an enum")
    else:
        for key in ("min", "max", "values", "map"):
            if key in t:
                raise ProfileError(f"{where}: '{key}' does not apply to a bool")
        true_tok = _token(t.get("true", "ON"), f"{where} true")
        false_tok = _token(t.get("false", "OFF"), f"{where} false")
        if true_tok.upper() == false_tok.upper():
            raise ProfileError(f"{where}: 'true' and 'false' tokens must differ")
    doc = t.get("doc", "")
    if not isinstance(doc, str):
        raise ProfileError(f"{where}: 'doc' must be a string")
    return SettingSpec(name=name, type=typ, query=query, set=set_cmd, read_only=read_only,
                       min=lo, max=hi, values=values, tokens=tokens, true_token=true_tok,
                       false_token=false_tok, doc=doc)


def _measure(raw: dict, src: str, commands: dict, options: dict) -> None:
    t = _table(raw, "measure", src, _MEASURE_KEYS, True)
    where = f"{src}: [measure]"
    mode = t.get("mode")
    if mode not in MEASURE_MODES:
        raise ProfileError(f"{where} mode must be one of {', '.join(MEASURE_MODES)}")
    options["mode"] = mode
    for key in ("trigger", "fetch", "read"):
        if key in t:
            commands[key] = CommandTemplate(_string(t, key, where), (), f"{where} {key}")
    needed = ("trigger", "fetch") if mode == "init-fetch" else ("read",)
    for key in needed:
        if key not in commands:
            raise ProfileError(f"{where} mode {mode!r} needs '{key}'")
    for key, is_q in (("trigger", False), ("fetch", True), ("read", True)):
        if key in commands and commands[key].is_query != is_q:
            kind = "a query (ending in '?')" if is_q else "a command (no '?')"
            raise ProfileError(f"{where} {key} must be {kind}")
    over = _number(t.get("overload_above", 9.0e37), f"{where} overload_above")
    if over <= 0:
        raise ProfileError(f"{where} overload_above must be positive")
    options["overload_above"] = over
    options["reply"] = _reply(t.get("reply", {}), f"{where}.reply")


def _reply(t: Any, where: str) -> ReplyLayout:
    if not isinstance(t, dict):
        raise ProfileError(f"{where}: must be a table")
    unknown = sorted(set(t) - _REPLY_KEYS)
    if unknown:
        raise ProfileError(f"{where} unknown key(s) {', '.join(unknown)}; "
                           f"allowed: {', '.join(sorted(_REPLY_KEYS))}")
    fields = t.get("fields", ["primary", "secondary"])
    if not isinstance(fields, list) or not all(isinstance(f, str) for f in fields):
        raise ProfileError(f"{where} fields must be a list of {', '.join(REPLY_FIELDS)}")
    bad = [f for f in fields if f not in REPLY_FIELDS]
    if bad:
        raise ProfileError(f"{where} fields: {bad[0]!r} unknown; each is one of "
                           f"{', '.join(REPLY_FIELDS)}")
    for f in ("primary", "secondary"):
        if fields.count(f) != 1:
            raise ProfileError(f"{where} fields must hold 'primary' and 'secondary' once each")
    if fields.count("status") > 1:
        raise ProfileError(f"{where} fields may hold 'status' once")
    sep = t.get("separator", ",")
    if sep not in REPLY_SEPARATORS:
        raise ProfileError(f"{where} separator must be one of \",\" \";\" \" \" \"\\t\"")
    toks = {}
    for key in ("status_ok", "status_overload"):
        v = t.get(key, [])
        if not isinstance(v, list):
            raise ProfileError(f"{where} {key} must be a list of status tokens")
        toks[key] = tuple(_token(x, f"{where} {key}") for x in v)
    if "status" in fields and not toks["status_ok"]:
        raise ProfileError(f"{where} a 'status' field needs status_ok (the token(s) of a good "
                           "reading, e.g. [\"0\"])")
    if "status" not in fields and (toks["status_ok"] or toks["status_overload"]):
        raise ProfileError(f"{where} status_ok/status_overload need a 'status' field")
    units = t.get("units", "none")
    if units not in UNIT_MODES:
        raise ProfileError(f"{where} units must be one of {', '.join(UNIT_MODES)}")
    return ReplyLayout(fields=tuple(fields), separator=sep, status_ok=toks["status_ok"],
                       status_overload=toks["status_overload"], units=units)


def _route(raw: dict, src: str, commands: dict, options: dict) -> None:
    t = _table(raw, "route", src, _ROUTE_KEYS, True)
    where = f"{src}: [route]"
    for key in ("first_channel", "last_channel"):
        v = t.get(key)
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise ProfileError(f"{where} {key} must be a positive integer")
        options[key] = v
    if options["first_channel"] > options["last_channel"]:
        raise ProfileError(f"{where} first_channel must not exceed last_channel")
    commands["open_all"] = CommandTemplate(_string(t, "open_all", where), (), f"{where} open_all")
    for key in ("close", "open", "is_closed"):
        cmd = CommandTemplate(_string(t, key, where), ("channel",), f"{where} {key}")
        if cmd.fields != ("channel",) or cmd.specs["channel"]:
            raise ProfileError(f"{where} {key} must hold exactly one plain {{channel}}")
        commands[key] = cmd
    if commands["open_all"].is_query or commands["close"].is_query or commands["open"].is_query:
        raise ProfileError(f"{where} open_all, close and open are commands (no '?')")
    if not commands["is_closed"].is_query:
        raise ProfileError(f"{where} is_closed must be a query (ending in '?')")
