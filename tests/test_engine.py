"""The ΔOD engine against definitions, shot-noise theory and plain numpy computations.

Every synthetic block is made here with numpy (no simulator). Sources of the expected values are named
beside each check; REFERENCES.md lists them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from shotpair.daemon.engine import (
    DarkFrame,
    EngineSettings,
    PointAccumulator,
    PointResult,
    dark_from_blocks,
    find_outliers,
    pair_shots,
)
from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import ConfigError, ShotpairError

# no overflow, divide-by-zero or invalid-value warning may escape the engine: they would mean inf/NaN
pytestmark = pytest.mark.filterwarnings("error")

LN10 = math.log(10.0)
DTYPES = ["float32", "float64"]


def block(counts: np.ndarray, pump: np.ndarray | list[bool], frame_id: np.ndarray | None = None,
          reference: np.ndarray | None = None, probe: np.ndarray | None = None) -> ShotBlock:
    counts = np.asarray(counts)
    n = counts.shape[0]
    fid = np.arange(n, dtype=np.int64) if frame_id is None else np.asarray(frame_id, dtype=np.int64)
    return ShotBlock(counts=counts.astype(np.uint16), pump_on=np.asarray(pump, dtype=bool), frame_id=fid,
                     reference=reference, probe_on=probe)


def alternating(n: int) -> np.ndarray:
    return (np.arange(n) % 2) == 0


def numpy_pairs(counts: np.ndarray, dark: np.ndarray, on: np.ndarray, off: np.ndarray) -> np.ndarray:
    """Reference per-pair ΔOD = −log10(S_on/S_off) in float64 (IUPAC absorbance definition)."""
    s = counts.astype(np.float64) - dark
    return -np.log10(s[on] / s[off])


def poisson_counts(rng: np.random.Generator, electrons: np.ndarray, gain: float, read_noise_e: float = 0.0,
                   dark_counts: float = 0.0) -> np.ndarray:
    """Camera counts from Poisson photoelectrons, Gaussian read noise, gain and 16-bit quantisation."""
    e = rng.poisson(electrons).astype(np.float64)
    if read_noise_e:
        e += rng.normal(0.0, read_noise_e, e.shape)
    return np.clip(np.rint(e / gain + dark_counts), 0, 65535).astype(np.uint16)


# ---------------------------------------------------------------------------------------- definitions


@pytest.mark.parametrize("dtype", DTYPES)
def test_ten_percent_drop_gives_iupac_absorbance(dtype: str) -> None:
    """IUPAC Gold Book 'absorbance': A = −log10(T); a 10 % drop of transmitted probe → ΔOD = 0.045757."""
    n, px = 40, 8
    dark = np.full(px, 1000.0)
    pump = alternating(n)
    counts = np.where(pump[:, None], 18000, 20000) + 1000
    acc = PointAccumulator(DarkFrame.from_counts(dark), EngineSettings(work_dtype=dtype))
    acc.add(block(np.broadcast_to(counts, (n, px)), pump))
    r = acc.result()
    np.testing.assert_allclose(r.delta_od, 0.045757, atol=5e-7)          # value as printed in REFERENCES.md
    np.testing.assert_allclose(r.delta_od, -np.log10(0.9), atol=2e-8)     # numpy as the reference library
    assert r.pairs == n // 2 and r.unpaired_shots == 0 and r.gaps == 0 and r.shots == n
    np.testing.assert_allclose(r.mean_counts_on, 18000.0, rtol=1e-6)
    np.testing.assert_allclose(r.mean_counts_off, 20000.0, rtol=1e-6)


@pytest.mark.parametrize("transmission", [0.5, 1.3, 0.999])
def test_large_and_small_signals_match_numpy_log10(transmission: float) -> None:
    """Beyond the series range (T = 0.5, 1.3) and well inside it (0.999): −log10(T) by numpy."""
    n, px = 20, 4
    pump = alternating(n)
    counts = np.where(pump[:, None], round(30000 * transmission), 30000) + 500
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, 500.0)))
    acc.add(block(np.broadcast_to(counts, (n, px)), pump))
    expected = -np.log10(round(30000 * transmission) / 30000)
    np.testing.assert_allclose(acc.result().delta_od, expected, atol=3e-7)


# ---------------------------------------------------------------------------------------- shot noise


@pytest.mark.parametrize("exact", [False, True])
def test_poisson_only_noise_matches_shot_noise_formula(exact: bool) -> None:
    """Poisson photon counting (σ(N) = √N): per pair σ(ΔOD) = √(1/N_on + 1/N_off)/ln10 (REFERENCES.md).

    Gain 1, no read noise, N = 4e4 e⁻ so counts fit 16 bits: expected √(2/4e4)/ln10 = 3.0709e-3.
    """
    rng = np.random.default_rng(11)
    n, px, electrons = 20000, 32, 4e4
    pump = alternating(n)
    settings = EngineSettings(gain_e_per_count=1.0, read_noise_e=0.0, exact_floor=exact)
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(px)), settings)
    for k in range(4):
        acc.add(block(poisson_counts(rng, np.full((n // 4, px), electrons), 1.0), pump[: n // 4],
                      np.arange(n // 4) + k * n))
    r = acc.result()
    expected = math.sqrt(2.0 / electrons) / LN10
    assert expected == pytest.approx(3.0709e-3, rel=1e-4)
    per_pair_measured = np.sqrt(r.variance)
    np.testing.assert_allclose(per_pair_measured, expected, rtol=0.04)
    np.testing.assert_allclose(r.floor * np.sqrt(r.count), expected, rtol=0.005)
    np.testing.assert_allclose(np.median(r.excess_noise), 1.0, atol=0.03)
    np.testing.assert_allclose(r.delta_od, 0.0, atol=5 * expected / math.sqrt(n / 2))


def test_check_value_n_1e5_with_gain_two() -> None:
    """REFERENCES.md check value: N = 1e5 e⁻ per reading → 1.942e-3 per pair (here 2 e⁻/count, 5e4 counts)."""
    rng = np.random.default_rng(5)
    n, px, gain = 16000, 16, 2.0
    pump = alternating(n)
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, 300.0)), EngineSettings(gain_e_per_count=gain))
    acc.add(block(poisson_counts(rng, np.full((n, px), 1e5), gain, dark_counts=300.0), pump))
    r = acc.result()
    np.testing.assert_allclose(r.floor * np.sqrt(r.count), 1.942e-3, rtol=0.002)
    np.testing.assert_allclose(np.sqrt(r.variance), 1.942e-3, rtol=0.04)


@pytest.mark.parametrize("exact", [False, True])
def test_floor_with_gain_and_read_noise_matches_formula(exact: bool) -> None:
    """σ² = (1/ln10)²·[(N_on + σr²)/N_on² + (N_off + σr²)/N_off²] (DESIGN §6), N = 2e4 e⁻, σr = 60 e⁻, g = 2.5.

    The measured spread of ΔOD (Poisson + Gaussian read noise drawn with numpy) must agree too.
    """
    rng = np.random.default_rng(3)
    n, px, gain, sr = 20000, 16, 2.5, 60.0
    n_off, n_on = 2.0e4, 1.6e4
    pump = alternating(n)
    electrons = np.where(pump[:, None], n_on, n_off) * np.ones(px)
    counts = poisson_counts(rng, electrons, gain, sr, dark_counts=200.0)
    settings = EngineSettings(gain_e_per_count=gain, read_noise_e=sr, exact_floor=exact)
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, 200.0)), settings)
    acc.add(block(counts, pump))
    r = acc.result()
    sigma = math.sqrt((n_on + sr**2) / n_on**2 + (n_off + sr**2) / n_off**2) / LN10
    np.testing.assert_allclose(r.floor * np.sqrt(r.count), sigma, rtol=0.003)
    np.testing.assert_allclose(np.sqrt(r.variance), sigma, rtol=0.04)
    np.testing.assert_allclose(r.delta_od, -np.log10(n_on / n_off), atol=4 * sigma / math.sqrt(n / 2))


@pytest.mark.parametrize("channels", ["pixels", "one"])
def test_reference_channel_noise_and_laser_cancellation(channels: str) -> None:
    """With a reference: four readings of N each → 2/(√N·ln10); N = 1e6 → 8.686e-4 (REFERENCES.md).

    Per-pixel reference: every reading is N = 1e6 e⁻ (20 e⁻/count). A 2 % common laser fluctuation is
    added to sample and reference; dividing by the reference removes it, so the spread is shot noise only.
    One-channel reference: the reference reads 4e6 e⁻, expected √(2/N + 2/N_ref)/ln10 (same formula).
    """
    rng = np.random.default_rng(8)
    n, px, gain, electrons = 12000, 16, 20.0, 1e6
    pump = alternating(n)
    laser = 1.0 + 0.02 * rng.standard_normal(n)
    counts = poisson_counts(rng, laser[:, None] * np.full((n, px), electrons), gain, dark_counts=100.0)
    if channels == "pixels":
        ref_e = np.full((n, px), electrons)
        expected = 2.0 / (math.sqrt(electrons) * LN10)
        assert expected == pytest.approx(8.686e-4, rel=1e-4)
    else:
        ref_e = np.full((n, 1), 4e6)
        expected = math.sqrt(2 / electrons + 2 / 4e6) / LN10
    reference = poisson_counts(rng, laser[:, None] * ref_e, gain * (4 if channels == "one" else 1), dark_counts=50.0)
    m = reference.shape[1]
    settings = EngineSettings(gain_e_per_count=gain, use_reference=True,
                              reference_gain_e_per_count=gain * (4 if channels == "one" else 1))
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, 100.0), np.full(m, 50.0)), settings)
    acc.add(block(counts, pump, reference=reference))
    r = acc.result()
    np.testing.assert_allclose(r.floor * np.sqrt(r.count), expected, rtol=0.005)
    np.testing.assert_allclose(np.sqrt(r.variance), expected, rtol=0.05)
    # without the reference, the 2 % laser noise dominates: far above the floor
    acc_off = PointAccumulator(DarkFrame.from_counts(np.full(px, 100.0)), EngineSettings(gain_e_per_count=gain))
    acc_off.add(block(counts, pump))
    assert np.all(acc_off.result().excess_noise > 5.0)


# ---------------------------------------------------------------------------------------- pairing


def test_never_pairs_across_a_dropped_frame() -> None:
    """Intensity halves at a frame gap; a pair across it would give −log10(2) = −0.301, pairs within give 0."""
    px = 4
    pump = [True, False, True, False, True, False, True, False, True, False]
    frames = [0, 1, 2, 3, 4, 6, 7, 8, 9, 10]                 # frame 5 dropped
    level = np.array([20000] * 5 + [10000] * 5)
    counts = np.broadcast_to(level[:, None], (10, px))
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(px)), EngineSettings(reject_threshold_mad=None))
    acc.add(block(counts, pump, frames))
    r = acc.result()
    assert r.gaps == 1
    assert r.pairs == 4 and r.unpaired_shots == 2            # shot 4 (before) and shot 9 (after) are alone
    np.testing.assert_allclose(r.delta_od, 0.0, atol=1e-7)


def test_pairing_follows_flags_through_phase_slips() -> None:
    """Irregular flags (two pump-on shots in a row, a slip): pairs follow the flags, ΔOD = −log10(0.9)."""
    pump = np.array([1, 1, 0, 1, 0, 0, 1, 0], dtype=bool)
    pairs = pair_shots(pump, np.arange(8))
    # by the documented rule (adjacent, flags differ, left to right without overlap): (1,2), (3,4), (5,6)
    assert pairs.on_index.tolist() == [1, 3, 6]
    assert pairs.off_index.tolist() == [2, 4, 5]
    assert pairs.unpaired == 2
    counts = np.where(pump[:, None], 18000, 20000) * np.ones((8, 3))
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(3)), EngineSettings(reject_threshold_mad=None))
    acc.add(block(counts, pump))
    np.testing.assert_allclose(acc.result().delta_od, -np.log10(0.9), atol=2e-7)   # IUPAC definition


def test_four_state_background_is_removed() -> None:
    """Pump scatter of 3000 counts on every pumped shot is subtracted; ΔOD then is −log10(0.9) (IUPAC).

    Without subtraction the ratio would be (18000 + 3000)/20000, i.e. ΔOD = −0.0212.
    """
    cycle = [(1, 1), (0, 1), (1, 0), (0, 0)]
    n, px, dark = 400, 6, 700.0
    pump = np.array([cycle[i % 4][0] for i in range(n)], dtype=bool)
    probe = np.array([cycle[i % 4][1] for i in range(n)], dtype=bool)
    probe_counts = np.where(probe, np.where(pump, 18000.0, 20000.0), 0.0)
    counts = np.broadcast_to((probe_counts + 3000.0 * pump + dark)[:, None], (n, px))
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, dark)))
    acc.add(block(counts, pump, probe=probe))
    r = acc.result()
    np.testing.assert_allclose(r.delta_od, -np.log10(0.9), atol=2e-7)
    assert r.pairs == n // 4 and r.unpaired_shots == 0 and r.background_missing_blocks == 0


# ---------------------------------------------------------------------------------------- faults


def test_misfires_are_rejected_and_do_not_move_the_mean() -> None:
    """Near-zero shots are rejected with their pair; the mean equals numpy's over the remaining pairs."""
    rng = np.random.default_rng(21)
    n, px = 4000, 32
    pump = alternating(n)
    laser = 1.0 + 0.01 * rng.standard_normal(n)
    misfires = np.array([10, 501, 1777, 3000])               # in four different pairs
    laser[misfires] = 0.003
    spectrum = rng.uniform(1e4, 4e4, px)
    electrons = laser[:, None] * spectrum * np.where(pump[:, None], 0.98, 1.0)
    counts = poisson_counts(rng, electrons, 1.0, dark_counts=400.0)
    dark = np.full(px, 400.0)
    acc = PointAccumulator(DarkFrame.from_counts(dark), EngineSettings(work_dtype="float64"))
    acc.add(block(counts, pump))
    r = acc.result()
    assert r.rejected_pairs == 4 and r.pairs == n // 2 - 4
    good = np.ones(n // 2, bool)
    good[misfires // 2] = False
    on = np.arange(0, n, 2)[good]
    ref = numpy_pairs(counts, dark, on, on + 1)
    np.testing.assert_allclose(r.delta_od, ref.mean(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(r.variance, ref.var(axis=0, ddof=1), rtol=1e-7)


def test_find_outliers_uses_median_and_mad() -> None:
    """1.4826·MAD is the normal-consistent robust σ (any robust-statistics text; from memory)."""
    values = np.array([100.0, 101.0, 99.0, 100.5, 99.5, 100.0, 50.0])
    flags = find_outliers(values, np.zeros(7, int), threshold_mad=6.0)
    assert flags.tolist() == [False] * 6 + [True]


@pytest.mark.parametrize("dtype", DTYPES)
def test_saturated_pixels_are_masked_and_counted(dtype: str) -> None:
    """Raw counts ≥ saturation on either shot mask that pair's pixel; others match numpy exactly."""
    rng = np.random.default_rng(2)
    n, px = 200, 8
    pump = alternating(n)
    counts = poisson_counts(rng, np.full((n, px), 3e4), 1.0, dark_counts=100.0)
    counts[[4, 5, 17], 3] = 65535                            # pairs 2 (both shots) and 8 on pixel 3
    counts[40, 6] = 60000                                    # at the configured saturation
    # rejection off: a 65535 spike on one of 8 pixels also makes the shot an intensity outlier
    settings = EngineSettings(saturation_counts=60000, work_dtype=dtype, reject_threshold_mad=None)
    acc = PointAccumulator(DarkFrame.from_counts(np.full(px, 100.0)), settings)
    acc.add(block(counts, pump))
    r = acc.result()
    assert r.saturated.tolist() == [0, 0, 0, 2, 0, 0, 1, 0]
    assert r.count.tolist() == [100, 100, 100, 98, 100, 100, 99, 100]
    assert np.all(np.isfinite(r.delta_od)) and np.all(np.isfinite(r.delta_od_error))
    keep = np.setdiff1d(np.arange(100), [2, 8])
    ref = numpy_pairs(counts, np.full(px, 100.0), 2 * keep, 2 * keep + 1)[:, 3]
    assert r.delta_od[3] == pytest.approx(ref.mean(), abs=2e-7)


def test_dark_above_counts_masks_without_wrap_or_nan() -> None:
    """uint16 counts below a float dark: masked and counted (500 − 1000 would wrap to 65036 in uint16)."""
    n, px = 20, 4
    pump = alternating(n)
    counts = np.full((n, px), 20000)
    counts[:, 1] = 500                                       # always below the dark
    counts[6, 2] = 900                                       # one shot below the dark
    dark = np.array([1000.0, 1000.0, 1000.0, 1000.0])
    acc = PointAccumulator(DarkFrame.from_counts(dark), EngineSettings(reject_threshold_mad=None))
    acc.add(block(counts, pump))
    r = acc.result()
    assert r.nonpositive.tolist() == [0, 10, 1, 0] and r.masked.tolist() == [0, 10, 1, 0]
    assert r.count.tolist() == [10, 0, 9, 10]
    assert np.isnan(r.delta_od[1]) and np.isnan(r.delta_od_error[1]) and np.isnan(r.mean_counts_on[1])
    finite = [0, 2, 3]
    assert np.all(np.isfinite(r.delta_od[finite])) and np.all(np.isfinite(r.sigma2_sum))
    np.testing.assert_allclose(r.delta_od[finite], 0.0, atol=1e-7)
    wrapped = np.array([500], np.uint16) - np.array([1000], np.uint16)
    assert int(wrapped[0]) == 65036                            # the trap the engine must avoid (numpy)


@pytest.mark.parametrize("channels", [1, 5])
def test_bad_reference_readings_mask_their_pairs(channels: int) -> None:
    """A saturated or below-dark reference reading masks that pair (all pixels for a one-channel reference)."""
    n, px = 20, 5
    pump = alternating(n)
    counts = np.where(pump[:, None], 18000, 20000) * np.ones((n, px))
    reference = np.full((n, channels), 30000, dtype=np.uint16)
    reference[2, 0] = 65535                                   # pair 1: saturated
    reference[7, 0] = 10                                      # pair 3: below the reference dark
    settings = EngineSettings(use_reference=True, reject_threshold_mad=None)
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(px), np.full(channels, 100.0)), settings)
    acc.add(block(counts, pump, reference=reference))
    r = acc.result()
    hit = slice(None) if channels == 1 else slice(0, 1)
    assert np.all(r.saturated[hit] == 1) and np.all(r.nonpositive[hit] == 1)
    assert np.all(r.count[hit] == n // 2 - 2)
    if channels > 1:
        assert np.all(r.count[1:] == n // 2) and np.all(r.masked[1:] == 0)
    np.testing.assert_allclose(r.delta_od, -np.log10(0.9), atol=2e-7)   # IUPAC; equal references cancel


def test_fewer_than_two_pairs_give_nan_not_errors() -> None:
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(3)))
    empty = acc.result()
    assert np.all(np.isnan(empty.delta_od)) and np.all(empty.count == 0) and empty.pairs == 0
    acc.add(block(np.full((3, 3), 1000), [True, False, True]))
    r = acc.result()
    assert r.pairs == 1 and r.unpaired_shots == 1
    assert np.all(np.isnan(r.delta_od)) and np.all(np.isnan(r.delta_od_error)) and np.all(np.isnan(r.floor))


# ---------------------------------------------------------------------------------------- merging


def random_blocks(seed: int, n_blocks: int, n: int, px: int) -> tuple[list[ShotBlock], np.ndarray]:
    rng = np.random.default_rng(seed)
    spectrum = rng.uniform(1e4, 5e4, px)
    blocks = []
    for k in range(n_blocks):
        pump = alternating(n)
        laser = 1.0 + 0.01 * rng.standard_normal(n)
        electrons = laser[:, None] * spectrum * np.where(pump[:, None], 0.995, 1.0)
        blocks.append(block(poisson_counts(rng, electrons, 1.0, dark_counts=600.0), pump,
                            np.arange(n) + k * 2 * n))
    return blocks, np.full(px, 600.0)


@pytest.mark.parametrize("dtype", DTYPES)
def test_many_blocks_equal_one_big_block_and_numpy(dtype: str) -> None:
    """Ten blocks of 400 shots vs the same 4000 shots as one block vs numpy over all pairs at once."""
    blocks, dark = random_blocks(4, 10, 400, 24)
    settings = EngineSettings(work_dtype=dtype)
    many = PointAccumulator(DarkFrame.from_counts(dark), settings)
    for b in blocks:
        many.add(b)
    counts = np.concatenate([b.counts for b in blocks])
    one = PointAccumulator(DarkFrame.from_counts(dark), settings)
    one.add(block(counts, alternating(counts.shape[0])))
    ref = numpy_pairs(counts, dark, np.arange(0, 4000, 2), np.arange(1, 4000, 2))
    tol = dict(rtol=1e-6, atol=3e-8) if dtype == "float32" else dict(rtol=1e-10, atol=1e-13)
    for r in (many.result(), one.result()):
        assert r.pairs == 2000 and r.rejected_pairs == 0
        np.testing.assert_allclose(r.delta_od, ref.mean(axis=0), **tol)
        np.testing.assert_allclose(r.variance, ref.var(axis=0, ddof=1), rtol=1e-4 if dtype == "float32" else 1e-8)
        np.testing.assert_allclose(r.delta_od_error, ref.std(axis=0, ddof=1) / np.sqrt(2000),
                                   rtol=1e-4 if dtype == "float32" else 1e-8)


def test_merged_sweeps_equal_one_accumulator() -> None:
    """PointResult.combine over three sweeps = one accumulator given all blocks (Chan et al. merge)."""
    blocks, dark = random_blocks(9, 6, 300, 16)
    settings = EngineSettings(work_dtype="float64")      # float32 rounding depends on the running shift
    sweeps = []
    for part in (blocks[:1], blocks[1:4], blocks[4:]):
        acc = PointAccumulator(DarkFrame.from_counts(dark), settings)
        for b in part:
            acc.add(b)
        sweeps.append(acc.result())
    together = PointAccumulator(DarkFrame.from_counts(dark), settings)
    for b in blocks:
        together.add(b)
    want, got = together.result(), PointResult.combine(sweeps)
    for name in ("count", "saturated", "nonpositive"):
        assert np.array_equal(getattr(got, name), getattr(want, name))
    for name in ("delta_od", "variance", "floor", "excess_noise", "mean_counts_on", "mean_counts_off"):
        np.testing.assert_allclose(getattr(got, name), getattr(want, name), rtol=1e-9)
    for name in ("shots", "pairs", "rejected_pairs", "unpaired_shots", "gaps", "blocks"):
        assert getattr(got, name) == getattr(want, name)
    counts = np.concatenate([b.counts for b in blocks])
    ref = numpy_pairs(counts, dark, np.arange(0, len(counts), 2), np.arange(1, len(counts), 2))
    np.testing.assert_allclose(got.delta_od, ref.mean(axis=0), rtol=1e-10)
    np.testing.assert_allclose(got.variance, ref.var(axis=0, ddof=1), rtol=1e-8)
    with pytest.raises(ShotpairError):
        PointResult.combine([])


# ---------------------------------------------------------------------------------------- dark, settings


def test_dark_frame_is_float_mean_of_closed_shutter_blocks() -> None:
    """Dark = mean counts per pixel and reference channel, as numpy's float64 mean over all shots."""
    rng = np.random.default_rng(1)
    parts = [rng.integers(300, 1200, (50, 5)).astype(np.uint16) for _ in range(3)]
    refs = [rng.integers(100, 200, (50, 1)).astype(np.uint16) for _ in range(3)]
    frame = dark_from_blocks(block(c, alternating(50), reference=r) for c, r in zip(parts, refs))
    np.testing.assert_allclose(frame.counts, np.concatenate(parts).astype(np.float64).mean(axis=0), rtol=1e-12)
    assert frame.reference is not None
    np.testing.assert_allclose(frame.reference, np.concatenate(refs).astype(np.float64).mean(axis=0), rtol=1e-12)
    assert frame.shots == 150 and frame.counts.dtype == np.float64
    with pytest.raises(ShotpairError):
        dark_from_blocks([])


def test_bad_settings_and_missing_reference_raise_config_errors() -> None:
    with pytest.raises(ConfigError, match="gain_e_per_count"):
        EngineSettings(gain_e_per_count=0.0)
    with pytest.raises(ConfigError, match="saturation_counts"):
        EngineSettings(saturation_counts=70000)
    with pytest.raises(ConfigError, match="work_dtype"):
        EngineSettings(work_dtype="float16")
    with pytest.raises(ConfigError, match="use_reference"):
        PointAccumulator(DarkFrame.from_counts(np.zeros(2)), EngineSettings(use_reference=True))
    acc = PointAccumulator(DarkFrame.from_counts(np.zeros(2), [0.0]), EngineSettings(use_reference=True))
    with pytest.raises(ConfigError, match="reference"):
        acc.add(block(np.ones((4, 2)), alternating(4)))
    assert issubclass(ConfigError, ShotpairError)
