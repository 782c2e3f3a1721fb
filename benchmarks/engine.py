"""Throughput and memory of the ΔOD engine, beside a plain whole-array computation and a raw conversion pass.

Run as ``python benchmarks/engine.py [--shots N] [--repeats R] [--block-shots B]``. Everything runs in one
process, side by side, on the same synthetic bytes (Poisson-like counts of 1e4–5e4, a dark of a few hundred
counts, 1 % common laser noise, a bleach band, rare misfires, frame gaps and an occasional saturated pixel),
and prints medians over the repeats, the ratios, the chunk-size sweep, and peak traced memory at two shot
counts. This is a measurement script, not a test: it asserts nothing and must not be collected by pytest.
"""

from __future__ import annotations

import argparse
import statistics
import time
import tracemalloc
from collections.abc import Callable, Iterator

import numpy as np

from shotpair.daemon.engine import DarkFrame, EngineSettings, PointAccumulator
from shotpair.drivers.base import ShotBlock

__all__ = ["main"]

POOL_BLOCKS = 4  # distinct synthetic blocks cycled through (keeps set-up time and memory small)


def make_pool(pixels: int, block_shots: int, seed: int = 7) -> tuple[list[ShotBlock], DarkFrame]:
    """Synthetic blocks with reference (m = 1) and the matching dark; counts are uint16 as a camera gives."""
    rng = np.random.default_rng(seed)
    wavelength = np.linspace(0.0, 1.0, pixels)
    spectrum = 1e4 + 4e4 * np.exp(-((wavelength - 0.5) / 0.35) ** 2)        # counts, 1e4…5e4
    dark = rng.uniform(400.0, 900.0, pixels)
    bleach = -4e-3 * np.exp(-((wavelength - 0.3) / 0.05) ** 2)             # ΔOD
    blocks = []
    for b in range(POOL_BLOCKS):
        n = block_shots
        pump = (np.arange(n) % 2) == 0
        laser = 1.0 + 0.01 * rng.standard_normal(n)
        laser[rng.choice(n, size=max(1, n // 2000), replace=False)] = 0.002  # misfires
        transmitted = np.where(pump[:, None], 10.0 ** (-bleach), 1.0)
        mean = laser[:, None] * spectrum * transmitted + dark
        counts = np.minimum(rng.poisson(mean), 65535).astype(np.uint16)
        counts[rng.integers(n), rng.integers(pixels)] = 65535                # an occasional saturated pixel
        reference = np.minimum(rng.poisson(laser[:, None] * 3e4 + 500.0), 65535).astype(np.uint16)
        frame_id = np.arange(n, dtype=np.int64) + b * 10 * n
        frame_id[n // 2:] += 1                                               # one dropped frame per block
        blocks.append(ShotBlock(counts=counts, pump_on=pump, frame_id=frame_id, reference=reference))
    return blocks, DarkFrame.from_counts(dark, reference=[500.0])


def stream(pool: list[ShotBlock], shots: int) -> Iterator[ShotBlock]:
    """Blocks from the pool until ``shots`` shots have been delivered (views, no copies)."""
    sent = 0
    k = 0
    while sent < shots:
        block = pool[k % len(pool)]
        sent += block.n_shots
        k += 1
        yield block


def run_engine(pool: list[ShotBlock], dark: DarkFrame, shots: int, settings: EngineSettings) -> float:
    acc = PointAccumulator(dark, settings)
    start = time.perf_counter()
    for block in stream(pool, shots):
        acc.add(block)
    acc.result()
    return time.perf_counter() - start


def whole_array(counts: np.ndarray, pump: np.ndarray, dark: np.ndarray) -> float:
    """The plain batch computation: float64 of all shots at once, −log10(on/off), mean and variance."""
    start = time.perf_counter()
    signal = counts.astype(np.float64) - dark
    with np.errstate(invalid="ignore", divide="ignore"):  # misfires below the dark, as it comes
        delta = -np.log10(signal[pump] / signal[~pump])
    delta.mean(axis=0)
    delta.var(axis=0, ddof=1)
    return time.perf_counter() - start


def chunked_log10(pool: list[ShotBlock], dark: DarkFrame, shots: int, chunk_pairs: int = 64) -> float:
    """The plain chunked computation: float32 dark subtraction, −log10(on/off), running per-pixel sums.

    No pairing rules, rejection, masks or floor: what a minimal cache-sized loop costs on this machine.
    """
    dark32 = dark.counts.astype(np.float32)
    s1 = np.zeros(dark.pixels)
    s2 = np.zeros(dark.pixels)
    start = time.perf_counter()
    for block in stream(pool, shots):
        c = block.counts
        for a in range(0, block.n_shots - 1, 2 * chunk_pairs):
            on = np.subtract(c[a:a + 2 * chunk_pairs:2], dark32, dtype=np.float32)
            off = np.subtract(c[a + 1:a + 2 * chunk_pairs:2], dark32, dtype=np.float32)
            n = min(on.shape[0], off.shape[0])
            with np.errstate(invalid="ignore", divide="ignore"):
                np.divide(off[:n], on[:n], out=on[:n])
                np.log10(on[:n], out=on[:n])
            s1 += on[:n].sum(axis=0)
            s2 += np.einsum("ij,ij->j", on[:n], on[:n])
    return time.perf_counter() - start


def conversion_pass(counts: np.ndarray, rows: int = 256) -> float:
    """A raw uint16 → float64 conversion of the same bytes, chunk by chunk into one reused buffer."""
    buffer = np.empty((rows, counts.shape[1]))
    start = time.perf_counter()
    for first in range(0, counts.shape[0], rows):
        part = counts[first:first + rows]
        np.copyto(buffer[:part.shape[0]], part)
    return time.perf_counter() - start


def median_times(fns: dict[str, Callable[[], float]], repeats: int) -> dict[str, float]:
    """Median time of each function, the repeats interleaved so that a burst of load hits all alike."""
    times: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            times[name].append(fn())
    return {name: statistics.median(values) for name, values in times.items()}


def peak_mib(fn: Callable[[], object]) -> float:
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / 2**20


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shots", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--block-shots", type=int, default=10_000)
    args = parser.parse_args(argv)
    shots, repeats = args.shots, args.repeats
    print(f"shots {shots}, repeats {repeats}, block {args.block_shots} shots; medians; shots/s")
    print(f"{'pixels':>6} {'engine ref off':>15} {'engine ref on':>14} {'whole-array':>12} {'chunked log10':>14}"
          f" {'u16->f64 pass':>14} {'off/whole':>9} {'off/chunked':>11} {'off/pass':>9}")
    pools = {}
    for pixels in (1024, 2048):
        pool, dark = make_pool(pixels, args.block_shots)
        pools[pixels] = (pool, dark)
        n_copy = -(-shots // args.block_shots)
        counts = np.concatenate([pool[k % len(pool)].counts for k in range(n_copy)])[:shots]
        pump = (np.arange(counts.shape[0]) % 2) == 0
        n_pairs = counts.shape[0] // 2
        pump_even = pump.copy()
        pump_even[2 * n_pairs:] = False
        t = median_times({
            "off": lambda: run_engine(pool, dark, shots, EngineSettings()),
            "on": lambda: run_engine(pool, dark, shots, EngineSettings(use_reference=True)),
            "whole": lambda: whole_array(counts[:2 * n_pairs], pump[:2 * n_pairs], dark.counts),
            "chunked": lambda: chunked_log10(pool, dark, shots),
            "pass": lambda: conversion_pass(counts),
        }, repeats)
        t_off, t_on, t_whole, t_chunk, t_pass = t["off"], t["on"], t["whole"], t["chunked"], t["pass"]
        rate = lambda t: shots / t  # noqa: E731
        print(f"{pixels:>6} {rate(t_off):>15,.0f} {rate(t_on):>14,.0f} {rate(t_whole):>12,.0f} {rate(t_chunk):>14,.0f}"
              f" {rate(t_pass):>14,.0f} {t_whole / t_off:>8.2f}x {t_chunk / t_off:>10.2f}x {t_pass / t_off:>8.2f}x")
        del counts

    print("\nchunk size sweep, 1024 px, reference off (shots/s):")
    pool, dark = pools[1024]
    configs = {f"{c}": EngineSettings(chunk_pairs=c) for c in (8, 16, 32, 64, 128, 256)}
    configs["exact_floor=True"] = EngineSettings(exact_floor=True)
    configs["work_dtype=float64"] = EngineSettings(work_dtype="float64")
    t = median_times({name: (lambda cfg=cfg: run_engine(pool, dark, shots, cfg)) for name, cfg in configs.items()},
                     repeats)
    print("  " + "   ".join(f"{name}: {shots / value:,.0f}" for name, value in t.items()))

    print("\npeak traced memory (MiB), 1024 px, input blocks allocated beforehand:")
    for n in (shots, 4 * shots):
        mem = peak_mib(lambda: run_engine(pool, dark, n, EngineSettings(use_reference=True)))
        print(f"  engine, {n:>9,} shots: {mem:8.2f}")
    small = min(shots, 50_000)
    counts = np.concatenate([pool[k % len(pool)].counts for k in range(-(-2 * small // args.block_shots))])
    for n in (small // 2, small):
        n -= n % 2
        pump = (np.arange(n) % 2) == 0
        mem = peak_mib(lambda: whole_array(counts[:n], pump, dark.counts))
        print(f"  whole-array, {n:>9,} shots: {mem:8.2f}")


if __name__ == "__main__":
    main()
