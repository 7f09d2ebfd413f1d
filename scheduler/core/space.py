"""Search spaces: which configurations a search may try.

This module owns the search-space language -- the pydantic models behind the ``[space]``
table of a spec file and the JSON Schema published from them -- the checks that make a broken
space fail early with a message naming the parameter and field at fault, and the mapping from
points of the unit cube ``[0, 1)^d`` to configurations that every sampler builds on.

It never draws randomness on its own (callers pass a ``numpy.random.Generator``), never
decides which configuration is tried next (samplers do), and never reads a file other than the
one it is asked to load.

Run ``python -m rungway.scheduler.core.space --schema`` to print the published JSON Schema
(``docs/search-space.schema.json`` is that output).
"""

from __future__ import annotations

import difflib
import json
import math
import re
import tomllib
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from types import MappingProxyType
from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    FiniteFloat,
    PlainValidator,
    RootModel,
    StrictInt,
    Tag,
    ValidationError,
    WithJsonSchema,
    model_validator,
)
from pydantic_core import PydanticCustomError

from .errors import SpecError

__all__ = [
    "KINDS",
    "NAME_PATTERN",
    "CategoryParameter",
    "ConstantParameter",
    "IntegerParameter",
    "Parameter",
    "RealParameter",
    "SearchSpace",
    "SpaceModel",
    "spec_error_from_validation",
    "value_key",
]

KINDS: tuple[str, ...] = ("real", "integer", "category", "constant")
"""The parameter kinds, in the order the documentation lists them."""

NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_\-]*$"
"""Parameter names: a letter or underscore, then letters, digits, ``_`` or ``-`` (no dots, so
that a dotted field path such as ``space.learning_rate.lower`` is never ambiguous)."""

_NAME_RE = re.compile(NAME_PATTERN)
Config = dict[str, Any]
"""One configuration: parameter name -> plain Python scalar (same as ``samplers.base.Config``)."""

_JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"
_BRANCH_TAG_RE = re.compile(r"^[a-z_]+=[A-Za-z0-9_\-]*$")


# --------------------------------------------------------------------------------------------
# Error conversion
# --------------------------------------------------------------------------------------------


def _fail(message: str, field: str | None = None) -> PydanticCustomError:
    """A validation error with our own message; ``field`` is a dotted path relative to ``loc``."""
    ctx: dict[str, Any] = {"rungway_message": message}
    if field:
        ctx["rungway_field"] = field
    return PydanticCustomError("rungway", "{rungway_message}", ctx)


