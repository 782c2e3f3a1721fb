"""Intensity of the amplified laser, shot by shot: fluctuation, slow drift and misfires.

Returns relative factors (1 = nominal) for the probe and for the pump; the probe factor is common to all
pixels and to the reference detector. Shot times in s. Random numbers only from the Generator it is
given; it knows nothing of spectra or detectors.
"""

from __future__ import annotations

import math

import numpy as np

from .settings import LaserSettings, NoiseSwitches

__all__ = ["LaserModel"]

_DRIFT_TERMS = 6


class LaserModel:
    """Shot-by-shot intensity factors of the laser.

    The drift is a fixed sum of a few sinusoids with random phases and periods between 0.5 and 2 times
    ``drift_timescale_s``, scaled to ``drift_rms``: smooth, reproducible, and a pure function of time.
    """

    def __init__(self, settings: LaserSettings, switches: NoiseSwitches, rng: np.random.Generator) -> None:
        self.settings = settings
        self.switches = switches
        self._rng = rng
        self._drift_period_s = settings.drift_timescale_s * np.exp(rng.uniform(math.log(0.5), math.log(2.0), _DRIFT_TERMS))
        self._drift_phase = rng.uniform(0.0, 2.0 * math.pi, _DRIFT_TERMS)

    def drift(self, t_s: np.ndarray) -> np.ndarray:
        """Relative drift of the intensity at times ``t_s`` (s); zero when drift is switched off."""
        t = np.asarray(t_s, dtype=float)
        if not self.switches.drift or self.settings.drift_rms == 0.0:
            return np.zeros_like(t)
        arg = 2.0 * math.pi * t[..., None] / self._drift_period_s + self._drift_phase
        return self.settings.drift_rms * math.sqrt(2.0 / _DRIFT_TERMS) * np.sin(arg).sum(axis=-1)

    def factors(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Probe factor, pump factor and misfire flags for shots at times ``t_s`` (n,), in s.

        Returns
        -------
        probe, pump:
            (n,) float64 relative intensities (1 = nominal), never negative.
        misfire:
            (n,) bool, True for misfired shots (both factors set to ``misfire_level``).
        """
        s, sw = self.settings, self.switches
        n = len(t_s)
        common = 1.0 + self.drift(t_s)
        probe = common.copy()
        pump = common.copy()
        if sw.laser_fluctuation and s.fluctuation_rms > 0:
            probe *= 1.0 + s.fluctuation_rms * self._rng.standard_normal(n)
        if sw.pump_fluctuation and s.pump_fluctuation_rms > 0:
            pump *= 1.0 + s.pump_fluctuation_rms * self._rng.standard_normal(n)
        if sw.misfires and s.misfire_probability > 0:
            misfire = self._rng.random(n) < s.misfire_probability
            probe[misfire] = s.misfire_level
            pump[misfire] = s.misfire_level
        else:
            misfire = np.zeros(n, dtype=bool)
        return np.maximum(probe, 0.0), np.maximum(pump, 0.0), misfire
