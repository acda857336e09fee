"""SCPI-1999 / IEEE 488.2 server core of the simulated instruments, independent of any one.

The package parses program messages and keeps an instrument's status and error queue; the
simulated instruments (:mod:`drivers.sim.instruments`) declare their command trees on top of
it and :mod:`drivers.sim.server` puts the answers on a socket. Its modules, by role:
:mod:`~drivers.sim.scpi.codes` (standard error numbers, status bits),
:mod:`~drivers.sim.scpi.headers` (header patterns and matching),
:mod:`~drivers.sim.scpi.params` (program data parsing), :mod:`~drivers.sim.scpi.responses`
(numbers and definite-length blocks) and :mod:`~drivers.sim.scpi.device` (the message
processor, :class:`ScpiDevice`). This face hands on the names the rest of the code uses.
"""

from drivers.sim.scpi.codes import ERROR_MESSAGES, QUEUE_DEPTH, CommandRejected
from drivers.sim.scpi.device import Call, ScpiDevice
from drivers.sim.scpi.headers import match_nodes, parse_header_pattern
from drivers.sim.scpi.params import Param, parse_params, split_units
from drivers.sim.scpi.responses import Block, encode_block, format_number

__all__ = [
    "Block",
    "Call",
    "CommandRejected",
    "ERROR_MESSAGES",
    "Param",
    "QUEUE_DEPTH",
    "ScpiDevice",
    "encode_block",
    "format_number",
    "match_nodes",
    "parse_header_pattern",
    "parse_params",
    "split_units",
]
