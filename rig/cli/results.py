"""Commands on stored runs: analyze, compare, measure, predict, report."""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

from rig.cli.common import (
    EXIT_NO,
    EXIT_OK,
    _must_be_run,
    _out,
    _pd_display,
    _print_verdicts,
)
from rigbase.errors import (
    FileFormatError,
)

log = logging.getLogger("rig")


def cmd_analyze(args: argparse.Namespace) -> int:
    from rig.analysis.analyze import analyze_run
    from rig.analysis.options import check_confidence, check_coverage
    from rig.store.lock import RunLock

    confidence, coverage = check_confidence(args.confidence), check_coverage(args.coverage)
    _must_be_run(args.run)
    with RunLock(args.run, "analyze"):  # no run, resume or other analysis writes meanwhile
        result = analyze_run(args.run, confidence=confidence, coverage=coverage, full=args.full)
    _out(f"analysed {result.analysed} captured events, kept {result.reused} unchanged")
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


def cmd_report(args: argparse.Namespace) -> int:
    from rig.analysis.analyze import analysis_mismatch, analyze_run, recorded_analysis_options
    from rig.report.documents import write_documents
    from rig.store.lock import RunLock

    run = Path(args.run)
    _must_be_run(run)
    with RunLock(run, "report"):  # the tables it reads are not replaced meanwhile
        stale = analysis_mismatch(run)
        if stale:  # recompute with the options the files were made with
            opts = recorded_analysis_options(run) if (run / "groups.csv").exists() else {}
            _out(f"analysing again: {stale}")
            analyze_run(run, **opts, table=False)
        base = Path(args.baseline) if args.baseline else None
        report, certificate = write_documents(run, base)  # drawn side by side
        _out(f"report: {report}")
        _out(f"certificate: {certificate}")
    return EXIT_OK
