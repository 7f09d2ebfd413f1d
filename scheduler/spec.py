"""Search specification files: one TOML file says what to search, how, and within what limits.

A spec file names the search and its objective, the ladder geometry and mode, the sampler, the
limits, the resources each trial needs and the search space (see ``docs/spec-files.md``)::

    name = "digits-mlp"
    objective = "rungway.workers.demo:train_mlp"
    metric = "accuracy"
    better = "higher"

    [ladder]
    unit = "epochs"
    min = 1
    max = 27

    [space.learning_rate]
    kind = "real"
    lower = 1e-4
    upper = 0.3
    scale = "log"

:func:`load_spec` and :func:`parse_spec` read one into a :class:`SearchSpec`; every mistake
in it -- TOML syntax, an unknown key, a wrong type, a ladder that cannot work, a broken space,
a bad sampler option -- raises one :class:`SpecFileError` whose message names the file, the
line, the dotted field and what would be valid::

    digits.toml:14: ladder.eta: must be an integer >= 2 (got 1)

:func:`check_spec` adds the checks that need the objective itself (it imports it).
"""

from __future__ import annotations

import difflib
import json
import math
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from os import PathLike
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PlainValidator,
    PrivateAttr,
    ValidationError,
    model_validator,
)

from rungway.workers.objective import check_objective_path, load_objective

from .core.errors import SpecError
from .store.migrations import renamed
from .core.ladder import hyperband_brackets
from .core.plan import MODES, SearchPlan
from .core.samplers import SAMPLERS, Sampler, make_sampler
from .core.space import SearchSpace

__all__ = [
    "BETTER_CHOICES",
    "decode_spec",
    "NAME_PATTERN",
    "LadderSection",
    "LimitsSection",
    "Problem",
    "ResourcesSection",
    "SamplerSection",
    "SearchSpec",
    "SpecFileError",
    "check_spec",
    "load_spec",
    "parse_duration",
    "parse_spec",
    "spec_from_mapping",
]

NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
"""Search names: a letter or digit, then up to 63 letters, digits, ``.``, ``_`` or ``-``."""

BETTER_CHOICES: tuple[str, ...] = ("higher", "lower")
"""The values of ``better``: which end of the metric is the good one."""
HYPERBAND_COUNTS: tuple[str, ...] = ("formula", "table")

_NAME_RE = re.compile(NAME_PATTERN)


# --------------------------------------------------------------------------------------------
# The error
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Problem:
    """One mistake in a spec file."""

    field: str | None
    """Dotted path of the offending field (``ladder.eta``), or None (a TOML syntax error)."""
    message: str
    """What is wrong and what would be valid, without the location."""
    line: int | None = None
    """1-based line of the field in the file, when it could be found."""


class SpecFileError(SpecError):
    """Everything wrong with a spec file, located: ``file:line: field: message`` per problem.

    ``field``, ``line`` and ``message`` describe the first problem; ``problems`` lists all of
    them (one per line of ``str(error)``).
    """

    def __init__(self, problems: Sequence[Problem], source: str = "<spec>") -> None:
        if not problems:
            raise ValueError("a SpecFileError needs at least one problem")
        self.source = source
        self.problems: tuple[Problem, ...] = tuple(problems)
        first = self.problems[0]
        self.line = first.line
        self.message = first.message
        super().__init__(first.message, field=first.field)
        self.args = ("\n".join(_format(p, source) for p in self.problems),)

    def __str__(self) -> str:
        return str(self.args[0])

    def __reduce__(self) -> tuple[Any, ...]:  # picklable, e.g. across a Ray boundary
        return (type(self), (self.problems, self.source))


def _format(problem: Problem, source: str) -> str:
    where = source if problem.line is None else f"{source}:{problem.line}"
    if problem.field:
        return f"{where}: {problem.field}: {problem.message}"
    return f"{where}: {problem.message}"


def _bare_message(err: SpecError) -> str:
    """A SpecError's message without the ``field: `` prefix SpecError adds."""
    text = str(err)
    prefix = f"{err.field}: " if err.field else ""
    return text[len(prefix):] if prefix and text.startswith(prefix) else text


_FIELD_PIECE = r"[A-Za-z0-9_\-]+(?:\[\d+\])*"
_FIELD_LINE_RE = re.compile(rf"^({_FIELD_PIECE}(?:\.{_FIELD_PIECE})*): (.+)$")


