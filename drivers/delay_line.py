"""Conversion between the position of a delay-line stage (mm) and the pump-probe delay (ps).

The delay is positive when the probe arrives after the pump. Moving the stage by d changes the optical
path by ``passes * d``; the path is travelled at the group velocity c / n_g of the medium (air or vacuum).
Pure arithmetic: no I/O, no knowledge of any particular stage.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = ["SPEED_OF_LIGHT_M_PER_S", "DelayLine", "air_refractive_index", "air_group_index"]

#: Exact by definition of the metre (SI, BIPM).
SPEED_OF_LIGHT_M_PER_S = 299_792_458.0


def _ciddor_terms(wavelength_nm: float) -> tuple[float, float]:
    """Return (n - 1, dn/d(sigma^2)) of standard dry air after Ciddor, Appl. Opt. 35, 1566 (1996)."""
    s = (1000.0 / wavelength_nm) ** 2  # sigma^2 in um^-2, sigma = 1 / vacuum wavelength in um
    a, b = 238.0185 - s, 57.362 - s
    n_minus_1 = 0.05792105 / a + 0.00167917 / b
    dn_ds = 0.05792105 / a**2 + 0.00167917 / b**2
    return n_minus_1, dn_ds


def air_refractive_index(wavelength_nm: float) -> float:
    """Phase index of standard dry air at a vacuum wavelength in nm (Ciddor 1996)."""
    return 1.0 + _ciddor_terms(wavelength_nm)[0]


def air_group_index(wavelength_nm: float) -> float:
    """Group index n_g = n - lambda dn/dlambda of standard dry air (Ciddor 1996).

    With s = 1/lambda^2, lambda dn/dlambda = -2 s dn/ds, so n_g = n + 2 s dn/ds.
    """
    n_minus_1, dn_ds = _ciddor_terms(wavelength_nm)
    s = (1000.0 / wavelength_nm) ** 2
    return 1.0 + n_minus_1 + 2.0 * s * dn_ds


@dataclass(frozen=True)
class DelayLine:
    """Calibration of an optical delay line.

    Parameters
    ----------
    passes:
        Optical path change per unit stage displacement: 2 for a retroreflector passed once (there and
        back), 4 when the beam meets the retroreflector twice.
    time_zero_mm:
        Stage position at which pump and probe overlap in time, in mm.
    delayed_beam:
        Which beam runs over the stage. ``"probe"``: a longer path delays the probe (positive delay grows
        with position); ``"pump"``: a longer path delays the pump (delay falls with position).
    group_index:
        Group index of the medium the beam travels through on the stage (1.0 in vacuum).
    """

    passes: int
    time_zero_mm: float
    delayed_beam: Literal["probe", "pump"] = "probe"
    group_index: float = 1.0

    @property
    def ps_per_mm(self) -> float:
        """Delay change per mm of stage travel (always positive), in ps/mm."""
        # passes * mm * n_g / c, with 1 mm = 1e-3 m and 1 s = 1e12 ps.
        return self.passes * self.group_index * 1e9 / SPEED_OF_LIGHT_M_PER_S

    @property
    def _sign(self) -> float:
        return 1.0 if self.delayed_beam == "probe" else -1.0

    def delay_ps(self, position_mm: float | np.ndarray) -> float | np.ndarray:
        """Pump-probe delay in ps at a stage position in mm."""
        return self._sign * (position_mm - self.time_zero_mm) * self.ps_per_mm

    def position_mm(self, delay_ps: float | np.ndarray) -> float | np.ndarray:
        """Stage position in mm that gives a pump-probe delay in ps."""
        return self.time_zero_mm + self._sign * delay_ps / self.ps_per_mm

    def delay_range_ps(self, travel_mm: tuple[float, float]) -> tuple[float, float]:
        """The (lowest, highest) delay in ps reachable within a stage travel in mm."""
        a = float(self.delay_ps(travel_mm[0]))
        b = float(self.delay_ps(travel_mm[1]))
        return (min(a, b), max(a, b))
