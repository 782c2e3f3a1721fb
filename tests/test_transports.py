"""Transports: address parsing, one contract suite run over every backend, failures, and the wire trace.

Every backend is tested against an echo on the other side: loop:// echoes by itself, pipe_pair and the
pty have an echo thread, tcp://, serial://socket:// and visa:// talk to one raw TCP echo server on
127.0.0.1. Threads poll a stop event through select timeouts and end by themselves after at most
THREAD_LIFETIME_S; nothing sleeps to synchronise.
"""

from __future__ import annotations

import io
import logging
import os
import re
import select
import socket
import threading
import time
import tty
from collections.abc import Iterator

import pytest
from hypothesis import given
from hypothesis import strategies as st
from shotpair.drivers.errors import ConfigError, InstrumentTimeout, TransportError
from shotpair.drivers.transport_serial import SerialTransport
from shotpair.drivers.transport_visa import VisaTransport
from shotpair.drivers.transports import (
    SCHEMES,
    LoopTransport,
    ReadTimeout,
    TcpTransport,
    Transport,
    make_transport,
    open_transport,
    pipe_pair,
)
from shotpair.drivers.wire_trace import TracedTransport, render, unrender

KEY = "bench.stage.address"
THREAD_LIFETIME_S = 60.0
POLL_S = 0.02
SHORT_S = 0.05  # a read that is meant to time out
LONG_S = 2.0  # a read that is meant to succeed


# -- helpers that play the instrument ----------------------------------------------------------------


class EchoServer:
    """A raw TCP echo server on 127.0.0.1 (port chosen by the system) in a thread that owns its sockets."""

    def __init__(self) -> None:
        self._listener = socket.create_server(("127.0.0.1", 0))
        self._listener.setblocking(False)
        self.port: int = self._listener.getsockname()[1]
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="echo-server", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        conns: list[socket.socket] = []
        deadline = time.monotonic() + THREAD_LIFETIME_S
        try:
            while not self.stop.is_set() and time.monotonic() < deadline:
                readable, _, _ = select.select([self._listener, *conns], [], [], POLL_S)
                for sock in readable:
                    if sock is self._listener:
                        conn, _ = self._listener.accept()
                        conn.settimeout(LONG_S)
                        conns.append(conn)
                        continue
                    try:
                        data = sock.recv(65536)
                        if data:
                            sock.sendall(data)
                            continue
                    except OSError:
                        pass
                    conns.remove(sock)
                    sock.close()
        finally:
            for sock in conns:
                sock.close()
            self._listener.close()

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=LONG_S)
        assert not self.thread.is_alive(), "echo server did not stop"


class PtyEcho:
    """A pseudo-terminal whose master side echoes in a thread; the client opens ``slave_path``."""

    def __init__(self) -> None:
        self.master_fd, self.slave_fd = os.openpty()
        tty.setraw(self.slave_fd)  # the pty starts with echo and line editing on
        self.slave_path = os.ttyname(self.slave_fd)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="pty-echo", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        deadline = time.monotonic() + THREAD_LIFETIME_S
        while not self.stop.is_set() and time.monotonic() < deadline:
            readable, _, _ = select.select([self.master_fd], [], [], POLL_S)
            if not readable:
                continue
            try:
                data = os.read(self.master_fd, 65536)
                while data:
                    _, writable, _ = select.select([], [self.master_fd], [], LONG_S)
                    if not writable:
                        return
                    data = data[os.write(self.master_fd, data):]
            except OSError:
                return

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=LONG_S)
        assert not self.thread.is_alive(), "pty echo did not stop"
        # Only now that no thread waits on them.
        os.close(self.master_fd)
        os.close(self.slave_fd)


class PipeEcho:
    """The simulator end of a pipe_pair, echoing in a thread until the driver end closes."""

    def __init__(self, peer: Transport) -> None:
        self.peer = peer
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="pipe-echo", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        deadline = time.monotonic() + THREAD_LIFETIME_S
        try:
            while not self.stop.is_set() and time.monotonic() < deadline:
                data = self.peer.read_available(65536, POLL_S)
                if data:
                    self.peer.write(data)
        except TransportError:
            pass  # the driver end closed
        finally:
            self.peer.close()

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=LONG_S)
        assert not self.thread.is_alive(), "pipe echo did not stop"


