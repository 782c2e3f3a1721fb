"""Instrument faults during a scan: which errors are retried, the retry budget, and how a faulted
instrument is tried again.

What it is for: the runner (daemon/runner.py) asks :func:`is_retryable` whether an error from the
detector, delay axis, chopper, shutter or delay generator may be retried, counts retries with a
:class:`RetryBudget` (at most ``retry_attempts`` in any ``retry_window_s``, from ``[bench]``), reopens
an instrument whose connection was lost with :func:`reconnect`, and, when a paused scan is resumed
after a fault, proves with :func:`probe` that the instrument answers again before any shutter opens.

What it must not do: decide what happens to the data (the runner does: a point whose trust is in doubt
is measured again from its start), talk to queues, sockets or files, or sleep.
"""

from __future__ import annotations

import math
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

from shotpair.drivers.errors import (InstrumentError, InstrumentReplyError, InstrumentTimeout, LimitError,
                                     ShotpairError, TransportError)

from .bench import Bench
from .config import BenchSettings

__all__ = ["RETRYABLE", "PROBE_SHOTS", "is_retryable", "fault_source", "Fault", "RetryBudget", "reconnect", "probe"]

#: Errors worth another try: no answer in time, an answer that cannot be used (an error the instrument
#: reports included), a lost connection. A refused setting (LimitError, also when the instrument reports
#: it), a configuration mistake or an illegal state change is not retried: it would give the same answer.
RETRYABLE: tuple[type[InstrumentError], ...] = (InstrumentTimeout, InstrumentReplyError, TransportError)
#: Shots read (and thrown away) to prove that a detector answers again before a scan resumes.
PROBE_SHOTS = 2


def is_retryable(exc: BaseException) -> bool:
    """True for the instrument errors the runner retries (see :data:`RETRYABLE`); never a LimitError."""
    return isinstance(exc, RETRYABLE) and not isinstance(exc, LimitError)


def fault_source(exc: InstrumentError, bench: Bench, default: str) -> str:
    """The bench's name of the instrument ``exc`` came from: its ``instrument`` field when that names one of
    the bench's instruments, else ``default`` (the instrument the failed operation was addressed to)."""
    return exc.instrument if exc.instrument in bench.instruments() else default


@dataclass(frozen=True)
class Fault:
    """An instrument that failed past the retry budget: what the status and the file show.

    ``instrument`` is the bench's name for it (``detector``, ``delay_axis``...), ``error`` the message of the
    last error, ``time_s`` its Unix time, s.
    """

    instrument: str
    error: str
    time_s: float


class RetryBudget:
    """At most ``attempts`` retries in any sliding window of ``window_s`` seconds.

    Parameters
    ----------
    attempts:
        Retries allowed inside one window (≥ 0; 0 allows none).
    window_s:
        Window length, s (> 0), measured on ``clock``.
    clock:
        Monotonic time in s; :func:`time.monotonic` unless a test gives another.

    Raises ValueError for a negative ``attempts`` or a window that is not a positive number.
    """

    def __init__(self, attempts: int, window_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        if attempts < 0:
            raise ValueError(f"attempts must be >= 0, got {attempts!r}")
        if not (math.isfinite(window_s) and window_s > 0):
            raise ValueError(f"window_s must be a number of seconds > 0, got {window_s!r}")
        self.attempts = int(attempts)
        self.window_s = float(window_s)
        self._clock = clock
        self._taken: deque[float] = deque()
        #: Retries granted since the budget was made (never reset): the scan's total.
        self.total = 0

    @classmethod
    def from_settings(cls, settings: BenchSettings) -> "RetryBudget":
        """The budget ``[bench] retry_attempts`` / ``retry_window_s`` describe."""
        return cls(settings.retry_attempts, settings.retry_window_s)

    def in_window(self) -> int:
        """Retries granted within the last ``window_s``."""
        self._forget(self._clock())
        return len(self._taken)

    def take(self) -> bool:
        """Grant one retry if the window has room (and count it); False when the budget is spent."""
        now = self._clock()
        self._forget(now)
        if len(self._taken) >= self.attempts:
            return False
        self._taken.append(now)
        self.total += 1
        return True

    def reset(self) -> None:
        """Forget the window (after a person resumed a faulted scan); ``total`` stays."""
        self._taken.clear()

    def _forget(self, now: float) -> None:
        while self._taken and now - self._taken[0] >= self.window_s:
            self._taken.popleft()


def reconnect(bench: Bench, name: str) -> None:
    """Close and open again the connection of instrument ``name`` (its ``disconnect()`` then ``connect()``).

    Raises what ``connect()`` raises (TransportError, InstrumentTimeout, InstrumentReplyError); the
    instrument is then left disconnected. KeyError for a name the bench does not have.
    """
    inst = bench.instruments()[name]
    inst.disconnect()
    inst.connect()


def probe(bench: Bench, name: str, *, block_timeout_s: float) -> None:
    """Ask instrument ``name`` something that proves it works again; moves nothing and opens nothing.

    The detector reads :data:`PROBE_SHOTS` shots (thrown away; the shutter is closed, so they are dark
    shots) within ``block_timeout_s`` s; the chopper is given its frequency and phase again and, when the
    bench requires lock, must report locked; the delay axis, the delay generator and the shutter are asked
    their read-back. Raises the instrument's error (InstrumentError and children), or InstrumentReplyError
    for an empty block or a chopper that does not lock.
    """
    settings = bench.settings
    if name == "detector":
        block = bench.detector.acquire(PROBE_SHOTS, timeout_s=block_timeout_s)
        if block.n_shots == 0:
            raise InstrumentReplyError("delivered an empty block", instrument=name)
    elif name == "chopper":
        bench.chopper.set_frequency_hz(settings.chopper.frequency_hz or settings.repetition_rate_hz / 2.0)
        bench.chopper.set_phase_deg(settings.chopper.phase_deg)
        if not bench.chopper.is_locked() and settings.chopper.require_lock:
            raise InstrumentReplyError("not locked to the laser", instrument=name)
    elif name == "delay_axis":
        bench.delay_axis.position_mm()
    elif name == "delay_generator" and bench.delay_generator is not None:
        bench.delay_generator.delay_ps()
    elif name == "shutter":
        bench.shutter.is_open()
    elif name not in bench.instruments():
        raise ShotpairError(f"no instrument {name!r} on this bench")
