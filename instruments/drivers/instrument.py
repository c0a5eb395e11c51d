"""What every driver shares: profile, session, settings, the error queue, the context manager."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, ClassVar

from .errors import InstrumentError, InstrumentLinkError, InstrumentTimeout, ProfileError
from .profile import Profile, load_profile
from .session import Session
from .setting import Setting

# SCPI-1999 vol. 2, SYSTem:ERRor: '<code>,"<description>"', code 0 = no error.
_ERROR_RE = re.compile(r'^\s*([+-]?\d+)\s*,\s*"([^"]*)"\s*$')
MAX_ERROR_READS = 40   # a 16-entry queue plus its overflow entry, with room to spare


def parse_error_entry(reply: str) -> tuple[int, str]:
    m = _ERROR_RE.match(reply)
    if not m:
        raise ValueError(f"not a SYSTem:ERRor? entry: {reply!r}")
    return int(m.group(1)), m.group(2).strip()


def check_profile_matches(cls: type["Instrument"], profile: Profile) -> None:
    """The profile must spell every setting the driver declares, and no other."""
    where = f"{profile.source}: profile '{profile.name}'"
    if profile.kind != cls.kind:
        raise ProfileError(f"{where} is for a {profile.kind}, not a {cls.kind} ({cls.__name__})")
    declared = cls.declared_settings()
    missing = sorted(n for n in set(declared) - set(profile.settings)
                     if not declared[n].optional)
    unknown = sorted(set(profile.settings) - set(declared))
    if missing:
        raise ProfileError(f"{where}: missing [setting.{missing[0]}] (a {cls.__name__} needs "
                           f"{', '.join(sorted(declared)) or 'no settings'})")
    if unknown:
        raise ProfileError(f"{where}: unknown [setting.{unknown[0]}]; a {cls.__name__} knows "
                           f"{', '.join(sorted(declared)) or 'no settings'}")
    for name, s in declared.items():
        if name not in profile.settings:
            continue
        spec = profile.settings[name]
        if spec.type != s.type:
            raise ProfileError(f"{where}: [setting.{name}] type must be {s.type!r}")
        if spec.read_only != s.read_only:
            want = "read_only = true" if s.read_only else "settable (with 'set')"
            raise ProfileError(f"{where}: [setting.{name}] must be {want}")
        if s.type == "enum" and not set(spec.values) <= set(s.values):
            extra = sorted(set(spec.values) - set(s.values))
            raise ProfileError(f"{where}: [setting.{name}] value(s) {', '.join(extra)} not "
                               f"known to the driver ({', '.join(s.values)})")


class Instrument:
    """Base of the drivers. Not opened by the constructor: use `with` or `open()`."""

    kind: ClassVar[str] = ""
    default_profile: ClassVar[str] = ""
    default_role: ClassVar[str] = ""

    def __init__(self, resource: str, profile: str | Path | Profile | None = None, *,
                 timeout_s: float | None = None, rm: Any = None, role: str | None = None,
                 open_timeout_s: float = 2.0, retries: int = 2, reconnects: int = 2,
                 backoff_s: float = 0.05, drain_timeout_s: float = 0.05,
                 visa_library: str | None = None):
        self.role = role or self.default_role
        if isinstance(profile, Profile):
            prof = profile
        else:
            prof = load_profile(profile if profile is not None else self.default_profile)
        check_profile_matches(type(self), prof)
        self.profile = prof
        if timeout_s is None:
            timeout_s = prof.timeout_s if prof.timeout_s is not None else 5.0
        self.session = Session(
            resource, role=self.role, read_termination=prof.read_termination,
            write_termination=prof.write_termination, timeout_s=timeout_s,
            open_timeout_s=open_timeout_s, rm=rm, retries=retries, reconnects=reconnects,
            backoff_s=backoff_s, drain_timeout_s=drain_timeout_s, serial=dict(prof.serial),
            common={k: t.text for k, t in prof.common.items()},
            on_reconnect=self._on_reconnect, visa_library=visa_library)
        self._remembered: dict[str, Any] = {}   # values set through this driver, in order
        self._known: dict[str, Any] = {}        # last value set or read back

    # -- declaration -----------------------------------------------------------------------

    @classmethod
    def declared_settings(cls) -> dict[str, Setting]:
        out: dict[str, Setting] = {}
        for klass in reversed(cls.__mro__):
            for name, v in vars(klass).items():
                if isinstance(v, Setting):
                    out[name] = v
        return out

    # -- lifecycle -------------------------------------------------------------------------

    @property
    def resource(self) -> str:
        return self.session.resource

    @property
    def idn(self) -> str:
        return self.session.idn or ""

    @property
    def is_open(self) -> bool:
        return self.session.is_open

    def open(self) -> "Instrument":
        """Open the link, check *IDN?, *CLS, configure, then read the error queue."""
        self.session.open()
        try:
            self._configure()
            self.check_errors(after="opening")
        except BaseException:
            self.session.close()
            raise
        return self

    def close(self) -> None:
        """Send the profile's shutdown commands (best effort), then close the link."""
        try:
            if self.session.is_open and self.profile.shutdown:
                for cmd in self.profile.shutdown:
                    try:
                        self.session.write(cmd.format())
                    except Exception:
                        pass
                try:   # *OPC?: done before the link closes (IEEE 488.2 10.19)
                    self.session.query(self.profile.common["operation_complete"].text)
                except Exception:
                    pass
        finally:
            self.session.close()

    def __enter__(self):
        self.open()
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def reconnect(self) -> None:
        """Reopen the link (bounded attempts) and re-apply the remembered settings."""
        self.session.reconnect()

    def _configure(self) -> None:
        """Right after opening: the profile's setup commands (the error queue is read next)."""
        for cmd in self.profile.setup:
            self.session.write(cmd.format())

    def has(self, capability: str) -> bool:
        """The profile spells this optional capability (e.g. 'level_monitor')."""
        return self.profile.has(capability)

    def may_use(self, capability: str) -> bool:
        """The profile spells this capability and lets the engine use it."""
        return self.profile.may_use(capability)

    def _on_reconnect(self) -> None:
        # values only read back may have changed (the instrument may have restarted)
        self._known = {k: v for k, v in self._known.items() if k in self._remembered}
        self._after_reconnect()

    def _after_reconnect(self) -> None:
        """Hook: re-apply what was set through this driver, in the order it was set."""
        for name, value in list(self._remembered.items()):
            self._apply(self.declared_settings()[name], value)

    # -- error queue -----------------------------------------------------------------------

    def read_errors(self) -> list[str]:
        """Empty the SYSTem:ERRor? queue; the entries other than 0 in order."""
        entries = []
        cmd = self.profile.common["next_error"].text
        for _ in range(MAX_ERROR_READS):
            code, text = self.session.query(cmd, parse=parse_error_entry)
            if code == 0:
                return entries
            entries.append(f'{code},"{text}"')
        entries.append(f"(queue not empty after {MAX_ERROR_READS} reads)")
        return entries

    def check_errors(self, after: str | None = None) -> None:
        """Raise InstrumentError listing the error queue entries, if there are any."""
        entries = self.read_errors()
        if entries:
            when = f" after '{after}'" if after else ""
            raise InstrumentError(
                f"{self.role} ({self.resource}): instrument reported {'; '.join(entries)}"
                f"{when}; check the value against this instrument's range and its profile "
                f"'{self.profile.name}'", role=self.role, resource=self.resource,
                command=after, errors=tuple(entries))

    # -- settings --------------------------------------------------------------------------

    def _what(self, setting: Setting) -> str:
        return f"{self.role} ({self.resource}): {setting.name} (profile '{self.profile.name}')"

    def _spec(self, setting: Setting):
        spec = self.profile.settings.get(setting.name)
        if spec is None:
            raise ProfileError(
                f"{self._what(setting)}: this instrument's profile does not spell "
                f"{setting.name} (optional capability {setting.optional}); add "
                f"[setting.{setting.name}] to the profile if the instrument has it")
        return spec

    def _get_setting(self, setting: Setting) -> Any:
        spec = self._spec(setting)
        value = self.session.query(spec.query.format(), parse=lambda r: setting.parse(spec, r))
        self._known[setting.name] = value
        return value

    def _set_setting(self, setting: Setting, value: Any) -> None:
        spec = self._spec(setting)
        v = setting.validate(spec, value, self._what(setting))   # before anything is written
        self._apply(setting, v)

    def _apply(self, setting: Setting, value: Any) -> None:
        spec = self.profile.settings[setting.name]
        cmd = setting.command(spec, value)
        # remembered = what the instrument should hold: kept through link failures (so a
        # reconnect re-applies it), dropped when the instrument itself refuses the value
        self._remembered.pop(setting.name, None)
        self._remembered[setting.name] = value
        self._known.pop(setting.name, None)
        self.session.write(cmd)
        try:
            self.check_errors(after=cmd)
        except (InstrumentTimeout, InstrumentLinkError):
            raise
        except InstrumentError:
            self._remembered.pop(setting.name, None)
            raise
        self._known[setting.name] = value

    @property
    def remembered(self) -> dict[str, Any]:
        """Values set through this driver (re-applied after a reconnect)."""
        return dict(self._remembered)

    def snapshot(self) -> dict[str, Any]:
        """Every settable setting, queried now (for the run record; readings excluded, as
        some need a measurement first)."""
        return {name: getattr(self, name) for name, s in self.declared_settings().items()
                if not s.read_only and name in self.profile.settings}