def _problems_of(
    err: SpecError, rename: Mapping[str, str] | None = None
) -> list[tuple[str | None, str]]:
    """(field, message) pairs of a SpecError; further problems on later lines of its message
    (``field: message``, as ``spec_error_from_validation`` writes them) become pairs too."""
    lines = _bare_message(err).split("\n")
    pairs: list[tuple[str | None, str]] = [(err.field, lines[0])]
    for extra in lines[1:]:
        m = _FIELD_LINE_RE.match(extra)
        if m:
            pairs.append((m.group(1), m.group(2)))
        elif pairs:
            f, msg = pairs[-1]
            pairs[-1] = (f, f"{msg}\n{extra}")
    if rename:
        pairs = [(_rename_field(f, rename), _rename_words(m, rename)) for f, m in pairs]
    return pairs


def _rename_field(field: str | None, rename: Mapping[str, str]) -> str | None:
    return rename.get(field, field) if field else field


def _rename_words(message: str, rename: Mapping[str, str]) -> str:
    for old, new in _PLAN_WORDS.items():
        message = re.sub(rf"\b{re.escape(old)}\b", new, message)
    return message


# SearchPlan and Ladder name their fields after the plan; a spec file names them differently.
_PLAN_FIELDS = {
    "ladder.min_budget": "ladder.min",
    "ladder.max_budget": "ladder.max",
    "limits.max_trials": "limits.trials",
    "limits.sync_trials": "ladder.sync_trials",
}
_PLAN_WORDS = {"min_budget": "ladder.min", "max_budget": "ladder.max"}


# --------------------------------------------------------------------------------------------
# Locating fields in the TOML text
# --------------------------------------------------------------------------------------------

_KEY_PART = r'(?:[A-Za-z0-9_\-]+|"(?:[^"\\]|\\.)*"|\'[^\']*\')'
_KEY = rf"{_KEY_PART}(?:\s*\.\s*{_KEY_PART})*"
_HEADER_RE = re.compile(rf"^\s*\[\[?\s*({_KEY})\s*\]\]?")
_ASSIGN_RE = re.compile(rf"^\s*({_KEY})\s*=")
_PART_RE = re.compile(_KEY_PART)


def _split_key(key: str) -> tuple[str, ...]:
    parts = []
    for m in _PART_RE.finditer(key):
        part = m.group(0)
        if part[:1] == '"':
            try:
                part = json.loads(part)
            except ValueError:
                part = part[1:-1]
        elif part[:1] == "'":
            part = part[1:-1]
        parts.append(part)
    return tuple(parts)


def _key_lines(text: str) -> dict[tuple[str, ...], int]:
    """Key path -> the first line (1-based) that defines it or a table under it (best effort:
    a line-by-line scan that knows headers, dotted keys and multi-line strings)."""
    found: dict[tuple[str, ...], int] = {}
    table: tuple[str, ...] = ()
    open_quote: str | None = None
    for number, line in enumerate(text.splitlines(), 1):
        if open_quote:
            if open_quote in line:
                open_quote = None
            continue
        header = _HEADER_RE.match(line)
        if header:
            table = _split_key(header.group(1))
            for i in range(1, len(table) + 1):
                found.setdefault(table[:i], number)
            continue
        assign = _ASSIGN_RE.match(line)
        if not assign:
            continue
        path = table + _split_key(assign.group(1))
        for i in range(len(table) + 1, len(path) + 1):
            found.setdefault(path[:i], number)
        rest = line[assign.end():].lstrip()
        for quote in ('"""', "'''"):
            if rest.startswith(quote) and rest.count(quote) == 1:
                open_quote = quote
    return found


def _field_parts(field: str) -> tuple[str, ...]:
    return tuple(re.sub(r"\[\d+\]$", "", p) for p in field.split("."))


class _Locator:
    def __init__(self, text: str | None) -> None:
        self._lines = _key_lines(text) if text else {}

    def line(self, field: str | tuple[str, ...] | None) -> int | None:
        """The line of ``field``, else of the nearest enclosing table that appears in the text."""
        if not field:
            return None
        parts = field if isinstance(field, tuple) else _field_parts(field)
        for i in range(len(parts), 0, -1):
            if parts[:i] in self._lines:
                return self._lines[parts[:i]]
        return None


