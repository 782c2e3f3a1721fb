"""Which shots of a block pair up, and which shots are outliers (misfires).

Part of the ΔOD engine; pure numpy over whole blocks, no per-shot Python loop, no I/O.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

__all__ = ["ShotPairs", "pair_shots", "robust_center_scale", "find_outliers", "MAD_TO_SIGMA"]

#: 1.4826 · MAD estimates the standard deviation of normally distributed data (1 / Φ⁻¹(3/4)).
MAD_TO_SIGMA = 1.4826

class ShotPairs(NamedTuple):
    """Which shots of a block pair up: indices into the block, one pair per position."""

    on_index: np.ndarray
    off_index: np.ndarray
    unpaired: int
    gaps: int
    #: Places where two consecutive frames carry the same pump flag (two pumped or two unpumped shots in
    #: a row: the chopper lost its phase); like gaps, no pair is formed across one.
    phase_breaks: int = 0


def pair_shots(pump_on: np.ndarray, frame_id: np.ndarray, probe_on: np.ndarray | None = None) -> ShotPairs:
    """Pair each pump-on shot with an adjacent pump-off shot of the same unbroken frame run.

    The candidates are the block's shots in order (only the probe-on shots when ``probe_on`` is given).
    Two consecutive candidates form a pair when their pump flags differ and neither a frame-counter gap
    (a step of ``frame_id`` other than 1) nor a phase break lies between them. A phase break is a step
    between two consecutive frames whose pump flags are equal (over all shots, probe-off ones included):
    the chopper's phase was lost there, so pump-on and pump-off are no longer known to alternate. Pairs
    do not overlap: walking left to right, a candidate already used is skipped, which in each stretch of
    pairable neighbours keeps the 1st, 3rd, 5th... link. A candidate left without a partner is unpaired.

    Returns
    -------
    ShotPairs
        ``on_index``/``off_index`` (int64), ``unpaired`` candidates, ``gaps`` (frame steps other than 1),
        ``phase_breaks`` (steps of exactly one frame between equal pump flags).
    """
    pump_on = np.asarray(pump_on, dtype=bool)
    frame_id = np.asarray(frame_id, dtype=np.int64)
    n = pump_on.shape[0]
    breaks = np.diff(frame_id) != 1
    gaps = int(np.count_nonzero(breaks))
    phase = pump_on[1:] == pump_on[:-1]
    phase &= ~breaks
    phase_breaks = int(np.count_nonzero(phase))
    if phase_breaks:
        breaks |= phase
    run = np.zeros(n, dtype=np.int64)
    np.cumsum(breaks, out=run[1:])
    cand = np.arange(n, dtype=np.int64) if probe_on is None else np.flatnonzero(np.asarray(probe_on, dtype=bool))
    if cand.size < 2:
        empty = np.zeros(0, dtype=np.int64)
        return ShotPairs(empty, empty, int(cand.size), gaps, phase_breaks)
    flags = pump_on[cand]
    link = (flags[1:] != flags[:-1]) & (run[cand[1:]] == run[cand[:-1]])
    pos = np.arange(link.size)
    starts = link.copy()
    starts[1:] &= ~link[:-1]
    run_start = np.maximum.accumulate(np.where(starts, pos, 0))
    take = np.flatnonzero(link & ((pos - run_start) % 2 == 0))
    first, second = cand[take], cand[take + 1]
    first_on = flags[take]
    on_index = np.where(first_on, first, second)
    off_index = np.where(first_on, second, first)
    return ShotPairs(on_index, off_index, int(cand.size - 2 * take.size), gaps, phase_breaks)


def robust_center_scale(values: np.ndarray) -> tuple[float, float]:
    """Median and MAD of a 1-D array (by partition: cheaper than np.median for small arrays)."""
    n = values.size
    k = n // 2
    if n % 2:
        median = float(np.partition(values, k)[k])
    else:
        part = np.partition(values, [k - 1, k])
        median = 0.5 * float(part[k - 1] + part[k])
    dev = np.abs(values - median)
    if n % 2:
        mad = float(np.partition(dev, k)[k])
    else:
        part = np.partition(dev, [k - 1, k])
        mad = 0.5 * float(part[k - 1] + part[k])
    return median, mad


def find_outliers(intensity: np.ndarray, groups: np.ndarray, threshold_mad: float,
                  noise_per_count: float = 0.0, noise_const: float = 0.0) -> np.ndarray:
    """Flag shots whose intensity index is far from the median of their group.

    A shot is an outlier when ``|I − median| > threshold_mad · scale``, per group (``groups`` holds a small
    non-negative integer label per shot), with ``scale = max(1.4826·MAD, sqrt(noise_per_count·median⁺ +
    noise_const))``: the floor (counts) is the spread expected from shot noise, read noise and
    quantisation, so a perfectly steady laser does not turn shot noise into outliers.
    Returns a bool array shaped like ``intensity``.
    """
    intensity = np.asarray(intensity, dtype=np.float64)
    groups = np.asarray(groups)
    out = np.zeros(intensity.shape, dtype=bool)
    for label in range(int(groups.max()) + 1 if groups.size else 0):
        members = groups == label
        values = intensity[members]
        if values.size == 0:
            continue
        median, mad = robust_center_scale(values)
        scale = max(MAD_TO_SIGMA * mad, math.sqrt(noise_per_count * max(median, 0.0) + noise_const))
        out[members] = np.abs(values - median) > threshold_mad * scale
    return out
