"""The simulated channel scanner (role `scanner`): one closed channel at a time."""

from __future__ import annotations

from instruments.sim.fixture import BiasFixture
from instruments.sim.scpi import ScpiError, ScpiInstrument, parse_channel_list


class ScannerSim(ScpiInstrument):
    model = "SIM-MUX"
    role = "scanner"

    def __init__(self, serial: str, fixture: BiasFixture):
        self.fixture = fixture
        super().__init__(serial)

    def reset(self) -> None:
        self.fixture.open_all()

    def _channels(self, token: str) -> list[int]:
        return parse_channel_list(token, 1, self.fixture.n_channels)

    def _register(self) -> None:
        add = self.commands.add
        add("ROUTe:CLOSe", set=self._close, query=self._query_closed, query_args=(1, 1))
        add("ROUTe:OPEN", set=self._open)
        add("ROUTe:OPEN:ALL", set=lambda a: self.fixture.open_all(), set_args=(0, 0))

    def _close(self, args: list[str]) -> None:
        channels = self._channels(args[0])
        with self.fixture.lock:
            closed = self.fixture.closed
            wanted = set(channels)
            # break before make: one path to the meter and supply at a time
            if len(wanted) > 1:
                raise ScpiError(-221, "only one channel may be closed at a time")
            if closed is not None and closed not in wanted:
                raise ScpiError(-221, f"channel {closed} is closed; open it first")
            self.fixture.close_channel(channels[0])

    def _open(self, args: list[str]) -> None:
        with self.fixture.lock:
            for channel in self._channels(args[0]):
                self.fixture.open_channel(channel)

    def _query_closed(self, args: list[str]) -> str:
        closed = self.fixture.closed
        return ",".join("1" if ch == closed else "0" for ch in self._channels(args[0]))
