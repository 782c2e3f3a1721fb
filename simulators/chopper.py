"""The simulated pump chopper: which laser shots reach the sample, from frequency, phase and slips.

The blade turns ``frequency / repetition_rate`` cycles per laser shot; a shot is pumped when the blade
phase at that shot, plus the set phase, lies in the open half of the cycle. At half the repetition rate
this pumps every other shot, and the phase selects which. A phase slip shifts the blade by one shot.
Shots are counted by their absolute laser shot index. No instrument protocol here.
"""

from __future__ import annotations

import numpy as np

from .settings import ChopperSettings, NoiseSwitches

__all__ = ["ChopperModel"]


class ChopperModel:
    """Blade state of the pump chopper, locked to the laser when set to half the repetition rate."""

    def __init__(self, settings: ChopperSettings, switches: NoiseSwitches, repetition_rate_hz: float,
                 rng: np.random.Generator) -> None:
        self.settings = settings
        self.switches = switches
        self.repetition_rate_hz = float(repetition_rate_hz)
        self.frequency_hz = 0.5 * self.repetition_rate_hz
        self.phase_deg = 0.0
        self._rng = rng
        self._anchor_shot = 0
        self._anchor_cycles = 0.0
        self._slips = 0  # phase slips that happened before shot ``_seen_shot``
        self._seen_shot = 0

    def is_locked(self) -> bool:
        """Locked when the blade runs at half the laser repetition rate."""
        return abs(self.frequency_hz - 0.5 * self.repetition_rate_hz) <= 1e-9 * self.repetition_rate_hz

    def set_frequency_hz(self, frequency_hz: float, at_shot: int) -> None:
        """Change the blade frequency from laser shot ``at_shot`` on, keeping the blade phase continuous."""
        self._anchor_cycles = self._cycles(np.array([at_shot]))[0] % 1.0
        self._anchor_shot = int(at_shot)
        self.frequency_hz = float(frequency_hz)

    def set_phase_deg(self, phase_deg: float) -> None:
        """Set the phase relative to the laser trigger, in degrees (kept modulo 360)."""
        self.phase_deg = float(phase_deg) % 360.0

    def _cycles(self, shots: np.ndarray) -> np.ndarray:
        ratio = self.frequency_hz / self.repetition_rate_hz
        return self._anchor_cycles + (shots - self._anchor_shot) * ratio

    def pump_on(self, shots: np.ndarray) -> np.ndarray:
        """Pump state of consecutive laser shots ``shots`` (int64, increasing, not before earlier calls).

        Slips in the unobserved gap since the last call are drawn too, so the blade phase stays honest.
        """
        shots = np.asarray(shots, dtype=np.int64)
        p = self.settings.phase_slip_probability if self.switches.phase_slips else 0.0
        slips = np.zeros(len(shots), dtype=np.int64)
        if p > 0 and len(shots):
            gap = max(0, int(shots[0]) - self._seen_shot)
            if gap:
                self._slips += int(self._rng.binomial(gap, p))
            slips = np.cumsum(self._rng.random(len(shots)) < p)
        phase = self._cycles(shots) + 0.5 * (self._slips + slips) + self.phase_deg / 360.0 + 0.25
        if len(shots):
            self._slips += int(slips[-1])
            self._seen_shot = int(shots[-1]) + 1
        return (phase % 1.0) < 0.5