# --------------------------------------------------------------------------------------------
# Field validators (each raises SpecError with a message; pydantic adds the location)
# --------------------------------------------------------------------------------------------


def _show(value: Any) -> str:
    """A value the way it is written in TOML."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, Mapping):
        return "a table"
    if isinstance(value, (list, tuple)):
        return "an array"
    return str(value)


def _suggest(word: Any, choices: Sequence[str]) -> str:
    if not isinstance(word, str):
        return ""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f' (did you mean "{close[0]}"?)' if close else ""


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _int_at_least(low: int) -> PlainValidator:
    def check(value: Any) -> int:
        if not _is_int(value) or value < low:
            raise SpecError(f"must be an integer >= {low} (got {_show(value)})")
        return value

    return PlainValidator(check)


def _positive_number(value: Any) -> int | float:
    if not _is_number(value) or not math.isfinite(value) or value <= 0:
        raise SpecError(f"must be a number > 0 (got {_show(value)})")
    return value


def _one_of(choices: Sequence[str]) -> PlainValidator:
    def check(value: Any) -> str:
        if value not in choices or not isinstance(value, str):
            listed = ", ".join(f'"{c}"' for c in choices)
            hint = _suggest(value, choices)
            raise SpecError(f"must be one of {listed} (got {_show(value)}){hint}")
        return value

    return PlainValidator(check)


def _text(what: str) -> PlainValidator:
    def check(value: Any) -> str:
        if not isinstance(value, str) or not value.strip():
            raise SpecError(f"must be {what} (got {_show(value)})")
        return value

    return PlainValidator(check)


def _check_name(value: Any) -> str:
    if not isinstance(value, str) or not _NAME_RE.match(value):
        raise SpecError(
            "must be 1 to 64 characters: a letter or digit, then letters, digits, '.', '_' or '-' "
            f'(got {_show(value)}), e.g. name = "digits-mlp"'
        )
    return value


def _check_metric(value: Any) -> str:
    if not isinstance(value, str) or not 0 < len(value) <= 64 or any(c.isspace() for c in value):
        raise SpecError(
            "must be the name of a metric the objective returns, 1 to 64 characters without "
            f'spaces (got {_show(value)}), e.g. metric = "accuracy"'
        )
    return value


_DURATION_RE = re.compile(
    "^" + "".join(rf"(?:(?P<{u}>\d+(?:\.\d+)?){u})?" for u in "dhms") + "$"
)
_DURATION_UNITS = {"d": 86400.0, "h": 3600.0, "m": 60.0, "s": 1.0}


def parse_duration(value: Any) -> float:
    """Seconds in a duration: a number of seconds, or a string such as ``"90s"``, ``"30m"``,
    ``"2h"``, ``"1h30m"``, ``"1d12h"`` (units d, h, m, s, largest first, each at most once,
    decimals allowed). Must be > 0. Raises ``SpecError`` (without a field) otherwise."""
    if _is_number(value):
        if math.isfinite(value) and value > 0:
            return float(value)
    elif isinstance(value, str):
        m = _DURATION_RE.match(value.strip().replace(" ", ""))
        if m and any(m.groupdict().values()):
            seconds = sum(float(v) * _DURATION_UNITS[u] for u, v in m.groupdict().items() if v)
            if seconds > 0:
                return seconds
    raise SpecError(
        f'must be a duration > 0: a number of seconds, or a string like "90s", "30m", "2h" or '
        f'"1h30m" (units d, h, m, s, largest first) (got {_show(value)})'
    )


def _check_objective(value: Any) -> str:
    return check_objective_path(value)


Name = Annotated[str, PlainValidator(_check_name)]
PositiveNumber = Annotated[int | float, PlainValidator(_positive_number)]


def _cpu_count(value: Any) -> int | float:
    # Ray takes a share of one CPU down to 1e-4 and whole CPUs above one; a share below a
    # hundredth is never what was meant.
    value = _positive_number(value)
    if value < 0.01:
        raise SpecError(f"must be at least 0.01 (a hundredth of a CPU) (got {_show(value)})")
    if value > 1 and value != int(value):
        raise SpecError(f"must be a whole number of CPUs when above 1 (got {_show(value)}); e.g. {math.ceil(value)}")
    return value


CpuCount = Annotated[int | float, PlainValidator(_cpu_count)]
Duration = Annotated[float, PlainValidator(parse_duration)]


_SECTION = ConfigDict(extra="forbid", frozen=True)

# Which modes read which optional ladder field; setting one the mode ignores is an error.
_MODE_FIELDS: dict[str, tuple[str, ...]] = {
    "early_stopping_rate": ("asha", "asha-stopping", "sync-halving"),
    "sync_trials": ("sync-halving",),
    "iterations": ("sync-hyperband",),
    "hyperband_counts": ("sync-hyperband",),
}


class LadderSection(BaseModel):
    """``[ladder]``: the budgets and the mode."""

    model_config = _SECTION

    unit: Annotated[str, _text("a non-empty label such as \"epochs\"")] = "budget"
    min: PositiveNumber
    max: PositiveNumber
    eta: Annotated[int, _int_at_least(2)] = 3
    mode: Annotated[str, _one_of(MODES)] = "asha"
    early_stopping_rate: Annotated[int, _int_at_least(0)] | None = None
    hyperband_counts: Annotated[str, _one_of(HYPERBAND_COUNTS)] | None = None
    sync_trials: Annotated[int, _int_at_least(1)] | None = None
    iterations: Annotated[int, _int_at_least(1)] | None = None

    @model_validator(mode="after")
    def _check(self) -> LadderSection:
        if self.max < self.min:
            raise SpecError(
                f"must be >= ladder.min = {_show(self.min)} (got {_show(self.max)})", field="max"
            )
        for name, modes in _MODE_FIELDS.items():
            if getattr(self, name) is not None and self.mode not in modes:
                listed = ", ".join(f'"{m}"' for m in modes)
                raise SpecError(
                    f"is only used when mode is one of {listed} (mode is \"{self.mode}\"); "
                    "remove it or change the mode",
                    field=name,
                )
        return self


class SamplerSection(BaseModel):
    """``[sampler]``: ``kind`` and that sampler's options (checked by ``make_sampler``)."""

    model_config = ConfigDict(extra="allow", frozen=True)

    kind: Annotated[str, _one_of(tuple(SAMPLERS))] = "random"

    @property
    def options(self) -> dict[str, Any]:
        """The sampler's options: every key of the table but ``kind``."""
        return dict(self.model_extra or {})


