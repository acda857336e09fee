"""Commands that drive the bench: check, run, resume, demo, verify, instruments; the end of a run
(safe state, analysis, report, verdicts) and its exit code.
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from rig.cli.common import (
    _RUN,
    CAUTION,
    DEMO_BENCH,
    DEMO_SEQUENCE,
    EXIT_BENCH,
    EXIT_INTERRUPTED,
    EXIT_NO,
    EXIT_OK,
    _now,
    _now_iso,
    _out,
    _print_verdicts,
    _today,
)
from rigbase.errors import (
    LimitError,
    RunFolderError,
    SafetyError,
)

log = logging.getLogger("rig")


def cmd_check(args: argparse.Namespace) -> int:
    from rig.planning.limits import checked_plan
    from rig.planning.review import describe, safety_review
    from rig.planning.sequence import load_sequence
    from rig.runner.opener import check_meter_netlists, load_bench, meter_time_constants

    bench = load_bench(args.bench)
    seq = load_sequence(args.sequence, bench)
    check_meter_netlists(seq)
    plan = checked_plan(seq, bench)  # the same limits `rig run` applies
    taus = meter_time_constants(bench, seq)
    _out(describe(plan, bench, seq, taus))
    findings = safety_review(plan, bench, seq, taus)
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
    counts: dict[str, int] = {}
    if outcome.status == "complete" and report:
        from rig.store.zarrwave import stop_io_threads

        stop_io_threads()  # the last waveform is written: the analysis may fork workers
        counts = _analyse_and_report(run_dir, None)
    if outcome.status == "interrupted":
        _out(f"continue with: rig resume {run_dir}")
        return EXIT_INTERRUPTED
    if outcome.status != "complete":
        _out(f"continue with: rig resume {run_dir}")
        return EXIT_BENCH
    if not outcome.safe.reached:
        return EXIT_BENCH
    # a verdict against the sequence's limits that says no is exit 1 (README, "Exit codes")
    return EXIT_NO if counts.get("fail", 0) else EXIT_OK


def _analyse_and_report(run_dir: Path, baseline: Path | None) -> dict[str, int]:
    """Analyse, print the verdict counts, write the report and certificate; the counts."""
    from rig.analysis.analyze import analyze_run

    # incremental: after a resume only the new events; the per-event table is not held
    # through the report (which reads what it needs)
    result = analyze_run(run_dir, table=False)
    _out(f"analysed {result.analysed} captured events, kept {result.reused} unchanged")
    for p in result.paths.values():
        _out(f"wrote {p}")
    counts = _print_verdicts(result.groups)
    from rig.report.documents import write_documents

    report, certificate = write_documents(run_dir, baseline)  # drawn side by side
    _out(f"report: {report}")
    _out(f"certificate: {certificate}")
    return counts


def cmd_run(args: argparse.Namespace) -> int:
    from rig.planning.limits import checked_plan
    from rig.planning.review import describe, safety_review
    from rig.planning.sequence import load_sequence
    from rig.runner.cycle import host_info
    from rig.runner.opener import check_meter_netlists, load_bench, meter_time_constants
    from rig.runner.signoff import check_calibration, sign_off
    from rig.store.runfolder import RunWriter, new_run_id

    bench = load_bench(args.bench)
    accepted = check_calibration(bench, _today(), input if sys.stdin.isatty() else None)
    seq = load_sequence(args.sequence, bench)
    check_meter_netlists(seq)
    plan = checked_plan(seq, bench)
    taus = meter_time_constants(bench, seq)
    findings = safety_review(plan, bench, seq, taus)
    _out(CAUTION)  # always, --quiet included
    _out()
    if not args.quiet:
        _out(describe(plan, bench, seq, taus))
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
        "calibration": bench.calibration.rows(),
        "operator": sign_off(
            bench,
            getattr(args, "operator", None),
            getattr(args, "sign_off", None),
            accepted,
            _now(),
        ),
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
    from rig.runner.opener import check_meter_netlists, load_bench
    from rig.runner.rebench import adopt_bench, record_bench
    from rig.runner.signoff import check_calibration
    from rig.store.runfolder import RunWriter, read_manifest, read_plan

    run = Path(args.run)
    read_manifest(run)  # "is this a run folder?" before anything else
    bench = load_bench(run / "bench.toml")
    if args.bench:
        bench = adopt_bench(run, load_bench(args.bench), Path(args.bench))
    check_calibration(bench, _today(), input if sys.stdin.isatty() else None)
    seq = load_sequence(run / "sequence.toml", bench)
    check_meter_netlists(seq)  # as check and run do
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
    code = cmd_run(ns)
    # The demo's limits are set so that one candidate fails on purpose: the demonstration has
    # succeeded when it ran, analysed and reported (README, "Exit codes"). Errors keep their code.
    return EXIT_OK if code == EXIT_NO else code
