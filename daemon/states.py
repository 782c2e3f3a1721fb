"""The run states of the acquisition and their legal transitions, as one explicit table.

Every state change goes through :class:`RunStateMachine.step`; a step not in the table raises
StateError and changes nothing. docs and the control protocol quote this table; keep them in step.
No I/O and no threads here: the runner owns the machine and guards it.
"""

from __future__ import annotations

import enum

from shotpair.drivers.errors import StateError

__all__ = ["RunState", "TRANSITIONS", "RunStateMachine", "transition_table_markdown"]


class RunState(str, enum.Enum):
    IDLE = "idle"            # bench connected, no scan
    MOVING = "moving"        # an alignment move requested while idle
    PREPARING = "preparing"  # scan accepted: homing, dark, opening the shutter
    ACQUIRING = "acquiring"  # moving and reading shots
    PAUSED = "paused"        # shutter closed, waiting for resume (asked by a user, or an instrument fault)
    STOPPING = "stopping"    # closing the shutter, stopping motion, closing the file


#: (state, action) -> next state. Actions come from users (start, pause, resume, abort) or from the
#: runner itself (ready, finish, fail, stopped, moved, and fault: an instrument still failing after its
#: retries pauses the scan; resume then first tries that instrument again, and stays paused if it fails).
TRANSITIONS: dict[tuple[RunState, str], RunState] = {
    (RunState.IDLE, "start"): RunState.PREPARING,
    (RunState.IDLE, "move"): RunState.MOVING,
    (RunState.MOVING, "moved"): RunState.IDLE,
    (RunState.PREPARING, "ready"): RunState.ACQUIRING,
    (RunState.PREPARING, "abort"): RunState.STOPPING,
    (RunState.PREPARING, "fail"): RunState.STOPPING,
    (RunState.ACQUIRING, "pause"): RunState.PAUSED,
    (RunState.ACQUIRING, "fault"): RunState.PAUSED,
    (RunState.ACQUIRING, "abort"): RunState.STOPPING,
    (RunState.ACQUIRING, "finish"): RunState.STOPPING,
    (RunState.ACQUIRING, "fail"): RunState.STOPPING,
    (RunState.PAUSED, "resume"): RunState.ACQUIRING,
    (RunState.PAUSED, "abort"): RunState.STOPPING,
    (RunState.PAUSED, "fail"): RunState.STOPPING,
    (RunState.STOPPING, "stopped"): RunState.IDLE,
}


class RunStateMachine:
    """Holds the present run state and applies the table."""

    def __init__(self) -> None:
        self.state = RunState.IDLE

    def can(self, action: str) -> bool:
        return (self.state, action) in TRANSITIONS

    def step(self, action: str) -> RunState:
        """Apply ``action``; raises StateError (and keeps the state) when the table has no such step."""
        nxt = TRANSITIONS.get((self.state, action))
        if nxt is None:
            allowed = sorted(a for (s, a) in TRANSITIONS if s is self.state)
            raise StateError(f"allowed now: {', '.join(allowed) or 'nothing'}", state=self.state.value, action=action)
        self.state = nxt
        return nxt


def transition_table_markdown() -> str:
    """The table as Markdown, for the docs (tests check the docs quote it)."""
    rows = ["| state | action | next state |", "|---|---|---|"]
    rows += [f"| {s.value} | {a} | {n.value} |" for (s, a), n in TRANSITIONS.items()]
    return "\n".join(rows)
