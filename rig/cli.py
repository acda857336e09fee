"""The ``rig`` command: check, run, resume, verify, analyse, compare, report, simulate.

Exit codes: 0 success; 1 a verdict or check said no (failed limits, not equivalent, run
incomplete, a run that failed to start) or an unexpected internal error (one line; -vv shows
the traceback); 2 bad input (a file, a key, a value, an option) or a run folder another
process holds; 3 instrument or interlock trouble, or a group in which no event was captured;
130 interrupted (Ctrl-C or SIGTERM, at any moment, analysis and report included).
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from rigbase.errors import (
    FileFormatError,
    InstrumentError,
    LimitError,
    RigError,
    RunFolderError,
    SafetyError,
)

__all__ = ["main"]

log = logging.getLogger("rig")

CAUTION = """\
HIGH VOLTAGE. This tool charges a meter's input to up to about a kilovolt; the voltages and
stored charges on the bench can injure or kill. Follow your local electrical codes, your
lab's safety rules and licensed practice: this software does not replace them. Use an
enclosed, interlocked bench with a hardware emergency stop; treat every input and lead as
live until measured discharged; keep hands off the bench while a run is active (Ctrl-C
stops a run and drives the bench to its safe state)."""

SOURCE_ROOT = Path(__file__).resolve().parent.parent
DEMO_SEQUENCE = SOURCE_ROOT / "sequences" / "qualification.toml"
DEMO_BENCH = SOURCE_ROOT / "sequences" / "benches" / "sim-demo.toml"

EXIT_OK, EXIT_NO, EXIT_INPUT, EXIT_BENCH, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


def _out(text: str = "") -> None:
    print(text, flush=True)


# ---------------------------------------------------------------------------------------------
# commands


def cmd_check(args: argparse.Namespace) -> int:
    from rig.planning.limits import checked_plan
    from rig.planning.plan import describe, safety_review
    from rig.planning.sequence import load_sequence
    from rig.runner.opener import load_bench

    bench = load_bench(args.bench)
    seq = load_sequence(args.sequence, bench)
    plan = checked_plan(seq, bench)  # the same limits `rig run` applies
    _out(describe(plan, bench, seq))
    findings = safety_review(plan, bench, seq)
    return EXIT_NO if any(f.level == "stop" for f in findings) else EXIT_OK


def _operator_prompt(message: str) -> None:
    """Ask the operator to act and confirm (real hardware)."""
    if not sys.stdin.isatty():
        raise SafetyError(f"operator action needed but no terminal to ask: {message}")
    input(f"\n>>> {message} [Enter] ")


def _confirm_hv(plan: Any, bench: Any, confirm: float | None) -> None:
    """Real hardware above the hazardous-live limit needs an explicit confirmation."""
    if bench.simulation is not None or plan.max_volts <= bench.limits.hazardous_live_volts:
        return
    if confirm is not None and abs(confirm - plan.max_volts) < 1e-9:
        return
    if confirm is not None:
        raise LimitError(
            f"--confirm-hv {confirm:g} does not match the plan's highest voltage "
            f"{plan.max_volts:g} V"
        )
    _out(CAUTION)
    if not sys.stdin.isatty():
        raise SafetyError(
            f"the plan charges to {plan.max_volts:g} V, above the hazardous-live limit "
            f"{bench.limits.hazardous_live_volts:g} V: pass --confirm-hv {plan.max_volts:g}"
        )
    typed = input(f"Type the highest voltage ({plan.max_volts:g}) to confirm: ").strip()
    if typed != f"{plan.max_volts:g}":
        raise SafetyError("high-voltage confirmation not given; nothing was switched on")


def _execute(
    writer: Any,
    bench_cfg: Any,
    seq: Any,
    plan: Any,
    quiet: bool,
    open_bench_fn: Callable[..., Any] | None = None,
) -> Any:
    """Open the bench, run the remaining events, close the bench; returns the RunOutcome."""
    from rig.runner.cycle import Runner
    from rig.runner.display import LiveDisplay
    from rig.runner.opener import open_bench

    first = next((e for e in plan.events if e.index not in writer.done), None)
    sim_model = seq.meters[first.meter_index].sim_model if first else None
    opener = open_bench_fn or open_bench
    started = False
    try:
        with opener(bench_cfg, first_sim_model=sim_model, operator=_operator_prompt) as ob:
            writer.update_manifest(instruments=ob.identities)
            display = LiveDisplay(plan, quiet=quiet, charge_captures=_charge_captures(seq))
            with display:
                started = True  # from here Runner.run records how the run ended
                outcome = Runner(ob, bench_cfg, seq, plan, writer, observer=display).run()
    except BaseException as exc:
        if not started:  # the bench never opened: say so in the manifest, for `rig verify`
            why = "interrupted before the bench opened" if _is_signal(exc) else str(exc)
            if writer.done:
                writer.update_manifest(status="interrupted", error=f"resume failed: {why}")
            else:
                writer.mark_failed_start(f"{type(exc).__name__}: {why}")
        raise
    return outcome


def _is_signal(exc: BaseException) -> bool:
    return isinstance(exc, KeyboardInterrupt) or type(exc).__name__ == "Terminated"


def _charge_captures(seq: Any) -> frozenset[str]:
    """With several captures, the one with the longest record shows charge in the live table
    (the others show |peak|), the same rule as the report's (rig.analysis.stats.capture_roles)."""
    if len(seq.captures) < 2:
        return frozenset()
    mode = seq.meters[0].modes[0]
    spans = {c: seq.scope_for(mode, c).record_s for c in seq.captures}
    return frozenset({max(spans, key=spans.__getitem__)})


