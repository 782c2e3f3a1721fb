"""First-order kinetic schemes: populations as sums of exponentials, with a Gaussian instrument response.

A scheme is a list of steps (from, to, rate in 1/ps) between named species; "ground" is the ground state,
which is not tracked. The rate matrix is diagonalised once, so the populations after an instantaneous
excitation at t = 0 are P(t) = Σ_j a_j exp(−k_j t) for t ≥ 0, and their convolution with a unit-area
Gaussian response (standard deviation σ) is exact: Σ_j a_j S(t; k_j, σ). Times in ps, rates in 1/ps.
Pure numpy; no knowledge of spectra, chirp or instruments.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from shotpair.drivers.errors import ConfigError

from .special import erfcx

__all__ = ["FWHM_PER_SIGMA", "fwhm_to_sigma", "gaussian_step_exp", "KineticScheme"]

#: FWHM of a Gaussian in units of its standard deviation: 2 sqrt(2 ln 2).
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

_SQRT2 = math.sqrt(2.0)
_GROUND = "ground"


def fwhm_to_sigma(fwhm: float) -> float:
    """Standard deviation of a Gaussian from its full width at half maximum (same unit)."""
    return fwhm / FWHM_PER_SIGMA


def gaussian_step_exp(t_ps: np.ndarray, rate_per_ps: float, sigma_ps: float) -> np.ndarray:
    """Unit step times exp(−k t), convolved with a unit-area Gaussian of standard deviation σ.

    S(t) = ½ exp(k²σ²/2 − k t) erfc(z/√2),  z = kσ − t/σ,  evaluated without overflow as
    ½ exp(−t²/2σ²) erfcx(z/√2) for z ≥ 0 and exp(k²σ²/2 − k t) − ½ exp(−t²/2σ²) erfcx(−z/√2) for z < 0.
    k = 0 gives the smoothed step ½ erfc(−t/(σ√2)); σ = 0 gives the bare step times exp(−k t).

    Parameters
    ----------
    t_ps:
        Times in ps (any shape).
    rate_per_ps:
        Decay rate k ≥ 0 in 1/ps.
    sigma_ps:
        Standard deviation of the response in ps (≥ 0).
    """
    t = np.asarray(t_ps, dtype=float)
    k = float(rate_per_ps)
    if sigma_ps <= 0.0:
        with np.errstate(over="ignore"):
            return np.where(t >= 0.0, np.exp(-k * np.maximum(t, 0.0)), 0.0)
    s = float(sigma_ps)
    u = (k * s - t / s) / _SQRT2
    gauss = np.exp(-0.5 * (t / s) ** 2)
    tail = 0.5 * gauss * erfcx(np.abs(u))
    # Where u < 0 the exponential is at most exp(-k^2 s^2 / 2) <= 1: no overflow.
    expo = np.exp(np.minimum(0.5 * (k * s) ** 2 - k * t, 0.0) if k > 0 else 0.0 * t)
    return np.where(u >= 0.0, tail, expo - tail)


class KineticScheme:
    """A first-order scheme solved by diagonalising its rate matrix.

    Parameters
    ----------
    species:
        Names of the tracked species (not the ground state).
    steps:
        ``(from, to, rate_per_ps)`` triples; ``to`` may be ``"ground"``.

    Raises
    ------
    ConfigError
        (key ``simulation.sample.steps``) when a step names an unknown species, a rate is not positive, or
        the scheme has no basis of exponentials: equal total decay rates along a chain, or a cycle with
        oscillating solutions.
    """

    def __init__(self, species: Sequence[str], steps: Sequence[tuple[str, str, float]]) -> None:
        self.species: tuple[str, ...] = tuple(species)
        index = {name: i for i, name in enumerate(self.species)}
        m = len(self.species)
        k = np.zeros((m, m))
        for src, dst, rate in steps:
            if src not in index or (dst not in index and dst != _GROUND):
                raise ConfigError("step names an unknown species", key_path="simulation.sample.steps",
                                  value=(src, dst), allowed=", ".join(self.species))
            if not rate > 0.0:
                raise ConfigError("rates must be positive", key_path="simulation.sample.steps", value=rate)
            i = index[src]
            k[i, i] -= rate
            if dst != _GROUND:
                k[index[dst], i] += rate
        self.rate_matrix_per_ps: np.ndarray = k

        eigval, eigvec = np.linalg.eig(k)
        scale = max(float(np.max(np.abs(np.diag(k)))), 1e-300) if m else 1.0
        if m and np.max(np.abs(eigval.imag)) > 1e-9 * scale:
            raise ConfigError("the scheme has oscillating solutions (complex rates); check cyclic steps",
                              key_path="simulation.sample.steps")
        eigvec = eigvec.real
        if m and np.linalg.cond(eigvec) > 1e8:
            raise ConfigError(
                "the scheme has equal total decay rates along a chain; make the rates differ by a small amount",
                key_path="simulation.sample.steps",
            )
        #: Decay rates k_j of the exponential terms, in 1/ps (≥ 0).
        self.rates_per_ps: np.ndarray = np.maximum(-eigval.real, 0.0)
        self._vectors = eigvec

    def amplitudes(self, initial: np.ndarray) -> np.ndarray:
        """Coefficients ``a[j, s]`` of exp(−k_j t) in the population of species s, for initial populations (m,)."""
        c = np.linalg.solve(self._vectors, np.asarray(initial, dtype=float))
        return self._vectors.T * c[:, None]

    def populations(self, t_ps: np.ndarray, initial: np.ndarray, sigma_ps: float = 0.0) -> np.ndarray:
        """Populations at times ``t_ps`` (any shape) after excitation at t = 0, shape ``t.shape + (m,)``.

        ``initial`` holds the populations created by the pump, shape (m,). With ``sigma_ps`` = 0 the
        populations are zero before t = 0; with ``sigma_ps`` > 0 they are convolved with a unit-area
        Gaussian response of that standard deviation (in ps).
        """
        t = np.asarray(t_ps, dtype=float)
        a = self.amplitudes(initial)
        terms = np.stack([gaussian_step_exp(t, kj, sigma_ps) for kj in self.rates_per_ps], axis=-1)
        return terms @ a
