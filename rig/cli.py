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

    result = analyze_run(run_dir)
    for p in result.paths.values():
        _out(f"wrote {p}")
    counts = _print_verdicts(result.groups)
    from rig.report.certificate import write_certificate
    from rig.report.page import write_report

    _out(f"report: {write_report(run_dir, baseline)}")
    _out(f"certificate: {write_certificate(run_dir, baseline)}")
    return counts


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
    from rig.analysis import compare as C
    from rig.analysis.options import check_tolerance

    tolerance = check_tolerance(args.tolerance)
    metrics = tuple(args.metric) if args.metric else C.DEFAULT_METRICS
    df = C.compare_runs(args.run, args.baseline, tolerance=tolerance, metrics=metrics)
    opts = C.compare_options(tolerance, metrics)
    path = C.write_comparison(df, args.run, args.baseline, opts)
    lo, hi = C.equivalence_margins(tolerance)
    if C.no_overlap(df):
        _out(
            f"no group of {args.run} matches a group of the baseline {args.baseline} "
            "(same meter model, mode, capture, voltage, load and delay): nothing was compared"
        )
        _out(f"wrote {path}")
        return EXIT_NO
    table = C.verdict_table(df)
    _out(
        f"equivalence: geometric-mean ratio run / baseline within {lo:.3f} .. {hi:.3f} "
        f"(--tolerance {tolerance:g}, symmetric on the log scale); ratios in brackets "
        "are ratios of medians"
    )
    with _pd_display():
        _out(table.to_string(index=False))
        if args.wide:
            _out(df.to_string(index=False))
    untested = df.loc[df["verdict"] == "only in baseline", list(C.COMPARE_KEYS)].drop_duplicates()
    if len(untested):
        _out(f"{len(untested)} baseline group(s) not re-tested (listed in {path.name})")
    alone = df.loc[df["verdict"] == "only in run", list(C.COMPARE_KEYS)].drop_duplicates()
    if len(alone):
        _out(f"{len(alone)} group(s) of this run have no baseline group: not equivalent")
    _out(f"wrote {path}" + ("" if args.wide else " (all columns; --wide prints them)"))
    ok = C.all_equivalent(df)
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


def cmd_predict(args: argparse.Namespace) -> int:
    from rig.analysis.predict import predict
    from rig.analysis.predictrun import predict_run, resolve_load
    from rig.analysis.sourcenet import FosterSource
    from rig.report.figures.predicted import fig_prediction, measured_medians
    from rig.report.figures.style import render
    from rigbase.units import eng

    if (args.run is None) == (args.source is None):
        raise FileFormatError("rig predict", "run", "give a run folder or --source, not both")
    import numpy as np

    rng = np.random.default_rng(args.seed)
    kw = {
        "series_ohms": args.wiring_ohms,
        "series_henry": args.wiring_henry,
        "samples": args.samples,
    }
    if args.source:
        src = FosterSource.load(args.source)
        preds = [
            predict(src, resolve_load(s), rng, args.window or 0.05, args.volts, **kw)
            for s in args.load
        ]
        detail = [({"source": args.source}, src, preds)]
    else:
        fit = args.fit.split(",") if args.fit else None
        _, detail = predict_run(args.run, args.load, rng, fit, args.window, **kw)
        if not detail:
            _out("no group of this run went into two or more loads: nothing to identify")
            return EXIT_NO
    out = Path(args.out or (args.run or "."))
    for n, (keys, src, preds) in enumerate(detail):
        _out(
            " ".join(f"{k}={v}" for k, v in keys.items()) + f": {src.order} branches, "
            f"dominant {eng(src.dominant()[0], 'F')}, tau {eng(src.dominant()[1], 's')}"
        )
        for p in preds:
            _out(
                f"  {p.load}: "
                + ", ".join(
                    f"{m} {eng(p.value[m], u)} [{eng(p.low[m], u)}, {eng(p.high[m], u)}]"
                    for m, u in (("peak_a", "A"), ("charge_c", "C"), ("energy_j", "J"))
                )
            )
        if args.save_source:
            src.save(Path(args.save_source).with_suffix(f".{n}.json") if n else args.save_source)
        measured = measured_medians(args.run, keys, [p.load for p in preds]) if args.run else {}
        fig = fig_prediction(preds, measured, " ".join(str(v) for v in keys.values()))
        _out(f"figure: {render(fig, f'predicted-{n}', out / 'figures').png_path}")
    return EXIT_OK


