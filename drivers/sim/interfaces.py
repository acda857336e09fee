"""The seam between the simulated instruments and the simulated physics.

The SCPI instruments in ``drivers/sim/instruments/`` keep their own settings (scope
range, trigger, format...) and ask the one shared :class:`World` for everything physical:
what the supply delivers, which relay contacts conduct, the voltages at the scope inputs.
``drivers/sim/world.py`` implements it on the circuit engine. Tests may implement it with a
simpler model, but the shipped bench always uses the circuit engine.

All times are absolute seconds on the world's clock (``world.clock.now()``). All methods are
called from server threads and must be thread-safe.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from drivers.clock import Clock

__all__ = ["BenchWiring", "BounceSpec", "Faults", "LoadSpec", "SenseSpec", "World", "WorldConfig"]


@dataclass(frozen=True)
class LoadSpec:
    """A defined discharge load: resistance with the inductance of its wiring."""

    name: str
    ohms: float
    henry: float = 0.0
    channel: int | None = None  # relay that selects this load, None if always in circuit
    model: str | None = None  # load file (rigbase.loadfile) after R and L: a nonlinear load


@dataclass(frozen=True)
class SenseSpec:
    """Current sense on scope input 1: a series shunt, or a probe with its own bandwidth."""

    kind: str = "shunt"  # "shunt" | "probe"
    ohms: float = 0.1  # shunt resistance (kind = "shunt")
    amps_per_volt: float = 1.0  # probe transfer (kind = "probe"): volts at scope = amps / this
    bandwidth_hz: float | None = None  # probe bandwidth (first order); None = ideal


@dataclass(frozen=True)
class BounceSpec:
    """Relay contact bounce on closing: a few make/break intervals, drawn per closing."""

    max_bounces: int = 3  # 0..max_bounces extra breaks after the first make
    min_s: float = 20e-9  # each make or break interval lies in [min_s, max_s]
    max_s: float = 2e-6
    contact_ohms: float = 0.05  # closed-contact resistance


@dataclass(frozen=True)
class BenchWiring:
    """Where things are: relay channels and the bench's own parts."""

    charge_channel: int = 1
    discharge_channel: int = 2
    bleed_channel: int = 3
    supply_output_ohms: float = 1.0e3  # supply's own output resistance
    charge_ohms: float = 100.0e3  # series charge resistor (R_charge)
    bleed_ohms: float = 10.0e3  # bleed resistor (R_bleed)
    loads: tuple[LoadSpec, ...] = (LoadSpec("short", 0.05, 200e-9),)
    sense: SenseSpec = field(default_factory=SenseSpec)
    divider_ratio: float | None = 1000.0  # HV divider probe on scope input 2 (None: not fitted)
    divider_ohms: float = 100.0e6  # divider input resistance (loads the meter input)


@dataclass(frozen=True)
class Faults:
    """Faults injected by configuration (all off by default)."""

    relay_stuck_closed: tuple[int, ...] = ()  # channels whose contacts never open
    relay_stuck_open: tuple[int, ...] = ()  # channels whose contacts never close
    supply_trip_amps: float | None = None  # output trips off when it would source more
    supply_stuck_on: bool = False  # output keeps delivering after OUTP OFF
    scope_never_triggers: bool = False
    drop_connection_after: int | None = None  # server closes the link after N commands
    drop_unanswered: bool = False  # ... and leaves the N-th unanswered (dies mid-exchange)
    slow_answer_s: float = 0.0  # extra delay before every answer (real time)
    scpi_error_every: int | None = None  # every Nth command is refused with -200
    corrupt_block_every: int | None = None  # every Nth block has a wrong length header


@dataclass(frozen=True)
class WorldConfig:
    """Everything the physics needs: the meter model, the bench wiring, randomness, faults."""

    meter_model: str  # path of a netlist TOML (drivers/sim/meters/*.toml)
    wiring: BenchWiring = field(default_factory=BenchWiring)
    bounce: BounceSpec = field(default_factory=BounceSpec)
    supply_max_volts: float = 1500.0
    supply_max_amps: float = 0.1
    noise_volts: float = 0.5e-3  # rms noise at each scope input
    seed: int = 0
    faults: Faults = field(default_factory=Faults)


class World(Protocol):
    """Physical state shared by all simulated instruments."""

    clock: Clock
    config: WorldConfig

    # supply ---------------------------------------------------------------------------------
    def supply_program(
        self, volts: float | None = None, amps: float | None = None, output: bool | None = None
    ) -> None:
        """Change the supply setpoint, current limit and/or output state from now on."""

    def supply_measure(self) -> tuple[float, float]:
        """(terminal volts, output amps) now, from the circuit state."""

    # relays ---------------------------------------------------------------------------------
    def relay_set(self, channels: Sequence[int], closed: bool) -> None:
        """Command relay coils now; closing contacts bounce per ``config.bounce``."""

    def relay_commanded(self, channels: Sequence[int]) -> list[bool]:
        """Coil state of each channel as last commanded (what a relay board reads back)."""

    # meter ----------------------------------------------------------------------------------
    def meter_modes(self) -> tuple[str, ...]:
        """Names of the meter model's modes, e.g. ("AC V", "AC mV", "DC V")."""

    def meter_set_mode(self, mode: str) -> None:
        """Turn the dial (or send the function command); unknown modes raise ValueError."""

    def meter_mode(self) -> str:
        """Current mode name."""

    def meter_connect(self, meter_model: str) -> None:
        """Swap the meter under test for the netlist at path ``meter_model`` (an operator
        change between meters); the new meter's input starts discharged, in its first mode."""

    # scope inputs ---------------------------------------------------------------------------
    def scope_inputs(self, t: np.ndarray, bandwidth_hz: Sequence[float | None]) -> np.ndarray:
        """Volts at scope inputs 1..len(bandwidth_hz) at absolute times ``t`` (all <= now).

        Shape (len(bandwidth_hz), len(t)). Input 1 is the current sense, input 2 the divider
        probe (zeros where none is fitted). The bandwidth limit of each input (first order,
        None = none) is part of the exact solution, not a filter on samples. Noise is NOT added
        here: the scope front end adds it.
        """

    def switching_times(self, t_from: float, t_to: float) -> list[float]:
        """Instants in [t_from, t_to] at which the network changed (relay contacts, supply)."""

    # ground truth for tests and interlock checks ---------------------------------------------
    def meter_input_volts(self) -> float:
        """Voltage between the meter's V input and COM now."""

    def history(self) -> list[tuple[float, dict[str, object]]]:
        """Every change so far: (time, {"relays": {ch: conducting}, "supply_on": bool,
        "supply_volts": float, "mode": str}) in time order; contact bounce included."""