def _finish(outcome: Any, run_dir: Path, report: bool) -> int:
    _out(f"run folder: {run_dir}")
    _out(f"ended by {outcome.exit_path.value}: {outcome.done}/{outcome.planned} events")
    _out(outcome.safe.summary())
    if outcome.error:
        _out(f"error: {outcome.error}")
    if outcome.late_signal:
        _out(
            f"rig: interrupted by {outcome.late_signal} after the last event; "
            f"{run_dir} holds {outcome.done} journalled events"
        )
        return EXIT_INTERRUPTED
    if outcome.empty_groups:
        _out("no event captured in group(s): " + "; ".join(outcome.empty_groups))
        _out("  the scope did not trigger: check its trigger level, probe and cabling")
        return EXIT_BENCH
    if outcome.status == "complete" and report:
        _analyse_and_report(run_dir, None)
    if outcome.status == "interrupted":
        _out(f"continue with: rig resume {run_dir}")
        return EXIT_INTERRUPTED
    if outcome.status != "complete":
        _out(f"continue with: rig resume {run_dir}")
        return EXIT_BENCH
    return EXIT_OK if outcome.safe.reached else EXIT_BENCH


def _analyse_and_report(run_dir: Path, baseline: Path | None) -> None:
    from rig.analysis.analyze import analyze_run

    result = analyze_run(run_dir)
    for p in result.paths.values():
        _out(f"wrote {p}")
    _print_verdicts(result.groups)
    from rig.report.page import write_report

    _out(f"report: {write_report(run_dir, baseline)}")


def _print_verdicts(groups: Any) -> dict[str, int]:
    """One line: how many group x limit checks passed, failed, or had too few events."""
    if not len(groups) or "verdict" not in groups:
        return {}
    counts = groups["verdict"].dropna().value_counts().to_dict()
    counts = {k: int(v) for k, v in counts.items() if str(k).strip()}
    if counts:
        _out(
            "verdicts against the sequence's limits: "
            + ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
        )
    return counts


def cmd_run(args: argparse.Namespace) -> int:
    from rig.planning.limits import checked_plan
    from rig.planning.plan import describe, safety_review
    from rig.planning.sequence import load_sequence
    from rig.runner.cycle import host_info
    from rig.runner.opener import load_bench
    from rig.store.runfolder import RunWriter, new_run_id

    bench = load_bench(args.bench)
    seq = load_sequence(args.sequence, bench)
    plan = checked_plan(seq, bench)
    findings = safety_review(plan, bench, seq)
    _out(CAUTION)  # always, --quiet included
    _out()
    if not args.quiet:
        _out(describe(plan, bench, seq))
    if any(f.level == "stop" for f in findings):
        _out("rig: the safety review stops this run; nothing was switched on")
        return EXIT_NO
    _confirm_hv(plan, bench, args.confirm_hv)
    manifest = {
        "sequence_file": str(Path(args.sequence).resolve()),
        "bench_file": str(Path(args.bench).resolve()),
        "sequence": seq.raw,
        "bench": bench.raw,
        "simulated": bench.simulation is not None,
        "software": host_info(),
        "started": _now_iso(),
        "status": "created",
    }
    writer = RunWriter.create(
        args.results,
        new_run_id(seq.name),
        manifest,
        [{**e.to_dict(), "event": e.index} for e in plan.events],
        inputs={"sequence.toml": Path(args.sequence), "bench.toml": Path(args.bench)},
    )
    _RUN["dir"] = writer.path
    with writer:  # holds the run folder's lock through the analysis and report too
        outcome = _execute(writer, bench, seq, plan, args.quiet)
        return _finish(outcome, writer.path, report=not args.no_report)


