"""The statistics of one delay point: mergeable per-pixel sums and the quantities derived from them.

Part of the ΔOD engine; pure numpy, no I/O. Results of several blocks, points or sweeps combine exactly
(Chan, Golub and LeVeque's rule for the moments; plain sums for the rest).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from shotpair.drivers.errors import ShotpairError

from .welford import chan_merge, sample_variance

__all__ = ["PointResult"]

@dataclass(frozen=True, eq=False)
class PointResult:
    """Statistics of one delay point (or of several merged): per-pixel arrays and block-level counters.

    Stored fields (per pixel unless noted) are sums and moments that merge exactly; derived quantities are
    properties. ΔOD is dimensionless (OD units); counts are dark-corrected detector counts.

    Attributes
    ----------
    count:
        Accepted, unmasked pairs per pixel (int64).
    mean, m2:
        Running mean of ΔOD and sum of squared deviations (OD²); ``mean`` is 0 where ``count`` is 0.
    sigma2_sum:
        Sum over pairs of the shot-noise variance of each pair's ΔOD (OD²).
    counts_on_sum, counts_off_sum:
        Sums of dark-corrected counts of the pump-on and pump-off shot of each pair (after the pump-only
        background in four-state mode).
    saturated, nonpositive:
        Pair-pixels masked for saturation (raw ≥ saturation on either shot, or on the reference), and for
        a dark-corrected value ≤ 0 (either shot or reference), int64; each masked entry counted once,
        saturation first.
    shots, pairs, rejected_pairs, unpaired_shots, gaps, blocks, background_missing_blocks, phase_breaks:
        Scalars: shots seen, pairs accepted, pairs rejected as outliers, candidate shots left unpaired,
        frame-counter gaps inside blocks, blocks added, four-state blocks lacking a probe-off state, and
        phase breaks (two consecutive frames with the same pump flag; never paired across).
    """

    count: np.ndarray
    mean: np.ndarray
    m2: np.ndarray
    sigma2_sum: np.ndarray
    counts_on_sum: np.ndarray
    counts_off_sum: np.ndarray
    saturated: np.ndarray
    nonpositive: np.ndarray
    shots: int = 0
    pairs: int = 0
    rejected_pairs: int = 0
    unpaired_shots: int = 0
    gaps: int = 0
    blocks: int = 0
    background_missing_blocks: int = 0
    phase_breaks: int = 0

    _SCALARS = ("shots", "pairs", "rejected_pairs", "unpaired_shots", "gaps", "blocks",
                "background_missing_blocks", "phase_breaks")
    _SUMS = ("sigma2_sum", "counts_on_sum", "counts_off_sum", "saturated", "nonpositive")

    @classmethod
    def empty(cls, pixels: int) -> "PointResult":
        z = np.zeros(pixels, dtype=np.float64)
        i = np.zeros(pixels, dtype=np.int64)
        return cls(i.copy(), z.copy(), z.copy(), z.copy(), z.copy(), z.copy(), i.copy(), i.copy())

    @classmethod
    def combine(cls, results: Sequence["PointResult"]) -> "PointResult":
        """Merge results (e.g. of one delay point over several sweeps) as if all pairs were accumulated once.

        Raises ShotpairError for an empty sequence or results of different pixel counts.
        """
        if not results:
            raise ShotpairError("nothing to combine")
        pixels = results[0].pixels
        if any(r.pixels != pixels for r in results):
            raise ShotpairError("cannot combine results of different pixel counts")
        n, mean, m2 = results[0].count, results[0].mean, results[0].m2
        for r in results[1:]:
            n, mean, m2 = chan_merge(n, mean, m2, r.count, r.mean, r.m2)
        sums = {k: np.sum([getattr(r, k) for r in results], axis=0) for k in cls._SUMS}
        scalars = {k: int(sum(getattr(r, k) for r in results)) for k in cls._SCALARS}
        return cls(count=n.copy(), mean=mean.copy(), m2=m2.copy(), **sums, **scalars)

    @property
    def pixels(self) -> int:
        return int(self.count.shape[0])

    @property
    def delta_od(self) -> np.ndarray:
        """Mean ΔOD per pixel (OD); NaN where fewer than two pairs count."""
        return np.where(self.count >= 2, self.mean, np.nan)

    @property
    def variance(self) -> np.ndarray:
        """Sample variance of the per-pair ΔOD (OD²), ``M2/(count−1)``; NaN where count < 2."""
        return sample_variance(self.count, self.m2)

    @property
    def delta_od_error(self) -> np.ndarray:
        """Standard error of the mean ΔOD (OD), ``sqrt(variance / count)``; NaN where count < 2."""
        return np.sqrt(self.variance / np.maximum(self.count, 1))

    @property
    def floor(self) -> np.ndarray:
        """Shot-noise floor of the mean (OD): ``sqrt(mean per-pair σ² / count)``; NaN where count < 2."""
        with np.errstate(invalid="ignore", divide="ignore"):
            n = np.maximum(self.count, 1)
            return np.where(self.count >= 2, np.sqrt(self.sigma2_sum / n / n), np.nan)

    @property
    def excess_noise(self) -> np.ndarray:
        """Measured standard error over the shot-noise floor (dimensionless); NaN where undefined."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.delta_od_error / self.floor

    @property
    def mean_counts_on(self) -> np.ndarray:
        """Mean dark-corrected counts of the pump-on shots of counted pairs; NaN where count is 0."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count > 0, self.counts_on_sum / np.maximum(self.count, 1), np.nan)

    @property
    def mean_counts_off(self) -> np.ndarray:
        """Mean dark-corrected counts of the pump-off shots of counted pairs; NaN where count is 0."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count > 0, self.counts_off_sum / np.maximum(self.count, 1), np.nan)

    @property
    def masked(self) -> np.ndarray:
        """Masked pair-pixels per pixel, ``saturated + nonpositive`` (int64)."""
        return self.saturated + self.nonpositive
