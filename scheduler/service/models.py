"""What crosses the HTTP boundary, as pydantic models (the OpenAPI document is made from them)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "SearchState",
    "SubmitRequest",
    "SearchInfo",
    "SearchDetail",
    "TeamUsage",
    "SearchUsage",
    "UsageReport",
    "Caller",
    "ErrorBody",
    "MAX_SPEC_CHARS",
]

MAX_SPEC_CHARS = 200_000

# running: in the head's loop (it may hold no CPU at the moment, waiting for its share);
# paused: by its team or an admin; held: waiting through no action of its own (``reason``
# says why, e.g. "allowance spent"); finished, cancelled: over; faulted: stopped on a storage
# fault or an error in the search itself (``reason``), resumable once fixed.
SearchState = Literal["running", "paused", "held", "finished", "cancelled", "faulted"]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class SubmitRequest(_Model):
    spec: str = Field(..., min_length=1, max_length=MAX_SPEC_CHARS, description="the search's spec file (TOML text)")
    priority: int = Field(0, ge=-1000, le=1000, description="order among the team's own searches; higher goes first")


class SearchInfo(_Model):
    name: str
    team: str
    priority: int
    state: SearchState
    reason: str | None = None
    submitted_at: float = Field(..., description="Unix time")
    metric: str
    better: Literal["higher", "lower"] | None  # None only while a faulted search's spec cannot be read
    trials: int = 0
    segments: int = 0
    running_segments: int = Field(0, description="segments running now")
    queued_segments: int = Field(0, description="segments submitted that wait for a CPU (head.queued_per_slot)")
    cpus_busy: float = 0.0
    cpu_seconds: float = Field(0.0, description="CPU time its segments used (limits.cpu_hours counts it)")
    reserved_cpu_seconds: float = Field(0.0, description="CPUs its segments reserved times how long they held them")
    leader: int | None = None
    leader_value: float | None = None


class SearchDetail(SearchInfo):
    leaderboard: list[dict[str, Any]] = Field(default_factory=list)
    rungs: list[dict[str, Any]] = Field(default_factory=list)
    statistics: dict[str, Any] = Field(default_factory=dict)


class TeamUsage(_Model):
    team: str
    guarantee_cpus: float
    cap_cpus: float | None
    weight: float
    allowance_cpu_hours: float | None
    used_cpu_hours: float = Field(..., description="CPU-hours used in the period: the CPU time of its segments "
                                                  "(what allowance_cpu_hours counts)")
    reserved_cpu_hours: float = Field(0.0, description="CPUs its segments reserved times hours held, in the period")
    memory_mb_hours: float = 0.0
    cpus_running: float = 0.0
    searches: int = 0
    held: bool = False


class SearchUsage(_Model):
    team: str
    search: str
    cpu_hours: float = Field(..., description="CPU time its segments used, in hours")
    reserved_cpu_hours: float = Field(0.0, description="CPUs its segments reserved times hours held")
    segments: int


class UsageReport(_Model):
    period: str
    since: float | None = Field(None, description="Unix time; None: from the start")
    until: float
    teams: list[TeamUsage]
    searches: list[SearchUsage]


class Caller(_Model):
    name: str
    team: str | None = None
    admin: bool = False


class ErrorBody(_Model):
    detail: str