def cmd_resume(args: argparse.Namespace) -> int:
    from rig.planning.limits import checked_plan
    from rig.planning.sequence import load_sequence
    from rig.runner.opener import load_bench
    from rig.runner.rebench import adopt_bench, record_bench
    from rig.store.runfolder import RunWriter, read_manifest, read_plan

    run = Path(args.run)
    read_manifest(run)  # "is this a run folder?" before anything else
    bench = load_bench(run / "bench.toml")
    if args.bench:
        bench = adopt_bench(run, load_bench(args.bench), Path(args.bench))
    seq = load_sequence(run / "sequence.toml", bench)
    plan = checked_plan(seq, bench)
    stored = [p["key"] for p in read_plan(run)]
    if stored != [e.key for e in plan.events]:
        raise RunFolderError(
            f"{run / 'plan.json'}: the stored plan differs from the one its sequence gives now"
        )
    writer = RunWriter.reopen(run)
    if args.bench:
        record_bench(run, Path(args.bench))
        writer.update_manifest(bench_file=str(Path(args.bench).resolve()), bench=bench.raw)
    remaining = len(plan.events) - len(writer.done)
    if remaining == 0 and read_manifest(run).get("status") == "complete":
        writer.close()
        _out(f"{run}: all {len(plan.events)} planned events are done; nothing to resume")
        return EXIT_OK
    # otherwise open the bench even with nothing left to run: a run that was killed has not
    # been through the safe-state procedure, and its event table is still to be written
    _out(f"resuming {run}: {len(writer.done)} done, {remaining} to go")
    _RUN["dir"] = run
    with writer:
        outcome = _execute(writer, bench, seq, plan, args.quiet)
        return _finish(outcome, run, report=not args.no_report)


def cmd_verify(args: argparse.Namespace) -> int:
    from rig.store.runfolder import verify_run

    v = verify_run(args.run)
    _out(
        f"{v.path}: status {v.status}; {v.journalled}/{v.planned} events journalled, "
        f"{v.captured} with waveforms"
    )
    for n in v.notes:
        _out(f"  note: {n}")
    for p in v.problems:
        _out(f"  PROBLEM: {p}")
    if not v.ok:
        return EXIT_NO
    if v.status == "failed to start":
        _out("  consistent; the run failed to start (see the note); `rig resume` retries it")
        return EXIT_NO
    _out("  consistent" + ("" if v.status == "complete" else " (incomplete; resumable)"))
    return EXIT_OK if v.status == "complete" else EXIT_NO


def cmd_instruments(args: argparse.Namespace) -> int:
    from rig.runner.opener import load_bench, open_bench

    bench = load_bench(args.bench)
    with open_bench(bench, operator=_operator_prompt) as ob:
        for s in ob._sessions:
            errs = s.errors()
            q = "error queue empty" if not errs else "; ".join(f"{c},{m!r}" for c, m in errs)
            _out(f"{s.name:8s} {s.resource_name}  {ob.identities.get(s.name, '?')}  ({q})")
        if ob.sim is not None:
            _out("(simulated bench, started in-process on loopback)")
    return EXIT_OK


def cmd_analyze(args: argparse.Namespace) -> int:
    from rig.analysis.analyze import analyze_run
    from rig.analysis.options import check_confidence, check_coverage
    from rig.store.lock import RunLock

    confidence, coverage = check_confidence(args.confidence), check_coverage(args.coverage)
    _must_be_run(args.run)
    with RunLock(args.run, "analyze"):  # no run, resume or other analysis writes meanwhile
        result = analyze_run(args.run, confidence=confidence, coverage=coverage)
    for name, p in result.paths.items():
        _out(f"{name}: {p}")
    counts = _print_verdicts(result.groups)
    return EXIT_NO if counts.get("fail", 0) else EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    from rig.analysis.compare import all_equivalent, compare_runs, write_comparison
    from rig.analysis.options import check_tolerance

    kw = {"metrics": tuple(args.metric)} if args.metric else {}
    tolerance = check_tolerance(args.tolerance)
    df = compare_runs(args.run, args.baseline, tolerance=tolerance, **kw)
    path = write_comparison(df, args.run, args.baseline)
    with _pd_display():
        _out(df.to_string(index=False))
    _out(f"wrote {path}")
    ok = all_equivalent(df)
    untested = int((df["verdict"] == "only in baseline").sum()) if len(df) else 0
    if untested:
        _out(f"{untested} baseline group x metric rows were not re-tested (listed above)")
    _out("all groups equivalent" if ok else "not every group is equivalent")
    return EXIT_OK if ok else EXIT_NO


