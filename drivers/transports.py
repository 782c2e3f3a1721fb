"""Byte transports to instruments, chosen by an address string from the bench file.

A transport moves bytes and nothing else: it knows no command set, no reply format and no physics.
The address picks the backend through one small registry (:data:`SCHEMES`)::

    loop://                                         in-process loopback (tests)
    tcp://127.0.0.1:5025                            plain TCP socket (raw-socket instruments)
    serial:///dev/ttyUSB0?baudrate=115200&parity=N  serial port (pyserial)
    serial://socket://127.0.0.1:7000                any pyserial URL (socket://, rfc2217://, loop://)
    visa://TCPIP0::127.0.0.1::5025::SOCKET          a VISA resource (pyvisa, pyvisa-py unless ?library=)

Every backend implements one read primitive, :meth:`Transport._recv`; line splitting, exact-length
reads, timeouts and resynchronising are done once, here, on a receive buffer. So all backends behave
alike and one contract test suite holds them to it. This module must not parse replies, retry, sleep,
enumerate ports or VISA resources, or touch the network beyond the one address it is given.
Transports are not thread-safe: one driver owns one transport.
"""

from __future__ import annotations

import abc
import math
import select
import socket
import threading
import time
import urllib.parse
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Self

from .errors import ConfigError, InstrumentTimeout, TransportError

__all__ = [
    "Address",
    "ReadTimeout",
    "Transport",
    "LoopTransport",
    "TcpTransport",
    "SCHEMES",
    "parse_address",
    "make_transport",
    "open_transport",
    "pipe_pair",
    "register_scheme",
]

#: Largest chunk asked of a backend in one call, in bytes.
CHUNK_BYTES = 65536

#: Options :func:`make_transport` accepts, with their defaults.
DEFAULT_OPTIONS: dict[str, Any] = {"trace": False, "open_timeout_s": 3.0, "write_timeout_s": 3.0}


class ReadTimeout(InstrumentTimeout):
    """A read did not complete in time.

    Attributes
    ----------
    received : bytes
        What had arrived of the incomplete reply (still buffered in the transport).
    expected : str
        What the read was waiting for, e.g. ``b'\\n'`` or ``16 bytes``.
    """

    def __init__(self, *, instrument: str, timeout_s: float, received: bytes, expected: str) -> None:
        self.received = received
        self.expected = expected
        super().__init__(
            f"no reply ending in {expected} within {timeout_s:g} s; received so far "
            f"({len(received)} B): {received!r}",
            instrument=instrument,
            timeout_s=timeout_s,
        )


@dataclass(frozen=True)
class Address:
    """A parsed transport address: ``scheme://target?key=value&...``.

    ``text`` is the address as written, ``key_path`` where it was written (for error messages).
    """

    scheme: str
    target: str
    query: dict[str, str] = field(default_factory=dict)
    text: str = ""
    key_path: str = ""

    def error(self, message: str, allowed: str | None = None) -> ConfigError:
        """A ConfigError about this address, naming its key path and text."""
        return ConfigError(message, key_path=self.key_path, value=self.text, allowed=allowed)

    def reject_query(self, allowed_keys: tuple[str, ...] = ()) -> None:
        """Raise ConfigError for any query key not in ``allowed_keys``."""
        for key in self.query:
            if key not in allowed_keys:
                raise self.error(
                    f"unknown setting {key!r} for {self.scheme}://",
                    allowed=", ".join(allowed_keys) if allowed_keys else "no settings",
                )


def _check_timeout(timeout_s: float) -> float:
    if not isinstance(timeout_s, (int, float)) or not math.isfinite(timeout_s) or timeout_s < 0:
        raise ValueError(f"timeout_s must be a finite number >= 0, got {timeout_s!r}")
    return float(timeout_s)


