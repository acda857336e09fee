"""The ``rig catalog`` and ``rig query`` commands: what they do and print, on top of the dataset
API (rig.cli declares their options and calls these, so ``rig --help`` imports none of this)."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

import pandas as pd

from rig.dataset.build import build_dataset
from rig.dataset.catalog import list_runs
from rig.dataset.control import CHART_NAME, individuals_chart
from rig.dataset.query import group_summary, load_events
from rig.dataset.variance import variance_split
from rigbase.errors import FileFormatError

__all__ = ["run_catalog", "run_query"]

SETTING = ["mode", "capture", "volts", "load", "delay_s"]


def _table(df: pd.DataFrame) -> str:
    with pd.option_context("display.width", 200, "display.max_columns", 30):
        return df.to_string(index=False) if len(df) else "(nothing)"


def run_catalog(args: argparse.Namespace, out: Callable[[str], None]) -> int:
    """List the runs under ``args.results``; with ``--dataset``, add the analysed ones."""
    cat = list_runs(args.results)
    out(_table(cat.drop(columns=["path"])))
    if args.dataset:
        runs = [*cat["path"], *(args.add or [])]
        if args.analyse:
            from rig.dataset.distribute import analyze_runs

            todo = [p for p, done in zip(cat["path"], cat["analysed"], strict=True) if not done]
            analyze_runs(todo, scheduler=args.scheduler)
            out(f"analysed {len(todo)} run(s) on Dask")
        s = build_dataset(args.dataset, runs)
        out(
            f"dataset {args.dataset}: {len(s.added)} added, {len(s.replaced)} replaced, "
            f"{len(s.unchanged)} unchanged, {len(s.skipped)} skipped"
        )
        for run, why in s.skipped.items():
            out(f"  skipped {run}: {why}")
    return 0


def _where(items: list[str] | None) -> dict[str, Any]:
    where: dict[str, Any] = {}
    for item in items or []:
        col, sep, value = item.partition("=")
        if not sep or not col:
            raise FileFormatError("--where", item, "expected COLUMN=VALUE")
        try:
            where[col] = float(value) if col in ("volts", "delay_s", "load_ohms") else value
        except ValueError:
            raise FileFormatError("--where", col, f"{value!r} is not a number") from None
    return where


def run_query(args: argparse.Namespace, out: Callable[[str], None]) -> int:
    """Group statistics, variance split or control chart of one metric across the dataset."""
    where = _where(args.where)
    unit = ["serial"] if args.per == "unit" else []
    if args.variance:
        ev = load_events(args.dataset, where=where)
        df = variance_split(ev, args.metric, by=["model", *SETTING])
        out(f"one-way random-effects ANOVA of {args.metric}: units = serials")
    elif args.trend:
        ev = load_events(args.dataset, where=where)
        base = args.baseline or []
        if not base:
            raise FileFormatError("--trend", "--baseline", "name the baseline run ids")
        df = individuals_chart(ev, args.metric, base, by=["serial", *SETTING], level=args.level)
        out(f"{CHART_NAME}; limits from {len(base)} baseline run(s)")
    else:
        by = ["model", *unit, *SETTING]
        df = group_summary(
            args.dataset, args.metric, by, where, engine=args.engine, scheduler=args.scheduler
        )
    out(_table(df))
    if args.csv:
        df.to_csv(args.csv, index=False)
        out(f"wrote {args.csv}")
    return 0