def cmd_measure(args: argparse.Namespace) -> int:
    import json

    from rig.analysis.measure import measure_file

    m = measure_file(
        args.file,
        dt=args.dt,
        shunt_ohms=args.shunt,
        charge_volts=args.charge_volts,
        load_ohms=args.load_ohms,
    )
    if args.json:
        _out(json.dumps(m, indent=2, default=float))
    else:
        from rigbase.units import eng, metric_unit

        width = max(len(k) for k in m)
        for k, v in m.items():
            _out(f"{k:<{width}}  {eng(v, metric_unit(k)) if isinstance(v, float) else v}")
    return EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    from rig.report.page import write_report
    from rig.store.lock import RunLock

    run = Path(args.run)
    _must_be_run(run)
    with RunLock(run, "report"):  # the tables it reads are not replaced meanwhile
        if not (run / "metrics.parquet").exists():
            from rig.analysis.analyze import analyze_run

            analyze_run(run)
        _out(f"report: {write_report(run, Path(args.baseline) if args.baseline else None)}")
    return EXIT_OK


def _must_be_run(run: str | Path) -> None:
    """RunFolderError unless ``run`` holds a manifest (before a lock file is made there)."""
    from rig.store.runfolder import read_manifest

    read_manifest(run)


def cmd_demo(args: argparse.Namespace) -> int:
    _out("Demo: qualification of two invented candidate meters on the simulated bench.")
    ns = argparse.Namespace(
        sequence=str(DEMO_SEQUENCE),
        bench=str(DEMO_BENCH),
        results=args.results,
        confirm_hv=None,
        quiet=args.quiet,
        no_report=False,
    )
    return cmd_run(ns)


def cmd_sim_serve(args: argparse.Namespace) -> int:
    import time

    from rig.planning.benchfile import resolve_meter_model
    from rig.runner.opener import load_bench, serve_simulated_bench

    bench = load_bench(args.bench)
    if bench.simulation is None:
        raise FileFormatError(args.bench, "simulation", "this bench file has no [simulation] table")
    meter = resolve_meter_model(args.meter) if args.meter else None
    with serve_simulated_bench(bench, meter) as sim:
        _out("Simulated bench: no voltage leaves this computer. Before driving a real bench,")
        _out("read the high-voltage cautions of `rig --help` and the README.")
        _out(f"simulated bench running in real time, meter model {sim.world.config.meter_model}")
        for role, res in sim.resources.items():
            _out(f"  {role:8s} {res}")
        _out("profile: drivers/profiles/scpi1999.toml; Ctrl-C stops")
        try:
            while True:
                time.sleep(args.poll)
        except KeyboardInterrupt:
            _out("stopped")
    return EXIT_OK


# ---------------------------------------------------------------------------------------------
# plumbing


def _now_iso() -> str:
    from datetime import UTC, datetime

    return datetime.now(UTC).isoformat(timespec="seconds")


class _pd_display:
    def __enter__(self) -> None:
        import pandas as pd

        self._ctx = pd.option_context("display.width", 160, "display.max_columns", 20)
        self._ctx.__enter__()

    def __exit__(self, *exc: object) -> None:
        self._ctx.__exit__(*exc)


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
        help="equivalence margin on the ratio of medians (default 0.10 = +-10 %%)",
    )
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

    sp = add("report", cmd_report, "write report.html and figures/ for a run")
    sp.add_argument("run", help="run folder")
    sp.add_argument("--baseline", help="baseline run folder to overlay and compare")

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
    sp.add_argument("--poll", type=float, default=0.5, help=argparse.SUPPRESS)
    return p


_RUN: dict[str, Path] = {}  # the run folder this process writes (for the interrupt message)


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
