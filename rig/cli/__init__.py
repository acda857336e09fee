"""The ``rig`` command, one of the controller's two faces (the other is :mod:`rig.api`).

``app`` builds the parser and turns errors into exit codes; the commands live by what they
work on: ``running`` (check, run, resume, demo, verify, instruments: the bench), ``results``
(analyze, compare, measure, predict, report: stored runs), ``tools`` (the simulated bench for
your own scripts, instrument bring-up, profile pages, datasets across runs); ``common`` holds
the high-voltage caution and the exit codes they share.
"""

from rig.cli.app import main

__all__ = ["main"]
