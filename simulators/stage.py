"""Mechanics of the simulated delay stage in virtual time: travel limits, finite speed, settling, homing.

A move runs at constant speed from where the stage is to the target, then settles for ``settle_s``; the
position in between is interpolated from the virtual time. Positions in mm, times in s. This module
checks limits and homing but knows nothing of delays, instruments or wires.
"""

from __future__ import annotations

import math

from shotpair.drivers.errors import LimitError, StateError

from .settings import StageSettings

__all__ = ["StageModel"]


class StageModel:
    """State of the stage: a move from ``start`` (at ``t_start_s``) to ``target``, then settling.

    Parameters
    ----------
    settings:
        Speed, settling time, homing requirement and power-up position.
    travel_mm:
        (low, high) software limits in mm; homing drives to ``low``.
    name:
        Instrument name used in error messages.
    """

    def __init__(self, settings: StageSettings, travel_mm: tuple[float, float], name: str = "delay_axis") -> None:
        self.settings = settings
        self.travel_mm = (float(travel_mm[0]), float(travel_mm[1]))
        self.name = name
        low, high = self.travel_mm
        start = settings.start_mm if settings.start_mm is not None else 0.5 * (low + high)
        self._start_mm = float(start)
        self._target_mm = float(start)
        self._t_start_s = 0.0
        self._t_arrive_s = 0.0
        self._t_settled_s = 0.0
        self._homed = not settings.needs_homing
        self._homing = False

    # -- queries -------------------------------------------------------------------------------------
    def position_mm(self, now_s: float) -> float:
        """Position at virtual time ``now_s``, in mm."""
        if now_s >= self._t_arrive_s or self._t_arrive_s <= self._t_start_s:
            return self._target_mm
        frac = (now_s - self._t_start_s) / (self._t_arrive_s - self._t_start_s)
        return self._start_mm + frac * (self._target_mm - self._start_mm)

    def target_mm(self) -> float:
        """Where the present (or last) move goes, in mm."""
        return self._target_mm

    def is_moving(self, now_s: float) -> bool:
        """True while moving or settling at virtual time ``now_s``."""
        return now_s < self._t_settled_s

    def settled_at_s(self) -> float:
        """Virtual time at which the present move will have settled, in s."""
        return self._t_settled_s

    def is_homed(self, now_s: float) -> bool:
        """True once a homing run has finished (or homing is not needed)."""
        if self._homing and now_s >= self._t_settled_s:
            self._homing = False
            self._homed = True
        return self._homed

    # -- commands ------------------------------------------------------------------------------------
    def _start_move(self, target_mm: float, now_s: float) -> None:
        here = self.position_mm(now_s)
        self._start_mm = here
        self._target_mm = float(target_mm)
        self._t_start_s = now_s
        self._t_arrive_s = now_s + abs(target_mm - here) / self.settings.velocity_mm_per_s
        self._t_settled_s = self._t_arrive_s + self.settings.settle_s

    def move_to(self, target_mm: float, now_s: float) -> None:
        """Start a move at ``now_s``.

        Raises LimitError outside the travel (or for a non-finite target) and StateError when the stage
        must be homed first; the stage does not move in either case.
        """
        low, high = self.travel_mm
        if not (math.isfinite(target_mm) and low <= target_mm <= high):
            raise LimitError("target position", instrument=self.name, value=target_mm, low=low, high=high)
        if not self.is_homed(now_s):
            raise StateError("home the stage first", state="not homed", action="move")
        self._start_move(target_mm, now_s)

    def home(self, now_s: float) -> float:
        """Start a homing run to the low end of the travel; returns the virtual time it ends, in s."""
        self._homed = False
        self._homing = True
        self._start_move(self.travel_mm[0], now_s)
        return self._t_settled_s

    def stop(self, now_s: float) -> None:
        """Stop at once where the stage is; a homing run that is cut short leaves the stage unhomed."""
        here = self.position_mm(now_s)
        if self._homing and now_s < self._t_settled_s:
            self._homing = False
        self._start_mm = self._target_mm = here
        self._t_start_s = self._t_arrive_s = self._t_settled_s = now_s
