"""Dispersion of fused silica and the chirp it gives a white-light probe.

Sellmeier equation of Malitson, J. Opt. Soc. Am. 55, 1205 (1965), valid 210-3710 nm at 20 °C, with its
exact derivative for the group index. Wavelengths are vacuum wavelengths in nm, thicknesses in mm,
group delays in fs per mm, arrival times in ps. Pure functions: no state, no knowledge of the sample.
"""

from __future__ import annotations

import numpy as np

from shotpair.drivers.delay_line import SPEED_OF_LIGHT_M_PER_S

__all__ = [
    "SELLMEIER_B",
    "SELLMEIER_C_UM",
    "fused_silica_index",
    "fused_silica_group_index",
    "fused_silica_group_delay_fs_per_mm",
    "chirp_arrival_ps",
]

#: Malitson (1965) oscillator strengths.
SELLMEIER_B = (0.6961663, 0.4079426, 0.8974794)
#: Malitson (1965) resonance wavelengths, in µm.
SELLMEIER_C_UM = (0.0684043, 0.1162414, 9.896161)


def _n_squared_and_slope(wavelength_nm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """n^2 and d(n^2)/d(lambda) with lambda in µm."""
    lam = np.asarray(wavelength_nm, dtype=float) * 1e-3
    lam2 = lam * lam
    n2 = np.ones_like(lam)
    slope = np.zeros_like(lam)
    for b, c in zip(SELLMEIER_B, SELLMEIER_C_UM):
        d = lam2 - c * c
        n2 = n2 + b * lam2 / d
        slope = slope - 2.0 * b * c * c * lam / (d * d)
    return n2, slope


def fused_silica_index(wavelength_nm: np.ndarray | float) -> np.ndarray:
    """Phase refractive index n of fused silica at a vacuum wavelength in nm."""
    n2, _ = _n_squared_and_slope(wavelength_nm)
    return np.sqrt(n2)


def fused_silica_group_index(wavelength_nm: np.ndarray | float) -> np.ndarray:
    """Group index n_g = n − λ dn/dλ of fused silica at a vacuum wavelength in nm."""
    n2, slope = _n_squared_and_slope(wavelength_nm)
    n = np.sqrt(n2)
    lam_um = np.asarray(wavelength_nm, dtype=float) * 1e-3
    return n - lam_um * slope / (2.0 * n)


def fused_silica_group_delay_fs_per_mm(wavelength_nm: np.ndarray | float) -> np.ndarray:
    """Group delay of 1 mm of fused silica, in fs: n_g · 1 mm / c."""
    return fused_silica_group_index(wavelength_nm) * 1e12 / SPEED_OF_LIGHT_M_PER_S


def chirp_arrival_ps(
    wavelength_nm: np.ndarray | float, thickness_mm: float, reference_nm: float
) -> np.ndarray:
    """Arrival time of each probe wavelength after ``thickness_mm`` of fused silica, relative to ``reference_nm``.

    Positive values arrive later than the reference wavelength: in the visible, blue light trails red
    (normal dispersion). Units: ps.
    """
    gd = fused_silica_group_delay_fs_per_mm(wavelength_nm) - fused_silica_group_delay_fs_per_mm(reference_nm)
    return thickness_mm * gd * 1e-3
