"""Cost of making each saved point durable: ScanStore.write_point with its two flush + fsync commit steps,
beside the same writes with fsync switched off (flush only, which survives a process crash but not a
power cut), on the disk that holds the output folder.

Run by hand: ``python benchmarks/durability.py [--folder DIR] [--pixels 1024] [--points 200] [--sweeps 2]``.

Prints the median and 95th percentile per point of the whole write_point and of its commit part (flush +
fsync), for both, and the difference per point. fsync cost depends on the disk and the file system far
more than on this code: measure on the computer that runs the bench. This is a measurement script.
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
from pathlib import Path
from unittest import mock

import numpy as np

import shotpair.daemon.store as store_module
from shotpair.daemon.point_result import PointResult
from shotpair.daemon.store import ScanStore

__all__ = ["main"]


def fake_result(rng: np.random.Generator, pixels: int) -> PointResult:
    return PointResult(count=rng.integers(900, 1000, pixels), mean=rng.normal(0, 1e-3, pixels),
                       m2=rng.random(pixels), sigma2_sum=rng.random(pixels), counts_on_sum=rng.random(pixels) * 1e7,
                       counts_off_sum=rng.random(pixels) * 1e7, saturated=np.zeros(pixels, np.int64),
                       nonpositive=np.zeros(pixels, np.int64), shots=2000, pairs=1000, blocks=4)


def measure(folder: Path, pixels: int, points: int, sweeps: int, durable: bool) -> tuple[list[float], list[float]]:
    """(whole write_point, flush + fsync part) per point, s."""
    n = max(1, points // sweeps)
    rng = np.random.default_rng(1)
    path = folder / f"durability-{os.getpid()}-{int(durable)}.h5"
    store = ScanStore.create(path, scan_id="bench", title="durability", delays_ps=np.arange(n, dtype=float),
                             wavelengths_nm=np.linspace(420, 720, pixels), sweeps=sweeps,
                             orders=[np.arange(n)] * sweeps, config_text="", instruments={})
    whole, commit = [], []
    try:
        with mock.patch.object(store_module.os, "fsync", os.fsync if durable else (lambda fd: None)):
            for s in range(sweeps):
                for i in range(n):
                    r = fake_result(rng, pixels)
                    store.write_point(s, i, r, r, position_mm=0.0, delay_readback_ps=0.0, measured_at_s=0.0)
                    whole.append(store.last_write_s)
                    commit.append(store.last_commit_s)
        store.finish("complete")
    finally:
        path.unlink(missing_ok=True)
    return whole, commit


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", type=Path, default=None, help="where to write (default: a temporary folder here)")
    ap.add_argument("--pixels", type=int, default=1024)
    ap.add_argument("--points", type=int, default=200)
    ap.add_argument("--sweeps", type=int, default=2)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=args.folder or Path.cwd()) as tmp:
        rows = {}
        for durable in (False, True):
            rows[durable] = measure(Path(tmp), args.pixels, args.points, args.sweeps, durable)

    def ms(values: list[float], q: float | None = None) -> float:
        return 1e3 * (statistics.median(values) if q is None else float(np.quantile(values, q)))

    print(f"{args.points} points x {args.pixels} px, {args.sweeps} sweeps, folder {args.folder or Path.cwd()}")
    for durable, label in ((False, "flush only"), (True, "flush + fsync")):
        whole, commit = rows[durable]
        print(f"{label:14s} write_point median {ms(whole):7.3f} ms (p95 {ms(whole, 0.95):7.3f}); "
              f"commit steps median {ms(commit):7.3f} ms (p95 {ms(commit, 0.95):7.3f})")
    print(f"fsync adds {ms(rows[True][0]) - ms(rows[False][0]):.3f} ms per point (median)")


if __name__ == "__main__":
    main()
