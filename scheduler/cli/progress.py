"""The live view of a running search: a redrawn block on a terminal, plain lines elsewhere."""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO

__all__ = ["ProgressView", "format_seconds", "render"]


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
    lines = [
        f"{stats['search']}: {stats['trials']} trials, {states['active']} running, {states['done']} at the top, "
        f"{states['failed']} failed | {stats['cpus_busy']:g}/{stats['cpus_total']:g} CPUs busy",
        f"  best {stats['metric']} ({stats['better']} is better): {best_text}",
    ]
    for index, bracket in enumerate(stats["brackets"]):
        prefix = f"  bracket {index} " if len(stats["brackets"]) > 1 else "  "
        cells = [
            f"{r['budget']:g}: {r['results']} done, {r['running']} running, {r['promoted']} promoted"
            for r in bracket["rungs"]
        ]
        lines.append(prefix + "rungs  " + " | ".join(cells))
    lines.append(
        f"  elapsed {format_seconds(stats['elapsed'])}, about {format_seconds(stats.get('eta_seconds'))} left"
    )
    return lines


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
