"""Vectorised complementary error functions for numpy, without scipy (a test-only dependency).

Used by the kinetics to convolve exponentials with a Gaussian instrument response. Accuracy: relative
error below 1.2e-7 for every finite argument (the Chebyshev-type fit of erfc in Numerical Recipes, 2nd ed.
(1992), section 6.2; checked against scipy.special in the tests). This module holds pure functions only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["erfcx", "erfc"]

# Coefficients of the fit  erfc(z) ~ t exp(-z^2 + P(t)),  t = 1 / (1 + z/2),  z >= 0  (lowest power first).
_COEFFS = (
    -1.26551223,
    1.00002368,
    0.37409196,
    0.09678418,
    -0.18628806,
    0.27886807,
    -1.13520398,
    1.48851587,
    -0.82215223,
    0.17087277,
)


def _erfcx_nonneg(z: np.ndarray) -> np.ndarray:
    """exp(z^2) erfc(z) for z >= 0; never overflows (tends to 1/(z sqrt(pi)))."""
    t = 1.0 / (1.0 + 0.5 * z)
    poly = np.full_like(t, _COEFFS[-1])
    for c in _COEFFS[-2::-1]:
        poly = poly * t + c
    return t * np.exp(poly)


def erfcx(x: np.ndarray | float) -> np.ndarray:
    """Scaled complementary error function exp(x^2) erfc(x), elementwise.

    Parameters
    ----------
    x:
        Real argument(s), any shape.

    Returns
    -------
    numpy.ndarray
        float64 array of the shape of ``x``; ``inf`` where exp(x^2) overflows (x below about -26.6),
        relative error below 1.2e-7 elsewhere.
    """
    x = np.asarray(x, dtype=float)
    z = np.abs(x)
    out = _erfcx_nonneg(z)
    neg = x < 0
    if np.any(neg):
        with np.errstate(over="ignore"):
            out = np.where(neg, 2.0 * np.exp(z * z) - out, out)
    return out


def erfc(x: np.ndarray | float) -> np.ndarray:
    """Complementary error function erfc(x), elementwise (relative error below 1.2e-7).

    Underflows gracefully to 0 for large positive ``x`` and tends to 2 for large negative ``x``.
    """
    x = np.asarray(x, dtype=float)
    z = np.abs(x)
    pos = _erfcx_nonneg(z) * np.exp(-z * z)
    return np.where(x < 0, 2.0 - pos, pos)