class Transport(abc.ABC):
    """A byte pipe to one instrument.

    Backends implement :meth:`open`, :meth:`close`, :meth:`write` and :meth:`_recv`; the reads are
    built here on a receive buffer. Bytes that arrive after a reply stay buffered for the next read.

    Parameters
    ----------
    address : str
        The address the transport was made from (for messages and traces).
    name : str
        The instrument's name in the bench file, used in every error message.
    """

    def __init__(self, address: str, *, name: str) -> None:
        self.address = address
        self.name = name
        self._rx = bytearray()

    # -- what a backend implements ---------------------------------------------------------------

    @abc.abstractmethod
    def open(self) -> None:
        """Connect. Opening an open transport does nothing. Raises TransportError."""

    @abc.abstractmethod
    def close(self) -> None:
        """Disconnect and release the port. Idempotent; never raises."""

    @property
    @abc.abstractmethod
    def is_open(self) -> bool:
        """True between a successful :meth:`open` and :meth:`close`."""

    @abc.abstractmethod
    def write(self, data: bytes) -> None:
        """Send all of ``data``. Raises TransportError if the bytes cannot be sent."""

    @abc.abstractmethod
    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        """Return 1 to ``max_bytes`` bytes as soon as any arrive, or ``b""`` after ``timeout_s``.

        ``terminator`` is a hint: the reply being waited for ends with it (None: binary or drain). A
        backend may use it to return earlier; it must not cut or consume anything because of it.
        Raises TransportError if the connection is lost. Never raises on a timeout.
        """

    # -- reads, shared by every backend ----------------------------------------------------------

    def _require_open(self) -> None:
        if not self.is_open:
            raise TransportError(f"transport {self.address} is not open", instrument=self.name)

    def read_available(self, max_bytes: int, timeout_s: float, terminator: bytes | None = None) -> bytes:
        """Return between 1 and ``max_bytes`` bytes as soon as any are there.

        Parameters
        ----------
        max_bytes : int
            Upper bound on the bytes returned (>= 1).
        timeout_s : float
            How long to wait for the first byte, in s.
        terminator : bytes, optional
            Hint for the backend: the awaited reply ends with it. Nothing is cut at it.

        Returns
        -------
        bytes
            Buffered bytes first, else whatever arrives; ``b""`` if nothing arrived in ``timeout_s``.

        Raises
        ------
        TransportError
            If the transport is closed or the connection is lost.
        """
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be >= 1, got {max_bytes!r}")
        timeout_s = _check_timeout(timeout_s)
        self._require_open()
        if self._rx:
            out = bytes(self._rx[:max_bytes])
            del self._rx[:max_bytes]
            return out
        return self._recv(max_bytes, timeout_s, terminator)

    def read_until(self, terminator: bytes, timeout_s: float) -> bytes:
        """Read up to and including the first ``terminator``.

        Parameters
        ----------
        terminator : bytes
            One or more bytes that end a reply (``b"\\n"``, ``b"\\r\\n"``...).
        timeout_s : float
            Time allowed for the whole reply, in s.

        Returns
        -------
        bytes
            The reply, terminator included. Later bytes stay buffered.

        Raises
        ------
        ReadTimeout
            (an InstrumentTimeout) if no terminator arrived within ``timeout_s``; the partial reply is in
            its message and ``received`` field and stays buffered: :meth:`drain` to resynchronise, or
            read again to wait longer.
        TransportError
            If the transport is closed or the connection is lost.
        """
        if not terminator:
            raise ValueError("terminator must not be empty")
        timeout_s = _check_timeout(timeout_s)
        self._require_open()
        deadline = time.monotonic() + timeout_s
        searched = 0
        while True:
            # Search only the new bytes (plus an overlap for a terminator split across chunks).
            index = self._rx.find(terminator, max(0, searched - len(terminator) + 1))
            if index >= 0:
                end = index + len(terminator)
                out = bytes(self._rx[:end])
                del self._rx[:end]
                return out
            searched = len(self._rx)
            remaining_s = deadline - time.monotonic()
            if remaining_s <= 0:
                raise ReadTimeout(instrument=self.name, timeout_s=timeout_s, received=bytes(self._rx),
                                  expected=repr(terminator))
            self._rx += self._recv(CHUNK_BYTES, remaining_s, terminator)

    def read_exact(self, n: int, timeout_s: float) -> bytes:
        """Read exactly ``n`` bytes, whatever they contain (binary blocks).

        Raises
        ------
        ReadTimeout
            If fewer than ``n`` bytes arrived within ``timeout_s`` (s); they stay buffered.
        TransportError
            If the transport is closed or the connection is lost.
        """
        if n < 0:
            raise ValueError(f"n must be >= 0, got {n!r}")
        timeout_s = _check_timeout(timeout_s)
        self._require_open()
        deadline = time.monotonic() + timeout_s
        while len(self._rx) < n:
            remaining_s = deadline - time.monotonic()
            if remaining_s <= 0:
                raise ReadTimeout(instrument=self.name, timeout_s=timeout_s, received=bytes(self._rx),
                                  expected=f"{n} bytes")
            self._rx += self._recv(min(CHUNK_BYTES, n - len(self._rx)), remaining_s, None)
        out = bytes(self._rx[:n])
        del self._rx[:n]
        return out

    def drain(self, timeout_s: float) -> bytes:
        """Discard the buffer and everything that arrives during ``timeout_s`` (s).

        For resynchronising after a timeout: a late reply would otherwise answer the next query.
        Always takes the full ``timeout_s``. Returns the discarded bytes (for logs).
        """
        timeout_s = _check_timeout(timeout_s)
        self._require_open()
        out = bytearray(self._rx)
        self._rx.clear()
        deadline = time.monotonic() + timeout_s
        while (remaining_s := deadline - time.monotonic()) > 0:
            out += self._recv(CHUNK_BYTES, remaining_s, None)
        return bytes(out)

    def __enter__(self) -> Self:
        self.open()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "open" if self.is_open else "closed"
        return f"<{type(self).__name__} {self.name} {self.address} {state}>"


