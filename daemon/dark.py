"""The dark: mean counts per pixel with the probe blocked, measured block by block or given as numbers.

Part of the ΔOD engine; pure numpy, no I/O. Converts uint16 to float64 before any arithmetic (uint16
subtraction wraps around).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import InstrumentReplyError, ShotpairError

from .welford import PixelStats

__all__ = ["DarkFrame", "DarkAccumulator", "dark_from_blocks"]

@dataclass(frozen=True)
class DarkFrame:
    """Mean counts per pixel with the probe blocked (float64, counts), and of the reference channel."""

    counts: np.ndarray
    reference: np.ndarray | None = None
    shots: int = 0
    std_counts: np.ndarray | None = None

    @classmethod
    def from_counts(cls, counts: Sequence[float] | np.ndarray, reference: Sequence[float] | np.ndarray | None = None
                    ) -> "DarkFrame":
        """A dark given as numbers (from a bench file, or zeros), counts per pixel."""
        c = np.asarray(counts, dtype=np.float64).reshape(-1)
        r = None if reference is None else np.asarray(reference, dtype=np.float64).reshape(-1)
        return cls(counts=c, reference=r)

    @property
    def pixels(self) -> int:
        return int(self.counts.shape[0])


class DarkAccumulator:
    """Averages blocks recorded with the shutter closed into a :class:`DarkFrame`, block by block."""

    def __init__(self, chunk_shots: int = 256) -> None:
        self._chunk = max(1, int(chunk_shots))
        self._stats: PixelStats | None = None
        self._ref: PixelStats | None = None
        self._ref_missing = False

    def add(self, block: ShotBlock) -> None:
        """Add every shot of ``block`` (pump and probe states are irrelevant with the shutter closed)."""
        if self._stats is None:
            self._stats = PixelStats(block.pixels)
            if block.reference is not None:
                self._ref = PixelStats(block.reference.shape[1])
        if block.pixels != self._stats.pixels:
            raise InstrumentReplyError(f"dark block has {block.pixels} pixels, earlier ones {self._stats.pixels}",
                                       instrument="detector")
        for start in range(0, block.n_shots, self._chunk):
            # float64 before any arithmetic: uint16 would wrap
            self._stats.update(block.counts[start:start + self._chunk].astype(np.float64))
            if self._ref is not None and block.reference is not None:
                self._ref.update(block.reference[start:start + self._chunk].astype(np.float64))
        if self._ref is not None and block.reference is None:
            self._ref_missing = True

    def frame(self) -> DarkFrame:
        """The dark measured so far. Raises ShotpairError if no shot was added."""
        if self._stats is None or int(self._stats.count[0]) == 0:
            raise ShotpairError("no dark shots were recorded")
        ref = None if (self._ref is None or self._ref_missing) else self._ref.mean.copy()
        return DarkFrame(counts=self._stats.mean.copy(), reference=ref, shots=int(self._stats.count[0]),
                         std_counts=np.sqrt(self._stats.variance))


def dark_from_blocks(blocks: Iterable[ShotBlock]) -> DarkFrame:
    """Mean counts per pixel (and reference channel) over all shots of ``blocks``; float64 counts."""
    acc = DarkAccumulator()
    for block in blocks:
        acc.add(block)
    return acc.frame()
