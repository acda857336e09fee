"""Tool commands: the simulated bench for your own scripts, instrument bring-up and profile
pages, and the dataset commands across runs.
"""

from __future__ import annotations

import argparse
import logging
from collections.abc import Callable
from pathlib import Path

from rig.cli.common import (
    EXIT_INPUT,
    EXIT_NO,
    EXIT_OK,
    _out,
)
from rigbase.errors import (
    FileFormatError,
)

log = logging.getLogger("rig")


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
