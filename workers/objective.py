"""Loading user objectives and reading what they return.

An objective is named in a spec file by a ``module.path:function`` path. It comes in one of
two forms, told apart by its signature:

- the **plain** form, exactly two required positional parameters ``(config, budget)``: trains
  from scratch to ``budget`` and returns the metric (a number) or a dict of metrics;
- the **resumable** form, exactly one required positional parameter ``(ctx)``: resumes from
  ``ctx.state``, reports through ``ctx.report`` and saves through ``ctx.save`` (see
  :class:`rungway.workers.Context`); it may return a number, a dict, or nothing (then the
  last report counts).

:func:`load_objective` imports and checks one; :func:`interpret_result` turns what it
returned into the number the scheduler ranks. Neither imports Ray: the scheduler uses them to
check a spec before it starts anything, the workers to run the objective.
"""

from __future__ import annotations

import difflib
import importlib
import inspect
import math
import numbers
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from rungway.scheduler.core.errors import SpecError

__all__ = [
    "NOT_FINITE",
    "OBJECTIVE_PATH_PATTERN",
    "Objective",
    "ObjectiveForm",
    "interpret_result",
    "load_objective",
]

ObjectiveForm = Literal["plain", "resumable"]

_IDENT = r"[A-Za-z_][A-Za-z0-9_]*"
OBJECTIVE_PATH_PATTERN = rf"^{_IDENT}(\.{_IDENT})*:{_IDENT}$"
"""``module.path:function``: a dotted module path, a colon, a function name."""

_PATH_RE = re.compile(OBJECTIVE_PATH_PATTERN)

NOT_FINITE = "not finite"
"""The reason :func:`interpret_result` gives for a NaN or infinite metric value. Such a
result is still a result (recorded, and ranked worst by the core); every other reason means
the objective returned something unusable."""

_FORMS_HELP = (
    "an objective takes either two arguments, (config, budget) -- the plain form: train from "
    "scratch to budget and return the metric or a dict of metrics -- or one argument, (ctx) -- "
    "the resumable form: resume from ctx.state, report with ctx.report and save with ctx.save"
)


@dataclass(frozen=True)
class Objective:
    """A loaded, checked objective."""

    path: str
    """The ``module:function`` path it was loaded from."""
    fn: Callable[..., Any]
    form: ObjectiveForm
    """``"plain"``: called as ``fn(config, budget)``; ``"resumable"``: called as ``fn(ctx)``."""


def check_objective_path(path: Any) -> str:
    """``path`` if it is a well-formed ``module.path:function``, else ``SpecError`` (no field;
    the caller knows where the path came from)."""
    if not isinstance(path, str):
        raise SpecError(
            f'must be a string "module.path:function" (got a {type(path).__name__})'
        )
    if _PATH_RE.match(path):
        return path
    if ":" not in path:
        hint = ""
        if "." in path:
            mod, _, fn = path.rpartition(".")
            hint = f'; did you mean "{mod}:{fn}"?'
        raise SpecError(
            f'must be "module.path:function", with a colon before the function name '
            f"(got {path!r}){hint}"
        )
    raise SpecError(
        'must be "module.path:function": a dotted module path of Python names, one colon, '
        f"and a function name (got {path!r})"
    )


def _required_positional(sig: inspect.Signature) -> tuple[list[str], list[str]]:
    """(names of required positional parameters, names of required keyword-only ones)."""
    positional, keyword = [], []
    for p in sig.parameters.values():
        if p.default is not inspect.Parameter.empty:
            continue
        if p.kind in (inspect.Parameter.POSITIONAL_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD):
            positional.append(p.name)
        elif p.kind is inspect.Parameter.KEYWORD_ONLY:
            keyword.append(p.name)
    return positional, keyword