def _show(value: Any) -> str:
    """A value the way a user wrote it in TOML/JSON: strings double-quoted, true/false, null."""
    if isinstance(value, (bool, str)) or value is None:
        return json.dumps(value)
    if isinstance(value, (int, float)):
        return repr(value)
    try:
        text = json.dumps(value, default=repr)
    except (TypeError, ValueError):
        text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _suggest(word: str, choices: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f'did you mean "{close[0]}"? ' if close else ""


def _kind_message(value: Any) -> tuple[str | None, str]:
    valid = ", ".join(f'"{k}"' for k in KINDS)
    if not isinstance(value, Mapping):
        return None, f'must be a table with a "kind" field (got {_show(value)})'
    if "kind" not in value:
        return "kind", f"required field is missing; must be one of {valid}"
    got = value["kind"]
    hint = _suggest(got, KINDS) if isinstance(got, str) else ""
    return "kind", f"{hint}must be one of {valid} (got {_show(got)})"


def _describe_error(err: Mapping[str, Any]) -> tuple[str | None, str]:
    """(extra dotted field relative to ``loc`` or None, message) for one pydantic error."""
    kind = err["type"]
    ctx = err.get("ctx") or {}
    if kind == "rungway":
        return ctx.get("rungway_field"), str(ctx["rungway_message"])
    if kind == "rungway_kind":
        return _kind_message(err.get("input"))
    if kind == "missing":
        return None, "required field is missing"
    msg = str(err.get("msg", "invalid value"))
    if kind == "literal_error":
        msg = msg.replace("'", '"')
    for lead, repl in (("Input should be ", "must be "), ("Value error, ", ""), ("Assertion failed, ", "")):
        if msg.startswith(lead):
            msg = repl + msg[len(lead):]
            break
    if msg[:1].isupper() and not msg[1:2].isupper():
        msg = msg[0].lower() + msg[1:]
    value = err.get("input")
    if isinstance(value, (str, int, float, bool)) or value is None:
        msg = f"{msg} (got {_show(value)})"
    return None, msg


def _dotted(prefix: str, loc: Sequence[Any], extra: str | None) -> str:
    parts: list[str] = [prefix] if prefix else []
    for piece in loc:
        if isinstance(piece, int):
            if parts:
                parts[-1] = f"{parts[-1]}[{piece}]"
            else:
                parts.append(f"[{piece}]")
        elif isinstance(piece, str) and _BRANCH_TAG_RE.match(piece):
            continue  # a discriminated-union branch tag such as "kind=real", not a field
        else:
            parts.append(str(piece))
    if extra:
        parts.extend(extra.split("."))
    return ".".join(parts)


def spec_error_from_validation(exc: ValidationError, prefix: str = "") -> SpecError:
    """Turn a pydantic ``ValidationError`` into a ``SpecError`` with a dotted field path.

    ``prefix`` is prepended to every path (``"space"`` gives ``space.learning_rate.lower``).
    Location parts of the form ``field=value`` are discriminated-union branch tags (rungway's
    convention, e.g. ``kind=real``) and are dropped; list indices render as ``options[2]``.
    The first problem becomes the error's ``field``; further problems follow on their own
    lines of the message, each as ``field: message``.
    """
    problems: list[tuple[str, str]] = []
    for err in exc.errors(include_url=False):
        extra, message = _describe_error(err)
        problems.append((_dotted(prefix, err["loc"], extra), message))
    if not problems:  # pragma: no cover - pydantic never raises an empty ValidationError
        return SpecError("invalid input", field=prefix or None)
    field, message = problems[0]
    shown = problems[1:10]
    lines = [message, *(f"{f}: {m}" if f else m for f, m in shown)]
    if len(problems) > 10:
        lines.append(f"... and {len(problems) - 10} more problems")
    return SpecError("\n".join(lines), field=field or None)


# --------------------------------------------------------------------------------------------
# Values
# --------------------------------------------------------------------------------------------

Scalar = Union[bool, int, float, str]
"""A value a category option, a constant or a condition may take."""


def value_key(value: Any) -> tuple[str, Any]:
    """Equality key for scalar values: 1 and 1.0 are the same value, true and 1 are not."""
    if isinstance(value, (bool, np.bool_)):
        return ("b", bool(value))
    if isinstance(value, (int, float, np.integer, np.floating)):
        return ("n", value.item() if isinstance(value, np.generic) else value)
    return ("s", value)


_key = value_key


def _check_scalar(value: Any) -> Scalar:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, (bool, str, int)):
        return value
    if isinstance(value, float):
        if not math.isfinite(value):
            raise _fail(f"must be a finite number (got {_show(value)})")
        return value
    raise _fail(f"must be a string, integer, number or boolean (got {_show(value)})")


ScalarValue = Annotated[
    Any,
    PlainValidator(_check_scalar),
    WithJsonSchema({"type": ["string", "number", "boolean"]}),
]


def _check_only_if(value: dict[str, list[Any]] | None) -> dict[str, list[Any]] | None:
    if value is None:
        return None
    if not value:
        raise _fail("must name at least one parent parameter (or leave only_if out)")
    for parent, listed in value.items():
        if not listed:
            raise _fail("must list at least one value of the parent", field=parent)
        seen: set[tuple[str, Any]] = set()
        for item in listed:
            if _key(item) in seen:
                raise _fail(f"lists {_show(item)} twice", field=parent)
            seen.add(_key(item))
    return value


_ONLY_IF_DESCRIPTION = (
    "Makes the parameter conditional: it is present only when every named parent parameter "
    "is present and takes one of the listed values."
)

OnlyIf = Annotated[
    Union[dict[str, list[ScalarValue]], None],
    AfterValidator(_check_only_if),
    WithJsonSchema(
        {
            "type": "object",
            "description": _ONLY_IF_DESCRIPTION,
            "minProperties": 1,
            "propertyNames": {"pattern": NAME_PATTERN},
            "additionalProperties": {
                "type": "array",
                "minItems": 1,
                "items": {"type": ["string", "number", "boolean"]},
            },
        }
    ),
    Field(default=None, description=_ONLY_IF_DESCRIPTION),
]


# --------------------------------------------------------------------------------------------
# Parameter models
# --------------------------------------------------------------------------------------------


