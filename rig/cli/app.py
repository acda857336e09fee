"""The ``rig`` command's parser, its entry point and the one place errors become exit codes
(0 success; 1 a verdict or check said no, or an internal error; 2 bad input or a run folder
in use; 3 instrument or interlock trouble, or a group with no captured event; 130 interrupted).
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys
from collections.abc import Callable, Sequence

from rig.cli.common import (
    _RUN,
    CAUTION,
    EXIT_BENCH,
    EXIT_INPUT,
    EXIT_INTERRUPTED,
    EXIT_NO,
    _si,
)
from rig.cli.results import (
    cmd_analyze,
    cmd_compare,
    cmd_measure,
    cmd_predict,
    cmd_report,
)
from rig.cli.running import (
    cmd_check,
    cmd_demo,
    cmd_instruments,
    cmd_resume,
    cmd_run,
    cmd_verify,
)
from rig.cli.tools import (
    _add_dataset_commands,
    cmd_bringup,
    cmd_profile_check,
    cmd_profile_doc,
    cmd_sim_serve,
)
from rigbase.errors import (
    FileFormatError,
    InstrumentError,
    LimitError,
    RigError,
    RunFolderError,
    SafetyError,
)

log = logging.getLogger("rig")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="rig",
        description="Controller and analysis for a meter input-discharge test bench.",
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("-v", "--verbose", action="count", default=0, help="more logging (-vv: SCPI)")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def add(
        name: str, fn: Callable[[argparse.Namespace], int], help: str
    ) -> argparse.ArgumentParser:
        sp = sub.add_parser(
            name,
            help=help,
            description=help,
            epilog=CAUTION,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        sp.set_defaults(func=fn)
        return sp

    sp = add(
        "demo",
        cmd_demo,
        "run the bundled two-meter qualification on the simulated bench, "
        "analyse it and write the report",
    )
    sp.add_argument("--results", default="results", help="folder for run folders (default results)")
    sp.add_argument("--quiet", action="store_true", help="no live display")

    sp = add("check", cmd_check, "print the plan and the safety review; touches no instrument")
    sp.add_argument("sequence", help="sequence file (TOML)")
    sp.add_argument("--bench", required=True, help="bench file (TOML)")

    sp = add("run", cmd_run, "run a sequence on a bench into a new run folder")
    sp.add_argument("sequence", help="sequence file (TOML)")
    sp.add_argument("--bench", required=True, help="bench file (TOML)")
    sp.add_argument("--results", default="results", help="folder for run folders (default results)")
    sp.add_argument(
        "--confirm-hv",
        type=float,
        metavar="VOLTS",
        help="confirm, without a prompt, the highest voltage of the plan (real hardware)",
    )
    sp.add_argument("--no-report", action="store_true", help="skip analysis and report at the end")
    sp.add_argument("--quiet", action="store_true", help="no live display")
    sp.add_argument("--operator", help="operator's name, recorded in the manifest (real hardware)")
    sp.add_argument("--sign-off", help="sign-off line for the manifest (default: who, when)")

    sp = add("resume", cmd_resume, "continue an interrupted run (no gaps, no duplicates)")
    sp.add_argument("run", help="run folder")
    sp.add_argument(
        "--bench",
        help="corrected bench file (instrument addresses, timeouts, injected faults); refused "
        "when anything that changes the measurement differs from the run's",
    )
    sp.add_argument("--no-report", action="store_true", help="skip analysis and report at the end")
    sp.add_argument("--quiet", action="store_true", help="no live display")

    sp = add("verify", cmd_verify, "check a run folder's counts and checksums")
    sp.add_argument("run", help="run folder")

    sp = add(
        "instruments",
        cmd_instruments,
        "identify each instrument of a bench and read its error queue",
    )
    sp.add_argument("bench", help="bench file (TOML)")

    sp = add(
        "analyze",
        cmd_analyze,
        "per-event metrics (metrics.parquet) and group statistics (groups.csv) of a run",
    )
    sp.add_argument("run", help="run folder")
    sp.add_argument(
        "--confidence",
        type=float,
        default=0.95,
        help="confidence of the tolerance bound (default 0.95)",
    )
    sp.add_argument(
        "--coverage",
        type=float,
        default=0.99,
        help="coverage of the tolerance bound (default 0.99)",
    )
    sp.add_argument(
        "--full",
        action="store_true",
        help="analyse every event again (default: only events new or changed since the last "
        "analysis by the same analysis code)",
    )

    sp = add(
        "compare",
        cmd_compare,
        "compare a run with a baseline run; exit 0 only if every group is equivalent",
    )
    sp.add_argument("run", help="run folder (e.g. after repair)")
    sp.add_argument("--baseline", required=True, help="baseline run folder")
    sp.add_argument(
        "--tolerance",
        type=float,
        default=0.10,
        help="equivalence margin of the geometric-mean ratio run / baseline (the two "
        "one-sided t tests run on log values), symmetric on the log scale: 0.10 (default) "
        "means 1/1.1 .. 1.1",
    )
    sp.add_argument("--wide", action="store_true", help="also print every column of the CSV")
    sp.add_argument(
        "--metric",
        action="append",
        metavar="NAME",
        help="metric to compare, repeat for several (default: peak_a and charge_c; "
        "energy_j, rise_s, tau_s... on request)",
    )

    sp = add("measure", cmd_measure, "metrics of one waveform saved elsewhere (CSV or .npy)")
    sp.add_argument("file", help="CSV with time and current (or voltage) columns, or .npy")
    sp.add_argument("--charge-volts", type=float, required=True, help="charge voltage, V")
    sp.add_argument("--load-ohms", type=float, required=True, help="load resistance, ohms")
    sp.add_argument(
        "--shunt",
        type=float,
        metavar="OHMS",
        help="the CSV holds shunt voltage; divide by this resistance",
    )
    sp.add_argument("--dt", type=float, metavar="SECONDS", help="sample interval of a .npy file")
    sp.add_argument("--json", action="store_true", help="print JSON")

    sp = add(
        "predict",
        cmd_predict,
        "identify each group's source from its events into two "
        "or more loads and predict its discharge into other loads",
    )
    sp.add_argument("run", nargs="?", help="run folder (or give --source)")
    sp.add_argument(
        "--load",
        action="append",
        required=True,
        metavar="LOAD",
        help="load: a bench load name, a load file (.toml) or a resistance; repeat",
    )
    sp.add_argument("--source", help="an identified source saved with --save-source")
    sp.add_argument("--save-source", metavar="FILE", help="save the identified source (JSON)")
    sp.add_argument("--fit", metavar="A,B", help="the loads to identify from (default: all)")
    sp.add_argument("--volts", type=_si, help="charge voltage with --source (default: its own)")
    sp.add_argument("--window", type=_si, metavar="S", help="time window, s (default: record)")
    sp.add_argument("--wiring-ohms", type=_si, default=0.0, help="series wiring, ohms")
    sp.add_argument("--wiring-henry", type=_si, default=0.0, help="series wiring, H")
    sp.add_argument("--samples", type=int, default=8, help="parameter draws for the intervals")
    sp.add_argument("--seed", type=int, default=1, help="seed of the parameter draws")
    sp.add_argument("--out", help="folder for figures/ (default: the run folder)")

    sp = add(
        "report",
        cmd_report,
        "write report.html, figures/ and the printable certificate.pdf for a run "
        "(analyses it again first when its analysis files are older than its data)",
    )
    sp.add_argument("run", help="run folder")
    sp.add_argument("--baseline", help="baseline run folder to overlay and compare")

    sp = add("bringup", cmd_bringup, "walk each instrument's profile command by command, safely")
    sp.add_argument("bench", help="bench file (TOML)")
    sp.add_argument("--role", choices=("supply", "switch", "scope"), help="only this instrument")
    sp.add_argument("--write", default=".", help="folder for proposed profiles (default .)")
    sp = add("profile-check", cmd_profile_check, "check a profile file without an instrument")
    sp.add_argument("profile", help="profile name or file")
    sp = add("profile-doc", cmd_profile_doc, "write the command-set page of profiles (Markdown)")
    sp.add_argument("profile", nargs="+", help="profile names or files")
    sp.add_argument("--out", default="docs/dialects", help="folder (default docs/dialects)")
    _add_dataset_commands(add)

    sim = add("sim", lambda a: (sim.print_help(), EXIT_INPUT)[1], "simulated bench tools")
    simsub = sim.add_subparsers(dest="sim_command", metavar="SUBCOMMAND")
    sp = simsub.add_parser(
        "serve",
        help="serve the simulated bench on loopback in real time "
        "and print each instrument's VISA resource string",
        description="serve the simulated bench on loopback in real time",
    )
    sp.set_defaults(func=cmd_sim_serve)
    sp.add_argument("bench", help="bench file with a [simulation] table")
    sp.add_argument("--meter", help="meter model id or netlist path (default: the bench's)")
    sp.add_argument(
        "--port", type=int, metavar="BASE", help="fixed TCP ports BASE..BASE+3 (default: any free)"
    )
    sp.add_argument("--poll", type=float, default=0.5, help=argparse.SUPPRESS)
    return p


def _on_sigterm(signum: int, frame: object) -> None:
    # outside the runner's event loop (which installs its own handler) SIGTERM ends the
    # command like Ctrl-C: analysis and report included, exit 130 with the message
    raise KeyboardInterrupt("SIGTERM")


def _interrupted(exc: BaseException) -> int:
    name = str(exc) or "Ctrl-C" if isinstance(exc, KeyboardInterrupt) else "SIGTERM"
    where = ""
    if "dir" in _RUN:
        from rig.store.runfolder import read_journal

        try:
            n = len({int(r["event"]) for r in read_journal(_RUN["dir"])})
            where = f"; {_RUN['dir']} holds {n} journalled events (rig verify, rig resume)"
        except Exception:  # reporting the count must not hide the interrupt
            where = f"; see {_RUN['dir']}"
    print(f"rig: interrupted by {name}{where}", file=sys.stderr)
    return EXIT_INTERRUPTED


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``rig`` console script."""
    from rigbase.memory import prefer_system_allocator

    prefer_system_allocator()  # before pyarrow is imported: see rigbase.memory
    args = build_parser().parse_args(argv)
    level = (logging.WARNING, logging.INFO, logging.DEBUG)[min(args.verbose, 2)]
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    _RUN.clear()
    try:
        old_term = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (tests): leave signals alone
        old_term = None
    try:
        return _dispatch(args)
    finally:
        if old_term is not None:
            signal.signal(signal.SIGTERM, old_term)


def _dispatch(args: argparse.Namespace) -> int:
    try:
        return int(args.func(args))
    except (FileFormatError, LimitError, RunFolderError) as exc:
        print(f"rig: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except (InstrumentError, SafetyError) as exc:
        print(f"rig: error: {exc}", file=sys.stderr)
        return EXIT_BENCH
    except RigError as exc:
        print(f"rig: error: {exc}", file=sys.stderr)
        return EXIT_BENCH
    except OSError as exc:  # a file that cannot be read or written
        where = exc.filename or ""
        print(f"rig: error: {where}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt as exc:
        return _interrupted(exc)
    except BaseException as exc:
        if type(exc).__name__ == "Terminated":  # the runner's SIGTERM, outside its loop
            return _interrupted(exc)
        if isinstance(exc, SystemExit | GeneratorExit):
            raise
        log.debug("unexpected error", exc_info=True)
        first = (str(exc).strip().splitlines() or [""])[0]
        print(
            f"rig: internal error: {type(exc).__name__}: {first} (-vv for details)", file=sys.stderr
        )
        return EXIT_NO


if __name__ == "__main__":
    sys.exit(main())
