"""A first look at a user's objective before a search starts.

Runs the objective once on one sampled configuration at the ladder's minimum budget, with
checkpoints kept in memory: in a child process (:func:`probe_in_child`, what ``rungway run``
does), so that an objective that hangs meets a time limit, one that exits or is killed ends
only the child, and whatever it prints stays off the command's own output (its tail is shown
when the probe fails). A search whose objective raises, returns a
string, or returns NaN at the first try is almost always a broken spec; saying so before
anything is written to the store saves a cluster's worth of failed segments. ``rungway run
--no-probe`` skips it (for objectives too expensive to run twice at the minimum budget).
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import traceback
from collections.abc import Mapping
from typing import Any

from rungway.scheduler.core.errors import SpecError

from .context import Context, TrialCulled
from .objective import NOT_FINITE, Objective, interpret_result

__all__ = ["probe_objective", "probe_in_child"]

_TAIL = 2000  # characters of the child's output shown when the probe fails


def probe_objective(objective: Objective, config: Mapping[str, Any], budget: int | float, metric: str) -> float:
    """The metric's value for ``config`` at ``budget``; SpecError(field="objective") if unusable."""
    saved: dict[str, Any] = {}
    last: list[dict[str, float]] = []

    def report(at: Any, metrics: dict[str, float], at_milestone: bool) -> bool:
        last[:] = [metrics]
        return True

    ctx = Context(
        config=config, budget=budget, start=0, state=None, trial=-1, attempt=0, rung=0,
        milestones=(budget,), save=lambda state, at: saved.update(state=state), report=report,
        yield_flag=lambda: False,
    )
    where = f"{objective.path} on {dict(config)} at budget {budget}"
    try:
        returned = objective.fn(dict(config), budget) if objective.form == "plain" else objective.fn(ctx)
    except TrialCulled:
        returned = None
    except Exception as exc:
        tail = "".join(traceback.format_exception_only(type(exc), exc)).strip()
        raise SpecError(
            f"the objective failed on a first try ({where}): {tail}; fix it, or pass --no-probe to skip this check",
            field="objective",
        ) from exc
    value, _metrics, reason = interpret_result(returned, metric, last[0] if last else None)
    if reason is not None and reason != NOT_FINITE:
        raise SpecError(f"the objective's first result is unusable ({where}): {reason}", field="objective")
    if not math.isfinite(value):
        raise SpecError(
            f"the objective returned {value} for {metric!r} on a first try ({where}); a search would rank every "
            "such result worst. Fix the objective, or pass --no-probe if this is expected",
            field="objective",
        )
    return value


def _tail(text: str) -> str:
    text = text.strip()
    return text if len(text) <= _TAIL else "..." + text[-_TAIL:]


def probe_in_child(objective_path: str, config: Mapping[str, Any], budget: int | float, metric: str,
                   timeout: float) -> float:
    """:func:`probe_objective` in a child Python process that sees this one's import path;
    SpecError(field="objective") if it fails, exits, is killed or outlives ``timeout`` seconds."""
    where = f"{objective_path} on {dict(config)} at budget {budget}"
    with tempfile.TemporaryDirectory(prefix="rungway-probe-") as folder:
        answer = os.path.join(folder, "answer.json")
        order = json.dumps({"objective": objective_path, "config": dict(config), "budget": budget, "metric": metric,
                            "answer": answer})
        env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in sys.path if p))
        try:
            done = subprocess.run([sys.executable, "-m", "rungway.workers.probe"], input=order, env=env,
                                  capture_output=True, text=True, timeout=timeout)
        except subprocess.TimeoutExpired as exc:
            output = (exc.stdout or b"").decode(errors="replace") if isinstance(exc.stdout, bytes) else (exc.stdout or "")
            raise SpecError(
                f"the objective did not finish a first try within {timeout:g} s ({where}); if it is just slow, "
                "raise --probe-timeout or pass --no-probe" + (f"; its output ended with:\n{_tail(output)}" if output else ""),
                field="objective",
            ) from None
        output = _tail(done.stdout + done.stderr)
        try:
            with open(answer) as fh:
                result = json.load(fh)
        except (OSError, ValueError):
            result = None
    if result is None:
        if done.returncode < 0:
            how = f"was killed by signal {signal.Signals(-done.returncode).name}"
        else:
            how = f"ended its process with exit code {done.returncode}"
        raise SpecError(f"the objective {how} on a first try ({where}); fix it, or pass --no-probe to skip this "
                        "check" + (f"; its output ended with:\n{output}" if output else ""), field="objective")
    if "error" in result:
        raise SpecError(result["error"] + (f"; its output ended with:\n{output}" if output else ""), field="objective")
    return float(result["value"])


def _child() -> None:
    from .objective import load_objective

    order = json.loads(sys.stdin.read())
    try:
        value = probe_objective(load_objective(order["objective"]), order["config"], order["budget"], order["metric"])
        result: dict[str, Any] = {"value": value}
    except SpecError as exc:
        result = {"error": str(exc).removeprefix("objective: ")}
    with open(order["answer"], "w") as fh:
        json.dump(result, fh)


if __name__ == "__main__":
    _child()