# -- in-process transports ---------------------------------------------------------------------------


class _Channel:
    """One direction of an in-process pipe: a byte buffer and a condition to wait on."""

    def __init__(self) -> None:
        self.data = bytearray()
        self.cond = threading.Condition()
        self.writer_closed = False


class LoopTransport(Transport):
    """An in-process transport: reads come from ``inbound``, writes go to ``outbound``.

    ``loop://`` uses one channel for both, so what is written is read back. :func:`pipe_pair` crosses
    two channels so that each end reads what the other writes. Thread-safe between the two ends.
    """

    def __init__(self, address: str = "loop://", *, name: str, inbound: _Channel | None = None,
                 outbound: _Channel | None = None) -> None:
        super().__init__(address, name=name)
        self._inbound = inbound if inbound is not None else _Channel()
        self._outbound = outbound if outbound is not None else self._inbound
        self._open = False
        self._closed_once = False

    @property
    def is_open(self) -> bool:
        return self._open

    def open(self) -> None:
        if self._closed_once and self._inbound is not self._outbound:
            raise TransportError("a pipe_pair end cannot be reopened once closed", instrument=self.name)
        self._open = True

    def close(self) -> None:
        if not self._open:
            return
        self._open = False
        self._closed_once = True
        with self._outbound.cond:
            if self._outbound is not self._inbound:
                self._outbound.writer_closed = True
            self._outbound.cond.notify_all()

    def write(self, data: bytes) -> None:
        self._require_open()
        with self._outbound.cond:
            self._outbound.data += data
            self._outbound.cond.notify_all()

    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        channel = self._inbound
        with channel.cond:
            channel.cond.wait_for(lambda: channel.data or channel.writer_closed or not self._open, timeout_s)
            if channel.data:
                out = bytes(channel.data[:max_bytes])
                del channel.data[:max_bytes]
                return out
            if channel.writer_closed:
                raise TransportError("the other end of the pipe was closed", instrument=self.name)
            return b""


def pipe_pair(*, name: str = "pipe", peer_name: str = "simulator") -> tuple[LoopTransport, LoopTransport]:
    """Two connected, open in-process transports: each reads what the other writes.

    The first end is for a driver, the second for the simulator that plays the instrument. Closing one
    end makes reads on the other raise TransportError once the buffered bytes are consumed.
    """
    to_peer, to_driver = _Channel(), _Channel()
    driver_end = LoopTransport("pipe://", name=name, inbound=to_driver, outbound=to_peer)
    peer_end = LoopTransport("pipe://", name=peer_name, inbound=to_peer, outbound=to_driver)
    driver_end.open()
    peer_end.open()
    return driver_end, peer_end


