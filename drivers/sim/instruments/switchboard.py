"""The simulated relay (switch) board: ROUTe commands with SCPI channel lists.

:class:`SimSwitch` closes and opens relays of the shared World by channel number and reads
their commanded state back. Channel lists follow SCPI-1999 Vol. 1 (``(@1,3)``, ``(@1:4)``); an
empty list is -109 and a channel outside the board -222. The World decides
what the relays do physically (bounce, timing).
"""

from __future__ import annotations

from drivers.sim.interfaces import World
from drivers.sim.scpi import Call, CommandRejected, ScpiDevice

__all__ = ["SimSwitch"]


class SimSwitch(ScpiDevice):
    """Relay board with ``channels`` channels, SCPI ROUTe commands with channel lists."""

    def __init__(
        self,
        world: World,
        channels: int = 16,
        identity: str = "SIMULATED,RELAY-BOARD-16,SN0002,0.1",
    ) -> None:
        super().__init__(identity)
        self.world = world
        self.n_channels = channels
        self.add(
            "ROUTe:CLOSe", set=self._close, query=lambda c: self._state(c, True), query_args=(1, 1)
        )
        self.add(
            "ROUTe:OPEN", set=self._open, query=lambda c: self._state(c, False), query_args=(1, 1)
        )
        self.add("ROUTe:OPEN:ALL", set=self._open_all, set_args=(0, 0))
        self.add("ROUTe:CLOSe:STATe", query=self._closed_list)

    def reset(self) -> None:
        """*RST: every relay open."""
        self.world.relay_set(list(range(1, self.n_channels + 1)), False)

    def _channels(self, call: Call) -> list[int]:
        chans = list(call.params[0].channels())
        if not chans:
            raise CommandRejected(-109, "empty channel list")
        bad = [c for c in chans if not 1 <= c <= self.n_channels]
        if bad:
            raise CommandRejected(-222, f"channel {bad[0]} outside 1..{self.n_channels}")
        return chans

    def _close(self, call: Call) -> None:
        self.world.relay_set(self._channels(call), True)

    def _open(self, call: Call) -> None:
        self.world.relay_set(self._channels(call), False)

    def _open_all(self, call: Call) -> None:
        self.world.relay_set(list(range(1, self.n_channels + 1)), False)

    def _state(self, call: Call, closed: bool) -> str:
        states = self.world.relay_commanded(self._channels(call))
        return ",".join(str(int(s == closed)) for s in states)

    def _closed_list(self, call: Call) -> str:
        chans = list(range(1, self.n_channels + 1))
        closed = [c for c, s in zip(chans, self.world.relay_commanded(chans), strict=True) if s]
        return "(@" + ",".join(str(c) for c in closed) + ")"