class LimitsSection(BaseModel):
    """``[limits]``: when the search stops, and how often a failing trial is retried."""

    model_config = _SECTION

    trials: Annotated[int, _int_at_least(1)] | None = None
    cpu_hours: PositiveNumber | None = None
    deadline: Duration | None = None
    """Wall-clock limit in seconds (the file may say ``"30m"``)."""
    max_crashes: Annotated[int, _int_at_least(0)] = 2
    """Retries of a trial whose code raised or whose worker process died (exit, signal, OOM kill)."""
    max_losses: Annotated[int, _int_at_least(0)] = 3
    """Requeues of a trial whose machine died or whose segment fell silent; one more loss fails it."""
    max_consecutive_failures: Annotated[int, _int_at_least(0)] = 10
    """This many trials in a row failing at their first rung stop the search as failing (0: never)."""
    hang_timeout: Duration | None = None
    """Seconds a segment may stay silent before it is cancelled."""


MAX_QUEUED_PER_SLOT = 16.0


def _queued_per_slot(value: Any) -> float:
    if not _is_number(value) or not math.isfinite(value) or not 0 <= value <= MAX_QUEUED_PER_SLOT:
        raise SpecError(f"must be a number from 0 to {MAX_QUEUED_PER_SLOT:g}: segments kept waiting in Ray's queue "
                        f"per CPU slot, 0 for none (got {_show(value)})")
    return float(value)


class ResourcesSection(BaseModel):
    """``[resources]``: what one trial needs, and how many segments wait for a CPU."""

    model_config = _SECTION

    cpus: CpuCount = 1
    memory_mb: Annotated[int, _int_at_least(0)] = 0
    queued_per_slot: Annotated[float, PlainValidator(_queued_per_slot)] = 2.0
    """Segments submitted beyond the free CPU slots, per slot (``rungway run``): Ray starts one
    the moment a slot frees, instead of after a round trip to the head. The lab's head uses its
    own ``head.queued_per_slot`` instead."""