@pytest.fixture
def echo_server() -> Iterator[EchoServer]:
    server = EchoServer()
    yield server
    server.close()


@pytest.fixture
def refused_port() -> Iterator[int]:
    """A port on 127.0.0.1 that is bound but not listening: connections are refused, and nobody can take it."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    yield sock.getsockname()[1]
    sock.close()


def _have_visa() -> bool:
    try:
        import pyvisa  # noqa: F401
        import pyvisa_py  # noqa: F401
    except ImportError:
        return False
    return True


BACKENDS = ["loop", "pipe", "tcp", "serial-pty", "serial-socket", "visa", "traced-tcp"]


@pytest.fixture(params=BACKENDS)
def transport(request: pytest.FixtureRequest) -> Iterator[Transport]:
    """An open transport whose other side echoes every byte back."""
    kind = request.param
    helpers: list[EchoServer | PtyEcho | PipeEcho] = []
    if kind == "visa" and not _have_visa():
        pytest.skip("pyvisa / pyvisa-py are not installed: visa:// is untested")
    if kind in ("tcp", "serial-socket", "visa", "traced-tcp"):
        server = EchoServer()
        helpers.append(server)
        address = {
            "tcp": f"tcp://127.0.0.1:{server.port}",
            "traced-tcp": f"tcp://127.0.0.1:{server.port}",
            "serial-socket": f"serial://socket://127.0.0.1:{server.port}",
            "visa": f"visa://TCPIP0::127.0.0.1::{server.port}::SOCKET",
        }[kind]
        options = {"trace": True} if kind == "traced-tcp" else None
        t: Transport = open_transport(address, name="stage", key_path=KEY, options=options)
    elif kind == "serial-pty":
        pty_echo = PtyEcho()
        helpers.append(pty_echo)
        t = open_transport(f"serial://{pty_echo.slave_path}?baudrate=115200", name="stage", key_path=KEY)
    elif kind == "pipe":
        t, peer = pipe_pair(name="stage")
        helpers.append(PipeEcho(peer))
    else:
        t = open_transport("loop://", name="stage", key_path=KEY)
    try:
        yield t
    finally:
        t.close()  # first, so that helper threads see the client go
        for helper in helpers:
            helper.close()


# -- the contract every backend keeps ----------------------------------------------------------------


def test_read_until_splits_replies_from_one_write(transport: Transport) -> None:
    transport.write(b"one\ntwo\nthree")
    assert transport.read_until(b"\n", LONG_S) == b"one\n"
    assert transport.read_until(b"\n", LONG_S) == b"two\n"
    transport.write(b" more\n")
    assert transport.read_until(b"\n", LONG_S) == b"three more\n"


def test_read_until_across_split_writes_and_split_terminator(transport: Transport) -> None:
    transport.write(b"ab")
    transport.write(b"c\r")
    with pytest.raises(ReadTimeout) as info:
        transport.read_until(b"\r\n", SHORT_S)  # half a terminator is not a terminator
    assert info.value.received == b"abc\r"
    transport.write(b"\nxy\r\n")
    assert transport.read_until(b"\r\n", LONG_S) == b"abc\r\n"
    assert transport.read_until(b"\r\n", LONG_S) == b"xy\r\n"


def test_read_until_timeout_reports_partial_reply(transport: Transport) -> None:
    transport.write(b"PARTIAL")
    start = time.monotonic()
    with pytest.raises(InstrumentTimeout) as info:
        transport.read_until(b"\n", SHORT_S)
    elapsed_s = time.monotonic() - start
    exc = info.value
    assert isinstance(exc, ReadTimeout)
    assert exc.timeout_s == SHORT_S
    assert exc.instrument == "stage"
    assert exc.received == b"PARTIAL"
    assert str(exc) == (f"stage: no reply ending in b'\\n' within {SHORT_S:g} s; received so far (7 B): "
                        "b'PARTIAL'")
    assert SHORT_S <= elapsed_s < SHORT_S + 1.0
    # The partial reply stays buffered: reading again completes it.
    transport.write(b"-END\n")
    assert transport.read_until(b"\n", LONG_S) == b"PARTIAL-END\n"


def test_zero_timeout_with_nothing_there(transport: Transport) -> None:
    with pytest.raises(ReadTimeout) as info:
        transport.read_until(b"\n", 0)
    assert info.value.received == b""


def test_read_exact_is_binary_safe(transport: Transport) -> None:
    payload = bytes(range(256)) * 4  # every byte value, terminators included
    transport.write(b"#41024" + payload + b"\n")
    assert transport.read_exact(2, LONG_S) == b"#4"
    assert transport.read_exact(4, LONG_S) == b"1024"
    assert transport.read_exact(1024, LONG_S) == payload
    assert transport.read_until(b"\n", LONG_S) == b"\n"
    assert transport.read_exact(0, 0) == b""


def test_read_exact_timeout_keeps_what_arrived(transport: Transport) -> None:
    transport.write(b"12345")
    with pytest.raises(ReadTimeout) as info:
        transport.read_exact(10, SHORT_S)
    assert info.value.received == b"12345"
    assert info.value.expected == "10 bytes"
    assert "b'12345'" in str(info.value)
    transport.write(b"67890")
    assert transport.read_exact(10, LONG_S) == b"1234567890"


def test_drain_discards_a_late_reply(transport: Transport) -> None:
    transport.write(b"late reply\n")
    transport.write(b"and noise")
    assert transport.drain(0.1) == b"late reply\nand noise"
    with pytest.raises(ReadTimeout) as info:
        transport.read_until(b"\n", SHORT_S)
    assert info.value.received == b""
    transport.write(b"fresh\n")
    assert transport.read_until(b"\n", LONG_S) == b"fresh\n"


def test_read_available_respects_its_bound(transport: Transport) -> None:
    transport.write(b"abcdefghij")
    got = b""
    while len(got) < 10:
        chunk = transport.read_available(4, LONG_S)
        assert 1 <= len(chunk) <= 4
        got += chunk
    assert got == b"abcdefghij"
    assert transport.read_available(4, SHORT_S) == b""


def test_close_is_idempotent_and_closed_transport_refuses(transport: Transport) -> None:
    assert transport.is_open
    transport.close()
    transport.close()
    assert not transport.is_open
    with pytest.raises(TransportError, match="not open"):
        transport.write(b"x\n")
    with pytest.raises(TransportError, match="not open"):
        transport.read_until(b"\n", SHORT_S)


def test_bad_arguments_are_programming_errors(transport: Transport) -> None:
    with pytest.raises(ValueError):
        transport.read_until(b"", LONG_S)
    with pytest.raises(ValueError):
        transport.read_exact(-1, LONG_S)
    with pytest.raises(ValueError):
        transport.read_until(b"\n", -1.0)
    with pytest.raises(ValueError):
        transport.read_until(b"\n", float("nan"))


# -- addresses ---------------------------------------------------------------------------------------

GOOD_ADDRESSES = [
    ("loop://", LoopTransport, {}),
    ("tcp://127.0.0.1:5025", TcpTransport, {"host": "127.0.0.1", "port": 5025}),
    ("TCP://localhost:1", TcpTransport, {"host": "localhost", "port": 1}),
    ("serial:///dev/ttyUSB0", SerialTransport,
     {"port": "/dev/ttyUSB0", "settings": {"baudrate": 9600, "parity": "N", "bytesize": 8, "stopbits": 1,
                                           "rtscts": False, "xonxoff": False}}),
    ("serial:///dev/ttyUSB0?baudrate=115200&parity=e&bytesize=7&stopbits=1.5&rtscts=true", SerialTransport,
     {"port": "/dev/ttyUSB0", "settings": {"baudrate": 115200, "parity": "E", "bytesize": 7, "stopbits": 1.5,
                                           "rtscts": True, "xonxoff": False}}),
    ("serial://COM3?stopbits=2", SerialTransport, {"port": "COM3"}),
    ("serial://socket://127.0.0.1:7000", SerialTransport, {"port": "socket://127.0.0.1:7000"}),
    ("visa://TCPIP0::127.0.0.1::5025::SOCKET", VisaTransport,
     {"resource": "TCPIP0::127.0.0.1::5025::SOCKET", "library": "@py"}),
    ("visa://GPIB0::12::INSTR?library=@ivi", VisaTransport, {"resource": "GPIB0::12::INSTR", "library": "@ivi"}),
]


@pytest.mark.parametrize("address, cls, attributes", GOOD_ADDRESSES)
def test_good_addresses_pick_the_backend(address: str, cls: type, attributes: dict) -> None:
    t = make_transport(address, name="stage", key_path=KEY)
    assert type(t) is cls
    assert not t.is_open  # make_transport never touches the instrument
    assert t.name == "stage"
    for attribute, value in attributes.items():
        assert getattr(t, attribute) == value


SCHEME_LIST = "allowed: loop://, tcp://127.0.0.1:5025, serial:///dev/ttyUSB0?baudrate=115200, " \
              "visa://TCPIP0::127.0.0.1::5025::SOCKET"

BAD_ADDRESSES = [
    ("", "a transport address needs a scheme://"),
    ("/dev/ttyUSB0", "a transport address needs a scheme:// (got '/dev/ttyUSB0'); " + SCHEME_LIST),
    ("usb://0", "unknown transport scheme 'usb' (got 'usb://0'); " + SCHEME_LIST),
    (42, "a transport address must be a string (got 42)"),
    ("loop://x", "loop:// takes no target"),
    ("loop://?echo=1", "unknown setting 'echo' for loop:// (got 'loop://?echo=1'); allowed: no settings"),
    ("tcp://127.0.0.1", "tcp:// needs host:port"),
    ("tcp://127.0.0.1:0", "tcp:// needs host:port"),
    ("tcp://127.0.0.1:99999", "tcp:// needs host:port"),
    ("tcp://127.0.0.1:http", "tcp:// needs host:port"),
    ("tcp://:5025", "tcp:// needs host:port"),
    ("tcp://127.0.0.1:5025/x", "tcp:// needs host:port"),
    ("tcp://127.0.0.1:5025?nodelay=1", "unknown setting 'nodelay' for tcp://"),
    ("tcp://127.0.0.1:5025?a", "malformed settings after '?'"),
    ("serial://", "serial:// needs a port"),
    ("serial:///dev/ttyUSB0?baudrate=fast", "baudrate 'fast' is not a rate in bit/s"),
    ("serial:///dev/ttyUSB0?baudrate=0", "allowed: an integer in 50..20000000"),
    ("serial:///dev/ttyUSB0?parity=X", ("parity 'X' is not allowed (got 'serial:///dev/ttyUSB0?parity=X'); "
                                        "allowed: N, E, O, M, S")),
    ("serial:///dev/ttyUSB0?bytesize=9", "bytesize '9' is not allowed"),
    ("serial:///dev/ttyUSB0?stopbits=3", "allowed: 1, 1.5, 2"),
    ("serial:///dev/ttyUSB0?rtscts=maybe", "rtscts 'maybe' is not a boolean"),
    ("serial:///dev/ttyUSB0?speed=9600", "unknown setting 'speed' for serial://"),
    ("serial:///dev/ttyUSB0?baudrate=9600&baudrate=19200", "setting 'baudrate' given twice"),
    ("serial://hwgrep://USB", "pyserial URL scheme 'hwgrep' is not allowed"),
    ("visa://", "visa:// needs a VISA resource string"),
    ("visa://ASRL1", "visa:// needs a VISA resource string"),
    ("visa://TCPIP0::127.0.0.1::5025::SOCKET?library=", "library must not be empty"),
    ("visa://TCPIP0::127.0.0.1::5025::SOCKET?backend=py", "unknown setting 'backend' for visa://"),
]


@pytest.mark.parametrize("address, fragment", BAD_ADDRESSES)
def test_bad_addresses_name_key_path_value_and_allowed(address: object, fragment: str) -> None:
    with pytest.raises(ConfigError) as info:
        make_transport(address, name="stage", key_path=KEY)  # type: ignore[arg-type]
    exc = info.value
    assert exc.key_path == KEY
    assert exc.value == address
    assert str(exc).startswith(f"<config>: {KEY}: ")
    assert fragment in str(exc)
    assert exc.allowed  # every address error says what would be accepted


def test_scheme_errors_list_every_registered_scheme() -> None:
    with pytest.raises(ConfigError) as info:
        make_transport("gpib://1", name="stage", key_path=KEY)
    assert all(example in str(info.value) for _, example in SCHEMES.values())


@given(st.text(max_size=40))
def test_any_string_gives_a_transport_or_a_config_error(text: str) -> None:
    try:
        t = make_transport(text, name="stage", key_path=KEY)
    except ConfigError as exc:
        assert exc.key_path == KEY
    else:
        assert not t.is_open


@pytest.mark.parametrize("options, fragment", [
    ({"retries": 3}, "unknown transport option 'retries'"),
    ({"trace": "yes"}, "trace must be true or false"),
    ({"open_timeout_s": 0}, "open_timeout_s must be a number of seconds"),
    ({"write_timeout_s": True}, "write_timeout_s must be a number of seconds"),
])
def test_bad_options(options: dict, fragment: str) -> None:
    with pytest.raises(ConfigError, match=re.escape(fragment)) as info:
        make_transport("loop://", name="stage", key_path=KEY, options=options)
    assert info.value.key_path == KEY


# -- failures to connect -----------------------------------------------------------------------------


@pytest.mark.parametrize("scheme", ["tcp", "serial-socket", "visa"])
def test_connection_refused_is_a_transport_error(scheme: str, refused_port: int) -> None:
    if scheme == "visa" and not _have_visa():
        pytest.skip("pyvisa / pyvisa-py are not installed: visa:// is untested")
    address = {
        "tcp": f"tcp://127.0.0.1:{refused_port}",
        "serial-socket": f"serial://socket://127.0.0.1:{refused_port}",
        "visa": f"visa://TCPIP0::127.0.0.1::{refused_port}::SOCKET",
    }[scheme]
    t = make_transport(address, name="stage", key_path=KEY, options={"open_timeout_s": 2.0})
    try:
        with pytest.raises(TransportError) as info:
            t.open()  # visa:// opens a closed port without complaint...
            t.write(b"*IDN?\n")  # ...and fails on the first write
        assert info.value.instrument == "stage"
        assert "refused" in str(info.value).lower()
    finally:
        t.close()


def test_missing_serial_port_is_a_transport_error() -> None:
    with pytest.raises(TransportError, match=r"stage: cannot open serial port /dev/shotpair-no-such-port"):
        open_transport("serial:///dev/shotpair-no-such-port", name="stage", key_path=KEY)


def test_tcp_peer_closing_is_a_transport_error() -> None:
    listener = socket.create_server(("127.0.0.1", 0))
    listener.settimeout(LONG_S)
    try:
        t = open_transport(f"tcp://127.0.0.1:{listener.getsockname()[1]}", name="stage", key_path=KEY)
        try:
            conn, _ = listener.accept()
            conn.sendall(b"bye\n")
            conn.close()
            assert t.read_until(b"\n", LONG_S) == b"bye\n"  # what was sent before closing still arrives
            with pytest.raises(TransportError, match="closed the connection"):
                t.read_until(b"\n", LONG_S)
        finally:
            t.close()
    finally:
        listener.close()


# -- pipe_pair ---------------------------------------------------------------------------------------


def test_pipe_pair_late_reply_then_resynchronise() -> None:
    driver, sim = pipe_pair(name="stage")
    try:
        driver.write(b"POS?\n")
        assert sim.read_until(b"\n", LONG_S) == b"POS?\n"
        with pytest.raises(ReadTimeout):
            driver.read_until(b"\n", SHORT_S)  # the simulator is slow...
        sim.write(b"12.5\n")  # ...and its answer comes after the timeout
        assert driver.drain(SHORT_S) == b"12.5\n"
        driver.write(b"POS?\n")
        assert sim.read_until(b"\n", LONG_S) == b"POS?\n"
        sim.write(b"12.6\n")
        assert driver.read_until(b"\n", LONG_S) == b"12.6\n"
    finally:
        driver.close()
        sim.close()


def test_pipe_pair_closed_peer() -> None:
    driver, sim = pipe_pair(name="stage")
    try:
        sim.write(b"last\n")
        sim.close()
        assert driver.read_until(b"\n", LONG_S) == b"last\n"
        with pytest.raises(TransportError, match="other end of the pipe was closed"):
            driver.read_until(b"\n", LONG_S)
        with pytest.raises(TransportError, match="cannot be reopened"):
            sim.open()
    finally:
        driver.close()
        sim.close()


def test_a_reader_blocked_in_another_thread_wakes_on_data() -> None:
    driver, sim = pipe_pair(name="stage")
    result: list[bytes] = []
    reader = threading.Thread(target=lambda: result.append(driver.read_until(b"\n", LONG_S)), daemon=True)
    try:
        reader.start()
        sim.write(b"ok\n")
        reader.join(timeout=LONG_S)
        assert not reader.is_alive()
        assert result == [b"ok\n"]
    finally:
        driver.close()
        sim.close()


# -- wire trace --------------------------------------------------------------------------------------

STAMP = r"\d+\.\d{6}"


def test_wire_trace_lines_for_a_short_exchange() -> None:
    sink = io.StringIO()
    t = TracedTransport(LoopTransport(name="stage"), sink)
    t.open()
    t.write(b"*IDN?\n")
    assert t.read_until(b"\n", LONG_S) == b"*IDN?\n"
    t.write(b"DATA \\ \x00\xff")
    with pytest.raises(ReadTimeout):
        t.read_until(b"\n", SHORT_S)
    assert t.drain(0) == b"DATA \\ \x00\xff"
    t.close()
    t.close()
    expected = [
        rf"{STAMP} stage open loop://",
        rf"{STAMP} stage → \*IDN\?\\x0a",
        rf"{STAMP} stage ← \*IDN\?\\x0a",
        rf"{STAMP} stage → DATA \\x5c \\x00\\xff",
        rf"{STAMP} stage ← DATA \\x5c \\x00\\xff",
        rf"{STAMP} stage ! timeout after 0.05 s waiting for b'\\n'",
        rf"{STAMP} stage drain discarded 9 B",
        rf"{STAMP} stage close loop://",
    ]
    lines = sink.getvalue().splitlines()
    assert len(lines) == len(expected), lines
    for line, pattern in zip(lines, expected):
        assert re.fullmatch(pattern, line), (line, pattern)
    stamps = [float(line.split(" ", 1)[0]) for line in lines]
    assert stamps == sorted(stamps)


def test_trace_option_logs_to_the_wire_trace_logger(caplog: pytest.LogCaptureFixture,
                                                    echo_server: EchoServer) -> None:
    caplog.set_level(logging.DEBUG, logger="shotpair.drivers.wire_trace")
    t = open_transport(f"tcp://127.0.0.1:{echo_server.port}", name="delay_axis", key_path=KEY,
                       options={"trace": True})
    try:
        assert isinstance(t, TracedTransport)
        t.write(b"MOVE 1.5\r\n")
        assert t.read_until(b"\r\n", LONG_S) == b"MOVE 1.5\r\n"
    finally:
        t.close()
    messages = [r.getMessage() for r in caplog.records if r.name == "shotpair.drivers.wire_trace"]
    assert re.fullmatch(rf"{STAMP} delay_axis → MOVE 1\.5\\x0d\\x0a", messages[1])
    received = "".join(m.split(" ← ", 1)[1] for m in messages if " ← " in m)  # TCP may split the echo
    assert unrender(received) == b"MOVE 1.5\r\n"


def test_trace_records_a_failed_open() -> None:
    sink = io.StringIO()
    t = TracedTransport(make_transport("serial:///dev/shotpair-no-such-port", name="stage", key_path=KEY), sink)
    with pytest.raises(TransportError):
        t.open()
    lines = sink.getvalue().splitlines()
    assert re.fullmatch(rf"{STAMP} stage open serial:///dev/shotpair-no-such-port", lines[0])
    assert re.fullmatch(rf"{STAMP} stage ! open failed: stage: cannot open serial port .*", lines[1])


@given(st.binary(max_size=64))
def test_render_is_printable_and_reversible(data: bytes) -> None:
    text = render(data)
    assert text.isascii() and text.isprintable()
    assert unrender(text) == data


def test_render_table() -> None:
    assert render(b"") == ""
    assert render(b"A1 ~") == "A1 ~"
    assert render(b"\\") == "\\x5c"
    assert render(b"\r\n\t\x00\x7f\x80\xff") == "\\x0d\\x0a\\x09\\x00\\x7f\\x80\\xff"
