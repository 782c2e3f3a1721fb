"""Serve one simulated SCPI device on a raw TCP socket at 127.0.0.1 (VISA's ``TCPIP0::…::SOCKET`` kind).

What it is for: the wire under the real ``scpi`` drivers when they are tested without hardware. One
thread waits for connections on the listening socket; each connection gets its own thread and its own
:class:`~shotpair.simulators.wire.scpi_device.ScpiParser` on the shared device. Replies are sent as the
socket accepts them; when a new message arrives while part of a reply is still unsent (the controller
did not read it), the rest of the reply is dropped and -410 is queued (IEEE 488.2 "query interrupted").

What it must not do: bind to anything but 127.0.0.1, interpret bytes (the parser does), sleep (threads
wait in select with a timeout and watch a stop event), or close a socket that another thread waits on:
each thread closes only its own socket, and closes it with linger 0 so that no port lingers.
"""

from __future__ import annotations

import logging
import select
import socket
import struct
import threading
from collections import deque

from shotpair.drivers.errors import TransportError

from .scpi_device import Interrupted, ScpiDevice

__all__ = ["HOST", "ScpiTcpServer"]

#: The only address the simulators listen on.
HOST = "127.0.0.1"
_RECV_BYTES = 65536

log = logging.getLogger(__name__)


def _close(sock: socket.socket) -> None:
    """Close at once with linger 0 (reset, no TIME_WAIT); never raises."""
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    except OSError:
        pass
    try:
        sock.close()
    except OSError:
        pass


class ScpiTcpServer:
    """A listening socket on 127.0.0.1 serving one device, one thread per connection.

    Parameters
    ----------
    device:
        The simulated device (shared by every connection: one error queue, one set of faults).
    port:
        TCP port; 0 (default) lets the system choose a free one (see :attr:`port`).
    poll_s:
        Longest time a thread waits in select before it looks at the stop event again, in s; it bounds
        how long :meth:`stop` takes for idle connections.

    Raises
    ------
    TransportError
        From :meth:`start`, if the port cannot be bound.
    """

    def __init__(self, device: ScpiDevice, *, port: int = 0, poll_s: float = 0.05) -> None:
        if not 0 <= int(port) <= 65535:
            raise ValueError(f"port must be in 0..65535, got {port!r}")
        self.device = device
        self.poll_s = poll_s
        self._wanted_port = int(port)
        self._port: int | None = None
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._accept_thread: threading.Thread | None = None
        self._sessions: list[threading.Thread] = []

    # -- public --------------------------------------------------------------------------------------
    @property
    def port(self) -> int:
        """The port listened on (after :meth:`start`)."""
        if self._port is None:
            raise RuntimeError("the server is not started")
        return self._port

    @property
    def address(self) -> str:
        """``tcp://127.0.0.1:<port>``, the plain-socket transport address."""
        return f"tcp://{HOST}:{self.port}"

    @property
    def visa_address(self) -> str:
        """``visa://TCPIP0::127.0.0.1::<port>::SOCKET``, the VISA transport address."""
        return f"visa://TCPIP0::{HOST}::{self.port}::SOCKET"

    @property
    def connections(self) -> int:
        """Connections being served now."""
        with self._lock:
            return sum(t.is_alive() for t in self._sessions)

    def inject(self, fault: str, count: int = 1) -> None:
        """Arm a fault of the device (``no_reply``, ``garbled``, ``disconnect``) for the next ``count``."""
        self.device.faults.arm(fault, count)

    def start(self) -> "ScpiTcpServer":
        """Bind, listen and start accepting. Returns self. Raises TransportError if the port is taken."""
        if self._accept_thread is not None:
            raise RuntimeError("the server is already started")
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        try:
            if self._wanted_port:
                listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            listener.bind((HOST, self._wanted_port))
            listener.listen(8)
            listener.setblocking(False)
        except OSError as exc:
            _close(listener)
            raise TransportError(f"cannot listen on {HOST}:{self._wanted_port}: {exc.strerror or exc}",
                                 instrument=self.device.name) from None
        self._port = listener.getsockname()[1]
        self._accept_thread = threading.Thread(target=self._accept_loop, args=(listener,), daemon=True,
                                               name=f"sim-{self.device.name}-accept")
        self._accept_thread.start()
        return self

    def request_stop(self) -> None:
        """Tell every thread to end, without waiting (call :meth:`stop` to join; stops several servers
        in parallel)."""
        self._stop.set()

    def stop(self, timeout_s: float = 10.0) -> bool:
        """Stop accepting, close every connection and join the threads; safe to call twice.

        Waits at most ``timeout_s`` (s) in all. Returns True when every thread has ended (a connection
        busy generating a very large block may need longer; it ends on its own).
        """
        self._stop.set()
        threads = ([self._accept_thread] if self._accept_thread is not None else [])
        for t in threads:
            t.join(timeout_s)
        with self._lock:
            sessions = list(self._sessions)
        for t in sessions:
            t.join(timeout_s)
        alive = [t.name for t in threads + sessions if t.is_alive()]
        if alive:
            log.warning("%s: threads still running after stop: %s", self.device.name, ", ".join(alive))
        return not alive

    def __enter__(self) -> "ScpiTcpServer":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- threads -------------------------------------------------------------------------------------
    def _accept_loop(self, listener: socket.socket) -> None:
        try:
            while not self._stop.is_set():
                readable, _, _ = select.select([listener], [], [], self.poll_s)
                if not readable:
                    continue
                try:
                    conn, _peer = listener.accept()
                except (BlockingIOError, InterruptedError):
                    continue
                except OSError as exc:
                    log.warning("%s: accept failed: %s", self.device.name, exc)
                    continue
                conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                conn.setblocking(False)
                thread = threading.Thread(target=self._session, args=(conn,), daemon=True,
                                          name=f"sim-{self.device.name}-session")
                with self._lock:
                    self._sessions = [t for t in self._sessions if t.is_alive()] + [thread]
                thread.start()
        finally:
            _close(listener)

    def _session(self, conn: socket.socket) -> None:
        parser = self.device.parser(stop=self._stop)
        pending: deque[memoryview] = deque()
        try:
            while not self._stop.is_set():
                readable, writable, _ = select.select([conn], [conn] if pending else [], [], self.poll_s)
                if writable:
                    self._send(conn, pending)
                if not readable:
                    continue
                data = conn.recv(_RECV_BYTES)
                if not data:
                    break  # the controller closed the connection
                if pending:
                    parser.interrupt()
                    pending.clear()
                for chunk in parser.receive(data):
                    if len(chunk):
                        pending.append(memoryview(chunk))
                if parser.close_requested:
                    log.info("%s: disconnect fault: closing a connection", self.device.name)
                    break
                self._send(conn, pending)
        except Interrupted:
            pass
        except OSError as exc:
            log.debug("%s: connection ended: %s", self.device.name, exc)
        finally:
            _close(conn)

    @staticmethod
    def _send(conn: socket.socket, pending: deque[memoryview]) -> None:
        """Send what the socket takes now; the rest stays pending."""
        while pending:
            view = pending[0]
            try:
                sent = conn.send(view)
            except BlockingIOError:
                return
            if sent < len(view):
                pending[0] = view[sent:]
                return
            pending.popleft()
