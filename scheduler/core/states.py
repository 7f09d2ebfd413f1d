"""Trial states and the one table of their transitions.

Every change of a trial's state in the core goes through :func:`advance`, which looks the move
up in :data:`TRANSITIONS`; anything not in the table is refused. The state diagram in
docs/scheduling.md is drawn from this table by :func:`mermaid_diagram` (a test keeps the two
equal).

States are plain strings so that they cost nothing to hash on the scheduling hot path and
appear unchanged in the store and the API.
"""

from __future__ import annotations

from .errors import RejectedEvent

__all__ = [
    "QUEUED",
    "ACTIVE",
    "PARKED",
    "DONE",
    "CULLED",
    "FAILED",
    "CANCELLED",
    "STATES",
    "FINAL_STATES",
    "TRANSITIONS",
    "advance",
    "mermaid_diagram",
]

QUEUED = "queued"  # waiting for a worker slot: new, promoted in a synchronous ladder, or requeued
ACTIVE = "active"  # a segment is running on a worker
PARKED = "parked"  # has a result at a rung below the top; may be promoted later
DONE = "done"  # reached the top rung
CULLED = "culled"  # stopped early by the ladder (stopping form, or not promoted in a synchronous ladder)
FAILED = "failed"  # user code kept failing; the traceback is kept
CANCELLED = "cancelled"  # withdrawn by a user or by the search ending early

STATES = (QUEUED, ACTIVE, PARKED, DONE, CULLED, FAILED, CANCELLED)
FINAL_STATES = frozenset({DONE, CULLED, FAILED, CANCELLED})

# (state, move) -> new state. The moves are the core's own verbs.
TRANSITIONS: dict[tuple[str, str], str] = {
    (QUEUED, "dispatch"): ACTIVE,
    (ACTIVE, "park"): PARKED,
    (ACTIVE, "finish"): DONE,
    (ACTIVE, "continue"): ACTIVE,
    (ACTIVE, "cull"): CULLED,
    (ACTIVE, "requeue"): QUEUED,
    (ACTIVE, "retry"): QUEUED,
    (ACTIVE, "fail"): FAILED,
    (PARKED, "promote"): QUEUED,
    (PARKED, "cull"): CULLED,
    (QUEUED, "cancel"): CANCELLED,
    (ACTIVE, "cancel"): CANCELLED,
    (PARKED, "cancel"): CANCELLED,
}


def advance(state: str, move: str, trial: int | None = None) -> str:
    """The state after ``move``; raises RejectedEvent for a move the table does not allow."""
    try:
        return TRANSITIONS[(state, move)]
    except KeyError:
        who = f"trial {trial}" if trial is not None else "a trial"
        raise RejectedEvent(f"{who} is {state}; it cannot {move}") from None


def mermaid_diagram() -> str:
    """The transition table as a Mermaid state diagram (for the docs)."""
    lines = ["stateDiagram-v2", f"    [*] --> {QUEUED}: created"]
    for (state, move), target in TRANSITIONS.items():
        lines.append(f"    {state} --> {target}: {move}")
    for state in STATES:
        if state in FINAL_STATES:
            lines.append(f"    {state} --> [*]")
    return "\n".join(lines)
