"""The virtual clock shared by every part of the simulated bench.

Fast mode: time only moves when the bench advances it (as fast as the CPU allows). Real-time mode:
virtual time follows the wall clock and ``advance`` paces itself so that virtual time never runs ahead of
wall time. Time is in s. The pacing sleep here is the simulated duration of work, not synchronisation;
nothing else in the simulators may sleep.
"""

from __future__ import annotations

import threading
import time

__all__ = ["VirtualClock"]


class VirtualClock:
    """A monotonic virtual clock in seconds, starting at 0.

    Parameters
    ----------
    realtime:
        False: time advances only through :meth:`advance`. True: time also passes with the wall clock, and
        :meth:`advance` blocks until the wall clock has caught up.
    """

    def __init__(self, realtime: bool = False) -> None:
        self.realtime = realtime
        self._t_s = 0.0
        self._wall0_s = time.monotonic()
        self._lock = threading.Lock()

    def _wall_elapsed_s(self) -> float:
        return time.monotonic() - self._wall0_s

    def now_s(self) -> float:
        """Present virtual time in s."""
        with self._lock:
            if self.realtime:
                self._t_s = max(self._t_s, self._wall_elapsed_s())
            return self._t_s

    def advance(self, dt_s: float) -> float:
        """Let ``dt_s`` seconds (≥ 0) of virtual time pass; returns the new time in s.

        In real-time mode this blocks until the wall clock reaches the new virtual time.
        """
        if dt_s < 0:
            raise ValueError(f"cannot advance the clock by a negative time ({dt_s} s)")
        target = self.now_s() + dt_s
        with self._lock:
            self._t_s = max(self._t_s, target)
        if self.realtime:
            wait = target - self._wall_elapsed_s()
            if wait > 0:
                time.sleep(wait)
        return target

    def advance_to(self, t_s: float) -> float:
        """Advance to virtual time ``t_s`` if it lies ahead; returns the new time in s."""
        return self.advance(max(0.0, t_s - self.now_s()))
