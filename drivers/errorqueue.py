"""The instrument's SCPI error/event queue as seen from the controller: answers and reports.

SCPI-1999 Vol. 2, 21.8 (SYSTem:ERRor, clause number from memory) has the instrument keep a
queue of ``<code>,"<message>"`` entries, answered one per ``SYSTem:ERRor[:NEXT]?`` and
``0,"No error"`` once empty. :func:`parse_error_reply` splits one answer, :func:`read_queue`
reads entries until the empty answer (bounded, so a queue that never empties cannot hang the
caller), and :func:`queue_error` turns what was read into one :class:`~rigbase.errors.ScpiError`
for the first entry with the others as notes. :mod:`drivers.session` does the asking.
"""

from __future__ import annotations

import re
from collections.abc import Callable

from rigbase.errors import ScpiError

__all__ = ["MAX_ENTRIES_READ", "parse_error_reply", "queue_error", "read_queue"]

MAX_ENTRIES_READ = 64  # a queue that never empties must not hang the session
# '<code>,"<message>"': the comma is required, so a stray late answer such as "0" or "1" is
# never mistaken for an empty error queue
_ERROR_RE = re.compile(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$', re.DOTALL)


def parse_error_reply(text: str) -> tuple[int, str]:
    """Split an error-queue answer ``-113,"Undefined header"`` into (code, message).

    IEEE 488.2 string data doubles an embedded quote (IEEE 488.2-1992, 8.7.8 string response
    data, clause number from memory); it is undoubled here. Raises ValueError when ``text`` is
    not of that form.
    """
    m = _ERROR_RE.match(text)
    if not m:
        raise ValueError(f"not an error-queue answer: {text!r}")
    return int(m.group(1)), (m.group(2) or "").replace('""', '"')


def read_queue(next_entry: Callable[[], tuple[int, str]]) -> tuple[list[tuple[int, str]], bool]:
    """Call ``next_entry`` until it returns code 0, at most :data:`MAX_ENTRIES_READ` times.

    Returns the non-zero entries in queue order and whether the queue was seen empty.
    """
    found: list[tuple[int, str]] = []
    for _ in range(MAX_ENTRIES_READ):
        code, message = next_entry()
        if code == 0:
            return found, True
        found.append((code, message))
    return found, False


def queue_error(name: str, command: str | None, found: list[tuple[int, str]]) -> ScpiError:
    """One :class:`ScpiError` for the first entry of ``found``; the others become notes."""
    code, message = found[0]
    exc = ScpiError(name, command, code, message)
    for other_code, other_message in found[1:]:
        exc.add_note(f'also queued: {other_code},"{other_message}"')
    return exc
