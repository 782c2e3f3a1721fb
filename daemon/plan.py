"""Turn validated scan and bench settings into a concrete plan: the delay grid, its stage positions
and the order of points in every sweep, with an estimate of how long it takes.

Pure computation: nothing here touches an instrument. A delay the stage cannot reach is a ConfigError
that names the segment, so a bad scan is refused before anything moves.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from shotpair.drivers.errors import ConfigError

from .config import BenchSettings, LinearSegment, ListSegment, LogSegment, ScanSettings

__all__ = ["ScanPlan", "build_grid_ps", "sweep_orders", "make_plan", "MAX_SEGMENT_DELAYS", "MAX_SWEEP_VALUES"]

#: Delays closer than this are the same point (ps); far below any stage's resolution (1e-6 ps = 0.15 nm).
_SAME_DELAY_PS = 1e-6
#: A scan estimated to take longer than this is refused as a mistake (a year, in s).
_LONGEST_SCAN_S = 365.25 * 86400.0
#: Most delays all segments together may list before merging (80 MB of float64 while planning).
MAX_SEGMENT_DELAYS = 10_000_000
#: Most values of one sweep-resolved array (sweeps x delay points x pixels): the file and the daemon hold
#: several such float64 arrays, 1 GiB each at this limit. A scan beyond it is refused before anything runs.
MAX_SWEEP_VALUES = 1 << 27


def _segment_delays(segment: object) -> np.ndarray:
    if isinstance(segment, ListSegment):
        return segment.delays_ps_array()
    return segment.delays_ps()  # type: ignore[attr-defined]


def _segment_size(segment: object) -> int:
    """How many delays a segment lists, without building them."""
    if isinstance(segment, ListSegment):
        return len(segment.delays_ps)
    if isinstance(segment, LogSegment):
        return segment.points
    assert isinstance(segment, LinearSegment)
    return int(math.floor((segment.stop_ps - segment.start_ps) / segment.step_ps + 1e-9)) + 1


def _check_size(scan: ScanSettings, bench: BenchSettings, config_path: str, n_points: int | None = None) -> None:
    """Refuse a scan too large to plan, store or hold in memory (before its arrays are built)."""
    if n_points is None:
        listed = sum(_segment_size(s) for s in scan.delays)
        if listed > MAX_SEGMENT_DELAYS:
            raise ConfigError(f"the delay segments list {listed:,} delays", file=config_path, key_path="scan.delays",
                              allowed=f"at most {MAX_SEGMENT_DELAYS:,} in all")
        return
    pixels = bench.detector.pixels
    values = n_points * scan.sweeps * pixels
    if values > MAX_SWEEP_VALUES:
        raise ConfigError(f"{scan.sweeps:,} sweeps x {n_points:,} delay points x {pixels:,} pixels make {values:,} "
                          "values per sweep-resolved array", file=config_path, key_path="scan.sweeps",
                          allowed=f"at most {MAX_SWEEP_VALUES:,} (fewer sweeps, delay points or pixels)")


def build_grid_ps(segments: list[object]) -> np.ndarray:
    """Merge delay segments into one ascending grid in ps, duplicates (within 1e-6 ps) removed."""
    allp = np.sort(np.concatenate([_segment_delays(s) for s in segments]))
    keep = np.ones(allp.size, dtype=bool)
    keep[1:] = np.diff(allp) > _SAME_DELAY_PS
    return allp[keep]


def sweep_orders(n_points: int, sweeps: int, order: str, seed: int | None) -> list[np.ndarray]:
    """The index order of the grid points in each sweep.

    ``alternating`` runs ascending on even sweeps and descending on odd ones; ``shuffled`` draws a fresh
    permutation per sweep from a generator seeded with ``seed`` (so a rerun with the same seed repeats it).
    """
    up = np.arange(n_points)
    if order == "ascending":
        return [up.copy() for _ in range(sweeps)]
    if order == "descending":
        return [up[::-1].copy() for _ in range(sweeps)]
    if order == "alternating":
        return [up.copy() if k % 2 == 0 else up[::-1].copy() for k in range(sweeps)]
    if order == "shuffled":
        rng = np.random.default_rng(seed)
        return [rng.permutation(n_points) for _ in range(sweeps)]
    raise ValueError(f"unknown order {order!r}")


@dataclass(frozen=True)
class ScanPlan:
    """Everything the runner needs to know about where to go and for how long."""

    delays_ps: np.ndarray
    positions_mm: np.ndarray
    orders: list[np.ndarray]
    shots_per_point: int
    dark_shots: int
    repetition_rate_hz: float
    velocity_mm_per_s: float
    #: What sets the delay: "stage" (positions_mm) or "generator" (generator_settings_ps; the stage then
    #: waits at time zero, so every positions_mm is time_zero_mm).
    axis: str = "stage"
    generator_settings_ps: np.ndarray | None = None
    settle_s: float = 0.0

    @property
    def n_points(self) -> int:
        return int(self.delays_ps.size)

    @property
    def sweeps(self) -> int:
        return len(self.orders)

    @property
    def total_points(self) -> int:
        return self.n_points * self.sweeps

    @property
    def total_shots(self) -> int:
        return self.total_points * self.shots_per_point + self.dark_shots

    def point_time_s(self) -> float:
        return self.shots_per_point / self.repetition_rate_hz

    def travel_time_s(self) -> float:
        """Estimated time in moves over all sweeps, from the configured typical stage velocity."""
        total_mm = 0.0
        previous = None
        for order in self.orders:
            path = self.positions_mm[order]
            if previous is not None:
                total_mm += abs(path[0] - previous)
            total_mm += float(np.abs(np.diff(path)).sum())
            previous = path[-1]
        return total_mm / self.velocity_mm_per_s

    def estimated_duration_s(self) -> float:
        """Shots at the repetition rate plus the moves (a lower bound: settling and readout come on top)."""
        return self.total_shots / self.repetition_rate_hz + self.travel_time_s() + self.total_points * self.settle_s


def _refuse_outside(scan: ScanSettings, low_ps: float, high_ps: float, what: str, calibration: str,
                    config_path: str) -> None:
    """ConfigError naming the first segment with a delay outside [low_ps, high_ps] (what the axis reaches)."""
    for i, segment in enumerate(scan.delays):
        d = _segment_delays(segment)
        bad = d[(d < low_ps - _SAME_DELAY_PS) | (d > high_ps + _SAME_DELAY_PS)]
        if bad.size:
            raise ConfigError(f"{bad.size} delay(s) outside {what}, from {bad.min():.6g} to {bad.max():.6g} ps",
                              file=config_path, key_path=f"scan.delays[{i}]",
                              allowed=f"{low_ps:.6g} to {high_ps:.6g} ps with {calibration}")


def _generator_plan(scan: ScanSettings, bench: BenchSettings, config_path: str) -> ScanPlan:
    gen = bench.delay_generator
    if gen is None:
        raise ConfigError("the scan asks for the delay generator but the bench has none", file=config_path,
                          key_path="scan.axis", value=scan.axis, allowed="stage, or add a [bench.delay_generator]")
    low_ps, high_ps = gen.delay_range_ps()
    _check_size(scan, bench, config_path)
    _refuse_outside(scan, low_ps, high_ps, "the delay generator's range",
                    f"range_ps = {list(gen.range_ps)}, time_zero_ps = {gen.time_zero_ps}", config_path)
    grid = build_grid_ps(list(scan.delays))
    _check_size(scan, bench, config_path, grid.size)
    settings = np.clip(grid + gen.time_zero_ps, *gen.range_ps)
    positions = np.full(grid.size, bench.delay_axis.time_zero_mm)
    orders = sweep_orders(grid.size, scan.sweeps, scan.order, scan.seed)
    dark = bench.dark_shots if bench.detector.dark_counts is None else 0
    return ScanPlan(grid, positions, orders, scan.shots_per_point, dark, bench.repetition_rate_hz,
                    bench.delay_axis.velocity_mm_per_s, axis="generator", generator_settings_ps=settings,
                    settle_s=gen.settle_s)


def _checked(plan: ScanPlan, config_path: str) -> ScanPlan:
    duration = plan.estimated_duration_s()
    if not math.isfinite(duration) or duration > _LONGEST_SCAN_S:
        raise ConfigError("the scan would take longer than a year", file=config_path, key_path="scan",
                          value=f"{duration:.3g} s", allowed="fewer shots, points or sweeps, or a faster rate")
    return plan


def make_plan(scan: ScanSettings, bench: BenchSettings, config_path: str = "<config>") -> ScanPlan:
    """Build the plan; raises ConfigError if a delay lies outside what the delay axis can reach.

    With ``scan.axis = "stage"`` the delays become stage positions; with ``"generator"`` they become
    settings of the delay generator (delay + its time_zero_ps) and the stage waits at time zero.
    """
    if scan.axis == "generator":
        return _checked(_generator_plan(scan, bench, config_path), config_path)
    line = bench.delay_axis.delay_line()
    low_ps, high_ps = line.delay_range_ps(bench.delay_axis.travel_mm)
    _check_size(scan, bench, config_path)
    _refuse_outside(scan, low_ps, high_ps, "the stage travel",
                    f"travel_mm = {list(bench.delay_axis.travel_mm)}, passes = {line.passes}, "
                    f"time_zero_mm = {line.time_zero_mm}", config_path)
    grid = build_grid_ps(list(scan.delays))
    _check_size(scan, bench, config_path, grid.size)
    positions = np.asarray(line.position_mm(grid), dtype=np.float64)
    lo, hi = bench.delay_axis.travel_mm
    positions = np.clip(positions, lo, hi)  # only rounding at the very ends can step outside
    orders = sweep_orders(grid.size, scan.sweeps, scan.order, scan.seed)
    dark = bench.dark_shots if bench.detector.dark_counts is None else 0
    return _checked(ScanPlan(grid, positions, orders, scan.shots_per_point, dark, bench.repetition_rate_hz,
                    bench.delay_axis.velocity_mm_per_s), config_path)