def _si(text: str) -> float:
    """A command-line number with an optional SI prefix (``200n``, ``1k``)."""
    from rigbase.tomlcheck import parse_si

    try:
        return parse_si(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def cmd_report(args: argparse.Namespace) -> int:
    from rig.analysis.analyze import analysis_mismatch, analyze_run, recorded_analysis_options
    from rig.report.page import write_report
    from rig.store.lock import RunLock

    run = Path(args.run)
    _must_be_run(run)
    with RunLock(run, "report"):  # the tables it reads are not replaced meanwhile
        stale = analysis_mismatch(run)
        if stale:  # recompute with the options the files were made with
            opts = recorded_analysis_options(run) if (run / "groups.csv").exists() else {}
            _out(f"analysing again: {stale}")
            analyze_run(run, **opts)
        from rig.report.certificate import write_certificate

        base = Path(args.baseline) if args.baseline else None
        _out(f"report: {write_report(run, base)}")
        _out(f"certificate: {write_certificate(run, base)}")
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
    code = cmd_run(ns)
    # The demo's limits are set so that one candidate fails on purpose: the demonstration has
    # succeeded when it ran, analysed and reported (README, "Exit codes"). Errors keep their code.
    return EXIT_OK if code == EXIT_NO else code


def cmd_sim_serve(args: argparse.Namespace) -> int:
    import time

    from rig.planning.benchfile import resolve_meter_model
    from rig.runner.opener import load_bench, serve_simulated_bench
    from rig.runner.pasteable import pasteable_bench

    bench = load_bench(args.bench)
    if bench.simulation is None:
        raise FileFormatError(args.bench, "simulation", "this bench file has no [simulation] table")
    meter = resolve_meter_model(args.meter) if args.meter else None
    with serve_simulated_bench(bench, meter, args.port) as sim:
        _out("Simulated bench: no voltage leaves this computer. Before driving a real bench,")
        _out("read the high-voltage cautions of `rig --help` and the README.")
        _out(f"simulated bench running in real time, meter model {sim.world.config.meter_model}")
        for role, res in sim.resources.items():
            _out(f"  {role:8s} {res}")
        _out("bench file for these instruments (paste into a .toml file):")
        _out("# ---8<---")
        _out(pasteable_bench(Path(args.bench).read_text(encoding="utf-8"), sim.resources))
        _out("# ---8<---  Ctrl-C stops")
        try:
            while True:
                time.sleep(args.poll)
        except KeyboardInterrupt:
            _out("stopped")
    return EXIT_OK


def cmd_bringup(args: argparse.Namespace) -> int:
    from contextlib import nullcontext

    from rig.runner.bringup import bring_up, propose_profile
    from rig.runner.opener import load_bench, serve_simulated_bench

    bench = load_bench(args.bench)
    roles = [args.role] if args.role else [r for r in ("supply", "switch", "scope")]
    sim = serve_simulated_bench(bench) if bench.simulation is not None else nullcontext()
    with sim as running:
        where = running.resources if running is not None else {}
        resources = {r: where.get(r, s.resource) for r, s in bench.instruments.items()}
        reports = bring_up(bench, roles, resources, _out)
    for rep in reports:
        proposed = propose_profile(rep, Path(args.write))
        if proposed is not None:
            _out(f"proposed profile with the finding: {proposed}")
    fixes = [f for f in (r.first_fix() for r in reports) if f]
    _out(f"first thing to fix: {fixes[0]}" if fixes else "bring-up: every step matched")
    return EXIT_NO if fixes else EXIT_OK


def cmd_profile_check(args: argparse.Namespace) -> int:
    from drivers.profiledoc import check_profile

    problems = check_profile(args.profile)
    for p in problems:
        _out(p)
    _out(f"{args.profile}: " + (f"{len(problems)} problem(s)" if problems else "no problems found"))
    return EXIT_INPUT if problems else EXIT_OK


def cmd_profile_doc(args: argparse.Namespace) -> int:
    from drivers.profiledoc import write_page

    for name in args.profile:
        _out(f"wrote {write_page(name, Path(args.out))}")
    return EXIT_OK


# ---------------------------------------------------------------------------------------------
# plumbing


def _now_iso() -> str:
    return _now().isoformat(timespec="seconds")


def _now() -> Any:
    from datetime import UTC, datetime

    return datetime.now(UTC)


def _today() -> Any:
    """Today's date (UTC), for calibration due dates."""
    return _now().date()


class _pd_display:
    def __enter__(self) -> None:
        import pandas as pd

        self._ctx = pd.option_context("display.width", 160, "display.max_columns", 20)
        self._ctx.__enter__()

    def __exit__(self, *exc: object) -> None:
        self._ctx.__exit__(*exc)


def cmd_catalog(args: argparse.Namespace) -> int:
    from rig.dataset.commands import run_catalog

    return run_catalog(args, _out)


def cmd_query(args: argparse.Namespace) -> int:
    from rig.dataset.commands import run_query

    return run_query(args, _out)


def _add_dataset_commands(add: Callable[..., argparse.ArgumentParser]) -> None:
    """``rig catalog`` and ``rig query`` (rig.dataset); options only, nothing imported."""
    sp = add("catalog", cmd_catalog, "list run folders; with --dataset, gather analysed runs")
    sp.add_argument("results", type=Path, help="folder of run folders (or one run folder)")
    sp.add_argument("--dataset", type=Path, help="dataset folder to build or update")
    sp.add_argument("--add", action="append", metavar="RUN", help="another run folder to add")
    sp.add_argument("--analyse", action="store_true", help="analyse new runs first (on Dask)")
    sp.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler (default: local)")
    sp = add("query", cmd_query, "statistics of a metric across the runs of a dataset")
    sp.add_argument("dataset", type=Path, help="dataset folder (from rig catalog --dataset)")
    sp.add_argument("--metric", default="peak_a", help="metric column (default peak_a)")
    sp.add_argument("--per", choices=("model", "unit"), default="model", help="group by")
    sp.add_argument("--where", action="append", metavar="COL=VALUE", help="filter; repeatable")
    sp.add_argument("--engine", choices=("pandas", "duckdb", "dask"), default="pandas")
    sp.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler (default: local)")
    sp.add_argument("--variance", action="store_true", help="split between units and events")
    sp.add_argument("--trend", action="store_true", help="I-MR chart per unit over time")
    sp.add_argument("--baseline", action="append", metavar="RUN_ID", help="baseline run id")
    sp.add_argument("--level", choices=("run", "event"), default="run", help="chart points")
    sp.add_argument("--csv", type=Path, help="also write the table to this CSV file")


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
