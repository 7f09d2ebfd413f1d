"""``rungway plan SPEC --workers N``: what a search will cost on a cluster, before running it.

Simulates the spec's search on the simulated cluster (see :mod:`rungway.scheduler.sim`) a
number of times and prints the median and the 10th-90th percentile of wall time, CPU-hours,
utilization and results per rung. Segment costs come from ``--seconds-per-unit`` (a linear
model), from a finished search's measurements (``--from-search NAME --store DIR``), or from
the planner's stated default.

Exit status: 0 printed, 2 a mistake in the input (the message says which).
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from rungway.scheduler.core.errors import SpecError

__all__ = ["add_parser", "run"]

EXIT_USER_ERROR = 2


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be an integer >= 1 (got {text!r})") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be an integer >= 1 (got {text!r})")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number > 0 (got {text!r})") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0 (got {text!r})")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number >= 0 (got {text!r})") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number >= 0 (got {text!r})")
    return value


def configure(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    """Add the ``plan`` arguments to ``parser``."""
    parser.add_argument("spec", help="the search's spec file (TOML)")
    parser.add_argument("--workers", type=_positive_int, required=True, help="machines in the cluster")
    parser.add_argument("--cpus-per-worker", type=_positive_float, default=1.0, help="CPUs per machine (default 1)")
    parser.add_argument("--quota-cpus", type=_positive_float, help="at most this many CPUs busy at once (default: no quota)")
    parser.add_argument("--from-search", metavar="NAME", help="fit the segment cost to this finished search's measurements")
    parser.add_argument("--store", help="store root holding --from-search (a folder or a pyarrow URI)")
    parser.add_argument("--seconds-per-unit", type=_positive_float,
                        help="segment cost: seconds per budget unit (linear model; default: the planner's stated default)")
    parser.add_argument("--overhead-seconds", type=_non_negative_float, default=0.0,
                        help="with --seconds-per-unit: fixed seconds per segment (default 0)")
    parser.add_argument("--failures-per-hour", type=_non_negative_float, default=0.0,
                        help="node failures per worker per hour (default 0)")
    parser.add_argument("--repeats", type=_positive_int, default=20, help="simulated runs (default 20)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the first run (default 0)")
    parser.add_argument("--json", action="store_true", help="print the estimate as JSON")
    return parser


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Register ``plan`` on an ``add_subparsers()`` object; returns its parser."""
    parser = subparsers.add_parser(
        "plan", help="simulate a search on a cluster: expected wall time, CPU-hours, trials per rung",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    return configure(parser)


def run(args: argparse.Namespace) -> int:
    """Carry out ``rungway plan``; returns the exit status."""
    try:
        return _run(args)
    except SpecError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR


def _run(args: argparse.Namespace) -> int:
    from rungway.scheduler.sim import LinearCost, plan_search
    from rungway.scheduler.spec import load_spec

    spec = load_spec(args.spec)
    cost = None
    fitted_from = None
    cpu_per_reserved = None
    if getattr(args, "from_search", None):
        if getattr(args, "seconds_per_unit", None) is not None:
            raise SpecError("give either --from-search or --seconds-per-unit, not both", field="--seconds-per-unit")
        if not getattr(args, "store", None):
            raise SpecError("--from-search needs --store, the store root that holds the search", field="--store")
        from rungway.scheduler.store import open_store

        root = args.store
        if "://" not in root:
            from pathlib import Path

            root = str(Path(root).resolve())
        files = open_store(root).search(args.from_search)
        if files.read_spec() is None:
            known = ", ".join(files.store.list_searches()) or "none"
            raise SpecError(f"no search named {args.from_search!r} in {args.store} (searches there: {known})",
                            field="--from-search")
        fitted_from = files.read_measurements()
        cpu_per_reserved = _cpu_per_reserved(files)
    elif getattr(args, "seconds_per_unit", None) is not None:
        cost = LinearCost(args.seconds_per_unit, getattr(args, "overhead_seconds", 0.0) or 0.0)
    estimate = plan_search(
        spec, args.workers, cpus_per_worker=getattr(args, "cpus_per_worker", 1.0),
        quota_cpus=getattr(args, "quota_cpus", None), cost=cost, fitted_from=fitted_from,
        repeats=getattr(args, "repeats", 20), seed=getattr(args, "seed", 0),
        failure_rate_per_hour=getattr(args, "failures_per_hour", 0.0), cpu_per_reserved=cpu_per_reserved,
    )
    if getattr(args, "json", False):
        print(json.dumps(estimate.to_dict(), indent=2))
    else:
        print(estimate.format())
    return 0


def _cpu_per_reserved(files: Any) -> float | None:
    """The CPU time a finished search's segments used per CPU-second they reserved (its head's
    snapshot keeps both), or None when it does not say (a search run before both were kept)."""
    from rungway.scheduler.head.driver import HEAD_STATE

    state = files.read_head_state(HEAD_STATE)
    if state is None:
        return None
    meta = json.loads(state).get("meta", {})
    reserved = meta.get("reserved_cpu_seconds")
    if not reserved or reserved <= 0:
        return None
    return float(meta.get("cpu_seconds", 0.0)) / float(reserved)
