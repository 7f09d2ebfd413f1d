"""The ``rungway`` command: run a search, run the demo, show and export results.

Exit status: 0 done, 2 a mistake in the user's input (the message says which field or file
and what would be valid; no traceback), 3 the search paused (a storage fault, or a
cluster left with no CPUs for two minutes), 4 the search
stopped as failing (every trial failed, or ``limits.max_consecutive_failures`` trials in a
row failed at their first rung; the first recorded failure is printed; the same command tries
again), 130 stopped by Ctrl-C (everything written so far is kept; the same command resumes).
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import signal
import sys
from pathlib import Path
from typing import Any

from rungway.scheduler.core.errors import RungwayError, SpecError

__all__ = ["main"]

DEFAULT_STORE = "rungway-store"
EXIT_USER_ERROR = 2
EXIT_STORAGE = 3
EXIT_FAILING = 4
EXIT_INTERRUPTED = 130


def _store_default() -> str:
    return os.environ.get("RUNGWAY_STORE", DEFAULT_STORE)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="rungway", description="Trial scheduling for a shared CPU cluster.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def add_store(p: argparse.ArgumentParser) -> None:
        p.add_argument("--store", default=_store_default(), help="store root: a folder or a pyarrow URI (default: ./rungway-store, or $RUNGWAY_STORE)")

    def add_ray(p: argparse.ArgumentParser) -> None:
        p.add_argument("--address", help="join this Ray cluster (host:port); default: start an embedded local Ray")
        p.add_argument("--cpus", type=int, help="CPUs for the embedded local Ray (default: all of this machine)")
        p.add_argument("--json", action="store_true", help="print the final summary as JSON")
        p.add_argument("--no-probe", action="store_true", help="skip trying the objective once here before the search starts")
        p.add_argument("--probe-timeout", type=float, default=300.0, metavar="SECONDS",
                       help="how long the first try of the objective may take (default: 300)")
        p.add_argument("--retry-storage", type=float, metavar="SECONDS",
                       help="on a storage fault, wait this long and resume, until it is fixed (default: stop with status 3)")

    run = sub.add_parser("run", help="run a search to completion in the foreground (resumes if it was stopped)")
    run.add_argument("spec", help="the search's spec file (TOML)")
    add_store(run)
    add_ray(run)

    demo = sub.add_parser("demo", help="run the bundled demo search on the embedded local Ray")
    demo.add_argument("--which", choices=["digits-mlp", "boosting"], default="digits-mlp")
    add_store(demo)
    add_ray(demo)

    show = sub.add_parser("show", help="leaderboard, rung occupancy and best so far of a search")
    show.add_argument("name")
    show.add_argument("--top", type=int, default=10)
    show.add_argument("--json", action="store_true")
    add_store(show)

    listing = sub.add_parser("list", help="the searches in a store")
    listing.add_argument("--json", action="store_true")
    add_store(listing)

    from rungway.scheduler.cli import plan_cmd

    plan_cmd.add_parser(sub)

    from rungway.scheduler.cli import lab_cmd

    lab_cmd.add_parsers(sub)

    export = sub.add_parser("export", help="write a search's trials or measurements to a file")
    export.add_argument("name")
    export.add_argument("--what", choices=["trials", "measurements", "failures"], default="trials")
    export.add_argument("--out", required=True, help="output file; the format follows its suffix (.csv, .parquet, .json)")
    add_store(export)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    try:
        return COMMANDS[args.command](args)
    except BrokenPipeError:
        # The reader went away (``rungway show --json | head``): not an error of ours. Point
        # stdout at nothing so that the interpreter's final flush does not fail again.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except RungwayError as exc:
        if isinstance(exc, SpecError):
            print(f"error: {exc}", file=sys.stderr)
            return EXIT_USER_ERROR
        from rungway.scheduler.store import StorageError

        if isinstance(exc, StorageError):
            print(f"storage error: {exc}", file=sys.stderr)
            return EXIT_STORAGE
        print(f"error: {exc}", file=sys.stderr)
        return 1


# ---- run ------------------------------------------------------------------------------------


def _run_spec(spec_text: str, source: str, args: argparse.Namespace) -> int:
    from rungway.scheduler.spec import check_spec, parse_spec

    if args.address is None and os.getcwd() not in sys.path:
        # The embedded Ray's workers import from the working directory (head/cluster.py);
        # so does the check below, as the README's tour expects.
        sys.path.insert(0, os.getcwd())
    spec = parse_spec(spec_text, source)
    for note in check_spec(spec):
        print(f"note: {note}", file=sys.stderr)
    if not args.no_probe:
        _probe(spec, args.probe_timeout)
    from rungway.scheduler.cli.progress import ProgressView
    from rungway.scheduler.head.cluster import ray_session
    from rungway.scheduler.head.driver import RunReport, SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.store import StorageError

    store_root = _absolute_root(args.store)
    stop = {"asked": False}

    def on_sigint(signum: int, frame: Any) -> None:
        if stop["asked"]:
            raise KeyboardInterrupt
        stop["asked"] = True
        print("\nstopping: requeueing running segments and writing state (Ctrl-C again to quit at once)", file=sys.stderr)

    previous = signal.signal(signal.SIGINT, on_sigint)
    driver = None
    # While the search runs, anything printed (Ray forwards worker and node messages to the
    # driver's stdout) goes to stderr: stdout carries only the summary (JSON with --json).
    real_stdout, sys.stdout = sys.stdout, sys.stderr
    try:
        with ray_session(args.address, args.cpus):
            while True:
                try:
                    executor = RayExecutor()
                    driver = SearchDriver(spec, spec_text, store_root, executor, progress=ProgressView())
                    try:
                        report = driver.run(lambda: stop["asked"])
                    finally:
                        executor.close()  # its relay actor too
                except StorageError as exc:
                    if args.retry_storage is None:
                        raise
                    report = RunReport(finished=False, paused_reason=str(exc))
                if not report.paused_reason or args.retry_storage is None or stop["asked"]:
                    break
                print(f"paused: {report.paused_reason}\nretrying in {args.retry_storage:g}s (Ctrl-C to stop)", file=sys.stderr)
                _sleep_unless(stop, args.retry_storage)
                if stop["asked"]:
                    break
    finally:
        signal.signal(signal.SIGINT, previous)
        sys.stdout = real_stdout
    stats = report.statistics
    summary = {
        "search": spec.name,
        "finished": report.finished,
        "interrupted": report.interrupted,
        "paused": report.paused_reason,
        "failing": report.failing,
        "first_failure": report.first_failure,
        "limit": report.limit,
        "elapsed_seconds": round(report.elapsed, 3),
        "segments": report.segments,
        "cpu_hours": stats.get("cpu_seconds", 0.0) / 3600,
        "reserved_cpu_hours": stats.get("reserved_cpu_seconds", 0.0) / 3600,
        "trials": stats.get("trials", 0),
        "best": _best(driver) if driver is not None else None,
        "store": os.path.join(store_root, "searches", spec.name) if "://" not in store_root else f"{store_root}/searches/{spec.name}",
    }
    if args.json:
        print(json.dumps(summary, indent=2, default=_plain))
    else:
        _print_summary(summary, spec.metric)
    if report.paused_reason:
        print(f"paused: {report.paused_reason}; fix it, then run the same command to resume", file=sys.stderr)
        return EXIT_STORAGE
    if report.failing:
        print(f"failing: {report.failing}\nfirst failure: {report.first_failure or 'none recorded'}\n"
              f"every failure: rungway export {spec.name} --what failures --out failures.csv; "
              "fix the objective, then run the same command to try again", file=sys.stderr)
        return EXIT_FAILING
    if report.interrupted:
        return EXIT_INTERRUPTED
    return 0


def _sleep_unless(stop: dict[str, bool], seconds: float) -> None:
    import time

    end = time.monotonic() + seconds
    while not stop["asked"] and time.monotonic() < end:
        time.sleep(min(0.2, seconds))


def _probe(spec: Any, timeout: float) -> None:
    """Try the objective once, in a child process, before anything is written (workers/probe.py)."""
    import numpy as np

    from rungway.workers.probe import probe_in_child

    config = spec.space().sample(np.random.default_rng(spec.seed + 1))
    print(f"trying the objective once at budget {spec.ladder.min} (at most {timeout:g} s; --no-probe skips this)",
          file=sys.stderr)
    probe_in_child(spec.objective, config, spec.ladder.min, spec.metric, timeout)


def _absolute_root(root: str) -> str:
    return root if "://" in root else str(Path(root).resolve())


def _best(driver: Any) -> dict[str, Any] | None:
    board = driver.core.leaderboard(1)
    if not board or board[0].loss is None or math.isinf(board[0].loss):
        return None
    t = board[0]
    return {"trial": t.id, "value": driver.core.value_of(t.loss), "budget": t.budget, "config": t.config}


def _plain(value: Any) -> Any:
    if hasattr(value, "item"):
        return value.item()
    return str(value)


def _print_summary(summary: dict[str, Any], metric: str) -> None:
    state = ("finished" if summary["finished"] else "failing" if summary["failing"] else
             "stopped" if summary["interrupted"] else "paused")
    print(f"search {summary['search']} {state} after {summary['elapsed_seconds']:.1f}s: {summary['trials']} trials, {summary['segments']} segments")
    if summary.get("limit"):
        print(f"stopped by its limit: {summary['limit']}")
    print(f"CPU-hours: {summary['cpu_hours']:.4g} used (CPU time), "
          f"{summary['reserved_cpu_hours']:.4g} reserved (CPUs x wall time)")
    if summary["failing"]:
        print(f"failing: {summary['failing']}")
        print(f"first failure: {summary['first_failure'] or 'none recorded'}")
    best = summary["best"]
    if best:
        print(f"best {metric}: {best['value']:.6g} (trial {best['trial']}, budget {best['budget']})")
        print("best configuration: " + json.dumps(best["config"], default=_plain))
    print(f"results: {summary['store']}  (trials.parquet, measurements/)")


def cmd_run(args: argparse.Namespace) -> int:
    from rungway.scheduler.spec import decode_spec

    path = Path(args.spec)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise SpecError(f"cannot read the spec file: {exc.strerror}", field=str(path)) from None
    return _run_spec(decode_spec(raw, str(path)), str(path), args)


def cmd_demo(args: argparse.Namespace) -> int:
    from rungway.workers import demo

    text = demo.DEMO_SPEC if args.which == "digits-mlp" else demo.BOOSTING_SPEC
    print(f"rungway demo: tuning the {args.which} example (see examples/README.md) on the embedded local Ray", file=sys.stderr)
    return _run_spec(text, f"<demo {args.which}>", args)


# ---- reading --------------------------------------------------------------------------------


def _load_search(store_root: str, name: str):  # type: ignore[no-untyped-def]
    import numpy as np

    from rungway.scheduler.core.search import SearchCore
    from rungway.scheduler.head.driver import HEAD_STATE
    from rungway.scheduler.spec import parse_spec
    from rungway.scheduler.store import open_store

    files = open_store(_absolute_root(store_root)).search(name)
    text = files.read_spec()
    state = files.read_head_state(HEAD_STATE)
    if text is None or state is None:
        known = ", ".join(files.store.list_searches()) or "none"
        raise SpecError(f"no search named {name!r} in {store_root} (searches there: {known})", field="name")
    spec = parse_spec(text, f"{name}/spec.toml")
    data = json.loads(state)
    core = SearchCore.restore(data["core"], spec.make_sampler(np.random.default_rng(spec.seed)))
    return spec, files, core, data.get("meta", {})


def cmd_show(args: argparse.Namespace) -> int:
    spec, files, core, meta = _load_search(args.store, args.name)
    stats = core.statistics()
    board = [
        {"trial": t.id, "state": t.state, "rung": t.rung, "budget": t.budget,
         "value": None if t.loss is None else core.value_of(t.loss), "config": t.config}
        for t in core.leaderboard(args.top)
    ]
    if args.json:
        print(json.dumps({"search": spec.name, "metric": spec.metric, "better": spec.better,
                          "statistics": stats, "leaderboard": board, "meta": meta}, indent=2, default=_plain))
        return 0
    states = stats["states"]
    print(f"search {spec.name}: {stats['trials']} trials ({', '.join(f'{k} {v}' for k, v in states.items() if v)})")
    print(f"metric {spec.metric} ({spec.better} is better); {spec.ladder.unit} from {spec.ladder.min} to {spec.ladder.max}, eta {spec.ladder.eta}, mode {spec.ladder.mode}")
    print(_usage_line(spec, meta, stats))
    if meta.get("ended_by"):
        print(f"stopped by its limit: {meta['ended_by']}")
    from rungway.scheduler.core.plan import bracket_name

    for bracket in stats["brackets"]:
        # Named by Li et al.'s s (docs/scheduling.md): s = s_max starts at the minimum budget.
        label = f"{bracket_name(bracket['s'], bracket.get('iteration'))}: " if len(stats["brackets"]) > 1 else ""
        print("  " + label + " | ".join(f"{r['budget']:g}: {r['results']} results, {r['promoted']} promoted" for r in bracket["rungs"]))
    print(f"\n{'rank':>4} {'trial':>6} {'state':<9} {spec.ladder.unit:>8} {spec.metric:>12}  configuration")
    for rank, row in enumerate(board, 1):
        value = "n/a" if row["value"] is None else f"{row['value']:.6g}"
        print(f"{rank:>4} {row['trial']:>6} {row['state']:<9} {row['budget']:>8g} {value:>12}  {json.dumps(row['config'], default=_plain)}")
    return 0


def _usage_line(spec: Any, meta: dict[str, Any], stats: dict[str, Any]) -> str:
    """Segments running and queued at the last snapshot, and CPU time used against the limit
    (a snapshot written before both CPU figures were kept: its cpu_seconds was the reservation)."""
    cpu = float(meta.get("cpu_seconds", 0.0))
    reserved = float(meta.get("reserved_cpu_seconds", cpu))
    limit = spec.limits.cpu_hours
    of = f" of limits.cpu_hours = {limit:g}" if limit is not None else ""
    return (f"{meta.get('running', 0)} running, {meta.get('queued', 0)} queued (at the last snapshot); "
            f"{stats.get('segments', meta.get('segments', 0))} segments\n"
            f"CPU-hours: {cpu / 3600:.4g}{of} used (CPU time), {reserved / 3600:.4g} reserved (CPUs x wall time)")


def cmd_list(args: argparse.Namespace) -> int:
    from rungway.scheduler.store import open_store

    names = open_store(_absolute_root(args.store)).list_searches()
    if args.json:
        print(json.dumps(names))
    else:
        print("\n".join(names) if names else f"no searches in {args.store}")
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    from rungway.scheduler.store import open_store

    files = open_store(_absolute_root(args.store)).search(args.name)
    if files.read_spec() is None:
        raise SpecError(f"no search named {args.name!r} in {args.store}", field="name")
    frame = {"trials": files.read_trials, "measurements": files.read_measurements, "failures": files.read_failures}[args.what]()
    out = Path(args.out)
    suffix = out.suffix.lower()
    if suffix == ".csv":
        frame.to_csv(out, index=False)
    elif suffix == ".parquet":
        frame.to_parquet(out, index=False)
    elif suffix == ".json":
        out.write_text(_exact_json(frame))
    else:
        raise SpecError(f"unknown output format {suffix or '(none)'!r}: use .csv, .parquet or .json", field="--out")
    print(f"wrote {len(frame)} {args.what} rows to {out}")
    return 0


def _exact_json(frame: Any) -> str:
    """Records whose floats and times read back exactly: floats as Python's shortest
    round-trip text, times as ISO 8601 with microseconds, missing values as null (pandas'
    own JSON writer rounds to 10 digits and milliseconds)."""
    import pandas as pd

    def cell(value: Any) -> Any:
        if value is None or value is pd.NaT or (isinstance(value, float) and math.isnan(value)):
            return None
        if isinstance(value, pd.Timestamp):
            return value.isoformat()
        if value is pd.NA:
            return None
        return value.item() if hasattr(value, "item") else value

    records = [{str(k): cell(v) for k, v in row.items()} for row in frame.astype(object).to_dict(orient="records")]
    return json.dumps(records, indent=1, allow_nan=False) + "\n"


def cmd_plan(args: argparse.Namespace) -> int:
    from rungway.scheduler.cli import plan_cmd

    return plan_cmd.run(args)


def cmd_head(args: argparse.Namespace) -> int:
    from rungway.scheduler.cli import lab_cmd

    return lab_cmd.run_head(args)


def cmd_lab(args: argparse.Namespace) -> int:
    from rungway.scheduler.cli import lab_cmd

    return lab_cmd.run_lab(args)


COMMANDS = {"run": cmd_run, "demo": cmd_demo, "show": cmd_show, "list": cmd_list, "export": cmd_export, "plan": cmd_plan,
            "head": cmd_head, "lab": cmd_lab}

if __name__ == "__main__":
    sys.exit(main())
