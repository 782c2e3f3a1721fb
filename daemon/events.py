"""Events the runner emits while it works. Plain dataclasses: the CLI prints them, the stream publishes them.

No I/O here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

__all__ = ["Event", "ScanStarted", "PointSaved", "ScanEnded", "LogEvent", "StateChanged", "BlockProgress", "SweepDone",
           "MoveDone", "InstrumentFault"]


@dataclass(frozen=True)
class Event:
    scan_id: str


@dataclass(frozen=True)
class ScanStarted(Event):
    path: str
    n_points: int
    sweeps: int
    shots_per_point: int
    estimated_duration_s: float


@dataclass(frozen=True)
class StateChanged(Event):
    state: str


@dataclass(frozen=True)
class PointSaved(Event):
    """A delay point of one sweep is in the file (already flushed when this is emitted)."""

    sweep: int
    position_in_sweep: int
    index: int
    delay_ps: float
    result: Any
    combined: Any
    points_done: int
    points_total: int
    elapsed_s: float
    eta_s: float
    shots_per_s: float
    #: Instrument faults retried while this point was measured (its move included), and how many times
    #: its measurement was discarded and begun again (a pause, an untrusted block, the chopper's lock lost).
    retries: int = 0
    restarts: int = 0


@dataclass(frozen=True)
class ScanEnded(Event):
    state: str  # "complete" | "aborted"
    reason: str
    path: str
    points_done: int
    safe_problems: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class LogEvent(Event):
    level: str
    message: str


@dataclass(frozen=True)
class BlockProgress(Event):
    """The live partial average of the point being measured (at most every ``block_interval_s``)."""

    sweep: int
    index: int
    delay_ps: float
    shots_done: int
    shots_target: int
    result: Any


@dataclass(frozen=True)
class SweepDone(Event):
    """A sweep has finished; ``delta_od``/``delta_od_error`` [n, p] average all finished sweeps."""

    sweep: int
    sweeps: int
    delta_od: Any
    delta_od_error: Any
    pairs: Any


@dataclass(frozen=True)
class MoveDone(Event):
    """An alignment move (while idle) has ended; ``error`` is empty on success."""

    delay_ps: float
    position_mm: float
    error: str = ""


@dataclass(frozen=True)
class InstrumentFault(Event):
    """An instrument fault during a scan and what the runner did about it.

    ``action`` is ``retry`` (within the budget: the operation is done again), ``paused`` (past the budget:
    the scan is paused, shutter closed), ``still_failing`` (a resume tried the instrument again and it
    failed: still paused) or ``cleared`` (a resume found it answering: the scan goes on). ``retries``
    counts the retries of the scan so far; ``time_s`` is Unix time (s) of the fault.
    """

    instrument: str
    error: str
    action: str
    retries: int
    time_s: float
