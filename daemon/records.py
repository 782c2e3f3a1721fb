"""Typed views of the daemon's messages for Python clients: status, point, block, sweep, scan and log.

Each record is built from a decoded :class:`~shotpair.daemon.protocol.Message` and keeps the whole header
in ``header`` (new fields appear there first). Pure data: no sockets.
"""

from __future__ import annotations

from dataclasses import MISSING, dataclass, field, fields
from typing import Any

import numpy as np

from shotpair.drivers.errors import ProtocolError

from .protocol import Message

__all__ = ["StatusRecord", "PointRecord", "BlockRecord", "SweepRecord", "ScanRecord", "LogRecord", "to_record"]


def _pick(cls: type, msg: Message, **extra: Any) -> Any:
    values: dict[str, Any] = {}
    for f in fields(cls):
        if f.name == "header":
            values["header"] = dict(msg.header)
        elif f.name in extra:
            values[f.name] = extra[f.name]
        elif f.name in msg.arrays:
            values[f.name] = msg.arrays[f.name]
        elif f.name in msg.header:
            values[f.name] = msg.header[f.name]
        elif f.default is not MISSING or f.default_factory is not MISSING:
            continue
        else:
            raise ProtocolError(f"{msg.topic or 'reply'} message has no {f.name!r}")
    return cls(**values)


@dataclass(frozen=True)
class StatusRecord:
    """Where the daemon is (the ``status`` topic, or the ``status`` reply)."""

    state: str
    scan_id: str | None
    points_done: int
    points_total: int
    sweep: int | None = None
    sweeps: int | None = None
    point: int | None = None
    points: int | None = None
    delay_ps: float | None = None
    shots_per_s: float | None = None
    rejected_fraction: float | None = None
    excess_noise_median: float | None = None
    eta_s: float | None = None
    output: str | None = None
    last_error: str | None = None
    last_scan_state: str | None = None
    last_scan_id: str | None = None
    header: dict[str, Any] = field(default_factory=dict, repr=False)


@dataclass(frozen=True)
class PointRecord:
    """One finished delay point of one sweep (already in the file)."""

    scan_id: str
    sweep: int
    index: int
    delay_ps: float
    points_done: int
    points_total: int
    delta_od: np.ndarray
    delta_od_error: np.ndarray
    noise_floor: np.ndarray
    combined_delta_od: np.ndarray
    combined_delta_od_error: np.ndarray
    header: dict[str, Any] = field(default_factory=dict, repr=False)


@dataclass(frozen=True)
class BlockRecord:
    """The live partial average of the point being measured."""

    scan_id: str
    sweep: int
    index: int
    delay_ps: float
    shots_done: int
    shots_target: int
    delta_od: np.ndarray
    delta_od_error: np.ndarray
    header: dict[str, Any] = field(default_factory=dict, repr=False)


@dataclass(frozen=True)
class SweepRecord:
    """The running average over all finished sweeps, after a sweep."""

    scan_id: str
    sweep: int
    sweeps: int
    delta_od: np.ndarray
    delta_od_error: np.ndarray
    delay_ps: np.ndarray
    wavelength_nm: np.ndarray
    header: dict[str, Any] = field(default_factory=dict, repr=False)


@dataclass(frozen=True)
class ScanRecord:
    """A scan started, completed or was aborted; ``event`` says which."""

    scan_id: str
    event: str
    path: str
    reason: str = ""
    header: dict[str, Any] = field(default_factory=dict, repr=False)


@dataclass(frozen=True)
class LogRecord:
    """A warning or error the daemon wants people to see."""

    level: str
    message: str
    scan_id: str | None = None
    header: dict[str, Any] = field(default_factory=dict, repr=False)


_BY_TOPIC = {"status": StatusRecord, "point": PointRecord, "block": BlockRecord, "sweep": SweepRecord,
             "scan": ScanRecord, "log": LogRecord}


def to_record(msg: Message) -> Any:
    """The typed record of a data-stream message (or of a ``status`` reply when ``msg.topic`` is None).

    Raises ProtocolError for an unknown topic or a message without a required field.
    """
    cls = _BY_TOPIC.get(msg.topic or "status")
    if cls is None:
        raise ProtocolError(f"no record type for topic {msg.topic!r}")
    return _pick(cls, msg)
