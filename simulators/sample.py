"""The simulated sample: noise-free ΔOD(delay, wavelength) from bands, kinetics, response and chirp.

ΔOD(τ, λ) = f · Σ_s P_s(τ − t0(λ)) · (A_s(λ) − A_ground(λ)), where f is the excitation fraction, P_s the
population of species s relative to the excited molecules (convolved with the Gaussian response), A_s the
absorbance spectrum of species s (excited-state absorption positive, stimulated emission negative) and
A_ground the ground-state absorbance, whose loss is the bleach: ground-state depletion is the total
excited population. Delays in ps, wavelengths in nm, absorbances in OD. No noise, no instruments here.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from .dispersion import chirp_arrival_ps
from .kinetics import KineticScheme, fwhm_to_sigma
from .settings import Band, SampleSettings

__all__ = ["band_spectrum_od", "SampleModel"]

_FOUR_LN2 = 4.0 * math.log(2.0)


def band_spectrum_od(bands: Sequence[Band], wavelengths_nm: np.ndarray) -> np.ndarray:
    """Sum of Gaussian bands A·exp(−4 ln2 (λ − λc)²/w²) at the given wavelengths (nm), in OD."""
    lam = np.asarray(wavelengths_nm, dtype=float)
    out = np.zeros_like(lam)
    for b in bands:
        out += b.amplitude_od * np.exp(-_FOUR_LN2 * ((lam - b.centre_nm) / b.width_nm) ** 2)
    return out


class SampleModel:
    """The sample of a :class:`SampleSettings`, ready to evaluate.

    Attributes
    ----------
    scheme:
        The kinetic scheme of the transient species.
    initial:
        Populations the pump creates, shape (m,), in the order of ``scheme.species``.
    sigma_ps:
        Standard deviation of the Gaussian instrument response, in ps.
    """

    def __init__(self, settings: SampleSettings) -> None:
        self.settings = settings
        names = [s.name for s in settings.species]
        self.scheme = KineticScheme(names, [(st.from_species, st.to_species, st.rate) for st in settings.steps])
        self.initial = np.array([settings.pumped.get(n, 0.0) for n in names])
        self.sigma_ps = fwhm_to_sigma(settings.irf_fwhm_fs * 1e-3)

    def difference_spectra_od(self, wavelengths_nm: np.ndarray) -> np.ndarray:
        """f · (A_s(λ) − A_ground(λ)) for each species, shape (m, px), in OD per unit population."""
        ground = band_spectrum_od(self.settings.ground_state_bands, wavelengths_nm)
        rows = [band_spectrum_od(s.bands, wavelengths_nm) - ground for s in self.settings.species]
        return self.settings.excitation_fraction * np.array(rows)

    def time_zero_ps(self, wavelengths_nm: np.ndarray) -> np.ndarray:
        """Nominal delay (ps) at which pump and probe overlap at each wavelength.

        Light that trails the reference wavelength (blue, after fused silica) probes a longer real delay at
        the same stage setting, so its time zero lies at an earlier nominal delay:
        t0(λ) = time_zero_offset_ps − arrival(λ).
        """
        s = self.settings
        return s.time_zero_offset_ps - chirp_arrival_ps(wavelengths_nm, s.fused_silica_mm, s.chirp_reference_nm)

    def populations(self, delays_ps: np.ndarray, wavelengths_nm: np.ndarray) -> np.ndarray:
        """Response-convolved populations at each (delay, pixel), shape (n, px, m)."""
        t = np.asarray(delays_ps, dtype=float)[:, None] - self.time_zero_ps(wavelengths_nm)[None, :]
        return self.scheme.populations(t, self.initial, self.sigma_ps)

    def delta_od(self, delays_ps: np.ndarray, wavelengths_nm: np.ndarray) -> np.ndarray:
        """Noise-free ΔOD at nominal delays (n,) in ps and wavelengths (px,) in nm, shape (n, px), in OD."""
        pops = self.populations(np.atleast_1d(delays_ps), wavelengths_nm)
        spectra = self.difference_spectra_od(wavelengths_nm)
        return np.einsum("npm,mp->np", pops, spectra)
