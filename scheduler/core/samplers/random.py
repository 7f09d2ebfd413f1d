"""Random search: independent uniform draws from the search space.

This module owns the ``"random"`` sampler and the small codec that writes a numpy bit
generator's state as JSON-safe data (used by every sampler here that keeps a generator). It
never touches global random state and never learns from results.
"""

from __future__ import annotations

from collections.abc import Mapping
from itertools import repeat
from typing import Any, ClassVar

import numpy as np

from ..errors import SpecError
from ..space import CategoryParameter, ConstantParameter, SearchSpace, _converter
from .base import Config, Sampler

__all__ = ["RandomSampler", "decode_rng_state", "encode_rng_state"]

_SAFE_INT = 2**53 - 1  # larger integers lose precision in many JSON readers


def encode_rng_state(state: Mapping[str, Any]) -> dict[str, Any]:
    """A ``bit_generator.state`` as JSON-safe data: big integers become ``"int:<decimal>"``
    strings and arrays become ``{"ndarray": [...], "dtype": "..."}``."""

    def enc(value: Any) -> Any:
        if isinstance(value, Mapping):
            return {str(k): enc(v) for k, v in value.items()}
        if isinstance(value, np.ndarray):
            return {"ndarray": value.tolist(), "dtype": str(value.dtype)}
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) > _SAFE_INT:
            return f"int:{value}"
        if isinstance(value, (list, tuple)):
            return [enc(v) for v in value]
        return value

    return enc(state)


def decode_rng_state(data: Mapping[str, Any]) -> dict[str, Any]:
    """The inverse of :func:`encode_rng_state`."""

    def dec(value: Any) -> Any:
        if isinstance(value, Mapping):
            if set(value) == {"ndarray", "dtype"}:
                return np.asarray(value["ndarray"], dtype=value["dtype"])
            return {k: dec(v) for k, v in value.items()}
        if isinstance(value, str) and value.startswith("int:"):
            return int(value[4:])
        if isinstance(value, list):
            return [dec(v) for v in value]
        return value

    return dec(data)


def set_rng_state(rng: np.random.Generator, data: Mapping[str, Any], field: str) -> None:
    """Put ``rng`` in the encoded state ``data``; a mismatch raises ``SpecError`` at ``field``."""
    state = decode_rng_state(data)
    mine = type(rng.bit_generator).__name__
    if state.get("bit_generator") != mine:
        raise SpecError(
            f"was written by a {state.get('bit_generator')!r} generator; this sampler's is {mine!r}",
            field=field,
        )
    rng.bit_generator.state = state


def check_kind(state: Mapping[str, Any], kind: str) -> None:
    if not isinstance(state, Mapping) or state.get("kind") != kind:
        got = state.get("kind") if isinstance(state, Mapping) else state
        raise SpecError(f'is not a "{kind}" sampler state (kind {got!r})', field="sampler.state")


class RandomSampler(Sampler):
    """Independent draws, each parameter uniform on its scale.

    Unit-cube rows are drawn ``block`` at a time for speed, and turned into configurations a
    block at a time too: one pass per parameter over the block's column, through the same
    per-parameter converters :meth:`SearchSpace.from_unit` applies row by row, so the values
    are exactly the ones ``from_unit`` gives for those rows. (A space with conditional
    parameters goes through ``from_unit`` row by row: whether a parameter is present depends
    on the row.) ``state()`` records the generator's state from just before the current block
    and the position in it, so a restored sampler regenerates the block and continues with
    exactly the same draws.
    """

    kind: ClassVar[str] = "random"

    def __init__(self, space: SearchSpace, rng: np.random.Generator, *, block: int = 256) -> None:
        if not isinstance(rng, np.random.Generator):
            raise TypeError("rng must be a numpy.random.Generator")
        if isinstance(block, bool) or not isinstance(block, int) or block < 1:
            raise SpecError(f"must be a positive integer (got {block!r})", field="sampler.block")
        self.space = space
        self._rng = rng
        self._block_size = block
        self._d = len(space.dimensions)
        self._columns = _column_plan(space)
        self._configs: list[Config] | None = None
        self._block_start: dict[str, Any] | None = None
        self._index = 0

    def _new_block(self) -> None:
        self._block_start = encode_rng_state(self._rng.bit_generator.state)
        units = self._rng.random((self._block_size, self._d))
        plan = self._columns
        if plan is None:
            from_unit = self.space.from_unit
            self._configs = [from_unit(row) for row in units.tolist()]
        else:
            self._configs = _build_configs(plan, units)
        self._index = 0

    def propose(self) -> Config:
        configs = self._configs
        if configs is None or self._index >= len(configs):
            self._new_block()
            configs = self._configs
            assert configs is not None
        config = configs[self._index]
        self._index += 1
        return config

    def state(self) -> dict[str, Any]:
        if self._configs is None or self._index >= len(self._configs):
            # No block in use: the next proposal draws a fresh block from the current state.
            return {
                "kind": self.kind,
                "rng": encode_rng_state(self._rng.bit_generator.state),
                "index": None,
            }
        return {"kind": self.kind, "rng": self._block_start, "index": self._index}

    def restore(self, state: Mapping[str, Any]) -> None:
        check_kind(state, self.kind)
        set_rng_state(self._rng, state["rng"], "sampler.state.rng")
        index = state["index"]
        if index is None:
            self._configs, self._block_start, self._index = None, None, 0
        else:
            self._new_block()
            self._index = int(index)


# (name, unit axis or -1 for a constant, converter, options of a category or the constant)
_Column = tuple[str, int, Any, Any]


def _column_plan(space: SearchSpace) -> tuple[_Column, ...] | None:
    """Per parameter, in the order ``from_unit`` fills a configuration: what to apply to its
    column of unit coordinates. None for a space with conditional parameters."""
    params = space.parameters
    if any(p.only_if for p in params.values()):
        return None
    axis = {name: i for i, name in enumerate(space.dimensions)}
    plan: list[_Column] = []
    for name in space.names:
        param = params[name]
        if isinstance(param, ConstantParameter):
            plan.append((name, -1, None, param.value))
        else:
            options = tuple(param.options) if isinstance(param, CategoryParameter) else None
            plan.append((name, axis[name], _converter(param), options))
    return tuple(plan)


def _build_configs(plan: tuple[_Column, ...], units: np.ndarray) -> list[Config]:
    """The configurations of the rows of ``units``, one column at a time."""
    columns = units.T.tolist()  # the same Python floats ``from_unit`` would get, by axis
    configs: list[Config] = [{} for _ in range(len(units))]
    for name, axis, convert, extra in plan:
        if axis < 0:
            values: Any = repeat(extra)
        else:
            values = map(convert, columns[axis])
            if extra is not None:
                values = map(extra.__getitem__, values)
        for config, value in zip(configs, values):
            config[name] = value
    return configs
