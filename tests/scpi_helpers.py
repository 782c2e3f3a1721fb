"""A scripted SCPI instrument for driver tests: a table of command → reply, served on a transport end.

The device thread reads program messages from the device end of :func:`pipe_pair` (or any transport),
records each line exactly as received, and answers from its table. Message units separated by ``;`` are
answered in order and their text replies joined by ``;`` in one line (IEEE 488.2 response message), which
is how the resync marker ``*OPC?;*OPC?`` gets ``1;1``. ``SYSTem:ERRor?`` serves the error queue. The
thread polls a stop event and ends by itself after LIFETIME_S; nothing sleeps to synchronise.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Union

from shotpair.drivers.errors import TransportError
from shotpair.drivers.transports import ReadTimeout, Transport

LIFETIME_S = 60.0
POLL_S = 0.02
NO_ERROR = '0,"No error"'


@dataclass(frozen=True)
class Error:
    """A table entry: the command queues this SCPI error entry and sends no reply."""

    entry: str  # e.g. '-222,"Data out of range"'


#: A reply: None (no reply), text (terminator added), raw bytes (sent as is), an Error, or a callable
#: ``f(device, unit)`` returning one of these.
Reply = Union[None, str, bytes, Error, Callable[["ScriptedDevice", str], Any]]


class ScriptedDevice:
    """Plays an instrument on ``end``. Use as a context manager (starts and stops the thread).

    Parameters
    ----------
    end:
        The device's transport end (open).
    table:
        Message unit or header → reply. A unit is looked up whole first (``FREQuency 1000.0``), then by
        its header (``FREQuency``). Unknown units queue ``-113,"Undefined header"`` and send nothing.
    """

    def __init__(self, end: Transport, table: dict[str, Reply] | None = None, *,
                 idn: str = "Acme,Model 7,SN42,1.0") -> None:
        self.end = end
        self.table: dict[str, Reply] = {"*IDN?": idn, "*OPC?": "1", "*CLS": self._clear, "*RST": None}
        self.table.update(table or {})
        self.errors: deque[str] = deque()
        self.lines: list[str] = []
        self.changed = threading.Condition()
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="scripted-scpi-device", daemon=True)

    def __enter__(self) -> "ScriptedDevice":
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        self.thread.join(5.0)
        self.end.close()

    # -- what tests use --------------------------------------------------------------------------

    def wait_lines(self, count: int, timeout_s: float = 5.0) -> list[str]:
        """Block until at least ``count`` lines have been received; returns a copy of them."""
        with self.changed:
            self.changed.wait_for(lambda: len(self.lines) >= count, timeout_s)
            return list(self.lines)

    def since(self, start: int) -> list[str]:
        with self.changed:
            return list(self.lines[start:])

    # -- the thread ------------------------------------------------------------------------------

    @staticmethod
    def _clear(device: "ScriptedDevice", unit: str) -> None:
        device.errors.clear()

    def _run(self) -> None:
        deadline = time.monotonic() + LIFETIME_S
        while not self.stop.is_set() and time.monotonic() < deadline:
            try:
                line = self.end.read_until(b"\n", POLL_S)
            except ReadTimeout:
                continue
            except TransportError:
                return
            text = line[:-1].decode("latin-1")
            with self.changed:
                self.lines.append(text)
                self.changed.notify_all()
            try:
                self._answer(text)
            except TransportError:
                return

    def _answer(self, text: str) -> None:
        texts: list[str] = []
        for unit in text.split(";"):
            reply = self._lookup(unit)
            while callable(reply):
                reply = reply(self, unit)
            if isinstance(reply, Error):
                self.errors.append(reply.entry)
            elif isinstance(reply, bytes):
                if texts:
                    self.end.write(";".join(texts).encode("ascii"))
                    texts = []
                self.end.write(reply)
            elif isinstance(reply, str):
                texts.append(reply)
        if texts:
            self.end.write(";".join(texts).encode("ascii") + b"\n")

    def _lookup(self, unit: str) -> Reply:
        if unit == "SYSTem:ERRor?" and "SYSTem:ERRor?" not in self.table:
            return self.errors.popleft() if self.errors else NO_ERROR
        if unit in self.table:
            return self.table[unit]
        header = unit.split(" ", 1)[0]
        if header in self.table:
            return self.table[header]
        return Error('-113,"Undefined header"')


def gate(event: threading.Event, reply: Reply, timeout_s: float = 10.0) -> Callable[[ScriptedDevice, str], Reply]:
    """A reply that is sent only once ``event`` is set (a slow instrument: its reply comes late)."""

    def held(device: ScriptedDevice, unit: str) -> Reply:
        event.wait(timeout_s)
        return reply

    return held


def block(payload: bytes) -> bytes:
    """A definite-length block reply with its terminator."""
    count = str(len(payload)).encode("ascii")
    return b"#" + str(len(count)).encode("ascii") + count + payload + b"\n"
