"""The ΔOD statistics engine: shot blocks in, per-pixel ΔOD with honest error bars out.

Turns the detector's single-shot spectra into per-pixel statistics for one delay point: dark correction,
pump-on/pump-off pairing inside unbroken frame runs, four-state pump-only background, robust rejection of
misfire pairs, masking of saturated and non-positive pixels, the shot-noise floor, and mergeable results
(blocks into a point, points of several sweeps into one). Work is vectorised over chunks of pairs sized
for the cache; every per-pair value is computed once per chunk, sums are kept in float64.
This module must not do I/O, start threads, sleep, log per shot, or know about files, queues or sockets.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import ConfigError, InstrumentReplyError

from .dark import DarkAccumulator, DarkFrame, dark_from_blocks
from .pairing import ShotPairs, find_outliers, pair_shots, robust_center_scale
from .point_result import PointResult
from .welford import PixelStats

__all__ = [
    "EngineSettings",
    "DarkFrame",
    "DarkAccumulator",
    "dark_from_blocks",
    "ShotPairs",
    "pair_shots",
    "find_outliers",
    "robust_center_scale",
    "PointResult",
    "PointAccumulator",
    "DEFAULT_CHUNK_PAIRS",
    "CHUNK_ELEMENTS",
    "default_chunk_pairs",
]

LN10 = math.log(10.0)
#: Work elements (pairs × pixels) per chunk when ``chunk_pairs`` is not given. Measured with
#: benchmarks/engine.py on the 2-core development machine (1 MiB L2 per core), shots/s, medians of 9
#: interleaved runs: 1024 px: 32 pairs 230k, 64: 282k, 96: 317k, 128: 321k, 192: 322k, 256: 302k;
#: 2048 px: 32: 162k, 64: 170k, 96: 170k, 128: 169k, 192: 143k, 256: 129k. About 128k elements (128 pairs
#: at 1024 px, 64 at 2048 px) is at or near the best for both.
CHUNK_ELEMENTS = 131_072


def default_chunk_pairs(pixels: int) -> int:
    """Pairs per chunk for ``pixels`` pixels: about CHUNK_ELEMENTS work elements, 16 to 512 pairs."""
    return max(16, min(512, CHUNK_ELEMENTS // max(pixels, 1)))


DEFAULT_CHUNK_PAIRS = default_chunk_pairs(1024)
#: The intensity index used for rejection reads at most this many pixels per shot (every k-th pixel).
INDEX_PIXELS = 64
#: Largest z² = ((A − B)/(A + B))² in a chunk for which atanh(z) is taken from its series to z³ or to z⁵,
#: per work dtype. float32: the neglected term (z⁵/5 at |z| ≤ 0.03, z⁷/7 at |z| ≤ 0.086, i.e. |ΔOD| ≲ 0.075)
#: stays below 5e-9, under float32 rounding of the ratio. float64: below 2e-16, so float64 results agree
#: with a direct log10 to rounding.
_SERIES_W_MAX = {"float32": (0.03**2, 0.086**2), "float64": (0.0007**2, 0.0055**2)}


@dataclass(frozen=True)
class EngineSettings:
    """Detector constants and rules the engine applies; validated on construction.

    Attributes
    ----------
    gain_e_per_count:
        Photoelectrons per count of the sample detector (> 0).
    read_noise_e:
        Read noise of the sample detector, in e⁻ rms (≥ 0).
    saturation_counts:
        Raw count at or above which a pixel is saturated (1…65536; 65536 never saturates).
    reject_threshold_mad:
        A shot whose intensity index lies more than this many robust standard deviations
        (1.4826·MAD) from its group's median is an outlier; None switches rejection off.
    use_reference:
        Divide by the reference detector (the block must carry ``reference``).
    reference_gain_e_per_count, reference_read_noise_e:
        The reference detector's constants; None means the same as the sample detector's.
    chunk_pairs:
        Pairs processed per vectorised chunk (≥ 1), or None for :func:`default_chunk_pairs` of the pixel
        count; a cache-size trade-off, see CHUNK_ELEMENTS.
    work_dtype:
        ``"float32"`` (fast; per-pair relative rounding ~1e-7, sums still float64) or ``"float64"``.
    exact_floor:
        Evaluate the shot-noise σ² of every pair from its own counts (about half the speed) instead of
        at the block's mean counts of each pixel.
    """

    gain_e_per_count: float = 1.0
    read_noise_e: float = 0.0
    saturation_counts: int = 65535
    reject_threshold_mad: float | None = 6.0
    use_reference: bool = False
    reference_gain_e_per_count: float | None = None
    reference_read_noise_e: float | None = None
    chunk_pairs: int | None = None
    work_dtype: str = "float32"
    exact_floor: bool = False

    def __post_init__(self) -> None:
        def bad(key: str, value: object, allowed: str) -> ConfigError:
            return ConfigError("invalid engine setting", key_path=key, value=value, allowed=allowed)

        for key in ("gain_e_per_count", "reference_gain_e_per_count"):
            value = getattr(self, key)
            if value is not None and not (math.isfinite(value) and value > 0):
                raise bad(key, value, "a finite number > 0")
        for key in ("read_noise_e", "reference_read_noise_e"):
            value = getattr(self, key)
            if value is not None and not (math.isfinite(value) and value >= 0):
                raise bad(key, value, "a finite number >= 0")
        if not (isinstance(self.saturation_counts, (int, np.integer)) and 1 <= self.saturation_counts <= 65536):
            raise bad("saturation_counts", self.saturation_counts, "an integer in 1..65536")
        if self.reject_threshold_mad is not None and not (self.reject_threshold_mad > 0):
            raise bad("reject_threshold_mad", self.reject_threshold_mad, "a number > 0, or None to switch off")
        if self.chunk_pairs is not None and not (isinstance(self.chunk_pairs, (int, np.integer))
                                                 and self.chunk_pairs >= 1):
            raise bad("chunk_pairs", self.chunk_pairs, "an integer >= 1, or None for the default")
        if self.work_dtype not in ("float32", "float64"):
            raise bad("work_dtype", self.work_dtype, "'float32' or 'float64'")


# ------------------------------------------------------------------------------------- accumulator


@dataclass
class _Totals:
    saturated: np.ndarray
    nonpositive: np.ndarray
    sigma2_sum: np.ndarray
    on_sum: np.ndarray
    off_sum: np.ndarray
    scalars: dict[str, int] = field(default_factory=lambda: dict.fromkeys(PointResult._SCALARS, 0))


class _ScalarReference(NamedTuple):
    """Per-pair values of a one-channel reference, for one chunk (slices of per-block arrays)."""

    half_log_ratio: np.ndarray  # (p, 1) work dtype: ½·ln(R_on/R_off), 0 on bad rows
    sigma2: np.ndarray          # (p,) float64: reference part of the pair's σ² (OD²), 0 on bad rows
    saturated: np.ndarray       # (p,) bool
    nonpositive: np.ndarray     # (p,) bool


class PointAccumulator:
    """Accumulates the shot blocks of one delay point into per-pixel ΔOD statistics.

    Parameters
    ----------
    dark:
        The dark frame subtracted from every shot (and from the reference when used).
    settings:
        Detector constants and rules; see :class:`EngineSettings`.

    Notes
    -----
    Per pair the engine computes ``z = (A − B)/(A + B)`` with ``A = S_off·R_on``, ``B = S_on·R_off`` (R = 1
    without reference), so that ``ΔOD = −log10(A⁻¹B) = 2·atanh(z)/ln10``. Where every ``|z| ≤ 0.086`` in a
    chunk, atanh is its series to z⁵ (truncation < 1e-8 in ln, below float32 rounding); otherwise the chunk
    uses ``log``. The shot-noise σ² of each pair is evaluated at the block's mean counts per pixel unless
    ``exact_floor`` is set: the two differ by the relative variance of the counts inside a block (Jensen),
    ~1e-4 for 1 % laser noise and N ≥ 1e4 e⁻, 1/N for dim pixels. In four-state mode N is taken from the
    background-subtracted counts, which slightly underestimates the floor where the background is large.
    Moments are kept as sums of deviations from a per-pixel shift (the running mean) within a block and
    merged into the point by Chan's rule once per block.

    Raises ConfigError when ``use_reference`` is set but the dark has no reference channel or a block
    carries none; InstrumentReplyError when a block's pixel or reference shape differs from the dark's.
    """

    def __init__(self, dark: DarkFrame, settings: EngineSettings | None = None) -> None:
        self.settings = settings if settings is not None else EngineSettings()
        s = self.settings
        if s.use_reference and dark.reference is None:
            raise ConfigError("use_reference is set but the dark frame has no reference channel",
                              key_path="use_reference", value=True)
        self.dark = dark
        px = dark.pixels
        self._dtype = np.dtype(s.work_dtype)
        self._dark_w = dark.counts.astype(self._dtype)
        self._two_dark_w = (2.0 * dark.counts).astype(self._dtype)
        self._ref_dark = None if dark.reference is None else dark.reference.astype(np.float64)
        self._ref_dark_w = None if dark.reference is None else dark.reference.astype(self._dtype)
        self._stride = max(1, -(-px // INDEX_PIXELS))
        self._index_dark = float(dark.counts[::self._stride].sum())
        self._index_pixels = int(dark.counts[::self._stride].shape[0])
        gain_r = s.reference_gain_e_per_count or s.gain_e_per_count
        noise_r = s.read_noise_e if s.reference_read_noise_e is None else s.reference_read_noise_e
        # σ² of a pair's ΔOD in OD² = (1/ln10)²·Σ over its readings of [1/(g·S) + σr²/(g·S)²]
        self._a = 1.0 / s.gain_e_per_count / LN10**2
        self._b = (s.read_noise_e / s.gain_e_per_count) ** 2 / LN10**2
        self._a_ref = 1.0 / gain_r / LN10**2
        self._b_ref = (noise_r / gain_r) ** 2 / LN10**2
        self._stats = PixelStats(px)
        self._t = _Totals(np.zeros(px, np.int64), np.zeros(px, np.int64), np.zeros(px), np.zeros(px), np.zeros(px))
        c = self._chunk_pairs = s.chunk_pairs or default_chunk_pairs(px)
        self._u = [np.empty((c, px), np.uint16) for _ in range(2)]
        self._f = [np.empty((c, px), self._dtype) for _ in range(5)]

    # ---------------------------------------------------------------- public

    def add(self, block: ShotBlock) -> None:
        """Pair, reject, mask and accumulate every pair of ``block``; a pair never spans two blocks.

        Raises ConfigError / InstrumentReplyError as described in the class docstring.
        """
        s = self.settings
        if block.pixels != self.dark.pixels:
            raise InstrumentReplyError(f"block has {block.pixels} pixels, the dark {self.dark.pixels}",
                                       instrument="detector")
        reference = None
        if s.use_reference:
            if block.reference is None:
                raise ConfigError("use_reference is set but the detector's blocks carry no reference",
                                  key_path="use_reference", value=True)
            assert self._ref_dark is not None
            m = block.reference.shape[1]
            if m != self._ref_dark.shape[0] or m not in (1, block.pixels):
                raise InstrumentReplyError(f"reference has {m} channels, the dark {self._ref_dark.shape[0]} "
                                           f"(allowed: 1 or {block.pixels})", instrument="detector")
            reference = block.reference
        tot = self._t.scalars
        tot["blocks"] += 1
        tot["shots"] += block.n_shots
        probe_on = block.probe_on
        four_state = probe_on is not None and not bool(np.all(probe_on))
        pairs = pair_shots(block.pump_on, block.frame_id, probe_on if four_state else None)
        tot["gaps"] += pairs.gaps
        tot["phase_breaks"] += pairs.phase_breaks
        tot["unpaired_shots"] += pairs.unpaired
        on_idx, off_idx = pairs.on_index, pairs.off_index

        outlier = self._outliers(block, four_state)
        if outlier is not None and on_idx.size:
            keep = ~(outlier[on_idx] | outlier[off_idx])
            tot["rejected_pairs"] += int(on_idx.size - np.count_nonzero(keep))
            on_idx, off_idx = on_idx[keep], off_idx[keep]
        tot["pairs"] += int(on_idx.size)
        if on_idx.size == 0:
            return

        background = None
        if four_state:
            assert probe_on is not None
            background = self._background(block, probe_on, outlier)
            if background is None:
                tot["background_missing_blocks"] += 1
        sm_offset = self._two_dark_w if background is None else self._two_dark_w + background

        scalar_ref = None
        if reference is not None and reference.shape[1] == 1:
            scalar_ref = self._scalar_reference(reference[:, 0], on_idx, off_idx)
            reference = None
        sums = _BlockSums.start(self._k_shift(), block.pixels)
        # one pass over the block's bytes decides whether chunks must look for saturated entries at all
        # (one pass over the block's bytes: the brightest pixel of every shot, so a chunk needs to look for
        # saturated entries only when one of its shots holds one)
        row_max = block.counts.max(axis=1)
        sums.saturated_rows = row_max >= s.saturation_counts if int(row_max.max()) >= s.saturation_counts else None
        steps = (np.diff(on_idx), np.diff(off_idx))
        c = self._chunk_pairs
        for start in range(0, on_idx.size, c):
            stop = start + c
            ref_part = None if scalar_ref is None else _ScalarReference(*(a[start:stop] for a in scalar_ref))
            rows = [self._rows(block.counts, idx[start:stop], k, steps[k][start:stop - 1])
                    for k, idx in enumerate((on_idx, off_idx))]
            self._chunk(sums, rows[0], rows[1], reference, on_idx[start:stop], off_idx[start:stop], background,
                        sm_offset, ref_part)
        self._finish_block(sums, int(on_idx.size))

    def result(self) -> PointResult:
        """A snapshot of the statistics so far (copies; safe to call at any time, also before any block)."""
        t = self._t
        return PointResult(count=self._stats.count.copy(), mean=self._stats.mean.copy(), m2=self._stats.m2.copy(),
                           sigma2_sum=t.sigma2_sum.copy(), counts_on_sum=t.on_sum.copy(),
                           counts_off_sum=t.off_sum.copy(), saturated=t.saturated.copy(),
                           nonpositive=t.nonpositive.copy(), **t.scalars)

    # ---------------------------------------------------------------- block level

    def _outliers(self, block: ShotBlock, four_state: bool) -> np.ndarray | None:
        s = self.settings
        if s.reject_threshold_mad is None or block.n_shots == 0:
            return None
        # intensity index: dark-corrected counts summed over every k-th pixel (≤ INDEX_PIXELS read, so a
        # uint32 sum cannot overflow)
        raw = np.add.reduce(block.counts[:, ::self._stride], axis=1, dtype=np.uint32)
        index = raw.astype(np.float64) - self._index_dark
        groups = block.pump_on.astype(np.int8)
        if four_state:
            assert block.probe_on is not None
            groups = groups + 2 * block.probe_on.astype(np.int8)
        # expected variance of the index from shot noise, read noise and 1-count quantisation, in counts²
        g = s.gain_e_per_count
        return find_outliers(index, groups, s.reject_threshold_mad, 1.0 / g,
                             self._index_pixels * ((s.read_noise_e / g) ** 2 + 1.0 / 12.0))

    def _background(self, block: ShotBlock, probe_on: np.ndarray, outlier: np.ndarray | None) -> np.ndarray | None:
        """Pump-only signal per pixel (counts): mean(pump on, probe off) − mean(pump off, probe off)."""
        good = ~probe_on if outlier is None else (~probe_on & ~outlier)
        rows_on = np.flatnonzero(good & block.pump_on)
        rows_off = np.flatnonzero(good & ~block.pump_on)
        if rows_on.size == 0 or rows_off.size == 0:
            return None
        diff = self._row_mean(block.counts, rows_on) - self._row_mean(block.counts, rows_off)
        return diff.astype(self._dtype)

    def _row_mean(self, counts: np.ndarray, rows: np.ndarray) -> np.ndarray:
        total = np.zeros(counts.shape[1], dtype=np.float64)
        c = self._chunk_pairs * 2
        for start in range(0, rows.size, c):
            total += np.add.reduce(counts[rows[start:start + c]], axis=0, dtype=np.float64)
        return total / rows.size

    def _scalar_reference(self, ref: np.ndarray, on: np.ndarray, off: np.ndarray) -> _ScalarReference:
        """Per-pair ratio and σ² terms of a one-channel reference, for all pairs of a block at once."""
        assert self._ref_dark is not None
        sat = self.settings.saturation_counts
        raw_on, raw_off = ref[on], ref[off]
        r_on = raw_on.astype(np.float64) - self._ref_dark[0]
        r_off = raw_off.astype(np.float64) - self._ref_dark[0]
        saturated = (raw_on >= sat) | (raw_off >= sat)
        nonpositive = ~saturated & ((r_on <= 0) | (r_off <= 0))
        bad = saturated | nonpositive
        r_on[bad] = 1.0
        r_off[bad] = 1.0
        inv_on, inv_off = 1.0 / r_on, 1.0 / r_off
        sigma2 = self._a_ref * (inv_on + inv_off) + self._b_ref * (inv_on**2 + inv_off**2)
        sigma2[bad] = 0.0
        half = (0.5 * np.log(r_on / r_off)).astype(self._dtype)[:, None]
        return _ScalarReference(half, sigma2, saturated, nonpositive)

    # ---------------------------------------------------------------- chunk level (the hot loop)

    def _k_shift(self) -> np.ndarray | None:
        """Per-pixel shift (atanh units) for the block's moment sums: the running mean, once there is one."""
        if int(self._stats.count.min()) == 0:
            return None
        return (self._stats.mean * (LN10 / 2.0)).astype(self._dtype)

    def _rows(self, counts: np.ndarray, idx: np.ndarray, which: int, steps: np.ndarray) -> np.ndarray:
        """The rows ``idx`` of ``counts``: a strided view when evenly spaced (no copy), else a copy.

        ``steps`` are the differences of consecutive ``idx`` (``np.diff(idx)``).
        """
        first = int(idx[0])
        if idx.size == 1:
            return counts[first:first + 1]
        step = int(steps[0])
        if step > 0 and int(steps.min()) == step and int(steps.max()) == step:
            return counts[first:int(idx[-1]) + 1:step]
        out = self._u[which][:idx.size]
        np.take(counts, idx, axis=0, out=out)
        return out

    def _chunk(self, sums: "_BlockSums", u_on: np.ndarray, u_off: np.ndarray, reference: np.ndarray | None,
               on: np.ndarray, off: np.ndarray, background: np.ndarray | None, sm_offset: np.ndarray,
               scalar_ref: _ScalarReference | None) -> None:
        p = on.size
        wd = self._dtype
        sat = self.settings.saturation_counts
        d, sm, z, w, x = (f[:p] for f in self._f)
        s_on = s_off = ra = rb = raw_on = raw_off = None
        if reference is None:
            np.subtract(u_off, u_on, out=d, dtype=wd)  # S_off − S_on: the dark cancels; float, so no wrap
            np.add(u_off, u_on, out=sm, dtype=wd)
            sm -= sm_offset                            # S_off + S_on (minus the pump-only background)
            if background is not None:
                d += background
        else:
            s_on = np.subtract(u_on, self._dark_w, dtype=wd)
            s_off = np.subtract(u_off, self._dark_w, dtype=wd)
            if background is not None:
                s_on -= background
            raw_on, raw_off = reference[on], reference[off]
            ra = np.subtract(raw_on, self._ref_dark_w, dtype=wd)
            rb = np.subtract(raw_off, self._ref_dark_w, dtype=wd)
            np.multiply(s_off, ra, out=z)              # A = S_off·R_on
            np.multiply(s_on, rb, out=w)               # B = S_on·R_off
            np.subtract(z, w, out=d)
            np.add(z, w, out=sm)
        np.divide(d, sm, out=z)
        np.multiply(z, z, out=w)
        w_max = float(w.max())

        # cheap whole-chunk checks first; the per-entry mask is built only when one of them fires
        suspect = not (w_max < 1.0) or float(sm.min()) <= 0
        if sums.saturated_rows is not None:
            suspect = suspect or bool(sums.saturated_rows[on].any() or sums.saturated_rows[off].any())
        if reference is not None:
            assert raw_on is not None and raw_off is not None and s_on is not None and s_off is not None
            assert ra is not None and rb is not None
            suspect = (suspect or int(raw_on.max()) >= sat or int(raw_off.max()) >= sat
                       or min(float(s_on.min()), float(s_off.min()), float(ra.min()), float(rb.min())) <= 0)
        if scalar_ref is not None:
            suspect = suspect or bool(scalar_ref.saturated.any() or scalar_ref.nonpositive.any())
        invalid = None
        if suspect:
            invalid = self._mask(u_on, u_off, d, sm, s_on, s_off, ra, rb, raw_on, raw_off, scalar_ref)
            np.divide(d, sm, out=z)
            np.multiply(z, z, out=w)
            w_max = float(w.max())

        series2, series3 = _SERIES_W_MAX[self.settings.work_dtype]
        if w_max <= series2:                    # atanh(z) = z·(1 + z²/3) + O(z⁵)
            np.multiply(w, 1.0 / 3.0, out=x)
            x += 1.0
            x *= z
        elif w_max <= series3:                  # atanh(z) = z·(1 + z²/3 + z⁴/5) + O(z⁷)
            np.multiply(w, 0.2, out=x)
            x += 1.0 / 3.0
            x *= w
            x += 1.0
            x *= z
        else:                                          # atanh(z) = ½·ln((1 + z)/(1 − z)) = ½·ln(A/B)
            np.add(sm, d, out=x)
            np.subtract(sm, d, out=w)
            x /= w
            np.log(x, out=x)
            x *= 0.5
        if scalar_ref is not None:
            x += scalar_ref.half_log_ratio

        if sums.shift is None:                          # first data of this point: shift by this chunk's mean
            if invalid is not None:
                np.copyto(x, 0, where=invalid)
            n0 = p - (0 if invalid is None else np.count_nonzero(invalid, axis=0))
            sums.shift = (np.add.reduce(x, axis=0, dtype=np.float64) / np.maximum(n0, 1)).astype(wd)
        x -= sums.shift
        if invalid is not None:
            np.copyto(x, 0, where=invalid)
            sums.masked += np.count_nonzero(invalid, axis=0)
        sums.s1 += np.add.reduce(x, axis=0)
        sums.s2 += np.einsum("ij,ij->j", x, x)
        self._noise_and_counts(sums, d, sm, z, w, s_on, s_off, ra, rb, invalid, scalar_ref)

    def _noise_and_counts(self, sums: "_BlockSums", d: np.ndarray, sm: np.ndarray, z: np.ndarray, w: np.ndarray,
                          s_on: np.ndarray | None, s_off: np.ndarray | None,
                          ra: np.ndarray | None, rb: np.ndarray | None, invalid: np.ndarray | None,
                          scalar_ref: _ScalarReference | None) -> None:
        """Add a chunk's count sums and (exact mode) inverse-count sums to the block sums; z, w are scratch."""
        exact = self.settings.exact_floor

        def add_inverse(values: np.ndarray, scratch: np.ndarray, factor: float, slot: int) -> None:
            # Σ 1/S and Σ 1/S² over valid entries, for S = values/factor
            np.reciprocal(values, out=scratch)
            if invalid is not None:
                np.copyto(scratch, 0, where=invalid)
            sums.inv1[slot] += np.add.reduce(scratch, axis=0) * factor
            sums.inv2[slot] += np.einsum("ij,ij->j", scratch, scratch) * factor**2

        if s_on is None:
            if exact:
                np.subtract(sm, d, out=z)                # 2·S_on (masked entries hold 1)
                np.add(sm, d, out=w)                     # 2·S_off
                add_inverse(z, z, 2.0, 0)
                add_inverse(w, w, 2.0, 0)
            if invalid is not None:
                np.copyto(sm, 0, where=invalid)          # d is already 0 there
            sum_sm = np.add.reduce(sm, axis=0)
            sum_d = np.add.reduce(d, axis=0)
            sums.on += 0.5 * (sum_sm - sum_d)
            sums.off += 0.5 * (sum_sm + sum_d)
        else:
            assert s_off is not None and ra is not None and rb is not None
            if exact:
                for arr, slot in ((s_on, 0), (s_off, 0), (ra, 1), (rb, 1)):
                    add_inverse(arr, z, 1.0, slot)
            if invalid is not None:
                for arr in (s_on, s_off, ra, rb):
                    np.copyto(arr, 0, where=invalid)
            sums.on += np.add.reduce(s_on, axis=0)
            sums.off += np.add.reduce(s_off, axis=0)
            sums.ref_on += np.add.reduce(ra, axis=0)
            sums.ref_off += np.add.reduce(rb, axis=0)
        if scalar_ref is not None:
            if invalid is None:
                sums.ref_sigma2 += float(scalar_ref.sigma2.sum())
            else:
                sums.ref_sigma2 += scalar_ref.sigma2 @ ~invalid

    def _finish_block(self, sums: "_BlockSums", pairs: int) -> None:
        """Turn a block's shifted sums into moments, merge them, and add its noise and count totals."""
        t = self._t
        n = pairs - sums.masked
        n_safe = np.maximum(n, 1)
        assert sums.shift is not None
        offset = sums.s1 / n_safe
        mean = sums.shift.astype(np.float64) + offset
        m2 = np.maximum(sums.s2 - sums.s1 * offset, 0.0)
        scale = 2.0 / LN10                             # the sums are of atanh(z) = ½·ln(A/B)
        self._stats.add_moments(n, np.where(n > 0, mean, 0.0) * scale, m2 * scale**2)
        if self.settings.exact_floor:
            sigma2 = self._a * sums.inv1[0] + self._b * sums.inv2[0]
            sigma2 += self._a_ref * sums.inv1[1] + self._b_ref * sums.inv2[1]
        else:
            sigma2 = _sigma2_at_mean(sums.on, n, self._a, self._b)
            sigma2 += _sigma2_at_mean(sums.off, n, self._a, self._b)
            if self.settings.use_reference and self._ref_dark is not None and self._ref_dark.shape[0] > 1:
                sigma2 += _sigma2_at_mean(sums.ref_on, n, self._a_ref, self._b_ref)
                sigma2 += _sigma2_at_mean(sums.ref_off, n, self._a_ref, self._b_ref)
        t.sigma2_sum += sigma2 + sums.ref_sigma2
        t.on_sum += sums.on
        t.off_sum += sums.off

    def _mask(self, u_on: np.ndarray, u_off: np.ndarray, d: np.ndarray, sm: np.ndarray,
              s_on: np.ndarray | None, s_off: np.ndarray | None, ra: np.ndarray | None, rb: np.ndarray | None,
              raw_on: np.ndarray | None, raw_off: np.ndarray | None,
              scalar_ref: _ScalarReference | None) -> np.ndarray:
        """Build a chunk's invalid mask, count it, and neutralise masked entries (d = 0, sums = 1)."""
        sat = self.settings.saturation_counts
        saturated = (u_on >= sat) | (u_off >= sat)
        if s_on is None:
            nonpos = (sm <= d) | (sm <= -d)             # 2·S_on = sm − d ≤ 0 or 2·S_off = sm + d ≤ 0
        else:
            assert s_off is not None and ra is not None and rb is not None
            assert raw_on is not None and raw_off is not None
            nonpos = (s_on <= 0) | (s_off <= 0) | (ra <= 0) | (rb <= 0)
            saturated |= (raw_on >= sat) | (raw_off >= sat)
        if scalar_ref is not None:
            saturated |= scalar_ref.saturated[:, None]
            nonpos |= scalar_ref.nonpositive[:, None]
        nonpos &= ~saturated
        self._t.saturated += np.count_nonzero(saturated, axis=0)
        self._t.nonpositive += np.count_nonzero(nonpos, axis=0)
        invalid = saturated | nonpos
        np.copyto(d, 0, where=invalid)
        np.copyto(sm, 1, where=invalid)
        for arr in (s_on, s_off, ra, rb):
            if arr is not None:
                np.copyto(arr, 1, where=invalid)
        return invalid


@dataclass
class _BlockSums:
    """Per-pixel float64 sums over one block's chunks, merged into the point once per block."""

    shift: np.ndarray | None
    masked: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    on: np.ndarray
    off: np.ndarray
    ref_on: np.ndarray
    ref_off: np.ndarray
    ref_sigma2: np.ndarray
    inv1: list[np.ndarray]
    inv2: list[np.ndarray]
    saturated_rows: np.ndarray | None = None

    @classmethod
    def start(cls, shift: np.ndarray | None, pixels: int) -> "_BlockSums":
        z = lambda: np.zeros(pixels)  # noqa: E731
        return cls(shift, np.zeros(pixels, np.int64), z(), z(), z(), z(), z(), z(), z(), [z(), z()], [z(), z()])


def _sigma2_at_mean(total: np.ndarray, n: np.ndarray, a: float, b: float) -> np.ndarray:
    """n·(a/S̄ + b/S̄²) with S̄ = total/n: Σ over pairs of a/S + b/S² at the mean counts; 0 where n or S̄ ≤ 0."""
    inv = n / np.where(total > 0, total, np.inf)   # 1/S̄; 0 where nothing was counted
    return n * inv * (a + b * inv)
