"""Serve one sans-I/O device on a pseudo-terminal, so a driver reaches it through a real serial port.

What it is for: the simulators' serial wire. :class:`PtyServer` opens a pty (raw mode at once: a fresh
pty echoes and edits lines), and a thread moves bytes between its master side and the device's
``feed``; a driver opens :attr:`PtyServer.slave_path` with pyserial (``serial:///dev/pts/N``) as it would
a USB adapter. One pty per instrument.

What it must not do: interpret the bytes (the device does), send anything the device did not produce,
or close an fd a thread may be waiting on: the thread owns the fds while it runs, waits in ``select``
with a timeout, and checks a stop event; :meth:`PtyServer.stop` joins it before closing anything. The
only waiting besides ``select`` is the device's modelled reply latency (pacing, 0 in fast mode).
POSIX only.
"""

from __future__ import annotations

import array
import fcntl
import logging
import os
import select
import termios
import threading
import time
import tty
from typing import Protocol, Self

__all__ = ["ByteDevice", "PtyServer"]

log = logging.getLogger(__name__)

#: How long the thread waits in one select before looking at the stop event, in s.
POLL_S = 0.02
#: Longest wait for the client to take a reply before the server gives up on writing it, in s.
WRITE_TIMEOUT_S = 2.0


class ByteDevice(Protocol):
    """What a served device offers (the example controller is one)."""

    #: Wall-clock time between a command and its reply, in s (0: answer at once).
    latency_s: float

    def feed(self, data: bytes) -> bytes:
        """Take bytes from the client; return the bytes to send back (possibly empty)."""
        ...

    @property
    def hangup(self) -> bool:
        """True when the device wants the line dropped (the server then closes the pty)."""
        ...


class PtyServer:
    """One device on one pseudo-terminal, served by one thread.

    Parameters
    ----------
    device : ByteDevice
        The device; only the server thread calls its ``feed``.
    name : str
        For the thread's name and logs.

    Notes
    -----
    The client sees a hang-up (device ``hangup``) as a read error on the port: the server closes both
    its fds and the pty disappears. :meth:`stop` is idempotent; the object is a context manager.
    """

    def __init__(self, device: ByteDevice, *, name: str = "pty") -> None:
        self.device = device
        self.name = name
        self._master_fd = -1
        self._slave_fd = -1
        self._slave_path = ""
        self._stop = threading.Event()
        self._pause = threading.Event()  # never set: its wait() paces the modelled latency
        self._thread: threading.Thread | None = None
        self._fds_closed = False
        #: Bytes read from and written to the client, for measurements and logs.
        self.bytes_in = 0
        self.bytes_out = 0

    @property
    def slave_path(self) -> str:
        """The serial port path a client opens (``/dev/pts/N``); empty before :meth:`start`."""
        return self._slave_path

    @property
    def is_running(self) -> bool:
        """Whether the server thread is alive (False after a hang-up or :meth:`stop`)."""
        return self._thread is not None and self._thread.is_alive()

    def start(self) -> str:
        """Open the pty in raw mode and start serving; returns the slave path. Raises OSError."""
        if self._thread is not None:
            raise RuntimeError(f"{self.name}: already started")
        master, slave = os.openpty()
        try:
            tty.setraw(slave)  # at once: a fresh pty echoes and buffers lines
            path = os.ttyname(slave)
        except OSError:
            os.close(master)
            os.close(slave)
            raise
        self._master_fd, self._slave_fd, self._slave_path = master, slave, path
        self._thread = threading.Thread(target=self._run, name=f"pty-{self.name}", daemon=True)
        self._thread.start()
        return path

    def stop(self, timeout_s: float = 2.0) -> None:
        """Stop the thread and close the pty. Never raises for a stopped server.

        Raises RuntimeError if the thread does not end within ``timeout_s`` (the fds are then left open
        rather than closed under it).
        """
        self._stop.set()
        thread = self._thread
        if thread is not None:
            thread.join(timeout_s)
            if thread.is_alive():
                raise RuntimeError(f"{self.name}: server thread did not stop within {timeout_s} s")
        self._close_fds()

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- the thread ------------------------------------------------------------------------------------
    def _close_fds(self) -> None:
        if self._fds_closed or self._master_fd < 0:
            return
        self._fds_closed = True
        for fd in (self._master_fd, self._slave_fd):
            try:
                os.close(fd)
            except OSError:
                pass

    def _available(self) -> int:
        buf = array.array("i", [0])
        try:
            fcntl.ioctl(self._master_fd, termios.FIONREAD, buf, True)
        except OSError:
            return 0
        return buf[0]

    def _write(self, data: bytes) -> bool:
        deadline = time.monotonic() + WRITE_TIMEOUT_S
        while data:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or self._stop.is_set():
                log.warning("%s: client did not take %d reply bytes", self.name, len(data))
                return False
            _, writable, _ = select.select([], [self._master_fd], [], min(remaining, POLL_S))
            if writable:
                sent = os.write(self._master_fd, data)
                self.bytes_out += sent
                data = data[sent:]
        return True

    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                readable, _, _ = select.select([self._master_fd], [], [], POLL_S)
                if not readable:
                    continue
                data = os.read(self._master_fd, max(1, self._available()))
                if not data:
                    continue
                self.bytes_in += len(data)
                reply = self.device.feed(data)
                if reply and self.device.latency_s > 0:
                    self._pause.wait(self.device.latency_s)  # modelled controller latency, not synchronisation
                if reply and not self._write(reply):
                    continue
                if self.device.hangup:
                    log.info("%s: device hung up; closing the pty", self.name)
                    break
        except OSError as exc:  # EIO and the like: the line is gone
            log.info("%s: pty closed (%s)", self.name, exc)
        finally:
            if self.device.hangup:
                self._close_fds()  # this thread owns the fds; nobody else waits on them
