"""Mergeable per-pixel running statistics: count, mean and sum of squared deviations (M2).

For the ΔOD engine and the dark measurement. Updates come from whole chunks of samples at once (vectorised,
with a per-sample validity mask), never one sample at a time; two partial results combine exactly by the
pairwise rule of Chan, Golub and LeVeque, so blocks, points and sweeps merge as if accumulated together.
This module must not know about shots, pairs, detectors or files: it only sees arrays of numbers.
"""

from __future__ import annotations

import numpy as np

from shotpair.drivers.errors import ShotpairError

__all__ = ["PixelStats", "chan_merge", "chunk_moments", "sample_variance"]


def sample_variance(count: np.ndarray, m2: np.ndarray) -> np.ndarray:
    """Unbiased sample variance ``M2 / (count - 1)`` per pixel; NaN where count < 2."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count >= 2, m2 / np.maximum(count - 1, 1), np.nan)


def chunk_moments(
    samples: np.ndarray, valid: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Count, mean and M2 per column of one chunk of samples, in two passes over the chunk.

    Parameters
    ----------
    samples:
        ``(n, pixels)`` samples, any float dtype; entries where ``valid`` is False may hold anything
        finite or not (they are excluded, not multiplied by zero).
    valid:
        ``(n, pixels)`` bool, True where the sample counts for that pixel; None means all count.

    Returns
    -------
    count, mean, m2:
        ``(pixels,)`` int64, float64, float64 (same units as ``samples``; ``m2`` in units squared).
        Pixels with no valid sample get mean 0 and m2 0.
    """
    x = np.asarray(samples, dtype=np.float64)
    if x.ndim != 2:
        raise ShotpairError(f"samples must be (n, pixels), got shape {x.shape}")
    if valid is None:
        n = np.full(x.shape[1], x.shape[0], dtype=np.int64)
        mean = x.mean(axis=0) if x.shape[0] else np.zeros(x.shape[1])
        dev = x - mean
        return n, mean, np.einsum("ij,ij->j", dev, dev)
    valid = np.asarray(valid, dtype=bool)
    if valid.shape != x.shape:
        raise ShotpairError(f"valid mask shape {valid.shape} does not match samples {x.shape}")
    n = np.count_nonzero(valid, axis=0).astype(np.int64)
    total = np.where(valid, x, 0.0).sum(axis=0)
    mean = np.divide(total, n, out=np.zeros(x.shape[1]), where=n > 0)
    dev = np.where(valid, x - mean, 0.0)
    return n, mean, np.einsum("ij,ij->j", dev, dev)


def chan_merge(
    n_a: np.ndarray, mean_a: np.ndarray, m2_a: np.ndarray,
    n_b: np.ndarray, mean_b: np.ndarray, m2_b: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Combine two sets of (count, mean, M2) per pixel into those of the union of their samples.

    Chan, Golub & LeVeque: ``n = n_a + n_b``, ``δ = mean_b − mean_a``, ``mean = mean_a + δ·n_b/n``,
    ``M2 = M2_a + M2_b + δ²·n_a·n_b/n``. Pixels with ``n = 0`` stay at mean 0, M2 0. Inputs are not modified.
    """
    n = n_a + n_b
    nf = n.astype(np.float64)
    safe = np.where(n > 0, nf, 1.0)
    delta = mean_b - mean_a
    frac_b = n_b / safe
    mean = mean_a + delta * frac_b
    m2 = m2_a + m2_b + delta * delta * (n_a * frac_b)
    return n, mean, m2


class PixelStats:
    """Running count, mean and M2 per pixel, updated chunk by chunk and mergeable.

    Parameters
    ----------
    pixels:
        Number of independent columns (pixels) tracked.

    Notes
    -----
    Variance is ``M2 / (count − 1)`` (unbiased); standard error ``sqrt(variance / count)``. Both are NaN
    for pixels with fewer than two samples; nothing here raises on an empty or one-sample pixel.
    """

    def __init__(self, pixels: int) -> None:
        if pixels < 1:
            raise ShotpairError(f"pixels must be at least 1, got {pixels}")
        self.count = np.zeros(pixels, dtype=np.int64)
        self.mean = np.zeros(pixels, dtype=np.float64)
        self.m2 = np.zeros(pixels, dtype=np.float64)

    @property
    def pixels(self) -> int:
        return int(self.count.shape[0])

    def update(self, samples: np.ndarray, valid: np.ndarray | None = None) -> None:
        """Add a chunk of ``(n, pixels)`` samples; where ``valid`` is False the sample is left out."""
        samples = np.asarray(samples)
        if samples.ndim != 2 or samples.shape[1] != self.pixels:
            raise ShotpairError(f"samples must be (n, {self.pixels}), got shape {samples.shape}")
        self.add_moments(*chunk_moments(samples, valid))

    def add_moments(self, count: np.ndarray, mean: np.ndarray, m2: np.ndarray) -> None:
        """Merge precomputed per-pixel (count, mean, M2) of a chunk into these statistics."""
        self.count, self.mean, self.m2 = chan_merge(self.count, self.mean, self.m2,
                                                    np.asarray(count, dtype=np.int64),
                                                    np.asarray(mean, dtype=np.float64),
                                                    np.asarray(m2, dtype=np.float64))

    def merge(self, other: "PixelStats") -> None:
        """Merge another :class:`PixelStats` of the same pixel count into this one (in place)."""
        if other.pixels != self.pixels:
            raise ShotpairError(f"cannot merge statistics of {other.pixels} pixels into {self.pixels}")
        self.add_moments(other.count, other.mean, other.m2)

    def copy(self) -> "PixelStats":
        out = PixelStats(self.pixels)
        out.count, out.mean, out.m2 = self.count.copy(), self.mean.copy(), self.m2.copy()
        return out

    @property
    def variance(self) -> np.ndarray:
        """Unbiased sample variance per pixel (units of the samples, squared); NaN where count < 2."""
        return sample_variance(self.count, self.m2)

    @property
    def std_error(self) -> np.ndarray:
        """Standard error of the mean per pixel, ``sqrt(variance / count)``; NaN where count < 2."""
        return np.sqrt(self.variance / np.maximum(self.count, 1))