def _check_space_table(value: Any) -> dict[str, Any]:
    if not isinstance(value, Mapping):
        raise SpecError(
            f"must be a table of parameters, e.g. [space.learning_rate] (got {_show(value)})"
        )
    return dict(value)


class _Problems(ValueError):
    """Several located SpecErrors raised at once from the spec's model validator."""

    def __init__(self, errors: list[tuple[SpecError, Mapping[str, str] | None]]) -> None:
        super().__init__("; ".join(str(e) for e, _ in errors))
        self.errors = errors


def _sync_halving_trials(plan: SearchPlan, sync_trials: int | None, trials: int | None) -> SearchPlan:
    """``plan`` with the number of trials its one bracket starts: ``ladder.sync_trials``, else
    ``limits.trials``, else eta**top. Every trial starts at the bottom rung, so the two fields
    are the same number; they must agree, and the number must bring a trial to the top rung
    (rung k keeps floor(n / eta**k))."""
    if sync_trials is not None and trials is not None and sync_trials != trials:
        raise SpecError(
            f"must equal ladder.sync_trials = {sync_trials} in sync-halving, where every trial starts at "
            f"the bottom rung, so both count the trials the search starts; give one of them (got {trials})",
            field="limits.trials",
        )
    budgets = plan.brackets()[0].ladder.budgets
    top, eta = len(budgets) - 1, plan.eta
    if sync_trials is not None:
        n, field = sync_trials, "ladder.sync_trials"
    elif trials is not None:
        n, field = trials, "limits.trials"
    else:
        return plan  # eta**top, SearchPlan's default
    if n < eta**top:
        kept = ", ".join(str(n // eta**k) for k in range(top + 1))
        raise SpecError(
            f"must be at least eta**{top} = {eta**top} for sync-halving on this ladder: keeping floor(n / eta) "
            f"at each rung, {n} trials leave {kept} at budgets {', '.join(f'{b:g}' for b in budgets)} and none "
            f"reaches the top; or shorten the ladder (a larger ladder.min or ladder.early_stopping_rate, a "
            f"smaller ladder.max) (got {n})",
            field=field,
        )
    return replace(plan, sync_trials=n)


def _sync_hyperband_trials(plan: SearchPlan, iterations: int | None, trials: int) -> SearchPlan:
    """``plan`` with ``limits.trials`` turned into iterations: each iteration starts the
    brackets' n_s (Li et al., JMLR 2018, Algorithm 1 or Table 1), so the trials must be a whole
    number of iterations, and ``ladder.iterations`` times that number when it is given."""
    counts = [b.n for b in hyperband_brackets(plan.min_budget, plan.max_budget, plan.eta, plan.hyperband_counts)]
    each = sum(counts)
    why = (f"sync-hyperband starts {each} trials per iteration on this ladder "
           f"({' + '.join(map(str, counts))}, ladder.hyperband_counts = \"{plan.hyperband_counts}\")")
    if iterations is not None:
        if trials != iterations * each:
            raise SpecError(
                f"must equal ladder.iterations x {each} = {iterations * each}: {why}; set it to "
                f"{iterations * each}, or leave out limits.trials or ladder.iterations (got {trials})",
                field="limits.trials",
            )
        return plan
    if trials % each:
        near = sorted({m for m in (trials // each * each, (trials // each + 1) * each) if m >= each})
        raise SpecError(
            f"must be a whole number of iterations: {why}; use {' or '.join(map(str, near))} (which sets "
            f"ladder.iterations), or leave it out (got {trials})",
            field="limits.trials",
        )
    return replace(plan, iterations=trials // each)


class SearchSpec(BaseModel):
    """A validated search specification.

    Validation covers the whole file: besides each field's own type and range, the ladder
    geometry (through :class:`SearchPlan`), the search space (through :class:`SearchSpace`)
    and the sampler's options (by building the sampler once) are checked, so a spec that
    loads can be run. Build one with :func:`load_spec` or :func:`parse_spec`.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: Name
    objective: Annotated[str, PlainValidator(_check_objective)]
    metric: Annotated[str, PlainValidator(_check_metric)]
    better: Annotated[str, _one_of(BETTER_CHOICES)]
    seed: Annotated[int, _int_at_least(0)] = 0
    ladder: LadderSection
    sampler: SamplerSection = SamplerSection()
    limits: LimitsSection = LimitsSection()
    resources: ResourcesSection = ResourcesSection()
    space_table: Annotated[dict[str, Any], PlainValidator(_check_space_table)] = Field(
        alias="space"
    )
    """The ``[space]`` table as written; :meth:`space` builds the checked space from it."""

    _source: str = PrivateAttr(default="<spec>")
    _text: str | None = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _check_whole(self) -> SearchSpec:
        errors: list[tuple[SpecError, Mapping[str, str] | None]] = []
        try:
            self.plan()
        except SpecError as exc:
            errors.append((exc, _PLAN_FIELDS))
        space = None
        try:
            space = self.space()
        except SpecError as exc:
            errors.append((exc, None))
        if space is not None and not errors:
            try:
                self._sampler_from(space, np.random.default_rng(self.seed))
            except SpecError as exc:
                errors.append((exc, None))
        if errors:
            raise _Problems(errors)
        return self

    # -- what the rest of rungway uses -----------------------------------------------------

    @property
    def source(self) -> str:
        """Where the spec came from (a file path, or ``"<spec>"``)."""
        return self._source

    @property
    def text(self) -> str | None:
        """The spec file's text exactly as read (None for a spec built from a mapping)."""
        return self._text

    @property
    def maximize(self) -> bool:
        return self.better == "higher"

    @property
    def deadline_seconds(self) -> float | None:
        """``limits.deadline`` in seconds, or None for no deadline."""
        return self.limits.deadline

    @property
    def hang_timeout_seconds(self) -> float | None:
        """``limits.hang_timeout`` in seconds, or None for no hang detection."""
        return self.limits.hang_timeout

    def plan(self) -> SearchPlan:
        """The ladder mode, geometry and limits as a :class:`SearchPlan`.

        In the synchronous modes the schedule fixes how many trials start, so ``limits.trials``
        must say the same number (docs/scheduling.md): in ``sync-halving`` it is the number the
        bottom rung starts (``ladder.sync_trials`` by another name), in ``sync-hyperband`` a
        whole number of iterations. A value the schedule cannot honour is a SpecError."""
        ladder, limits = self.ladder, self.limits
        plan = SearchPlan(
            mode=ladder.mode,  # type: ignore[arg-type]
            min_budget=ladder.min,
            max_budget=ladder.max,
            eta=ladder.eta,
            early_stopping_rate=ladder.early_stopping_rate or 0,
            maximize=self.maximize,
            max_trials=limits.trials,
            max_crashes=limits.max_crashes,
            max_losses=limits.max_losses,
            max_consecutive_failures=limits.max_consecutive_failures,
            sync_trials=ladder.sync_trials,
            iterations=ladder.iterations if ladder.iterations is not None else 1,
            hyperband_counts=ladder.hyperband_counts or "formula",  # type: ignore[arg-type]
        )
        if plan.mode == "sync-halving":
            return _sync_halving_trials(plan, ladder.sync_trials, limits.trials)
        if plan.mode == "sync-hyperband" and limits.trials is not None:
            return _sync_hyperband_trials(plan, ladder.iterations, limits.trials)
        return plan

    def space(self) -> SearchSpace:
        """The checked search space of the ``[space]`` table."""
        return SearchSpace.from_mapping(self.space_table, prefix="space")

    def sampler_options(self) -> dict[str, Any]:
        """The sampler's options with rungway's defaults filled in: for ``evolution``, ``rung``
        defaults to the level of the first bracket's bottom rung (where every trial reports)."""
        options = self.sampler.options
        if self.sampler.kind == "evolution" and "rung" not in options:
            options["rung"] = self.plan().brackets()[0].level_offset
        return options

    def make_sampler(self, rng: np.random.Generator) -> Sampler:
        """A fresh sampler of ``[sampler]`` over :meth:`space`, drawing from ``rng``."""
        try:
            return self._sampler_from(self.space(), rng)
        except SpecError as exc:
            raise self.error_from(exc) from None

    def _sampler_from(self, space: SearchSpace, rng: np.random.Generator) -> Sampler:
        return make_sampler(self.sampler.kind, space, rng, self.sampler_options())

    # -- errors ------------------------------------------------------------------------------

    def error_from(self, exc: SpecError) -> SpecFileError:
        """``exc`` located in this spec's file (its field's line looked up in :attr:`text`)."""
        locate = _Locator(self._text)
        if isinstance(exc, SpecFileError):
            return exc
        problems = [Problem(f, m, locate.line(f)) for f, m in _problems_of(exc, _PLAN_FIELDS)]
        return SpecFileError(problems, source=self._source)


# --------------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------------

_SECTIONS: dict[tuple[str, ...], type[BaseModel]] = {
    (): SearchSpec,
    ("ladder",): LadderSection,
    ("limits",): LimitsSection,
    ("resources",): ResourcesSection,
}

_MISSING_HINTS = {
    ("name",): 'give the search a name, e.g. name = "digits-mlp"',
    ("objective",): 'name the function to tune, e.g. objective = "mypackage.train:run"',
    ("metric",): 'name the metric the objective returns, e.g. metric = "accuracy"',
    ("better",): (
        'say whether higher or lower values of the metric are better: better = "higher" or "lower"'
    ),
    ("ladder",): "add a [ladder] table with at least min and max (the smallest and largest budget)",
    ("ladder", "min"): "give the smallest budget a trial runs for, e.g. min = 1",
    ("ladder", "max"): "give the largest budget a trial runs for, e.g. max = 27",
    ("space",): "add a [space] table with at least one parameter, e.g. [space.learning_rate]",
}

_TYPE_WORDS = {
    "dict_type": "must be a table",
    "model_type": "must be a table",
    "model_attributes_type": "must be a table",
    "string_type": "must be a string",
    "int_type": "must be an integer",
    "float_type": "must be a number",
    "bool_type": "must be true or false",
}


def _field_names(model: type[BaseModel]) -> list[str]:
    return [info.alias or name for name, info in model.model_fields.items()]


def _pydantic_problems(exc: ValidationError) -> list[tuple[tuple[str, ...], str]]:
    out: list[tuple[tuple[str, ...], str]] = []
    for err in exc.errors(include_url=False):
        loc = tuple(str(p) if not isinstance(p, int) else f"[{p}]" for p in err["loc"])
        kind = err["type"]
        error = (err.get("ctx") or {}).get("error")
        if isinstance(error, _Problems):
            for spec_error, rename in error.errors:
                for f, m in _problems_of(spec_error, rename):
                    out.append((loc + (_field_parts(f) if f else ()), m))
        elif isinstance(error, SpecError):
            for f, m in _problems_of(error):
                out.append((loc + (_field_parts(f) if f else ()), m))
        elif kind == "missing":
            hint = _MISSING_HINTS.get(loc)
            out.append((loc, "required field is missing" + (f"; {hint}" if hint else "")))
        elif kind == "extra_forbidden" and len(loc) == 1 and renamed(loc[0]) is not None:
            out.append((loc, f"this key was renamed in rungway 0.2: write {renamed(loc[0])}"))
        elif kind == "extra_forbidden":
            model = _SECTIONS.get(loc[:-1])
            valid = _field_names(model) if model else []
            where = f"in [{'.'.join(loc[:-1])}]" if loc[:-1] else "at the top level"
            listed = f"; the keys {where} are: {', '.join(valid)}" if valid else ""
            out.append((loc, f"unknown key{_suggest(loc[-1], valid)}{listed}"))
        elif kind in _TYPE_WORDS:
            out.append((loc, f"{_TYPE_WORDS[kind]} (got {_show(err.get('input'))})"))
        else:
            msg = str(err.get("msg", "invalid value"))
            for lead, repl in (("Input should be ", "must be "), ("Value error, ", "")):
                if msg.startswith(lead):
                    msg = repl + msg[len(lead):]
            out.append((loc, f"{msg} (got {_show(err.get('input'))})"))
    return out


def _dotted(parts: tuple[str, ...]) -> str:
    text = ""
    for part in parts:
        text += part if part.startswith("[") or not text else f".{part}"
    return text


def spec_from_mapping(
    data: Mapping[str, Any], *, source: str = "<spec>", text: str | None = None
) -> SearchSpec:
    """A :class:`SearchSpec` from an already-parsed table; ``text`` (the TOML it came from,
    if any) lets errors give line numbers. Raises :class:`SpecFileError`."""
    if not isinstance(data, Mapping):
        raise SpecFileError([Problem(None, f"must be a table (got {_show(data)})")], source=source)
    locate = _Locator(text)
    try:
        spec = SearchSpec.model_validate(dict(data))
    except ValidationError as exc:
        problems = [
            Problem(_dotted(parts) or None, message, locate.line(parts))
            for parts, message in _pydantic_problems(exc)
        ]
        raise SpecFileError(problems, source=source) from None
    spec._source = source
    spec._text = text
    return spec


_TOML_AT_RE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")


def parse_spec(text: str, source: str = "<spec>") -> SearchSpec:
    """A :class:`SearchSpec` from TOML ``text``; ``source`` names it in error messages."""
    text = text.removeprefix("\ufeff")  # a byte-order mark some editors write: harmless
    try:
        data = tomllib.loads(text)
    except RecursionError:
        raise SpecFileError([Problem(None, "values are nested too deeply to read; a spec needs at most a few levels")],
                            source=source) from None
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        line = getattr(exc, "lineno", None)
        m = _TOML_AT_RE.search(message)
        if m:
            line = line or int(m.group(1))
            message = f"{message[: m.start()]} at column {m.group(2)}"
        elif message.endswith("(at end of document)"):
            message = message[: -len("(at end of document)")].rstrip() + " at the end of the file"
            line = line or max(1, len(text.splitlines()))
        if text.lstrip().startswith("{"):
            message += "; this looks like JSON, but a spec file is TOML (docs/spec-files.md shows one)"
        problem = Problem(None, f"not valid TOML: {message}", line)
        raise SpecFileError([problem], source=source) from None
    try:
        return spec_from_mapping(data, source=source, text=text)
    except RecursionError:
        raise SpecFileError([Problem(None, "values are nested too deeply to check; a spec needs at most a few levels")],
                            source=source) from None


def decode_spec(raw: bytes, source: str) -> str:
    """A spec file's bytes as text; anything but UTF-8 is a located :class:`SpecFileError`."""
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise SpecFileError(
            [Problem(None, f"not UTF-8 text (byte {exc.start}); save the file as UTF-8, as TOML requires", line)],
            source=source,
        ) from None


def load_spec(path: str | PathLike[str]) -> SearchSpec:
    """Read and check the spec file at ``path``. Raises :class:`SpecFileError`."""
    source = str(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise SpecFileError(
            [Problem(None, f"cannot read the spec file: {exc.strerror or exc}")], source=source
        ) from None
    return parse_spec(decode_spec(raw, source), source)


# --------------------------------------------------------------------------------------------
# Checks that need the objective
# --------------------------------------------------------------------------------------------

_PROMOTING_MODES = ("asha", "sync-halving", "hyperband", "sync-hyperband")


def check_spec(spec: SearchSpec) -> list[str]:
    """Import the spec's objective and check that it fits the spec; return notes (warnings
    that do not stop the search, each ``field: text``).

    Raises :class:`SpecFileError` when the objective cannot be loaded (malformed path, module
    that does not import, missing attribute, signature that fits neither form) or when its
    form cannot work with the mode: ``asha-stopping`` needs the resumable form.
    """
    try:
        objective = load_objective(spec.objective)
    except SpecError as exc:
        raise spec.error_from(exc) from None
    mode = spec.ladder.mode
    notes: list[str] = []
    if mode == "asha-stopping" and objective.form != "resumable":
        raise spec.error_from(
            SpecError(
                "the asha-stopping mode needs a resumable objective (one argument, ctx); "
                f"{spec.objective!r} takes (config, budget). Rewrite it to take ctx and report "
                'with ctx.report, or use mode = "asha", which runs plain objectives',
                field="objective",
            )
        )
    if objective.form == "plain" and mode in _PROMOTING_MODES:
        notes.append(
            f"objective: {spec.objective!r} takes (config, budget), so every promoted trial "
            "trains again from scratch to its next budget; a resumable objective (one "
            "argument, ctx) continues from its checkpoint instead"
        )
    if objective.form == "plain" and spec.limits.hang_timeout is not None:
        notes.append(
            f"limits.hang_timeout: a plain objective reports only when it returns, so its {spec.limits.hang_timeout:g} s "
            "bound each whole segment; make it longer than one training at the largest budget, or use the "
            "resumable form, whose every ctx.report counts as progress"
        )
    return notes