# -- plain TCP ---------------------------------------------------------------------------------------


class TcpTransport(Transport):
    """A plain TCP client socket (instruments that speak over a raw socket, without VISA)."""

    def __init__(self, address: str, *, name: str, host: str, port: int, open_timeout_s: float = 3.0,
                 write_timeout_s: float = 3.0) -> None:
        super().__init__(address, name=name)
        self.host = host
        self.port = port
        self.open_timeout_s = open_timeout_s
        self.write_timeout_s = write_timeout_s
        self._sock: socket.socket | None = None

    @property
    def is_open(self) -> bool:
        return self._sock is not None

    def open(self) -> None:
        if self._sock is not None:
            return
        try:
            sock = socket.create_connection((self.host, self.port), timeout=self.open_timeout_s)
        except OSError as exc:
            raise TransportError(f"cannot connect to {self.host}:{self.port}: {exc}",
                                 instrument=self.name) from exc
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.settimeout(self.write_timeout_s)  # bounds sendall; reads wait in select
        self._rx.clear()
        self._sock = sock

    def close(self) -> None:
        sock, self._sock = self._sock, None
        if sock is not None:
            try:
                sock.close()
            except OSError:
                pass

    def write(self, data: bytes) -> None:
        self._require_open()
        assert self._sock is not None
        try:
            self._sock.sendall(data)
        except OSError as exc:  # socket.timeout is an OSError too
            raise TransportError(f"write to {self.host}:{self.port} failed: {exc!r}", instrument=self.name) from exc

    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        assert self._sock is not None
        try:
            readable, _, _ = select.select([self._sock], [], [], timeout_s)
            if not readable:
                return b""
            data = self._sock.recv(max_bytes)
        except OSError as exc:
            raise TransportError(f"read from {self.host}:{self.port} failed: {exc!r}", instrument=self.name) from exc
        if not data:
            raise TransportError(f"{self.host}:{self.port} closed the connection", instrument=self.name)
        return data


# -- the registry ------------------------------------------------------------------------------------

#: A factory builds a closed transport from a parsed address, validating every setting first.
Factory = Callable[[Address, str, Mapping[str, Any]], Transport]


def _make_loop(address: Address, name: str, options: Mapping[str, Any]) -> Transport:
    if address.target:
        raise address.error("loop:// takes no target", allowed="loop://")
    address.reject_query()
    return LoopTransport(address.text, name=name)


def _make_tcp(address: Address, name: str, options: Mapping[str, Any]) -> Transport:
    address.reject_query()
    try:
        split = urllib.parse.urlsplit("//" + address.target)
        host, port = split.hostname, split.port
    except ValueError:
        host, port = None, None
    if not host or port is None or port < 1 or split.path:
        raise address.error("tcp:// needs host:port with a port in 1..65535", allowed="tcp://127.0.0.1:5025")
    return TcpTransport(address.text, name=name, host=host, port=port, open_timeout_s=options["open_timeout_s"],
                        write_timeout_s=options["write_timeout_s"])


def _make_serial(address: Address, name: str, options: Mapping[str, Any]) -> Transport:
    from .transport_serial import from_address  # imports pyserial only when opened

    return from_address(address, name=name, options=options)


def _make_visa(address: Address, name: str, options: Mapping[str, Any]) -> Transport:
    from .transport_visa import from_address  # imports pyvisa only when opened

    return from_address(address, name=name, options=options)


#: scheme -> (factory, example address). Add to it with :func:`register_scheme`.
SCHEMES: dict[str, tuple[Factory, str]] = {
    "loop": (_make_loop, "loop://"),
    "tcp": (_make_tcp, "tcp://127.0.0.1:5025"),
    "serial": (_make_serial, "serial:///dev/ttyUSB0?baudrate=115200"),
    "visa": (_make_visa, "visa://TCPIP0::127.0.0.1::5025::SOCKET"),
}


