"""Human-readable progress for long scans: a one-line bar on a terminal, sparse lines in a log file.

Formatting only: it reads events, never touches instruments or files.
"""

from __future__ import annotations

import sys
from typing import TextIO

import numpy as np

from .events import PointSaved

__all__ = ["format_duration", "ProgressPrinter"]


def format_duration(seconds: float) -> str:
    """``h:mm:ss`` (or ``m:ss`` under an hour) for a duration in s."""
    if not np.isfinite(seconds):
        return "?"
    s = int(round(max(seconds, 0.0)))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"


class ProgressPrinter:
    """Prints PointSaved events as a progress bar (terminal) or as a line every few percent (pipe)."""

    def __init__(self, stream: TextIO | None = None, width: int = 24) -> None:
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.width = width
        self._last_percent = -100.0

    def line(self, ev: PointSaved) -> str:
        frac = ev.points_done / max(ev.points_total, 1)
        filled = int(round(frac * self.width))
        bar = "#" * filled + "-" * (self.width - filled)
        res = ev.result
        total_pairs = res.pairs + res.rejected_pairs
        rejected = res.rejected_pairs / total_pairs if total_pairs else 0.0
        excess = float(np.nanmedian(res.excess_noise)) if np.any(np.isfinite(res.excess_noise)) else float("nan")
        return (f"sweep {ev.sweep + 1} point {ev.position_in_sweep + 1} [{bar}] {100 * frac:5.1f}% "
                f"delay {ev.delay_ps:10.3f} ps  {ev.shots_per_s:8.0f} shots/s  rejected {100 * rejected:4.1f}%  "
                f"noise/floor {excess:4.2f}  ETA {format_duration(ev.eta_s)}")

    def point(self, ev: PointSaved) -> None:
        percent = 100.0 * ev.points_done / max(ev.points_total, 1)
        if self.tty:
            self.stream.write("\r" + self.line(ev) + "\x1b[K")
            self.stream.flush()
        elif percent - self._last_percent >= 5.0 or ev.points_done == ev.points_total:
            self._last_percent = percent
            self.stream.write(self.line(ev) + "\n")
            self.stream.flush()

    def finish(self) -> None:
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()
