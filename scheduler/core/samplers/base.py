"""The sampler interface: where new configurations come from.

A sampler proposes configurations for new trials and may learn from the results the ladders
record. It never decides budgets or promotions; the ladders never look inside a sampler. A
model-based sampler plugs in by implementing this interface alone.

Samplers own their randomness: each is built with its own ``numpy.random.Generator`` (or an
integer seed), never touches global random state, and can write its whole state out and read
it back so that a restored search proposes exactly what the original would have.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Mapping
from typing import Any, ClassVar

__all__ = ["Config", "Sampler"]

Config = dict[str, Any]
"""One configuration: parameter name -> plain Python scalar (str, int, float, bool)."""


class Sampler(ABC):
    """Proposes configurations; optionally learns from rung results."""

    kind: ClassVar[str]
    """Short name used in spec files (``sampler.kind``)."""

    @abstractmethod
    def propose(self) -> Config | None:
        """The next configuration, or ``None`` when the sampler is exhausted (a finished grid)."""

    def observe(self, trial: int, config: Mapping[str, Any], rung: int, loss: float) -> None:
        """A result was recorded for ``trial`` at ``rung``.

        ``loss`` is already normalised so that lower is better whatever the search's ``better``, and any
        non-finite measurement arrives as ``math.inf``. The default ignores results.
        """

    @abstractmethod
    def state(self) -> dict[str, Any]:
        """Everything needed to continue exactly where this sampler is, as JSON-compatible data."""

    @abstractmethod
    def restore(self, state: Mapping[str, Any]) -> None:
        """Continue from a ``state()`` taken earlier from a sampler built with the same arguments."""