def register_scheme(scheme: str, factory: Factory, example: str) -> None:
    """Add a transport scheme (e.g. ``sim`` for simulators). Replaces an existing one of that name."""
    if not scheme.isidentifier() or scheme != scheme.lower():
        raise ValueError(f"scheme must be a lower-case identifier, got {scheme!r}")
    SCHEMES[scheme] = (factory, example)


def _allowed_schemes() -> str:
    return ", ".join(example for _, example in SCHEMES.values())


def parse_address(address: str, *, key_path: str) -> Address:
    """Split ``scheme://target?k=v&...`` and check the scheme; settings are checked by the backend.

    Raises
    ------
    ConfigError
        Naming ``key_path``, the address and the allowed schemes, if the address is not a string, has no
        ``://``, an unknown scheme, or a malformed or repeated query setting.
    """
    if not isinstance(address, str):
        raise ConfigError("a transport address must be a string", key_path=key_path, value=address,
                          allowed=_allowed_schemes())
    text = address.strip()
    scheme, sep, rest = text.partition("://")
    scheme = scheme.lower()
    if not sep or scheme not in SCHEMES:
        what = f"unknown transport scheme {scheme!r}" if sep else "a transport address needs a scheme://"
        raise ConfigError(what, key_path=key_path, value=address, allowed=_allowed_schemes())
    target, qmark, query_text = rest.partition("?")
    query: dict[str, str] = {}
    if qmark:
        try:
            pairs = urllib.parse.parse_qsl(query_text, keep_blank_values=True, strict_parsing=True)
        except ValueError:
            raise ConfigError("malformed settings after '?' (use key=value&key=value)", key_path=key_path,
                              value=address, allowed=_allowed_schemes()) from None
        for key, value in pairs:
            if key in query:
                raise ConfigError(f"setting {key!r} given twice", key_path=key_path, value=address,
                                  allowed="each setting once")
            query[key] = value
    return Address(scheme=scheme, target=target, query=query, text=text, key_path=key_path)


def _check_options(options: Mapping[str, Any] | None, key_path: str) -> dict[str, Any]:
    merged = dict(DEFAULT_OPTIONS)
    for key, value in (options or {}).items():
        if key not in DEFAULT_OPTIONS:
            raise ConfigError(f"unknown transport option {key!r}", key_path=key_path, value=value,
                              allowed=", ".join(DEFAULT_OPTIONS))
        if key == "trace":
            if not isinstance(value, bool):
                raise ConfigError("trace must be true or false", key_path=key_path, value=value)
        elif isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 3600:
            raise ConfigError(f"{key} must be a number of seconds", key_path=key_path, value=value,
                              allowed="0 < value <= 3600")
        merged[key] = value
    return merged


def make_transport(address: str, *, name: str, key_path: str,
                   options: Mapping[str, Any] | None = None) -> Transport:
    """Build the transport an address names, validated but not opened.

    Parameters
    ----------
    address : str
        See the module docstring for the schemes.
    name : str
        The instrument's name, for messages.
    key_path : str
        Where the address sits in the bench file (``bench.delay_axis.address``), for ConfigError.
    options : mapping, optional
        ``trace`` (bool: wrap in a :class:`~shotpair.drivers.wire_trace.TracedTransport` logging to the
        ``shotpair.drivers.wire_trace`` logger), ``open_timeout_s``, ``write_timeout_s`` (s).

    Raises
    ------
    ConfigError
        For a bad address or option; nothing is opened.
    """
    checked = _check_options(options, key_path)
    parsed = parse_address(address, key_path=key_path)
    factory, _ = SCHEMES[parsed.scheme]
    transport = factory(parsed, name, checked)
    if checked["trace"]:
        from .wire_trace import TracedTransport

        transport = TracedTransport(transport)
    return transport


def open_transport(address: str, *, name: str, key_path: str,
                   options: Mapping[str, Any] | None = None) -> Transport:
    """:func:`make_transport`, then open it. Raises ConfigError (bad address) or TransportError."""
    transport = make_transport(address, name=name, key_path=key_path, options=options)
    transport.open()
    return transport