class _Parameter(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    @model_validator(mode="before")
    @classmethod
    def _known_fields(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            valid = list(cls.model_fields)
            for field in data:
                if field not in cls.model_fields:
                    hint = _suggest(str(field), valid)
                    raise _fail(
                        f"unknown field; {hint}valid fields for kind = "
                        f"\"{cls.model_fields['kind'].annotation.__args__[0]}\" are: {', '.join(valid)}",
                        field=str(field),
                    )
        return data


def _check_bounds(lower: float, upper: float, scale: str, log_min: str, log_ok: bool) -> None:
    if not lower < upper:
        raise _fail(f"must be < upper ({_show(upper)}) (got {_show(lower)})", field="lower")
    if scale == "log" and not log_ok:
        raise _fail(f'must be {log_min} when scale = "log" (got {_show(lower)})', field="lower")


class RealParameter(_Parameter):
    """A real number in [lower, upper], sampled uniformly on a linear or log scale."""

    kind: Literal["real"] = Field(description='Always "real".')
    lower: FiniteFloat = Field(description="Smallest value (inclusive).")
    upper: FiniteFloat = Field(description="Largest value (inclusive); must exceed lower.")
    scale: Literal["linear", "log"] = Field(
        default="linear",
        description='"linear": uniform in value; "log": uniform in log(value), needs lower > 0.',
    )
    only_if: OnlyIf

    @model_validator(mode="after")
    def _check(self) -> RealParameter:
        _check_bounds(self.lower, self.upper, self.scale, "> 0", self.lower > 0)
        return self


class IntegerParameter(_Parameter):
    """An integer in [lower, upper] (both inclusive), on a linear or log scale."""

    kind: Literal["integer"] = Field(description='Always "integer".')
    lower: StrictInt = Field(description="Smallest value (inclusive).")
    upper: StrictInt = Field(description="Largest value (inclusive); must exceed lower.")
    scale: Literal["linear", "log"] = Field(
        default="linear",
        description='"linear": every integer equally likely; "log": log-uniform, needs lower >= 1.',
    )
    only_if: OnlyIf

    @model_validator(mode="after")
    def _check(self) -> IntegerParameter:
        _check_bounds(self.lower, self.upper, self.scale, ">= 1", self.lower >= 1)
        return self


class CategoryParameter(_Parameter):
    """One of a list of options, each equally likely."""

    kind: Literal["category"] = Field(description='Always "category".')
    options: list[ScalarValue] = Field(
        description="The possible values (strings, numbers or booleans), no duplicates.",
        json_schema_extra={"minItems": 1, "uniqueItems": True},
    )
    only_if: OnlyIf

    @model_validator(mode="after")
    def _check(self) -> CategoryParameter:
        if not self.options:
            raise _fail("must list at least one option", field="options")
        seen: dict[tuple[str, Any], int] = {}
        for i, option in enumerate(self.options):
            k = _key(option)
            if k in seen:
                raise _fail(
                    f"option {_show(option)} appears twice (positions {seen[k]} and {i})",
                    field="options",
                )
            seen[k] = i
        return self


class ConstantParameter(_Parameter):
    """A fixed value, passed to every trial."""

    kind: Literal["constant"] = Field(description='Always "constant".')
    value: ScalarValue = Field(description="The value (a string, number or boolean).")
    only_if: OnlyIf


def _kind_tag(value: Any) -> str | None:
    kind = value.get("kind") if isinstance(value, Mapping) else getattr(value, "kind", None)
    return f"kind={kind}" if isinstance(kind, str) and kind in KINDS else None


Parameter = Annotated[
    Union[
        Annotated[RealParameter, Tag("kind=real")],
        Annotated[IntegerParameter, Tag("kind=integer")],
        Annotated[CategoryParameter, Tag("kind=category")],
        Annotated[ConstantParameter, Tag("kind=constant")],
    ],
    Discriminator(
        _kind_tag,
        custom_error_type="rungway_kind",
        custom_error_message="invalid parameter kind",
    ),
]
"""One parameter of a space; the ``kind`` field says which model applies."""

ParameterModel = Union[RealParameter, IntegerParameter, CategoryParameter, ConstantParameter]


def _possible(param: ParameterModel, value: Any) -> bool:
    """Whether ``value`` is a value ``param`` can take."""
    if isinstance(param, CategoryParameter):
        return _key(value) in {_key(o) for o in param.options}
    if isinstance(param, ConstantParameter):
        return _key(value) == _key(param.value)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    if isinstance(param, IntegerParameter) and not float(value).is_integer():
        return False
    return param.lower <= value <= param.upper


def _describe_values(param: ParameterModel) -> str:
    if isinstance(param, CategoryParameter):
        return "options: " + ", ".join(_show(o) for o in param.options)
    if isinstance(param, ConstantParameter):
        return f"constant {_show(param.value)}"
    what = "integers" if isinstance(param, IntegerParameter) else "numbers"
    return f"{what} in [{_show(param.lower)}, {_show(param.upper)}]"


def _topological(params: Mapping[str, ParameterModel]) -> list[str]:
    """Names parents-first; among ready names the earliest declared goes first.

    Raises the pydantic custom error for a cycle (caught by the model validator's caller).
    """
    deps = {n: list(p.only_if or {}) for n, p in params.items()}
    order: list[str] = []
    done: set[str] = set()
    pending = list(params)
    while pending:
        for i, name in enumerate(pending):
            if all(d in done for d in deps[name]):
                order.append(name)
                done.add(name)
                del pending[i]
                break
        else:
            # Every pending name waits on another pending one: walk until a name repeats.
            path = [pending[0]]
            while True:
                nxt = next(d for d in deps[path[-1]] if d not in done)
                if nxt in path:
                    cycle = path[path.index(nxt):] + [nxt]
                    raise _fail(
                        "conditions form a cycle: " + " -> ".join(cycle),
                        field=f"{cycle[0]}.only_if.{cycle[1]}",
                    )
                path.append(nxt)
    return order


class SpaceModel(RootModel[dict[str, Parameter]]):
    """A search space: a table mapping parameter names to parameters."""

    model_config = ConfigDict(
        strict=True,
        title="rungway search space",
        json_schema_extra={
            "description": (
                "A rungway search space: a table mapping parameter names to parameters. In a "
                "spec file it is the [space] table. See docs/search-spaces.md."
            ),
            "minProperties": 1,
            "propertyNames": {"pattern": NAME_PATTERN},
        },
    )

    @model_validator(mode="before")
    @classmethod
    def _check_names(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            if not data:
                raise _fail("must define at least one parameter")
            for name in data:
                if not isinstance(name, str) or not _NAME_RE.match(name):
                    raise _fail(
                        f"invalid parameter name {_show(name)}: use a letter or underscore, "
                        "then letters, digits, _ or -",
                    )
        return data

    @model_validator(mode="after")
    def _check_conditions(self) -> SpaceModel:
        params = self.root
        for name, param in params.items():
            for parent, listed in (param.only_if or {}).items():
                where = f"{name}.only_if.{parent}"
                if parent == name:
                    raise _fail("a parameter cannot depend on itself", field=where)
                if parent not in params:
                    others = [n for n in params if n != name]
                    known = (
                        f"parameters are: {', '.join(others)}"
                        if others
                        else "the space has no other parameter"
                    )
                    raise _fail(
                        f'unknown parent parameter "{parent}"; {_suggest(parent, others)}{known}',
                        field=where,
                    )
                for value in listed:
                    if not _possible(params[parent], value):
                        raise _fail(
                            f'value {_show(value)} is not a possible value of "{parent}" '
                            f"({_describe_values(params[parent])})",
                            field=where,
                        )
        _topological(params)
        return self


# --------------------------------------------------------------------------------------------
# The space
# --------------------------------------------------------------------------------------------

_Converter = Callable[[float], Any]


def _converter(param: ParameterModel) -> _Converter:
    """u in [0, 1) -> value (for categories: the option index). Values stay in range for any u."""
    if isinstance(param, RealParameter):
        lo, hi = param.lower, param.upper
        if param.scale == "log":
            a, b = math.log(lo), math.log(hi) - math.log(lo)

            def real_log(u: float, a: float = a, b: float = b, lo: float = lo, hi: float = hi) -> float:
                v = math.exp(a + u * b)
                return hi if v > hi else (lo if v < lo else v)

            return real_log
        w = hi - lo

        def real_linear(u: float, lo: float = lo, w: float = w, hi: float = hi) -> float:
            v = lo + float(u) * w
            return hi if v > hi else (lo if v < lo else v)

        return real_linear
    if isinstance(param, IntegerParameter):
        ilo, ihi = param.lower, param.upper
        if param.scale == "log":
            a, b = math.log(ilo), math.log(ihi + 1) - math.log(ilo)

            def int_log(u: float, a: float = a, b: float = b, lo: int = ilo, hi: int = ihi) -> int:
                v = int(math.exp(a + u * b))
                return hi if v > hi else (lo if v < lo else v)

            return int_log
        n = ihi - ilo + 1

        def int_linear(u: float, lo: int = ilo, n: int = n, hi: int = ihi) -> int:
            v = lo + int(u * n) if u > 0 else lo
            return hi if v > hi else v

        return int_linear
    if isinstance(param, CategoryParameter):
        k = len(param.options)

        def category(u: float, k: int = k) -> int:
            i = int(u * k) if u > 0 else 0
            return k - 1 if i >= k else i

        return category
    raise TypeError(f"no unit axis for {type(param).__name__}")  # constants


class SearchSpace:
    """A checked search space and the map from the unit cube to its configurations.

    Build one with :meth:`from_mapping`, :meth:`from_toml` or :meth:`from_json` (or the
    constructor, which takes the same table). Every problem raises ``SpecError``.
    """

    __slots__ = ("_params", "_names", "_dims", "_plan", "_conds", "_option_keys", "_prefix")

    def __init__(self, parameters: Mapping[str, Any], *, prefix: str = "space") -> None:
        if not isinstance(parameters, Mapping):
            raise SpecError(
                f"must be a table of parameters (got {_show(parameters)})", field=prefix or None
            )
        try:
            model = SpaceModel.model_validate(dict(parameters))
        except ValidationError as exc:
            raise spec_error_from_validation(exc, prefix) from None
        self._prefix = prefix
        self._params: dict[str, ParameterModel] = dict(model.root)
        self._names: tuple[str, ...] = tuple(_topological(self._params))
        self._dims: tuple[str, ...] = tuple(
            n for n in self._names if not isinstance(self._params[n], ConstantParameter)
        )
        self._option_keys: dict[str, dict[tuple[str, Any], int]] = {
            n: {_key(o): i for i, o in enumerate(p.options)}
            for n, p in self._params.items()
            if isinstance(p, CategoryParameter)
        }
        # Per parameter: (parent, keys allowed, fast allowed set, test on category index?).
        self._conds: dict[str, tuple[tuple[str, frozenset[Any], frozenset[Any], bool], ...]] = {}
        for name, param in self._params.items():
            conds = []
            for parent, listed in (param.only_if or {}).items():
                keys = frozenset(_key(v) for v in listed)
                pp = self._params[parent]
                if isinstance(pp, CategoryParameter):
                    fast = frozenset(i for k, i in self._option_keys[parent].items() if k in keys)
                    conds.append((parent, keys, fast, True))
                else:
                    conds.append((parent, keys, frozenset(listed), False))
            self._conds[name] = tuple(conds)
        axis = {n: i for i, n in enumerate(self._dims)}
        plan = []
        for name in self._names:
            param = self._params[name]
            conds = tuple((p, fast, by_index) for p, _, fast, by_index in self._conds[name]) or None
            if isinstance(param, ConstantParameter):
                plan.append((name, -1, None, param.value, conds))
            elif isinstance(param, CategoryParameter):
                plan.append((name, axis[name], _converter(param), tuple(param.options), conds))
            else:
                plan.append((name, axis[name], _converter(param), None, conds))
        self._plan = tuple(plan)

    # -- construction ------------------------------------------------------------------------

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any], *, prefix: str = "space") -> SearchSpace:
        """A space from a table of parameters (name -> fields); errors name ``prefix.name.field``."""
        return cls(data, prefix=prefix)

    @classmethod
    def from_toml(cls, path: str | Path) -> SearchSpace:
        """A space from a TOML file: a ``[space.*]`` table (other top-level tables, which belong
        to the rest of a spec file, are ignored) or a bare table of parameters."""
        try:
            with open(path, "rb") as fh:
                data = tomllib.load(fh)
        except tomllib.TOMLDecodeError as exc:
            raise SpecError(f"{path}: not valid TOML: {exc}") from None
        except OSError as exc:
            raise SpecError(f"{path}: cannot read the file: {exc.strerror or exc}") from None
        return cls(_unwrap(data))

    @classmethod
    def from_json(cls, path: str | Path) -> SearchSpace:
        """A space from a JSON file: ``{"space": {...}}`` or a bare object of parameters."""
        try:
            with open(path, encoding="utf-8") as fh:
                data = json.load(fh)
        except json.JSONDecodeError as exc:
            raise SpecError(f"{path}: not valid JSON: {exc}") from None
        except OSError as exc:
            raise SpecError(f"{path}: cannot read the file: {exc.strerror or exc}") from None
        return cls(_unwrap(data))

    @classmethod
    def json_schema(cls) -> dict[str, Any]:
        """The JSON Schema of a space table, generated from :class:`SpaceModel`."""
        return {"$schema": _JSON_SCHEMA_DIALECT, **SpaceModel.model_json_schema()}

    def to_mapping(self) -> dict[str, dict[str, Any]]:
        """The table this space was read from (declaration order, defaults filled in)."""
        return {n: p.model_dump(exclude_none=True) for n, p in self._params.items()}

    # -- structure ---------------------------------------------------------------------------

    @property
    def names(self) -> tuple[str, ...]:
        """All parameter names, parents before the parameters conditioned on them."""
        return self._names

    @property
    def dimensions(self) -> tuple[str, ...]:
        """Names of the non-constant parameters, in ``names`` order: the unit-cube axes."""
        return self._dims

    @property
    def parameters(self) -> Mapping[str, ParameterModel]:
        """Name -> parameter model, in declaration order (read-only)."""
        return MappingProxyType(self._params)

    def __len__(self) -> int:
        return len(self._params)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, SearchSpace):
            return NotImplemented
        return self.to_mapping() == other.to_mapping()

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"SearchSpace({', '.join(self._names)})"

    # -- unit cube ---------------------------------------------------------------------------

    def from_unit(self, u: Sequence[float] | np.ndarray) -> Config:
        """The configuration at point ``u`` of ``[0, 1)^d`` (one coordinate per dimension).

        Coordinates of inactive conditional parameters are ignored and those parameters are
        left out. Values at or beyond the cube's faces are clipped into range.
        """
        if type(u) is not list:
            u = u.tolist() if isinstance(u, np.ndarray) else [float(x) for x in u]
        if len(u) != len(self._dims):
            raise ValueError(f"expected {len(self._dims)} coordinates, got {len(u)}")
        cfg: Config = {}
        index: dict[str, int] = {}
        for name, axis, convert, extra, conds in self._plan:
            if conds is not None:
                active = True
                for parent, allowed, by_index in conds:
                    v = index.get(parent) if by_index else cfg.get(parent)
                    if v is None or v not in allowed:
                        active = False
                        break
                if not active:
                    continue
            if axis < 0:
                cfg[name] = extra
            elif extra is not None:
                i = convert(u[axis])
                index[name] = i
                cfg[name] = extra[i]
            else:
                cfg[name] = convert(u[axis])
        return cfg

    def sample(self, rng: np.random.Generator) -> Config:
        """One configuration drawn uniformly (per each parameter's scale) with ``rng``."""
        return self.from_unit(rng.random(len(self._dims)).tolist())

    def value_at(self, name: str, u: float) -> Any:
        """The value parameter ``name`` takes at unit coordinate ``u`` (constants: the value)."""
        param = self._params[name]
        if isinstance(param, ConstantParameter):
            return param.value
        v = _converter(param)(float(u))
        return param.options[v] if isinstance(param, CategoryParameter) else v

    def unit_of(self, name: str, value: Any) -> float:
        """The unit coordinate of ``value`` for parameter ``name``: the inverse of
        :meth:`value_at` (the centre of the value's cell for integers and categories)."""
        param = self._params[name]
        if isinstance(param, ConstantParameter):
            raise ValueError(f'"{name}" is a constant; it has no unit axis')
        if isinstance(param, CategoryParameter):
            i = self._option_keys[name].get(_key(value))
            if i is None:
                raise ValueError(f'{_show(value)} is not an option of "{name}"')
            return (i + 0.5) / len(param.options)
        v = float(value)
        if isinstance(param, RealParameter):
            if param.scale == "log":
                lo, hi = math.log(param.lower), math.log(param.upper)
                t = (math.log(max(v, param.lower)) - lo) / (hi - lo)
            else:
                t = (v - param.lower) / (param.upper - param.lower)
        else:
            v = min(max(round(v), param.lower), param.upper)
            if param.scale == "log":
                lo, hi = math.log(param.lower), math.log(param.upper + 1)
                t = (0.5 * (math.log(v) + math.log(v + 1)) - lo) / (hi - lo)
            else:
                t = (v - param.lower + 0.5) / (param.upper - param.lower + 1)
        return min(max(t, 0.0), 1.0)

    # -- configurations ----------------------------------------------------------------------

    def is_active(self, name: str, config: Mapping[str, Any]) -> bool:
        """Whether ``name`` is present in a configuration whose other values are ``config``."""
        for parent, keys, _, _ in self._conds[name]:
            if parent not in config or _key(config[parent]) not in keys:
                return False
        return True

    def _value_ok(self, name: str, value: Any) -> str | None:
        """None if ``value`` is valid for ``name``, else what is wrong."""
        param = self._params[name]
        if isinstance(param, CategoryParameter):
            if _key(value) in self._option_keys[name]:
                return None
            return f"must be one of {', '.join(_show(o) for o in param.options)} (got {_show(value)})"
        if isinstance(param, ConstantParameter):
            if _key(value) == _key(param.value):
                return None
            return f"must be {_show(param.value)} (got {_show(value)})"
        if isinstance(param, IntegerParameter):
            if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
                return f"must be an integer (got {_show(value)})"
        elif isinstance(value, (bool, np.bool_)) or not isinstance(
            value, (int, float, np.integer, np.floating)
        ):
            return f"must be a number (got {_show(value)})"
        elif not math.isfinite(value):
            return f"must be a finite number (got {_show(value)})"
        if not param.lower <= value <= param.upper:
            return f"must be in [{_show(param.lower)}, {_show(param.upper)}] (got {_show(value)})"
        return None

    def validate_config(self, config: Mapping[str, Any], *, prefix: str = "config") -> None:
        """Raise ``SpecError`` unless ``config`` is exactly a configuration of this space:
        every active parameter present with a valid value, inactive ones absent, nothing else."""
        if not isinstance(config, Mapping):
            raise SpecError(f"must be a table (got {_show(config)})", field=prefix or None)
        where = (lambda n: f"{prefix}.{n}") if prefix else (lambda n: n)
        for key in config:
            if key not in self._params:
                raise SpecError(
                    f"not a parameter of this space; {_suggest(str(key), self._names)}"
                    f"parameters are: {', '.join(self._names)}",
                    field=where(key),
                )
        for name in self._names:
            active = self.is_active(name, config)
            if name not in config:
                if active:
                    raise SpecError("required here but missing", field=where(name))
                continue
            if not active:
                conds = ", ".join(
                    f"{p} in [{', '.join(_show(v) for v in vs)}]"
                    for p, vs in (self._params[name].only_if or {}).items()
                )
                raise SpecError(
                    f"must be absent: its condition ({conds}) does not hold", field=where(name)
                )
            problem = self._value_ok(name, config[name])
            if problem:
                raise SpecError(problem, field=where(name))

    def is_valid(self, config: Mapping[str, Any]) -> bool:
        """Whether :meth:`validate_config` would pass."""
        try:
            self.validate_config(config)
        except SpecError:
            return False
        return True

    def complete(self, config: Mapping[str, Any], rng: np.random.Generator) -> Config:
        """``config`` made valid: inactive and unknown parameters dropped, active parameters
        that are missing (or hold an invalid value) drawn afresh with ``rng``."""
        out: Config = {}
        for name in self._names:
            if not self.is_active(name, out):
                continue
            if name in config and self._value_ok(name, config[name]) is None:
                value = config[name]
                out[name] = value.item() if isinstance(value, np.generic) else value
            else:
                out[name] = self.value_at(name, rng.random())
        return out


def _unwrap(data: Any) -> Any:
    """The parameter table of a loaded file: its ``space`` table when that is not itself a
    parameter named "space" (a parameter has a ``kind`` field), else the whole file."""
    if isinstance(data, Mapping):
        inner = data.get("space")
        if isinstance(inner, Mapping) and "kind" not in inner:
            return inner
    return data


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m rungway.scheduler.core.space --schema``: print the JSON Schema."""
    import argparse

    parser = argparse.ArgumentParser(
        prog="python -m rungway.scheduler.core.space", description="Search-space tools."
    )
    parser.add_argument("--schema", action="store_true", help="print the JSON Schema of a space")
    args = parser.parse_args(argv)
    if not args.schema:
        parser.print_help()
        return 2
    print(json.dumps(SearchSpace.json_schema(), indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
