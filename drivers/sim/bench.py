"""Start the four simulated instruments on loopback around one World.

    with start_sim_bench(config, clock) as sim:
        sim.resources["scope"]   # "TCPIP0::127.0.0.1::<port>::SOCKET"
        sim.world                # ground truth for tests

Each instrument is its own TCP server on 127.0.0.1 at a port the OS picks; clients reach
them through PyVISA exactly as they would reach hardware.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np

from drivers.clock import Clock
from drivers.profile import PROFILE_DIR, Profile
from drivers.sim.dialect import DialectDevice
from drivers.sim.instruments import SimMeter, SimScope, SimSupply, SimSwitch
from drivers.sim.interfaces import World, WorldConfig
from drivers.sim.scpi import ScpiDevice
from drivers.sim.serialport import PtyServer
from drivers.sim.server import ScpiServer

__all__ = ["SimBench", "start_sim_bench"]

logger = logging.getLogger(__name__)

GENERIC = PROFILE_DIR / "scpi1999.toml"  # the dialect the simulated instruments speak natively


class SimBench:
    """The running simulated bench: one server per instrument role around ``world``.

    ``dialects`` maps a role to the profile whose dialect its instrument speaks (absent: the
    generic SCPI-1999 one); an instrument whose profile has ``[link] interface = "serial"``
    is served on a pseudo-terminal, every other on TCP (``port_base`` + role index when
    given, else an OS-chosen port).
    """

    def __init__(
        self,
        world: World,
        devices: dict[str, ScpiDevice],
        dialects: Mapping[str, Profile] | None = None,
        port_base: int | None = None,
    ) -> None:
        self.world = world
        self.devices = devices
        self.servers: dict[str, Any] = {}
        self.dialects = dict(dialects or {})
        try:
            for index, (role, device) in enumerate(devices.items()):
                self.servers[role] = self._serve(role, device, index, port_base)
        except BaseException:
            self.close()
            raise
        self.resources: dict[str, str] = {r: s.resource for r, s in self.servers.items()}

    def _serve(self, role: str, device: ScpiDevice, index: int, port_base: int | None) -> Any:
        profile = self.dialects.get(role)
        if profile is None:
            port = 0 if port_base is None else port_base + index
            return ScpiServer(device, self.world.config.faults, name=role, port=port)
        speaker = DialectDevice(device, profile, role, self.world.clock)
        link = profile.dialect.link
        ends = {
            "line_end": (link.write_termination or "\n").encode(),
            "reply_end": (link.read_termination or "\n").encode(),
        }
        if link.interface == "serial":
            return PtyServer(speaker, role, baud_rate=link.baud_rate, **ends)
        port = 0 if port_base is None else port_base + index
        return ScpiServer(speaker, self.world.config.faults, name=role, port=port, **ends)

    def close(self) -> None:
        """Stop every server; safe to call twice."""
        for server in self.servers.values():
            server.close()  # each server's close() is idempotent

    def __enter__(self) -> SimBench:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


def start_sim_bench(
    config: WorldConfig,
    clock: Clock,
    world: World | None = None,
    *,
    dialects: Mapping[str, str | Path] | None = None,
    port_base: int | None = None,
) -> SimBench:
    """Build the world (the circuit-engine bench world unless one is given) and serve it.

    ``config.faults`` applies to the servers (dropped links, slow answers, refused commands,
    corrupt blocks) and to the instruments (a scope that never triggers); the world itself
    handles the physical faults. The scope's noise generator is seeded from ``config.seed``.
    ``dialects`` maps roles to profiles (names or paths) whose dialect the instrument speaks;
    the generic SCPI-1999 profile, or a role left out, gets the plain SCPI instrument.
    """
    speak: dict[str, Profile] = {}
    for role, name in (dialects or {}).items():
        profile = Profile.load(name)
        if profile.path.resolve() != GENERIC.resolve():
            speak[role] = profile
    if world is None:
        from drivers.sim.world import BenchWorld  # lazy: the physics is heavy to import

        world = BenchWorld(config, clock)
    # an independent stream from the same seed, so the scope noise does not mirror the
    # world's own random draws (contact bounce)
    scope_rng = np.random.default_rng(np.random.SeedSequence([int(config.seed), 0x5C0BE]))
    devices: dict[str, ScpiDevice] = {
        "supply": SimSupply(world),
        "switch": SimSwitch(world),
        "scope": SimScope(world, rng=scope_rng),
        "meter": SimMeter(world),
    }
    bench = SimBench(world, devices, speak, port_base)
    logger.info("simulated bench up: %s", bench.resources)
    return bench
