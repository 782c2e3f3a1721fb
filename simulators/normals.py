"""Fast standard-normal draws for the detector noise, split over a few threads.

numpy's generators release the GIL while they fill an array, so two generators filling two halves of a
block on two cores take half the time; the noise draw is most of the cost of a simulated shot. Each part
has its own generator spawned from one seed, so a seeded bench stays reproducible. No physics here.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

__all__ = ["NormalSource"]

_MIN_PARALLEL = 1 << 15  # below this many values a thread hand-off costs more than it saves


class NormalSource:
    """Fills float32 arrays with independent standard-normal values.

    Parameters
    ----------
    seed:
        A :class:`numpy.random.SeedSequence` to spawn the per-thread generators from.
    threads:
        Number of threads to draw in (1 = in the caller's thread only); capped at the CPU count.
    """

    def __init__(self, seed: np.random.SeedSequence, threads: int = 2) -> None:
        self.threads = max(1, min(int(threads), os.cpu_count() or 1))
        self._gens = [np.random.Generator(np.random.SFC64(s)) for s in seed.spawn(self.threads)]
        self._pool: ThreadPoolExecutor | None = None

    def fill(self, out: np.ndarray) -> np.ndarray:
        """Fill the C-contiguous float32 array ``out`` (any shape) in place and return it."""
        flat = out.reshape(-1)
        if self.threads == 1 or flat.size < _MIN_PARALLEL:
            self._gens[0].standard_normal(out=flat, dtype=np.float32)
            return out
        if self._pool is None:
            self._pool = ThreadPoolExecutor(self.threads - 1, thread_name_prefix="shotpair-sim-noise")
        bounds = np.linspace(0, flat.size, self.threads + 1).astype(int)
        futures = [self._pool.submit(g.standard_normal, out=flat[a:b], dtype=np.float32)
                   for g, a, b in zip(self._gens[1:], bounds[1:-1], bounds[2:])]
        self._gens[0].standard_normal(out=flat[: bounds[1]], dtype=np.float32)
        for f in futures:
            f.result()
        return out

    def close(self) -> None:
        """Stop the helper threads (they are also stopped at interpreter exit)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None
