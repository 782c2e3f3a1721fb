"""The instrument interfaces every driver implements, and the block of shots a detector delivers.

Drivers (real or simulated) subclass these ABCs, so a missing method fails at construction, not in the
middle of a scan. Units are part of every name. This module holds no I/O and no physics.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import InstrumentReplyError

__all__ = ["Instrument", "DelayAxis", "DelayGenerator", "Chopper", "Shutter", "Detector", "ShotBlock"]


class Instrument(abc.ABC):
    """Common part of every instrument: a name, a connection, an identity.

    ``name`` is the instrument's key in the bench file (``delay_axis``, ``detector``...), used in every
    error message about it.
    """

    def __init__(self, name: str) -> None:
        self.name = name

    @abc.abstractmethod
    def connect(self) -> None:
        """Open the connection and check that the instrument answers. Raises TransportError, InstrumentTimeout."""

    @abc.abstractmethod
    def disconnect(self) -> None:
        """Release the connection. Never raises for an instrument that is already disconnected."""

    @abc.abstractmethod
    def identity(self) -> str:
        """A one-line identity (maker, model, serial, firmware or the simulator's equivalent)."""

    def state(self) -> dict[str, Any]:
        """A small JSON-able summary of the instrument's present state, for `check` and the output file."""
        return {}

    def __enter__(self) -> "Instrument":
        self.connect()
        return self

    def __exit__(self, *exc: object) -> None:
        self.disconnect()


class DelayAxis(Instrument):
    """A motorised translation stage carrying the retroreflector of an optical delay line, in mm."""

    @property
    @abc.abstractmethod
    def travel_mm(self) -> tuple[float, float]:
        """The (low, high) positions the axis may be sent to, in mm."""

    @property
    @abc.abstractmethod
    def is_homed(self) -> bool:
        """Whether the axis knows its absolute position."""

    @abc.abstractmethod
    def home(self, timeout_s: float) -> None:
        """Find the reference position; blocks until done. Raises InstrumentTimeout."""

    @abc.abstractmethod
    def move_to_mm(self, position_mm: float) -> None:
        """Start a move to an absolute position; returns at once. Raises LimitError outside ``travel_mm``."""

    @abc.abstractmethod
    def is_moving(self) -> bool:
        """Whether the axis is still moving or settling."""

    @abc.abstractmethod
    def wait_settled(self, timeout_s: float) -> float:
        """Block until the axis has stopped and settled; returns the read-back position in mm.

        Raises InstrumentTimeout if it has not settled within ``timeout_s``.
        """

    @abc.abstractmethod
    def position_mm(self) -> float:
        """The read-back position in mm."""

    @abc.abstractmethod
    def stop(self) -> None:
        """Stop any motion now. Must be safe to call at any time, also after errors."""


class DelayGenerator(Instrument):
    """A digital delay generator that delays the pump trigger electronically, in ps.

    It is the delay axis for nanosecond-to-millisecond kinetics, beyond what a stage reaches. Delays are
    the generator's own setting in ps (the bench file's ``time_zero_ps`` says which setting makes pump and
    probe coincide); one unit for delay across the code base, however long.
    """

    @property
    @abc.abstractmethod
    def range_ps(self) -> tuple[float, float]:
        """The (low, high) settings the generator accepts, in ps."""

    @abc.abstractmethod
    def set_delay_ps(self, delay_ps: float) -> None:
        """Set the delay; returns when the generator has taken it. Raises LimitError outside ``range_ps``."""

    @abc.abstractmethod
    def delay_ps(self) -> float:
        """The delay the generator reports, in ps."""


class Chopper(Instrument):
    """An optical chopper locked to the laser that blocks every other pump pulse."""

    @abc.abstractmethod
    def frequency_hz(self) -> float:
        """The blade frequency in Hz (half the laser repetition rate when it chops every other pulse)."""

    @abc.abstractmethod
    def set_frequency_hz(self, frequency_hz: float) -> None:
        """Set the frequency in Hz. Raises LimitError outside the chopper's range."""

    @abc.abstractmethod
    def phase_deg(self) -> float:
        """The phase of the blade relative to the laser trigger, in degrees."""

    @abc.abstractmethod
    def set_phase_deg(self, phase_deg: float) -> None:
        """Set the phase in degrees."""

    @abc.abstractmethod
    def is_locked(self) -> bool:
        """Whether the chopper is phase-locked to the laser trigger."""


class Shutter(Instrument):
    """A beam shutter; closed blocks the laser (pump and probe), which is how the dark is measured."""

    @abc.abstractmethod
    def open(self) -> None:
        """Open the shutter; blocks until it is open."""

    @abc.abstractmethod
    def close(self) -> None:
        """Close the shutter; blocks until closed. Must be safe to call at any time, also after errors."""

    @abc.abstractmethod
    def is_open(self) -> bool:
        """Whether the shutter is open."""


class Detector(Instrument):
    """A spectrometer with a line camera that reads the probe spectrum of every single shot."""

    @property
    @abc.abstractmethod
    def pixels(self) -> int:
        """Number of pixels per spectrum."""

    @property
    @abc.abstractmethod
    def has_reference(self) -> bool:
        """Whether a reference detector reads the probe before the sample on every shot."""

    @abc.abstractmethod
    def acquire(self, n_shots: int, timeout_s: float) -> "ShotBlock":
        """Read the next ``n_shots`` laser shots.

        Frames lost on the way (dropped frames) are not replaced: the block then holds fewer shots and its
        ``frame_id`` shows the gap. Raises InstrumentTimeout if the shots do not arrive within ``timeout_s``.
        """


@dataclass(frozen=True)
class ShotBlock:
    """Consecutive single-shot spectra as the detector delivered them.

    Attributes
    ----------
    counts:
        ``(n, pixels)`` uint16 raw counts, one row per laser shot.
    pump_on:
        ``(n,)`` bool, True where the pump reached the sample on that shot (from the chopper's reference
        signal recorded by the detector, never inferred from the shot's position in the block).
    frame_id:
        ``(n,)`` int64 frame counter; consecutive shots differ by exactly one, a larger step is a gap.
    reference:
        ``(n, m)`` uint16 counts of the reference detector (``m`` = 1 or ``pixels``), or None.
    probe_on:
        ``(n,)`` bool where the probe is chopped too (four-state mode), or None when it is always on.
    """

    counts: np.ndarray
    pump_on: np.ndarray
    frame_id: np.ndarray
    reference: np.ndarray | None = None
    probe_on: np.ndarray | None = None
    meta: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = self.counts.shape[0]
        if self.counts.ndim != 2 or self.counts.dtype != np.uint16:
            raise InstrumentReplyError(f"counts must be (n, pixels) uint16, got {self.counts.dtype} {self.counts.shape}",
                                       instrument="detector")
        for label, arr in (("pump_on", self.pump_on), ("frame_id", self.frame_id), ("probe_on", self.probe_on)):
            if arr is not None and arr.shape != (n,):
                raise InstrumentReplyError(f"{label} must have shape ({n},), got {arr.shape}", instrument="detector")
        if self.reference is not None and (self.reference.ndim != 2 or self.reference.shape[0] != n):
            raise InstrumentReplyError(f"reference must be (n, m), got {self.reference.shape}", instrument="detector")

    @property
    def n_shots(self) -> int:
        return int(self.counts.shape[0])

    @property
    def pixels(self) -> int:
        return int(self.counts.shape[1])
