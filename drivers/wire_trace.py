"""Wire tracing: log every byte to and from an instrument, for debugging a bench.

:class:`TracedTransport` wraps any :class:`~shotpair.drivers.transports.Transport` and writes one line
per event, with a monotonic timestamp in s, the instrument name, the direction and the bytes::

    12.345678 stage → *IDN?\\x0a
    12.345912 stage ← SIM,STAGE,0,1.0\\x0a

Printable ASCII is shown as is; every other byte, and the backslash, as ``\\xNN``, so a line is
unambiguous and can be turned back into bytes (:func:`unrender`). Received bytes are logged as they come
off the wire, before any line splitting. The wrapper must not change what the inner transport does:
same bytes, same errors, same timeouts. It sets up no logging handlers itself.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Callable
from typing import TextIO

from .transports import ReadTimeout, Transport

__all__ = ["TracedTransport", "render", "unrender", "SEND", "RECEIVE"]

logger = logging.getLogger(__name__)

SEND = "→"
RECEIVE = "←"


def render(data: bytes) -> str:
    """Bytes as printable ASCII, with ``\\xNN`` for everything else and for the backslash itself."""
    return "".join(chr(b) if 0x20 <= b <= 0x7E and b != 0x5C else f"\\x{b:02x}" for b in data)


def unrender(text: str) -> bytes:
    """Inverse of :func:`render`."""
    return re.sub(r"\\x([0-9a-f]{2})", lambda m: chr(int(m.group(1), 16)), text).encode("latin-1")


class TracedTransport(Transport):
    """A transport that logs its traffic and otherwise behaves exactly like ``inner``.

    Parameters
    ----------
    inner : Transport
        The transport to wrap (open or not).
    sink : logging.Logger or text file, optional
        Where lines go: a logger (at ``level``) or anything with ``write`` (one line each, flushed).
        Defaults to this module's logger, ``shotpair.drivers.wire_trace``.
    level : int
        Logging level when ``sink`` is a logger.
    clock : callable
        Returns the timestamp in s; :func:`time.monotonic` unless a test needs another.
    """

    def __init__(self, inner: Transport, sink: logging.Logger | TextIO | None = None, *,
                 level: int = logging.DEBUG, clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__(inner.address, name=inner.name)
        self.inner = inner
        self._sink = sink if sink is not None else logger
        self._level = level
        self._clock = clock

    def _emit(self, marker: str, text: str) -> None:
        line = f"{self._clock():.6f} {self.name} {marker} {text}"
        if isinstance(self._sink, logging.Logger):
            self._sink.log(self._level, "%s", line)
        else:
            self._sink.write(line + "\n")
            self._sink.flush()

    @property
    def is_open(self) -> bool:
        return self.inner.is_open

    def open(self) -> None:
        if self.inner.is_open:
            return
        self._emit("open", self.address)
        try:
            self.inner.open()
        except Exception as exc:
            self._emit("!", f"open failed: {exc}")
            raise

    def close(self) -> None:
        if self.inner.is_open:
            self._emit("close", self.address)
        self.inner.close()

    def write(self, data: bytes) -> None:
        self._emit(SEND, render(data))
        try:
            self.inner.write(data)
        except Exception as exc:
            self._emit("!", f"write failed: {exc}")
            raise

    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        try:
            data = self.inner.read_available(max_bytes, timeout_s, terminator)
        except Exception as exc:
            self._emit("!", f"read failed: {exc}")
            raise
        if data:
            self._emit(RECEIVE, render(data))
        return data

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        try:
            return super().read_until(terminator, timeout_s)
        except ReadTimeout as exc:
            self._emit("!", f"timeout after {timeout_s:g} s waiting for {exc.expected}")
            raise

    def read_exact(self, n: int, timeout_s: float) -> bytes:
        try:
            return super().read_exact(n, timeout_s)
        except ReadTimeout as exc:
            self._emit("!", f"timeout after {timeout_s:g} s waiting for {exc.expected}")
            raise

    def drain(self, timeout_s: float) -> bytes:
        discarded = super().drain(timeout_s)
        self._emit("drain", f"discarded {len(discarded)} B")
        return discarded

