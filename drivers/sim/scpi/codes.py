"""The standard numbers of an SCPI instrument: error/event codes and status register bits.

The error/event numbers and messages the simulated instruments queue, the exception a
command handler raises to queue one (:class:`CommandRejected`), the bits of the IEEE 488.2
status registers, and the error queue's depth. Everything here is data from the published
standards (sources beside each table); the rules that use it live in
:mod:`drivers.sim.scpi.device`.
"""

from __future__ import annotations

from rigbase.errors import ScpiError

__all__ = ["ERROR_MESSAGES", "INSTRUMENT_NAME", "QUEUE_DEPTH", "CommandRejected"]

# Standard error/event numbers and messages: SCPI-1999 Vol. 2, 21.8 (SYSTem:ERRor and its
# tables). -100, -113, -200, -222, -350, -410 and -420 are the standard's entries; -102,
# -108, -109 and -221 are from memory; -101, -104, -114, -131, -224, -230 and -363 are further
# entries of the same table, also from memory.
ERROR_MESSAGES: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -131: "Invalid suffix",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

# IEEE 488.2-1992, 11.5.1 Standard Event Status Register bits (clause from memory).
ESR_OPC = 1
ESR_QUERY_ERROR = 4
ESR_DEVICE_ERROR = 8
ESR_EXECUTION_ERROR = 16
ESR_COMMAND_ERROR = 32
ESR_POWER_ON = 128
# Status Byte bits (IEEE 488.2-1992, 11.2; bit 2 from SCPI-1999 Vol. 1 status reporting; all
# from memory): 2 error queue not empty, 4 MAV, 5 ESB, 6 MSS, 7 operation summary.
STB_ERROR_QUEUE = 4
STB_MAV = 16
STB_ESB = 32
STB_MSS = 64
STB_OPERATION = 128

QUEUE_DEPTH = 20  # entries, the last of which becomes -350 on overflow (our choice of depth)
INSTRUMENT_NAME = "simulated instrument"


class CommandRejected(ScpiError):
    """A handler refuses a command: the device queues ``code`` with an optional detail."""

    def __init__(self, code: int, info: str = ""):
        self.info = info
        super().__init__(INSTRUMENT_NAME, None, code, ERROR_MESSAGES.get(code, "Error"))