def load_objective(path: str) -> Objective:
    """Import the objective at ``path`` and work out its form.

    Every problem raises ``SpecError`` with ``field="objective"``: a malformed path, a module
    that does not import, a missing attribute, something that is not a function, or a
    signature that fits neither form.
    """
    try:
        check_objective_path(path)
    except SpecError as exc:
        raise SpecError(str(exc), field="objective") from None
    module_name, _, attr = path.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        raise SpecError(
            f"could not import {module_name!r}: {type(exc).__name__}: {exc}; "
            "is it installed on every worker, or on PYTHONPATH?",
            field="objective",
        ) from exc
    except Exception as exc:  # the module itself raised while it ran
        raise SpecError(
            f"could not import {module_name!r}: {type(exc).__name__}: {exc}; "
            "the module raised this while it was being imported (see the chained traceback)",
            field="objective",
        ) from exc
    try:
        fn = getattr(module, attr)
    except AttributeError:
        names = vars(module)
        public = sorted(n for n in names if not n.startswith("_") and callable(names[n]))
        close = difflib.get_close_matches(attr, public, n=1)
        hint = f'did you mean "{module_name}:{close[0]}"? ' if close else ""
        listed = f"its functions are: {', '.join(public)}" if public else "it defines no functions"
        raise SpecError(
            f"module {module_name!r} has no attribute {attr!r}; {hint}{listed}", field="objective"
        ) from None
    if not callable(fn):
        raise SpecError(
            f"{path!r} is {_a(type(fn).__name__)}, not a function; {_FORMS_HELP}",
            field="objective",
        )
    if inspect.iscoroutinefunction(fn) or inspect.isasyncgenfunction(fn):
        raise SpecError(
            f"{path!r} is an async function; objectives must be ordinary functions "
            "(run an event loop inside it if it needs one)",
            field="objective",
        )
    if inspect.isgeneratorfunction(fn):
        raise SpecError(
            f"{path!r} is a generator function (it uses yield); an objective returns its "
            "result, and the resumable form reports intermediate results with ctx.report",
            field="objective",
        )
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError) as exc:
        raise SpecError(
            f"cannot read the signature of {path!r} ({exc}); wrap it in a Python function: "
            f"{_FORMS_HELP}",
            field="objective",
        ) from None
    positional, keyword = _required_positional(sig)
    if keyword:
        raise SpecError(
            f"{path!r} has required keyword-only parameters ({', '.join(keyword)}) that "
            f"rungway cannot fill; give them defaults. {_FORMS_HELP}",
            field="objective",
        )
    if len(positional) == 2:
        return Objective(path, fn, "plain")
    if len(positional) == 1:
        return Objective(path, fn, "resumable")
    shown = f"({', '.join(positional)})" if positional else "none"
    raise SpecError(
        f"{path!r} takes {len(positional)} required positional arguments {shown}; "
        f"{_FORMS_HELP}",
        field="objective",
    )


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------


def _as_number(value: Any) -> float | None:
    """``value`` as a float if it is a real number (Python or numpy, not a bool), else None."""
    if isinstance(value, (bool, np.bool_)):
        return None
    if isinstance(value, np.ndarray):
        if value.ndim == 0 and np.issubdtype(value.dtype, np.number) and value.dtype.kind != "c":
            return float(value.item())
        return None
    if isinstance(value, numbers.Real):
        return float(value)
    return None


def _a(noun: str) -> str:
    return f"{'an' if noun[:1].lower() in 'aeiou' else 'a'} {noun}"


def _type_name(value: Any) -> str:
    if isinstance(value, np.ndarray):
        return f"numpy array of shape {value.shape}"
    return type(value).__name__


def _bad_type(value: Any, what: str) -> str:
    hint = ""
    if hasattr(value, "item") and not isinstance(value, (str, bytes, Mapping)):
        hint = " (for a one-element array or tensor, return value.item())"
    return f"{what} {_a(_type_name(value))}, expected a number or a dict of numbers{hint}"


def _from_mapping(
    data: Mapping[Any, Any], metric: str, what: str
) -> tuple[float, dict[str, float], str | None]:
    metrics: dict[str, float] = {}
    for key, raw in data.items():
        if not isinstance(key, str):
            reason = f"{what} a dict with a non-string key {key!r}; metric names are strings"
            return math.nan, metrics, reason
        number = _as_number(raw)
        if number is None:
            return (
                math.nan,
                metrics,
                f"{what} a dict whose {key!r} is {_a(_type_name(raw))}, expected a number",
            )
        metrics[key] = number
    if metric not in metrics:
        got = ", ".join(repr(k) for k in metrics) or "nothing"
        reason = f"{what} no {metric!r} (it has {got}); the spec's metric is {metric!r}"
        return math.nan, metrics, reason
    value = metrics[metric]
    return value, metrics, None if math.isfinite(value) else NOT_FINITE


def interpret_result(
    returned: Any, metric: str, last_reported: Mapping[str, float] | None
) -> tuple[float, dict[str, float], str | None]:
    """(the metric's value, all metrics, reason) for what an objective returned.

    - a number (int, float, numpy scalar) is the metric's value: ``{metric: value}``;
    - a dict must map metric names to numbers and contain ``metric``;
    - ``None`` means "the last report counts" (resumable form): ``last_reported`` is read like
      a returned dict; without one the result is bad;
    - anything else (a string, a list, ...) is bad.

    ``reason`` is None for a good result, :data:`NOT_FINITE` when the metric is NaN or
    infinite (the value is returned as-is; the core ranks it worst), and otherwise says what
    was wrong, e.g. ``"returned a str, expected a number or a dict of numbers"``; the value is
    then NaN and ``metrics`` holds whatever could be read.
    """
    if returned is None:
        if last_reported:
            return _from_mapping(last_reported, metric, "returned None and its last report has")
        return (
            math.nan,
            {},
            "returned None and reported nothing; return a number or a dict of numbers, "
            "or report with ctx.report(budget, name=value) before returning",
        )
    if isinstance(returned, Mapping):
        return _from_mapping(returned, metric, "returned")
    number = _as_number(returned)
    if number is None:
        return math.nan, {}, _bad_type(returned, "returned")
    return number, {metric: number}, None if math.isfinite(number) else NOT_FINITE
