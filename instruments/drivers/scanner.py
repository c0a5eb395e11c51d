"""Channel scanner driver: connects one sample of the fixture at a time."""

from __future__ import annotations

from .errors import InstrumentError, InstrumentLinkError, InstrumentTimeout
from .instrument import Instrument
from .setting import check_channel, parse_bool_reply


class Scanner(Instrument):
    """A relay scanner; select() opens every channel before closing one (break before make)."""

    kind = "scanner"
    default_profile = "generic-scanner"
    default_role = "scanner"

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.selected_channel: int | None = None

    @property
    def channels(self) -> range:
        o = self.profile.options
        return range(o["first_channel"], o["last_channel"] + 1)

    def _channel(self, channel) -> int:
        o = self.profile.options
        return check_channel(channel, o["first_channel"], o["last_channel"],
                             f"{self.role} ({self.resource}) (profile '{self.profile.name}')")

    def _send(self, cmd: str) -> None:
        self.session.write(cmd)
        self.check_errors(after=cmd)

    def open_all(self) -> None:
        """Open every channel."""
        self.selected_channel = None
        self._send(self.profile.commands["open_all"].format())

    def select(self, channel: int) -> None:
        """Open all channels, then close `channel`; the error queue is read after each."""
        n = self._channel(channel)          # before anything is written
        self.open_all()
        # remembered before it is sent (as settings are): if the link drops between the close
        # and its error check, the reconnect closes this channel again on a scanner that restarted
        self.selected_channel = n
        try:
            self._send(self.profile.commands["close"].format(channel=n))
        except (InstrumentTimeout, InstrumentLinkError):
            raise
        except InstrumentError:
            self.selected_channel = None        # the scanner refused it: nothing to re-close
            raise

    def open_channel(self, channel: int) -> None:
        n = self._channel(channel)
        self._send(self.profile.commands["open"].format(channel=n))
        if self.selected_channel == n:
            self.selected_channel = None

    def is_closed(self, channel: int) -> bool:
        n = self._channel(channel)
        return self.session.query(self.profile.commands["is_closed"].format(channel=n),
                                  parse=parse_bool_reply)

    def _after_reconnect(self) -> None:
        if self.selected_channel is not None:
            self.select(self.selected_channel)
