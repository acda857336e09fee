"""Start the four simulated instruments on loopback around one World.

    with start_sim_bench(config, clock) as sim:
        sim.resources["scope"]   # "TCPIP0::127.0.0.1::<port>::SOCKET"
        sim.world                # ground truth for tests

Each instrument is its own TCP server on 127.0.0.1 at a port the OS picks; clients reach
them through PyVISA exactly as they would reach hardware.
"""

from __future__ import annotations

import logging
from types import TracebackType

import numpy as np

from drivers.clock import Clock
from drivers.sim.instruments import SimMeter, SimScope, SimSupply, SimSwitch
from drivers.sim.interfaces import World, WorldConfig
from drivers.sim.scpi import ScpiDevice
from drivers.sim.server import ScpiServer

__all__ = ["SimBench", "start_sim_bench"]

logger = logging.getLogger(__name__)


class SimBench:
    """The running simulated bench: one server per instrument role around ``world``."""

    def __init__(self, world: World, devices: dict[str, ScpiDevice]) -> None:
        self.world = world
        self.devices = devices
        self.servers: dict[str, ScpiServer] = {}
        try:
            for role, device in devices.items():
                self.servers[role] = ScpiServer(device, world.config.faults, name=role)
        except BaseException:
            self.close()
            raise
        self.resources: dict[str, str] = {r: s.resource for r, s in self.servers.items()}

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


def start_sim_bench(config: WorldConfig, clock: Clock, world: World | None = None) -> SimBench:
    """Build the world (the circuit-engine bench world unless one is given) and serve it.

    ``config.faults`` applies to the servers (dropped links, slow answers, refused commands,
    corrupt blocks) and to the instruments (a scope that never triggers); the world itself
    handles the physical faults. The scope's noise generator is seeded from ``config.seed``.
    """
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
    bench = SimBench(world, devices)
    logger.info("simulated bench up: %s", bench.resources)
    return bench
