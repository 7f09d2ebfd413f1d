"""The live view of a running search: a redrawn block on a terminal, plain lines elsewhere."""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO

from rungway.scheduler.core.plan import bracket_name

__all__ = ["ProgressView", "cpu_text", "format_seconds", "render"]


def format_seconds(seconds: float | None) -> str:
    if seconds is None:
        return "unknown"
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}h{m:02d}m{s:02d}s" if h else f"{m}m{s:02d}s" if m else f"{s}s"


def render(stats: dict[str, Any]) -> list[str]:
    """The lines of the live view for one statistics snapshot."""
    best = stats.get("best")
    best_text = "none yet" if best is None else f"{best['value']:.6g} (trial {best['trial']}, {stats['unit']} {best['budget']})"
    states = stats["states"]
    # Segments waiting in Ray's queue for a slot (resources.queued_per_slot) are not running.
    running = stats.get("segments_running", states["active"])
    queued = stats.get("segments_queued", 0)
    lines = [
        f"{stats['search']}: {stats['trials']} trials, {running} running, {queued} queued, {states['done']} at the top, "
        f"{states['failed']} failed | {stats['cpus_busy']:g}/{stats['cpus_total']:g} CPUs busy",
        f"  best {stats['metric']} ({stats['better']} is better): {best_text}",
    ]
    for bracket in stats["brackets"]:
        prefix = f"  {bracket_name(bracket['s'], bracket.get('iteration'))} " if len(stats["brackets"]) > 1 else "  "
        cells = [
            f"{r['budget']:g}: {r['results']} done, {r['running']} running, {r['promoted']} promoted"
            for r in bracket["rungs"]
        ]
        lines.append(prefix + "rungs  " + " | ".join(cells))
    lines.append(
        f"  elapsed {format_seconds(stats['elapsed'])}, about {format_seconds(stats.get('eta_seconds'))} left"
        + cpu_text(stats)
    )
    return lines


def cpu_text(stats: dict[str, Any]) -> str:
    """``" | CPU 0.0123 of 0.1 CPU-hours used, 0.015 reserved"``: the CPU time the segments used
    (what limits.cpu_hours counts) and what they reserved; empty before anything is charged."""
    if "cpu_seconds" not in stats:
        return ""
    limit = (stats.get("limits") or {}).get("cpu_hours")
    of = f" of {limit['limit']:g}" if limit else ""
    return (f" | CPU {stats['cpu_seconds'] / 3600:.4g}{of} CPU-hours used, "
            f"{stats.get('reserved_cpu_seconds', stats['cpu_seconds']) / 3600:.4g} reserved")


class ProgressView:
    """Callable progress sink: redraws in place on a terminal, else logs every ``every`` s."""

    def __init__(self, stream: TextIO | None = None, every: float = 10.0, tty: bool | None = None) -> None:
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty() if tty is None else tty
        self.every = every
        self._drawn = 0
        self._last = 0.0

    def __call__(self, stats: dict[str, Any]) -> None:
        lines = render(stats)
        if self.tty:
            if self._drawn:
                self.stream.write(f"\x1b[{self._drawn}F\x1b[J")
            self.stream.write("\n".join(lines) + "\n")
            self._drawn = len(lines)
        else:
            now = time.monotonic()
            if now - self._last < self.every:
                return
            self._last = now
            self.stream.write(" ".join(line.strip() for line in lines[:2]) + f" elapsed {format_seconds(stats['elapsed'])}\n")
        self.stream.flush()
