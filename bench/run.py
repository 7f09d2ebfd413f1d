"""Run every benchmark and write BENCHMARKS.md with the figures, their spread, their targets
and the command that reproduces each.

    .venv/bin/python bench/run.py --quick              # a few minutes
    .venv/bin/python bench/run.py --full               # about 28 minutes
    .venv/bin/python bench/run.py --quick --out /tmp/B.md --figures /tmp/figs --raw /tmp/raw.json
    .venv/bin/python bench/run.py --quick --only core_cost,journal_replay
    .venv/bin/python bench/run.py --render raw.json    # the report again from a --raw file, nothing run

Each benchmark runs as a subprocess with its own flags (smaller sizes with ``--quick``); its
JSON (``--json OUT`` where the script has it, else the JSON object it prints last) is
collected. A benchmark that fails or times out is reported as such; the others still run.
Ray-using scripts get ``RAY_ADDRESS=local`` so that each starts its own Ray instance rather
than joining one another process left running. ``/proc/loadavg`` is read before and after
each benchmark: the machine is shared, and the load is written next to the figures.

Figures are given as the median with min-max over repeats (``n`` of them): repeats inside a
script where it has them, otherwise repeated invocations (``core_cost.py``). Compare figures
from one run of this script, as ratios where possible: other processes move absolute rates.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shlex
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

PY = ".venv/bin/python"  # as the commands are written in the report


@dataclass
class Bench:
    name: str
    script: str
    args: list[str]
    invocations: int = 1
    json_flag: bool = True  # the script takes --json OUT; else its stdout ends with a JSON object
    ray: bool = False
    timeout: float = 900.0
    what: str = ""
    extra: dict[str, Any] = field(default_factory=dict)


def plan(size: str, figures: str) -> list[Bench]:
    """The benchmarks with their flags for ``size``: "quick", "full", or "smoke" (the tests':
    the smallest sizes every script takes, figures that mean nothing)."""
    q, smoke = size != "full", size == "smoke"

    def pick(full: list[str], quick: list[str], tiny: list[str] | None = None) -> list[str]:
        return (tiny if tiny is not None else quick) if smoke else quick if q else full

    return [
        Bench("core_cost", "core_cost.py", pick(["--repeat", "1"], ["--quick", "--repeat", "1"]),
              invocations=1 if smoke else 3, what="scheduling core: decisions per second and bytes per trial"),
        Bench("dispatch", "dispatch.py", pick(["--repeats", "5"], ["--segments", "300", "--sleep-segments", "40", "--repeats", "3"],
                                              ["--segments", "20", "--sleep-segments", "4", "--repeats", "1"]),
              ray=True, what="dispatch overhead against raw Ray tasks"),
        Bench("utilization", "utilization.py", pick([], ["--quick"], ["--smoke"]), ray=True,
              what="busy fraction under heavy-tailed segments"),
        Bench("quality", "quality.py", pick([], ["--quick"], ["--smoke"]) + ["--figures", figures], ray=True,
              timeout=1800.0, what="search quality per CPU-second"),
        Bench("recovery", "recovery.py", pick(["--repeats", "5"], ["--repeats", "2"], ["--repeats", "1", "--unit-seconds", "0.4"]),
              json_flag=False, ray=True, what="recovery from a lost node"),
        Bench("journal_replay", "journal_replay.py",
              pick(["--events", "100000", "--repeats", "5"], ["--events", "20000", "--repeats", "3"], ["--events", "2000", "--repeats", "1"]),
              json_flag=False, what="journal replay at head start"),
        Bench("sharing_round", "sharing_round.py", pick(["--rounds", "1000"], ["--rounds", "200"], ["--rounds", "20"]),
              what="one round of the sharing rules, 50 teams and 500 searches"),
        Bench("lab_round", "lab_round.py", pick([], ["--turns", "150"], ["--quick", "--turns", "20"]),
              what="one turn of the lab's head, 50 teams and 500 searches"),
        Bench("sim_scale", "sim_scale.py", pick([], ["--quick"]), what="simulator speed and scaling"),
        Bench("sim_accuracy", "sim_accuracy.py", pick([], ["--quick"], ["--smoke"]), ray=True,
              what="simulator predictions against real runs"),
        Bench("accounting", "accounting.py", pick([], ["--quick"], ["--smoke"]), ray=True, timeout=1500.0,
              what="worker processes, extra CPU, CPU charged and limit overshoot, realistic task"),
    ]


# ---- running ------------------------------------------------------------------------------------------


def loadavg() -> list[float]:
    try:
        return [float(x) for x in Path("/proc/loadavg").read_text().split()[:3]]
    except OSError:
        return []


def last_json(text: str) -> Any:
    """The last JSON object in ``text`` that starts at the beginning of a line."""
    decoder = json.JSONDecoder()
    found = None
    pos = 0
    while True:
        at = text.find("{", pos)
        if at < 0:
            return found
        if at == 0 or text[at - 1] == "\n":
            try:
                found, end = decoder.raw_decode(text, at)
                pos = end
                continue
            except ValueError:
                pass
        pos = at + 1


def shown_path(arg: str) -> str:
    """Paths inside the repository as the reader would type them, from its root."""
    try:
        path = Path(arg)
        return str(path.resolve().relative_to(ROOT)) if path.is_absolute() else arg
    except ValueError:
        return arg


def command_line(b: Bench) -> str:
    env = "RAY_ADDRESS=local " if b.ray else ""
    shown = [shown_path(a) for a in b.args] + (["--json", "OUT.json"] if b.json_flag else [])
    return f"{env}{PY} bench/{b.script} {shlex.join(shown)}".rstrip()


def run_bench(b: Bench, scratch: Path) -> dict[str, Any]:
    out: dict[str, Any] = {"name": b.name, "command": command_line(b), "args": b.args, "invocations": b.invocations, "runs": [],
                           "seconds": [], "errors": [], "load_before": loadavg()}
    env = dict(os.environ)
    env.setdefault("PYTHONHASHSEED", "0")
    if b.ray:
        env["RAY_ADDRESS"] = "local"
    for i in range(b.invocations):
        target = scratch / f"{b.name}-{i}.json"
        cmd = [sys.executable, str(HERE / b.script), *b.args] + (["--json", str(target)] if b.json_flag else [])
        start = time.perf_counter()
        try:
            proc = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True, timeout=b.timeout)
        except subprocess.TimeoutExpired:
            out["errors"].append(f"invocation {i + 1}: timed out after {b.timeout:.0f} s")
            out["seconds"].append(time.perf_counter() - start)
            continue
        out["seconds"].append(time.perf_counter() - start)
        (scratch / f"{b.name}-{i}.stdout").write_text(proc.stdout)
        (scratch / f"{b.name}-{i}.stderr").write_text(proc.stderr)
        if proc.returncode != 0:
            tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
            out["errors"].append(f"invocation {i + 1}: exit {proc.returncode}: {' | '.join(tail)}")
            continue
        data = json.loads(target.read_text()) if b.json_flag and target.exists() else last_json(proc.stdout)
        if data is None:
            out["errors"].append(f"invocation {i + 1}: no JSON in its output")
            continue
        out["runs"].append(data)
    out["load_after"] = loadavg()
    return out


# ---- environment ------------------------------------------------------------------------------------


def environment() -> dict[str, Any]:
    from importlib import metadata

    def version(dist: str) -> str:
        try:
            return metadata.version(dist)
        except metadata.PackageNotFoundError:
            return "not installed"

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = "unknown"
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem = f"{int(line.split()[1]) / 1024**2:.1f} GiB"
                break
    except OSError:
        pass

    def git(*args: str) -> str:
        try:
            return subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True, timeout=30).stdout.strip()
        except (OSError, subprocess.TimeoutExpired):
            return ""

    commit = git("rev-parse", "--short", "HEAD") or "unknown"
    code_tree = git("rev-parse", "HEAD:scheduler", "HEAD:workers").replace("\n", " ")
    # what could move the figures: rungway's own code, not these scripts or the docs
    dirty = bool(git("status", "--porcelain", "--", "scheduler", "workers", "pyproject.toml"))
    return {
        "date": datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "nproc": os.cpu_count(), "cpu": cpu, "machine": platform.machine(), "memory": mem,
        "python": platform.python_version(), "ray": version("ray"), "numpy": version("numpy"),
        "scikit-learn": version("scikit-learn"), "pandas": version("pandas"), "pyarrow": version("pyarrow"),
        "commit": commit, "code_tree": code_tree, "dirty": dirty,
    }


# ---- formatting ----------------------------------------------------------------------------------


def sp(values: list[float]) -> dict[str, Any]:
    clean = [float(v) for v in values if v is not None]
    if not clean:
        return {"median": None, "min": None, "max": None, "n": 0}
    return {"median": statistics.median(clean), "min": min(clean), "max": max(clean), "n": len(clean)}


def num(x: float | None, fmt: str = ".3g", scale: float = 1.0) -> str:
    if x is None:
        return "-"
    v = x * scale
    if fmt == "pct":
        return f"{v:.1%}"
    if fmt == "int":
        return f"{v:,.0f}"
    if fmt == ",":
        return f"{v:,.0f}" if abs(v) >= 100 else f"{v:.3g}"
    return format(v, fmt)


def show(s: dict[str, Any] | None, fmt: str = ".3g", scale: float = 1.0) -> str:
    """``median (min-max, n=k)``."""
    if not s or s.get("median") is None:
        return "-"
    n = s.get("n")
    if n is None or n > 1:
        rng = f" ({num(s['min'], fmt, scale)} – {num(s['max'], fmt, scale)}"
        return f"{num(s['median'], fmt, scale)}{rng}{f', n={n}' if n else ''})"
    return f"{num(s['median'], fmt, scale)} (n=1)"


def arg_value(args: list[str], flag: str, default: int) -> int:
    """The integer after ``flag`` in ``args`` (the script's default when absent)."""
    return int(args[args.index(flag) + 1]) if flag in args else default


def from_internal(s: dict[str, Any], n: int) -> dict[str, Any]:
    """A script's own {median, min, max} with the count of repeats it ran."""
    return {**s, "n": n}


class Report:
    def __init__(self) -> None:
        self.summary: list[list[str]] = []
        self.sections: list[str] = []

    def row(self, bench: str, figure: str, value: str, target: str, met: bool | None, command: str) -> None:
        verdict = "-" if met is None else ("met" if met else "**missed**")
        command = command.replace(f"{ROOT}{os.sep}", "")  # repository paths from its root
        self.summary.append([bench, figure, value, target, verdict, f"`{command}`"])


def md_table(head: list[str], rows: list[list[str]]) -> str:
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    lines += ["| " + " | ".join(r) + " |" for r in rows]
    return "\n".join(lines)


def relpath(path: str, out: Path) -> str:
    try:
        return os.path.relpath(Path(path).resolve(), out.resolve().parent)
    except ValueError:
        return path


# ---- per benchmark ------------------------------------------------------------------------------


def render_core_cost(res: dict[str, Any], rep: Report) -> None:
    runs, cmd = res["runs"], res["command"] + f"   # x{res['invocations']} invocations"
    if not runs:
        return
    slowest = sp([min(r["last10_pairs_per_s"] for r in run["rows"]) for run in runs])
    heaviest = sp([max(r["bytes_per_trial"] for r in run["rows"]) for run in runs])
    rep.row("core_cost", "slowest last-10 % pairs/s over n (ask + report)", show(slowest, ","), ">= 100,000",
            slowest["median"] >= 100_000, cmd)
    rep.row("core_cost", "bytes per trial besides configurations (largest n)", show(heaviest, ".0f"), "< 1024",
            heaviest["median"] < 1024, cmd)
    ns = [r["n"] for r in runs[0]["rows"]]
    rows = []
    for i, n in enumerate(ns):
        get = lambda key: sp([run["rows"][i][key] for run in runs if len(run["rows"]) > i])  # noqa: E731
        rows.append([f"{n:,}", show(get("pairs_per_s"), ","), show(get("first10_pairs_per_s"), ","),
                     show(get("last10_pairs_per_s"), ","), show(get("loop_cpu_pairs_per_s"), ","),
                     show(get("bytes_per_trial"), ".0f"), show(get("bytes_per_trial_with_configs"), ".0f")])
    snap = sp([run["snapshot"]["snapshot_s"] + run["snapshot"]["restore_s"] for run in runs])
    rep.sections.append(
        "## Scheduling core (`core_cost.py`)\n\nASHA core, eta 3, budgets 1..81, 64 segments in flight, driven to "
        "the end; each invocation reports the best of `--repeat` runs, and the spread is over invocations.\n\n"
        + md_table(["n trials", "pairs/s", "first 10 %", "last 10 %", "loop pairs/CPU-s", "B/trial", "+configs"], rows)
        + f"\n\nsnapshot() + restore() of a drained core with {runs[0]['snapshot']['n']:,} trials: {show(snap, '.3f')} s.\n")


def render_dispatch(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    d, cmd = res["runs"][0], res["command"]
    n = arg_value(res["args"], "--repeats", 3)
    ratio = from_internal(d["ratio"], n)
    busy = from_internal(d["busy_fraction_100ms"], n)
    steady = from_internal(d["busy_fraction_100ms_steady"], n)
    rep.row("dispatch", "rungway segments/s over raw Ray tasks/s, no-op objective (same instance)", show(ratio, ".2f"),
            ">= 0.8 (issue #3)", ratio["median"] is not None and ratio["median"] >= 0.8, cmd)
    rep.row("dispatch", "busy fraction, 100 ms segments, over run()", show(busy, "pct"),
            ">= 95 % (issue #3)", busy["median"] is not None and busy["median"] >= 0.95, cmd)
    rep.row("dispatch", "busy fraction, 100 ms segments, first start to last end", show(steady, "pct"),
            ">= 95 % (issue #3)", steady["median"] is not None and steady["median"] >= 0.95, cmd)
    cpu = d.get("cpu_ms_per_segment")
    cpu_rows = []
    if isinstance(cpu, dict):
        for side, roles in cpu.items():
            if isinstance(roles, dict):
                cpu_rows.append([side, ", ".join(f"{role} {show(from_internal(v, n), '.3g') if isinstance(v, dict) else f'{v:.3g}'}"
                                                 for role, v in roles.items())])
    rep.sections.append(
        f"## Dispatch overhead (`dispatch.py`)\n\n{d['cpus']} CPUs, {d['segments']} no-op segments per repeat, "
        f"each keeping every slot busy.\n\n"
        + md_table(["figure", "median (min – max, n)"], [
            ["raw Ray tasks/s", show(from_internal(d["raw_ray_tasks_per_s"], n), ",")],
            ["rungway segments/s (core decision, Ray task, runner, measurements written, result applied)",
             show(from_internal(d["rungway_segments_per_s"], n), ",")],
            ["ratio rungway / raw Ray", show(ratio, ".2f")],
            ["busy fraction, 100 ms sleeping segments, over run()", show(busy, "pct")],
            ["same, first segment start to last end", show(steady, "pct")],
        ]) + "\n"
        + ("\nCPU milliseconds per segment, by process (from /proc; this run's processes only):\n\n"
           + md_table(["side", "ms per segment by role"], cpu_rows) + "\n" if cpu_rows else ""))


def render_utilization(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    u, cmd = res["runs"][0], res["command"]
    sim, real = u["sim"]["modes"], u.get("real", {}).get("modes", {})
    rep.row("utilization", f"ASHA busy fraction, simulator ({u['sim']['workers']} workers, lognormal sigma 1), "
            "while admitting", show(sim["asha"]["busy_steady"], "pct"), "> 95 %", u["met_sim"], cmd)
    if real:
        rep.row("utilization", "ASHA busy fraction, real Ray (2 CPUs, 0.08 s/unit x lognormal), steady window",
                show(real["asha"]["busy_steady"], "pct"), "> 95 %", u["met_real"], cmd)
        others = "; ".join(f"{m} {num(real[m]['busy_steady']['median'], 'pct')}" for m in real if m != "asha")
        rep.row("utilization", "the others, real Ray, steady window (ray-replay: plain Ray tasks, ASHA's durations)",
                others, "-", None, cmd)
    rep.row("utilization", "simulator, steady / whole run incl. drain, every mode",
            "; ".join(f"{m} {num(sim[m]['busy_steady']['median'], 'pct')} / {num(sim[m]['busy_whole']['median'], 'pct')}"
                      for m in sim), "-", None, cmd)
    rows = []
    for mode in sim:
        r = real.get(mode, {})
        rows.append([mode, show(sim[mode]["busy_steady"], "pct"), show(sim[mode]["busy_whole"], "pct"),
                     show(sim[mode]["wall_hours"], ".1f"), show(r.get("busy_steady"), "pct"),
                     show(r.get("busy_whole"), "pct"), show(r.get("startup_s"), ".2f"), show(r.get("longest_idle_s"), ".2f"),
                     show(r.get("wall_s"), ".1f")])
    if "ray-replay" in real:
        rows.append(["plain Ray tasks replaying ASHA's measured durations (control)", "", "", "",
                     show(real["ray-replay"]["busy_steady"], "pct"), "", "", "", ""])
    extra = ""
    if "real" in u:
        rr = u["real"]
        extra = (f" Real: {rr['cpus']} CPUs, budgets {rr['budgets']}, {rr['repeats']} repeat(s) per mode (modes "
                 f"interleaved), trials per mode " + ", ".join(f"{m} {real[m]['trials']}" for m in real if "trials" in real[m])
                 + ".")
    rep.sections.append(
        "## Utilization (`utilization.py`)\n\nSimulator: budgets 1..81, eta 3, "
        f"{u['sim']['cost']}, {u['sim']['seeds']} seeds; *steady* = while the search starts new trials "
        f"({u['sim']['horizon_hours']:g} simulated hours with no trial limit; sync-halving: one bracket of "
        f"{u['sim']['sync_trials']} trials, brackets back to back repeat it); *whole* = admitting for the same hours, "
        "then draining." + extra + " Real *steady*: from the first moment both CPUs were busy to the last new trial's "
        "start; *start-up*: `run()` to both CPUs busy. The simulator has no dispatch latency, so its asynchronous "
        "modes are 100 % busy while admitting by construction; what it shows is the drain (stragglers of a heavy tail) "
        "and synchronous halving's barriers. The real steady figure is what the head and Ray cost per segment; the "
        "plain-Ray control shows what Ray alone allows for the same durations.\n\n"
        + md_table(["mode", "sim busy, steady", "sim busy, whole run", "sim wall (h)", "real busy, steady",
                    "real busy, whole run", "real start-up (s)", "real longest stretch with a CPU idle, steady window (s)",
                    "real wall (s)"], rows) + "\n")


def render_quality(res: dict[str, Any], rep: Report, out: Path) -> None:
    if not res["runs"]:
        return
    q, cmd = res["runs"][0], res["command"]
    parts = [f"## Search quality per CPU-second (`quality.py`)\n\nSame space, seeds and CPU budget "
             f"({q['budget_cpu_s']:g} CPU-seconds as `limits.cpu_hours` for rungway; the baseline stops submitting at "
             f"{q['budget_cpu_s']:g} CPU-seconds of finished tasks) on {q['cpus']} CPUs, {q['seeds']} seeds. CPU-seconds "
             "are the workers' own (segment start to end). *Best at equal CPU*: each method's best validation accuracy "
             "once it had spent the smallest total any method of that seed spent. *Head counted*: the CPU-seconds "
             "rungway's head charged against `limits.cpu_hours`. The validation sets are small (digits 360 images, "
             "breast cancer 171 rows), so accuracy moves in steps of 0.0028 and 0.0058: most differences below are one or "
             "two steps.\n"]
    for oname, o in q["objectives"].items():
        m = o["methods"]
        base, asha = m["baseline"], m["asha"]
        t_names = list(o["targets"])
        rep.row("quality", f"{oname}: ASHA best accuracy at equal CPU-seconds (baseline: "
                f"{show(base['best_at_equal_cpu'], '.4f')})", show(asha["best_at_equal_cpu"], ".4f"),
                ">= baseline", (asha["best_at_equal_cpu"]["median"] or 0) >= (base["best_at_equal_cpu"]["median"] or 1), cmd)
        reach = asha["to_target"]["sklearn-default"]
        rep.row("quality", f"{oname}: ASHA CPU-seconds to the scikit-learn default's accuracy "
                f"({o['target']:.4f}; reached {reach['reached']})", show(reach["cpu_s"], ".3g"),
                "reached in every seed", reach["reached"].split("/")[0] == reach["reached"].split("/")[1], cmd)
        rows = []
        for name, f in m.items():
            rows.append([name, show(f["best_at_equal_cpu"], ".4f"), show(f["best_final"], ".4f"),
                         show(f["cpu_used_s"], ".3g"), show(f["head_counted_cpu_s"], ".3g"), show(f["trials"], ".0f")]
                        + [f"{show(f['to_target'][t]['cpu_s'], '.3g')} [{f['to_target'][t]['reached']}]" for t in t_names]
                        + [show(f["to_target"][t_names[-1]]["wall_s"], ".3g")])
        vs = o["asha_vs_one_training"]
        ratio_lines = [f"- ASHA's eventual best configuration trained once at the top budget (in-process, median of "
                       f"3): {show(vs['best_config_full_budget_s'], '.3g')} s."]
        for t in t_names:
            ratio_lines.append(f"- ASHA wall time to *{t}* ({o['targets'][t]:.4f}): {show(vs[t]['wall_to_target_s'], '.3g')} s; "
                               f"ratio to that one training: {show(vs[t]['ratio'], '.3g')}.")
        over = [m[k]["head_counted_cpu_s"]["median"] / m[k]["cpu_used_s"]["median"] for k in m if k != "baseline"
                and m[k]["cpu_used_s"]["median"]]
        ratio_lines.append(f"- rungway's head charged {min(over):.1f}x to {max(over):.1f}x the workers' busy CPU-seconds "
                           "against `limits.cpu_hours` (medians per method): it counts each segment from its submission, "
                           "so the time a segment waits in Ray's queue behind the prefetch counts too, and the searches "
                           "stopped admitting trials after well under the budget of real work.")
        svg = f"\n![best so far against CPU-seconds, {oname}]({relpath(o['svg'], out)})\n" if "svg" in o else ""
        parts.append(
            f"### {oname}\n\nTargets: *sklearn-default* = {o['target']:.4f} ({o['target_name']}); *baseline-final* = "
            f"the baseline's final best, median over seeds ({o['targets'].get('baseline-final', float('nan')):.4f}). "
            f"Equal CPU-seconds per seed: {show(o['equal_cpu_s'], '.3g')}. sync-halving bracket: {o['sync_trials']} trials "
            f"(estimated {o['sync_estimated_cpu_s']:.1f} CPU-s from a calibration of "
            f"{o['calibration']['top_s']:.3f} s per top-budget training).\n\n"
            + md_table(["method", "best at equal CPU", "final best", "CPU-s used", "head counted CPU-s", "trials"]
                       + [f"CPU-s to {t} [seeds]" for t in t_names] + [f"wall s to {t_names[-1]}"], rows)
            + "\n\n" + "\n".join(ratio_lines) + "\n" + svg)
        rep.row("quality", f"{oname}: ASHA wall to sklearn-default / one top-budget training of its best",
                show(vs["sklearn-default"]["ratio"], ".3g"), "none set", None, cmd)
    rep.sections.append("\n".join(parts))


def render_recovery(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    r, cmd = res["runs"][0], res["command"]
    n = r["runs"]
    rep.row("recovery", "node death to its segments noticed (s)", show(from_internal(r["notice_seconds"], n), ".3g"),
            "none set (docs/reliability.md)", None, cmd)
    rep.row("recovery", "node death to its segments resubmitted (s)",
            show(from_internal(r["requeue_to_resubmit_seconds"], n), ".3g"), "none set", None, cmd)
    rep.row("recovery", "budget units redone beyond the newest checkpoint", show(from_internal(r["units_redone"], n), ".3g"),
            "0 (docs/reliability.md)", r["units_redone"]["max"] == 0, cmd)
    rep.sections.append(
        f"## Recovery (`recovery.py`)\n\n3-node `ray.cluster_utils` cluster, one node killed while it runs segments, "
        f"{r['unit_seconds']} s per budget unit, {n} runs.\n\n"
        + md_table(["figure", "median (min – max, n)"], [
            ["noticed (s)", show(from_internal(r["notice_seconds"], n), ".3g")],
            ["resubmitted (s)", show(from_internal(r["requeue_to_resubmit_seconds"], n), ".3g")],
            ["segments lost", show(from_internal(r["segments_lost"], n), ".3g")],
            ["units redone", show(from_internal(r["units_redone"], n), ".3g")]]) + "\n")


def render_journal(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    j, cmd = res["runs"][0], res["command"]
    n = arg_value(res["args"], "--repeats", 3)
    s = from_internal(j["replay_seconds"], n)
    rate = {"median": j["events"] / s["median"], "min": j["events"] / s["max"], "max": j["events"] / s["min"], "n": n}
    rep.row("journal_replay", f"head start replaying {j['events']:,} journal events (s)", show(s, ".3g"),
            "none set (docs/reliability.md: 2.0 s for 100,000)", None, cmd)
    rep.sections.append(f"## Journal replay (`journal_replay.py`)\n\n{j['events']:,} events: {show(s, '.3g')} s, "
                        f"{show(rate, ',')} events/s.\n")


def render_sim_scale(res: dict[str, Any], rep: Report, figures: Path, out: Path) -> None:
    if not res["runs"]:
        return
    s, cmd = res["runs"][0], res["command"]
    big = s["scale"]
    rep.row("sim_scale", f"simulate {big['trials']:,} ASHA trials on {big['workers']:,} workers: real seconds "
            f"({big['segments_per_s']:,.0f} segments/s)", f"{big['real_seconds']:.1f} (n=1)", "none set", None, cmd)
    rows, series = [], {}
    for cost in dict.fromkeys(r["cost"] for r in s["throughput"]):
        these = [r for r in s["throughput"] if r["cost"] == cost]
        one = these[0]["budget_per_worker"]
        for r in these:
            rows.append([cost, f"{r['workers']:,}", f"{r['segments_per_hour']:,.0f}", f"{r['per_worker']:.2f}",
                         f"{r['budget_per_hour']:,.0f}", f"{r['budget_per_worker']:.2f}",
                         f"{r['budget_per_worker'] / one:.3f}", f"{r['utilization']:.3f}", f"{r['real_seconds']:.1f}"])
        series[cost] = [(r["workers"], r["budget_per_hour"]) for r in these]
        last = these[-1]["budget_per_worker"] / one
        rep.row("sim_scale", f"ASHA budget units/h per worker at {these[-1]['workers']:,} workers over 1 worker ({cost})",
                f"{last:.3f} (deterministic)", "linear: 0.9 – 1.1 (proposed)", 0.9 <= last <= 1.1, cmd)
    svg = ""
    try:
        from svg import line_plot

        path = line_plot(series, figures / "sim-scaling.svg", logx=True, logy=True, markers=True,
                         title="ASHA throughput in the simulator", xlabel="workers", ylabel="budget units per simulated hour")
        svg = f"\n![ASHA throughput against workers]({relpath(str(path), out)})\n"
    except Exception as exc:  # noqa: BLE001 - a missing plot is not a missing figure
        svg = f"\n(plot not written: {exc})\n"
    rep.sections.append(
        f"## Simulator scale (`sim_scale.py`)\n\n{big['trials']:,} ASHA trials on {big['workers']:,} workers: "
        f"{big['real_seconds']:.1f} s real time, {big['events']:,} events ({big['events_per_s']:,.0f}/s), "
        f"{big['simulated_hours']:.1f} simulated hours, utilization {big['utilization']:.3f}.\n\n"
        "Throughput from 1 to 10,000 simulated workers (simulated time: the figures are deterministic; "
        "*real s* is what simulating took):\n\n"
        + md_table(["cost model", "workers", "segments/h", "per worker", "units/h", "units/h per worker",
                    "per worker vs 1", "util", "real s"], rows) + "\n" + svg)


def render_sim_accuracy(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    a, cmd = res["runs"][0], res["command"]
    rows = []
    for name, s in a["searches"].items():
        for what, key in (("wall time", "wall_error"), ("CPU-hours", "cpu_error")):
            errors = [row[kind][key] for row in s["runs"] for kind in ("in_sample", "next_run") if kind in row]
            worst = max((abs(e) for e in errors), default=float("inf"))
            rep.row("sim_accuracy", f"{name}: relative error of the predicted {what} (in sample and next run)",
                    show(sp(errors), "pct") + f", worst {worst:.1%}"
                    + (f"; {len(s['fit_failures'])} fit(s) failed" if s.get("fit_failures") else ""),
                    "within 25 %", worst <= 0.25, cmd)
        for row in s["runs"]:
            for kind in ("in_sample", "next_run"):
                if kind not in row:
                    continue
                p, meas = row[kind], row["measured"]
                rows.append([name, str(row["run"]), kind.replace("_", " "), f"{meas['wall_s']:.2f}",
                             f"{p['wall_s']['median']:.2f} [{p['wall_s']['low']:.2f} – {p['wall_s']['high']:.2f}]",
                             f"{p['wall_error']:+.1%}", f"{meas['cpu_hours'] * 3600:.2f}", f"{p['cpu_hours']['median'] * 3600:.2f}",
                             f"{p['cpu_error']:+.1%}", f"{meas['head_cpu_hours'] * 3600:.2f}", f"{meas['segments']} / {p['segments']['median']:.0f}",
                             f"{p['fit']['seconds_per_unit']:.4g} + {p['fit']['overhead_s']:.3g}"])
    rep.sections.append(
        "## Simulator accuracy (`sim_accuracy.py`)\n\nEach search run on local Ray (2 CPUs); `plan_search(spec, "
        "workers=2, fitted_from=measurements, repeats=20)` predicts it from its own measurements (*in sample*) and "
        "from the previous run's (*next run*, other seed). Measured CPU is the workers' busy time; *head counted* "
        f"is `statistics()['cpu_seconds']`. The sleepy search's true cost is {a['known_seconds_per_unit']} s per unit.\n\n"
        + md_table(["search", "run", "fit from", "wall s", "predicted wall s [10–90 %]", "error", "busy CPU-s",
                    "predicted CPU-s", "error", "head counted CPU-s", "segments measured / predicted",
                    "fitted s/unit + s/segment"], rows) + "\n")


def render_sharing_round(res: dict[str, Any], rep: Report) -> None:
    runs, cmd = res["runs"], res["command"]
    if not runs:
        return
    for case, label in (("steady", "steady state"), ("cold", "first round, empty cluster"), ("preempting", "round that preempts")):
        s = sp([r[case]["median_ms"] for r in runs])
        rep.row("sharing_round", f"sharing round, {runs[0]['teams']} teams / {runs[0]['searches']} searches / "
                f"{runs[0]['waiting']:,} waiting, {label} (ms, median)", show(s, ".3g"), "well under 10 ms",
                s["max"] is not None and s["max"] < 10.0, cmd)
    rep.sections.append(
        f"## Sharing round (`sharing_round.py`)\n\nThe pure sharing rules alone "
        f"(`scheduler/core/sharing.py`): {runs[0]['teams']} teams, {runs[0]['searches']} searches, "
        f"{runs[0]['waiting']:,} segments waiting.\n\n"
        + md_table(["case", "median ms", "p99 ms"], [
            [case, show(sp([r[case]["median_ms"] for r in runs]), ".3g"), show(sp([r[case]["p99_ms"] for r in runs]), ".3g")]
            for case in ("steady", "cold", "preempting")]) + "\n")


def render_lab_round(res: dict[str, Any], rep: Report) -> None:
    runs, cmd = res["runs"], res["command"]
    if not runs:
        return
    turn = sp([r["turn_ms"]["median"] for r in runs])
    p99 = sp([r["turn_ms"]["p99"] for r in runs])
    inner = sp([r["sharing_round_ms"]["median"] for r in runs])
    r0 = runs[0]
    rep.row("lab_round", f"whole turn of the lab's head, {r0['teams']} teams / {r0['searches']} searches, "
            f"{r0['segments_ended_per_turn']:.0f} segments ending per turn (ms, median)", show(turn, ".3g"),
            "none set (the round: well under 10 ms)", None, cmd)
    rep.sections.append(
        f"## Lab head turn (`lab_round.py`)\n\nThe whole turn of `LabHead` (sharing round, every search's "
        f"driver stepped, journals fsynced, one ledger file), {r0['teams']} teams, {r0['searches']} searches, "
        f"{r0['running_segments']:,} segments running on a stand-in 2,048-CPU pool, "
        f"{r0['segments_ended_per_turn']:.0f} ending per turn.\n\n"
        + md_table(["figure", "median (min – max, n)"], [
            ["turn, median ms", show(turn, ".3g")], ["turn, p99 ms", show(p99, ".3g")],
            ["sharing round within it, median ms", show(inner, ".3g")],
            ["first turn (every CPU free, drivers opened), ms", show(sp([r["first_turn_ms"] for r in runs]), ".3g")]])
        + "\n")


def render_accounting(res: dict[str, Any], rep: Report) -> None:
    if not res["runs"]:
        return
    a, cmd = res["runs"][0], res["command"]
    s = a["summary"]
    names = list(s)
    ours = [n for n in names if s[n]["method"] != "baseline"]

    def each(key: str, fmt: str) -> str:
        return "; ".join(f"{n} {num(s[n][key]['median'], fmt)}" for n in names if s[n][key]["median"] is not None)

    def all_of(test: Any) -> bool | None:
        vals = [s[n] for n in ours]
        return None if not vals else all(test(v) for v in vals)

    t = a["targets"]
    rep.row("accounting", "worker processes that ran objectives, per CPU slot", each("workers_per_slot", ".2g"),
            "1 (as plain Ray; issue #11)", all_of(lambda v: v["workers_per_slot"]["max"] <= t["workers_per_slot"]), cmd)
    rep.row("accounting", "extra worker CPU over the objectives' own CPU", each("extra_cpu", "pct"),
            f"< {t['extra_cpu']:.0%} (as plain Ray; issue #11)",
            all_of(lambda v: v["extra_cpu"]["median"] is not None and v["extra_cpu"]["median"] < t["extra_cpu"]), cmd)
    rep.row("accounting", "CPU charged (limits.cpu_hours) over the workers' CPU measured by the OS",
            each("charged_over_os", ".3f"), f"within {t['charged_over_os']:.0%} (issue #11)",
            all_of(lambda v: v["charged_over_os"]["median"] is not None
                   and abs(v["charged_over_os"]["median"] - 1) <= t["charged_over_os"]), cmd)
    rep.row("accounting", f"overshoot of limits.cpu_hours ({a['limit_cpu_s']:g} CPU-s): charged at the end over the limit "
            "(plain Ray: its objectives' CPU, stopping at the limit by hand)",
            each("overshoot", "pct"), f"<= {t['overshoot']:.0%} of the limit or one segment's cost (issue #11)",
            all_of(lambda v: bool(v["overshoot_met"])), cmd)
    rows = []
    for n in names:
        v = s[n]
        rows.append([n, show(v["segments"], ".0f"), show(v["trials"], ".0f"), show(v["workers_per_slot"], ".2g"),
                     show(v["max_objectives_at_once"], ".0f"), show(v["share_over_cpus"], "pct"),
                     show(v["objective_cpu_s"], ".1f"), show(v["objective_calls_cpu_s"], ".2f"),
                     show(v["worker_os_cpu_s"], ".1f"), show(v["extra_cpu"], "pct"),
                     f"{num(v['extra_startup_cpu_s']['median'], '.2f')} / {num(v['extra_idle_workers_cpu_s']['median'], '.2f')}"
                     f" / {num(v['extra_rest_cpu_s']['median'], '.2f')}",
                     show(v["charged_cpu_s"], ".1f"), show(v["charged_over_os"], ".3f"), show(v["overshoot"], "pct"),
                     show(v["allowance"], "pct"), show(v["relay_os_cpu_s"], ".2f"), show(v["head_cpu_s"], ".2f"),
                     show(v["extra_cpu_all"], "pct"), show(v["wall_s"], ".0f")])
    loads = "; ".join(f"{r['name']} {r['load_before']} → {r['load_after']}" for r in a["runs"])
    cal = a["task"].get("calibration")
    cal_text = (f" One full training at the task's defaults ({cal['epochs']} epochs, in the benchmark's own process "
                f"before Ray started): {cal['wall_s']:.2f} s wall, {cal['cpu_s']:.2f} s CPU." if cal else "")
    rep.sections.append(
        f"## Accounting (`accounting.py`)\n\nThe realistic task (`bench/realistic_task.py`: a one-hidden-layer network "
        f"on shifted digits, {a['task']['train_size']:,} training images, 1 .. {a['task']['epochs'][1]} epochs, eta 3, "
        f"4 parameters).{cal_text} Each search: `limits.cpu_hours` = {a['limit_cpu_s']:g} CPU-seconds, no trial limit, "
        f"{a['cpus']} CPUs, a fresh embedded Ray each; {a['repeats']} repeat(s). *Plain Ray*: random configurations "
        "from the same sampler trained at the top budget, one `ray.remote(num_cpus=1)` task each, 2 in flight, no new "
        "task once the finished tasks' CPU reaches the limit. *Objective CPU*: measured inside the objective "
        "(`time.thread_time()` over the call), *of which save/report*: inside `ctx.save`/`ctx.report`. *Workers (OS)*: "
        "every Ray worker process's user + system CPU from `/proc/<pid>/stat` over its life (the relay actor apart); "
        "*extra* = workers / objective - 1, split into the start-up of the processes that ran objectives (their CPU "
        "before their first call) / worker processes that ran none / the rest. *Charged*: `SearchDriver.cpu_seconds`. "
        "*Overshoot*: (charged - limit) / limit (plain Ray: objective CPU); *allowed*: 2 % of the limit or the run's "
        "most expensive segment, whichever is larger. *All*: workers + relay + head process over objective CPU. "
        f"Load average (1, 5, 15 min) at start {a['load_start']}, at end {a['load_end']}; per run: {loads}.\n\n"
        + md_table(["run", "segments", "trials", "worker processes / slot", "objectives at once (max)",
                    "time with more than 2", "objective CPU s", "of which save/report s", "workers (OS) CPU s",
                    "extra", "extra s: start-up / idle workers / rest", "charged CPU s", "charged / OS",
                    "overshoot", "allowed", "relay CPU s", "head CPU s", "all / objective - 1", "wall s"], rows)
        + "\n")


RENDER = {"accounting": render_accounting, "sharing_round": render_sharing_round, "lab_round": render_lab_round, "core_cost": render_core_cost, "dispatch": render_dispatch, "utilization": render_utilization,
          "recovery": render_recovery, "journal_replay": render_journal, "sim_accuracy": render_sim_accuracy}


def write_report(env: dict[str, Any], results: list[dict[str, Any]], mode: str, out: Path, figures: Path,
                 took: float, load: tuple[list[float], list[float]]) -> str:
    rep = Report()
    for res in results:
        try:
            if res["name"] == "quality":
                render_quality(res, rep, out)
            elif res["name"] == "sim_scale":
                render_sim_scale(res, rep, figures, out)
            else:
                RENDER[res["name"]](res, rep)
        except Exception as exc:  # noqa: BLE001 - a malformed result must not lose the others
            res["errors"].append(f"could not render: {type(exc).__name__}: {exc}")
    dirty = (" with uncommitted changes in `scheduler/` or `workers/`" if env["dirty"]
             else ", `scheduler/` and `workers/` as committed")
    end = env.get("at_end")
    if end and (end.get("code_tree"), end["dirty"]) != (env.get("code_tree"), env["dirty"]):
        dirty += (f" **(changed during the run: at the end `{end['commit']}`"
                  f"{', with uncommitted changes' if end['dirty'] else ''}; figures may mix the two)**")
    elif end and end["commit"] != env["commit"]:
        dirty += f" (HEAD was `{end['commit']}` at the end: other files only, rungway's code the same)"
    lines = [
        "# Benchmarks",
        "",
        f"Generated by `{PY} bench/run.py --{mode}` on {env['date']}; it took {took / 60:.1f} minutes. "
        "Regenerate with the same command; every figure's own command is in the last column. Nothing here is "
        "asserted by the tests.",
        "",
        f"- Machine: `nproc` = {env['nproc']}, {env['cpu']} ({env['machine']}), {env['memory']} memory. Shared: other "
        f"people's processes ran during the run; load average (1, 5, 15 min) {load[0]} before, {load[1]} after "
        "(each benchmark's own below).",
        f"- Versions: Python {env['python']}, Ray {env['ray']}, numpy {env['numpy']}, scikit-learn {env['scikit-learn']}, "
        f"pandas {env['pandas']}, pyarrow {env['pyarrow']}; rungway commit `{env['commit']}`{dirty}.",
        "- Figures: median (min – max, n = repeats). On a shared 2-core machine absolute rates move by up to 2x "
        "between runs; compare figures within one run, as ratios.",
        "",
        "## Summary",
        "",
        md_table(["benchmark", "figure", "median (min – max, n)", "target", "met?", "reproduce"], rep.summary),
        "",
        "Targets marked *none set* have no target in the repository; *proposed* ones are this runner's reading of a "
        "qualitative claim.",
        "",
        "## Runs",
        "",
        md_table(["benchmark", "what", "wall s", "load before → after", "problems"], [
            [r["name"], r.get("what", ""), " + ".join(f"{s:.0f}" for s in r["seconds"]), f"{r['load_before']} → {r['load_after']}",
             "; ".join(r["errors"]) or "-"] for r in results]),
        "",
        *rep.sections,
    ]
    return "\n".join(lines).rstrip() + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--quick", action="store_true", help="small sizes: a few minutes (default)")
    group.add_argument("--full", action="store_true", help="full sizes: about 28 minutes")
    group.add_argument("--smoke", action="store_true", help=argparse.SUPPRESS)  # the tests' tiny sizes
    parser.add_argument("--out", default=str(ROOT / "BENCHMARKS.md"), help="the report (default BENCHMARKS.md)")
    parser.add_argument("--figures", default=str(HERE / "figures"), help="SVG plots go here (default bench/figures)")
    parser.add_argument("--raw", metavar="PATH", help="also write every benchmark's collected JSON here")
    parser.add_argument("--only", help="comma-separated benchmark names (default: all)")
    parser.add_argument("--render", metavar="RAW", help="only write the report again from a --raw file of an earlier run")
    args = parser.parse_args(argv)
    mode = "full" if args.full else "smoke" if args.smoke else "quick"
    out, figures = Path(args.out), Path(args.figures)
    figures.mkdir(parents=True, exist_ok=True)
    if args.render:
        raw = json.loads(Path(args.render).read_text())
        text = write_report(raw["environment"], raw["results"], raw["mode"], out, figures, raw["took"],
                            (raw["load"][0], raw["load"][1]))
        out.write_text(text, encoding="utf-8")
        print(f"wrote {out} from {args.render}")
        return 0
    benches = plan(mode, str(figures))
    if args.only:
        wanted = {w.strip() for w in args.only.split(",")}
        unknown = wanted - {b.name for b in benches}
        if unknown:
            parser.error(f"unknown benchmark(s): {', '.join(sorted(unknown))}")
        benches = [b for b in benches if b.name in wanted]
    env = environment()
    scratch = Path(tempfile.mkdtemp(prefix="rungway-bench-run-"))
    print(f"rungway benchmarks ({mode}); raw output in {scratch}", flush=True)
    load0 = loadavg()
    start = time.perf_counter()
    results = []
    for b in benches:
        print(f"- {b.name}: {command_line(b)}", flush=True)
        res = run_bench(b, scratch)
        res["what"] = b.what
        results.append(res)
        print(f"  {sum(res['seconds']):.0f} s, load {res['load_before']} -> {res['load_after']}"
              + (f", problems: {'; '.join(res['errors'])}" if res["errors"] else ""), flush=True)
    took = time.perf_counter() - start
    load1 = loadavg()
    later = environment()
    env["at_end"] = {"commit": later["commit"], "code_tree": later["code_tree"], "dirty": later["dirty"]}
    text = write_report(env, results, mode, out, figures, took, (load0, load1))
    out.write_text(text, encoding="utf-8")
    if args.raw:
        Path(args.raw).write_text(json.dumps({"environment": env, "results": results, "mode": mode, "took": took,
                                              "load": [load0, load1]}, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {out} ({took / 60:.1f} min)", flush=True)
    return 1 if any(r["errors"] for r in results) else 0


if __name__ == "__main__":
    sys.exit(main())
