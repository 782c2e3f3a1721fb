"""The SCPI wire simulators, byte for byte over raw 127.0.0.1 sockets.

References named beside the checks: IEEE 488.2 (common commands, *ESR? bits, definite-length blocks,
query-interrupted rule), SCPI-99 vol. 2 ch. 21 (error codes and texts; the texts and the overflow rule
are from memory), docs/instruments.md (command set and the SPB1 record layout), numpy for decoding, and
the driver-side codec drivers/scpi.py (ReplyReader, parse_error, Resync) as an independent reader.
Every blocking call has a timeout; nothing sleeps.
"""

from __future__ import annotations

import dataclasses
import select
import socket
import struct
import threading
import time
from collections.abc import Callable, Iterator
from importlib.metadata import version
from typing import Any

import numpy as np
import pytest
from shotpair.drivers.errors import InstrumentReplyError
from shotpair.drivers.scpi import NEED_DATA, ReplyReader, Resync, decode_block, parse_error, parse_idn
from shotpair.drivers.transports import make_transport
from shotpair.simulators.bench import BenchCalibration, VirtualBench
from shotpair.simulators.settings import NoiseSwitches, SimulationSettings, StageSettings
from shotpair.drivers.shot_record import encode_shot_block, max_shots, record_bytes
from shotpair.simulators.wire.devices import make_devices
from shotpair.simulators.wire.scpi_device import ScpiDevice
from shotpair.simulators.wire.tcp_server import ScpiTcpServer

TIMEOUT_S = 5.0
PIXELS = 64


def _calibration(**changes: Any) -> BenchCalibration:
    return dataclasses.replace(BenchCalibration.demo(pixels=PIXELS), **changes)


def _settings(seed: int = 11, *, quiet: bool = False, **sections: Any) -> SimulationSettings:
    if quiet:
        sections.setdefault("noise", NoiseSwitches.none())
    return SimulationSettings(seed=seed, **sections)


class Wire:
    """A raw client socket with timeouts on every read."""

    def __init__(self, port: int, *, rcvbuf: int | None = None) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        if rcvbuf is not None:
            self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, rcvbuf)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)  # as the real transports do
        self.sock.settimeout(TIMEOUT_S)
        self.sock.connect(("127.0.0.1", port))
        self.buf = bytearray()

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def _fill(self, deadline: float) -> None:
        remaining = deadline - time.monotonic()
        if remaining <= 0:
            raise AssertionError(f"no complete reply within {TIMEOUT_S} s; got {bytes(self.buf[:200])!r}")
        readable, _, _ = select.select([self.sock], [], [], remaining)
        if readable:
            data = self.sock.recv(1 << 20)
            if not data:
                raise ConnectionError("the simulator closed the connection")
            self.buf += data

    def line(self) -> bytes:
        """Read one reply line, terminator included."""
        deadline = time.monotonic() + TIMEOUT_S
        while (at := self.buf.find(b"\n")) < 0:
            self._fill(deadline)
        out = bytes(self.buf[:at + 1])
        del self.buf[:at + 1]
        return out

    def exact(self, n: int) -> bytes:
        deadline = time.monotonic() + TIMEOUT_S
        while len(self.buf) < n:
            self._fill(deadline)
        out = bytes(self.buf[:n])
        del self.buf[:n]
        return out

    def query(self, message: bytes) -> bytes:
        self.send(message)
        return self.line()

    def silent_for(self, timeout_s: float) -> bool:
        """True if nothing arrives within ``timeout_s`` (a select with a timeout, not a sleep)."""
        if self.buf:
            return False
        readable, _, _ = select.select([self.sock], [], [], timeout_s)
        return not readable

    def close(self) -> None:
        self.sock.close()


class Served:
    """The five devices of one bench, each on its own server."""

    def __init__(self, bench: VirtualBench, latency_s: float = 0.0) -> None:
        self.bench = bench
        self.devices = make_devices(bench, latency_s=latency_s)
        self.servers = {name: ScpiTcpServer(dev).start() for name, dev in self.devices.items()}
        self.clients: list[Wire] = []

    def connect(self, name: str, **kw: Any) -> Wire:
        client = Wire(self.servers[name].port, **kw)
        self.clients.append(client)
        return client

    def close(self) -> None:
        for c in self.clients:
            c.close()
        for s in self.servers.values():
            s.request_stop()
        for s in self.servers.values():
            assert s.stop(), "a server thread did not stop"
        self.bench.close()


@pytest.fixture
def serve() -> Iterator[Callable[..., Served]]:
    made: list[Served] = []

    def factory(*, calibration: BenchCalibration | None = None, settings: SimulationSettings | None = None,
                realtime: bool = False, latency_s: float = 0.0) -> Served:
        bench = VirtualBench(settings or _settings(), calibration or _calibration(), realtime=realtime)
        served = Served(bench, latency_s)
        made.append(served)
        return served

    yield factory
    for served in made:
        served.close()


def _error(client: Wire) -> tuple[int, str]:
    # Decoded with the driver-side parser: the reply must be what the codec expects.
    return parse_error(client.query(b"SYST:ERR?\n").decode("ascii").rstrip("\n"))


def _decode_record(payload: bytes) -> dict[str, Any]:
    """The SPB1 record as docs/instruments.md lays it out, decoded with numpy alone."""
    magic, n, px, ref, flags = struct.unpack_from("<4sIIII", payload, 0)
    at = 20
    frame = np.frombuffer(payload, "<i8", n, at)
    at += 8 * n
    state = np.frombuffer(payload, np.uint8, n, at)
    at += n
    counts = np.frombuffer(payload, "<u2", n * px, at).reshape(n, px)
    at += 2 * n * px
    reference = np.frombuffer(payload, "<u2", n * ref, at).reshape(n, ref)
    at += 2 * n * ref
    return {"magic": magic, "n": n, "pixels": px, "ref_width": ref, "flags": flags, "frame": frame,
            "state": state, "counts": counts, "reference": reference, "end": at}


def _read_block(client: Wire) -> bytes:
    """One definite-length block reply (IEEE 488.2 §8.7.9) plus its LF; returns the payload."""
    head = client.exact(2)
    assert head[:1] == b"#" and head[1:2].isdigit(), head
    length = int(client.exact(int(head[1:2])))
    payload = client.exact(length)
    assert client.exact(1) == b"\n"
    return payload


# --------------------------------------------------------------------------------------------------
# Identity, headers, compound messages
# --------------------------------------------------------------------------------------------------


def test_idn_of_each_device(serve: Callable[..., Served]) -> None:
    s = serve()
    stage = s.connect("delay_axis")
    # Exact bytes: four comma-separated fields (IEEE 488.2 *IDN?), firmware = the package version.
    assert stage.query(b"*IDN?\n") == f"shotpair simulator,delay axis,sim-0001,{version('shotpair')}\n".encode()
    serials = set()
    for name in ("chopper", "shutter", "detector", "delay_generator"):
        ident = parse_idn(s.connect(name).query(b"*idn?\n").decode().rstrip("\n"))
        assert ident.manufacturer == "shotpair simulator"
        serials.add(ident.serial)
    assert len(serials) == 4


def test_unknown_header_is_113_and_queue_empties(serve: Callable[..., Served]) -> None:
    c = serve().connect("chopper")
    c.send(b"FOO:BAR 1\n")
    # SCPI-99 vol. 2 ch. 21: -113 "Undefined header"; an empty queue answers 0,"No error".
    assert c.query(b"SYST:ERR?\n") == b'-113,"Undefined header;FOO:BAR"\n'
    assert c.query(b"SYSTEM:ERROR:NEXT?\n") == b'0,"No error"\n'


def test_short_and_long_forms_case_insensitive(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("delay_axis")
    assert c.query(b"HOME;*OPC?\n") == b"1\n"
    for message, position in ((b"MOVE:ABS 5", b"5.0"), (b"move:absolute 6", b"6.0"), (b":Move:Abs 7.5", b"7.5"),
                              (b"MOVE:ABSOLUTE 8", b"8.0")):
        assert c.query(message + b";*OPC?;POS?\n") == b"1;" + position + b"\n"
    # Only the short or the whole long form is a header (SCPI-99 vol. 1 §6.2.1, from memory).
    c.send(b"MOVE:ABSO 9\n")
    assert _error(c)[0] == -113
    assert c.query(b"POSITION?\n") == b"8.0\n"


def test_compound_message_and_relative_header(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("delay_axis")
    ident = f"shotpair simulator,delay axis,sim-0001,{version('shotpair')}"
    # Replies of one message are joined by ';' (IEEE 488.2 response message unit separator).
    assert c.query(b"*IDN?;SYST:ERR?\n") == f'{ident};0,"No error"\n'.encode()
    # After MOVE:ABS the header STAT? resolves below MOVE (the SCPI tree rule): MOVE:STAT?.
    assert c.query(b"HOME;*OPC?\n") == b"1\n"
    assert c.query(b"MOVE:ABS 30;STAT?\n") == b"1\n"
    # A command error ends the message: what follows is not executed.
    assert c.query(b"*OPC?;BOGUS;*IDN?;*OPC?\n") == b"1\n"
    assert _error(c)[0] == -113


# --------------------------------------------------------------------------------------------------
# Error queue and status
# --------------------------------------------------------------------------------------------------


def test_parameter_errors(serve: Callable[..., Served]) -> None:
    c = serve().connect("shutter")
    cases = [
        (b"SHUT\n", -109),        # missing parameter
        (b"SHUT 1,0\n", -108),    # parameter not allowed
        (b"SHUT 2\n", -224),      # illegal parameter value (strict boolean)
        (b"SHUT ,\n", -102),      # syntax error
        (b"SHUT 1;*IDN \n", -113),
        ("SHUT \u00e9\n".encode("latin-1"), -101),  # invalid character
    ]
    for message, code in cases:
        c.send(message)
        assert _error(c)[0] == code, message  # codes: SCPI-99 vol. 2 ch. 21
    assert c.query(b"SYST:ERR?\n") == b'0,"No error"\n'


def test_error_queue_overflow_keeps_oldest_and_ends_in_350(serve: Callable[..., Served]) -> None:
    c = serve().connect("chopper")
    c.send(b"".join(f"NOPE{i}\n".encode() for i in range(20)))
    entries = [_error(c) for _ in range(17)]
    # SCPI-99 vol. 2 §21.8 (from memory): 16 entries at most; on overflow the newest becomes -350.
    assert [code for code, _ in entries[:15]] == [-113] * 15
    assert [text.split(";")[1] for _, text in entries[:15]] == [f"NOPE{i}" for i in range(15)]
    assert entries[15] == (-350, "Queue overflow")
    assert entries[16] == (0, "No error")


def test_esr_bits_and_cls(serve: Callable[..., Served]) -> None:
    c = serve().connect("delay_axis")
    c.send(b"NOPE\n")
    # IEEE 488.2 §11.5.1.1: CME is bit 5 (32), EXE bit 4 (16), OPC bit 0 (1); *ESR? reads and clears.
    assert c.query(b"*ESR?\n") == b"32\n"
    assert c.query(b"*ESR?\n") == b"0\n"
    c.send(b"MOVE:ABS 10\n")  # before homing: -221, an execution error
    assert c.query(b"*ESR?\n") == b"16\n"
    c.send(b"HOME;*OPC\n")
    assert c.query(b"*OPC?;*ESR?\n") == b"1;1\n"
    c.send(b"*CLS\n")
    assert c.query(b"SYST:ERR?\n") == b'0,"No error"\n'


# --------------------------------------------------------------------------------------------------
# Stage
# --------------------------------------------------------------------------------------------------


def test_stage_move_before_home_and_out_of_range(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("delay_axis")
    start = c.query(b"POS?\n")
    assert start == b"125.0\n"  # the middle of the 0-250 mm travel at power-up (StageSettings.start_mm)
    assert c.query(b"HOME:STAT?\n") == b"0\n"
    c.send(b"MOVE:ABS 20\n")
    assert _error(c)[0] == -221  # settings conflict: not homed
    assert c.query(b"LIM?\n") == b"0.0,250.0\n"
    assert c.query(b"HOME;*OPC?;HOME:STAT?\n") == b"1;1\n"
    c.send(b"MOVE:ABS 250.5\n")
    code, text = _error(c)
    assert code == -222 and "250.5" in text  # data out of range, naming the value
    assert c.query(b"POS?;MOVE:STAT?\n") == b"0.0;0\n"  # and no motion


def test_opc_after_a_move_advances_virtual_time_in_fast_mode(serve: Callable[..., Served]) -> None:
    s = serve()
    st = s.bench.settings.stage
    c = s.connect("delay_axis")
    assert c.query(b"HOME;*OPC?\n") == b"1\n"
    # Homing from 125 mm to 0 at velocity v, then settling: t = 125 / v + settle (derived from the model).
    t_home = 125.0 / st.velocity_mm_per_s + st.settle_s
    assert s.bench.now_s() == pytest.approx(t_home, abs=1e-9)
    assert c.query(b"MOVE:ABS 20;MOVE:STAT?\n") == b"1\n"
    assert c.query(b"*OPC?;POS?;MOVE:STAT?\n") == b"1;20.0;0\n"
    # *OPC? returned when the move had settled; the status query after it costs POLL_S (1 ms).
    assert s.bench.now_s() == pytest.approx(t_home + 20.0 / st.velocity_mm_per_s + st.settle_s + 0.001, abs=1e-6)


def test_opc_waits_in_realtime_as_hardware_would(serve: Callable[..., Served]) -> None:
    stage = StageSettings(velocity_mm_per_s=1000.0, settle_s=0.01, needs_homing=False, start_mm=0.0)
    s = serve(settings=_settings(stage=stage, quiet=True), realtime=True)
    c = s.connect("delay_axis")
    t0 = time.monotonic()
    assert c.query(b"MOVE:ABS 50;*OPC?\n") == b"1\n"
    elapsed = time.monotonic() - t0
    # 50 mm at 1000 mm/s plus 10 ms settling = 60 ms of wall time at least.
    assert 0.059 <= elapsed < 2.0
    assert c.query(b"POS?\n") == b"50.0\n"


def test_stop_interrupts_a_long_realtime_wait(serve: Callable[..., Served]) -> None:
    stage = StageSettings(velocity_mm_per_s=1.0, settle_s=0.0, needs_homing=False, start_mm=0.0)
    s = serve(settings=_settings(stage=stage, quiet=True), realtime=True)
    c = s.connect("delay_axis")
    c.send(b"MOVE:ABS 200;*OPC?\n")  # 200 s of motion
    assert c.silent_for(0.05)
    server = s.servers["delay_axis"]
    t0 = time.monotonic()
    assert server.stop(timeout_s=TIMEOUT_S)
    assert time.monotonic() - t0 < 1.0
    with pytest.raises((ConnectionError, OSError)):
        c.line()


# --------------------------------------------------------------------------------------------------
# Chopper, shutter, delay generator
# --------------------------------------------------------------------------------------------------


def test_chopper(serve: Callable[..., Served]) -> None:
    c = serve().connect("chopper")
    assert c.query(b"FREQ?;LOCK?\n") == b"500.0;1\n"  # half of the 1 kHz laser: locked
    c.send(b"FREQ 400\n")
    assert c.query(b"FREQUENCY?;LOCK?\n") == b"400.0;0\n"
    c.send(b"FREQ 1E6\n")
    assert _error(c)[0] == -222
    assert c.query(b"PHAS 90;PHAS?\n") == b"90.0\n"
    c.send(b"FREQ abc\n")
    assert _error(c)[0] == -104  # data type error
    assert c.query(b"*RST;FREQ?;PHAS?;LOCK?\n") == b"500.0;0.0;1\n"


def test_shutter_is_overlapped(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("shutter")
    assert c.query(b"SHUT?\n") == b"0\n"
    t0 = s.bench.now_s()
    assert c.query(b"SHUT ON;*OPC?;SHUT?\n") == b"1;1\n"
    assert s.bench.shutter_open is True
    assert s.bench.now_s() == pytest.approx(t0 + 0.010)  # *OPC? waited for the blade (SHUTTER_S)
    assert c.query(b"SHUTTER 0;*OPC?;SHUTTER?\n") == b"1;0\n"
    assert s.bench.shutter_open is False


def test_delay_generator_seconds_to_ps(serve: Callable[..., Served]) -> None:
    s = serve(calibration=_calibration(generator_time_zero_ps=25_000.0, generator_range_ps=(0.0, 1.0e10)))
    c = s.connect("delay_generator")
    assert c.query(b"DEL?\n") == b"2.5E-08\n"  # power-up: the time-zero setting, 25 000 ps
    assert c.query(b"DEL:LIM?\n") == b"0.0,0.01\n"  # 0 to 1e10 ps = 10 ms
    assert c.query(b"DEL 1.5E-06;DEL?\n") == b"1.5E-06\n"
    assert s.bench.generator_setting_ps == pytest.approx(1.5e6, rel=1e-12)  # 1.5 µs = 1.5e6 ps
    assert s.bench.electronic_delay_ps() == pytest.approx(1.5e6 - 25_000.0, rel=1e-12)
    c.send(b"DELAY 0.02\n")
    code, text = _error(c)
    assert code == -222 and "0.02" in text
    assert s.bench.generator_setting_ps == pytest.approx(1.5e6, rel=1e-12)


# --------------------------------------------------------------------------------------------------
# Spectrometer and the SPB1 record
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("has_reference, chopped", [(False, False), (True, True)])
def test_shot_record_equals_twin_bench(serve: Callable[..., Served], has_reference: bool, chopped: bool) -> None:
    cal = _calibration(has_reference=has_reference)
    settings = _settings(seed=5, probe={"chopped": chopped},
                         detector={"dropped_frame_probability": 0.01, "generator_threads": 1})
    s = serve(calibration=cal, settings=settings)
    twin = VirtualBench(settings, cal)
    try:
        s.bench.shutter_open = twin.shutter_open = True
        c = s.connect("detector")
        assert c.query(b"SENS:PIX?;SENS:REF?\n") == f"{PIXELS};{PIXELS if has_reference else 0}\n".encode()
        c.send(b"ACQ:SHOT? 700\n")
        payload = _read_block(c)
        expected = twin.generate_shots(700)
    finally:
        twin.close()
    rec = _decode_record(payload)
    ref_width = PIXELS if has_reference else 0
    n = expected.n_shots
    assert n < 700  # a 1 % drop rate loses about 7 of 700 frames
    # docs/instruments.md: 20 + 9 n + 2 n (pixels + ref_width) bytes, nothing after the last field.
    assert len(payload) == 20 + 9 * n + 2 * n * (PIXELS + ref_width) == rec["end"]
    assert (rec["magic"], rec["n"], rec["pixels"], rec["ref_width"], rec["flags"]) == \
        (b"SPB1", n, PIXELS, ref_width, int(chopped))
    np.testing.assert_array_equal(rec["frame"], expected.frame_id)
    np.testing.assert_array_equal(rec["counts"], expected.counts)
    np.testing.assert_array_equal(rec["state"] & 1, expected.pump_on)
    probe = expected.probe_on if chopped else np.ones(n, bool)
    np.testing.assert_array_equal(rec["state"] >> 1, probe)
    if has_reference:
        np.testing.assert_array_equal(rec["reference"], expected.reference)
    assert np.any(np.diff(rec["frame"]) > 1)  # the gaps are in the frame counter


def test_block_framing_read_by_the_driver_codec(serve: Callable[..., Served]) -> None:
    c = serve().connect("detector")
    c.send(b"ACQ:SHOTS? 50\n*OPC?\n")
    reader = ReplyReader("detector")
    replies: list[Any] = []
    deadline = time.monotonic() + TIMEOUT_S
    while len(replies) < 2:
        assert time.monotonic() < deadline
        readable, _, _ = select.select([c.sock], [], [], TIMEOUT_S)
        assert readable
        reader.feed(c.sock.recv(1 << 20))
        while (r := reader.next_reply()) is not NEED_DATA:
            replies.append(r)
    # The codec takes exactly the announced bytes as the block, then the next reply as text.
    assert isinstance(replies[0], bytes) and replies[0][:4] == b"SPB1"
    assert len(replies[0]) == record_bytes(50, PIXELS, 0)
    assert replies[1] == "1"


def test_acquire_parameter_errors(serve: Callable[..., Served]) -> None:
    c = serve().connect("detector")
    for message, code in ((b"ACQ:SHOT? 0\n", -222), (b"ACQ:SHOT? 1.5\n", -224), (b"ACQ:SHOT? many\n", -104),
                          (f"ACQ:SHOT? {max_shots(PIXELS, 0) + 1}\n".encode(), -222), (b"ACQ:SHOT?\n", -109)):
        c.send(message)
        assert c.silent_for(0.05), message  # a query that fails gives no reply (IEEE 488.2)
        assert _error(c)[0] == code, message


def test_encode_shot_record_is_fast_enough_for_10khz_1024px() -> None:
    """The record of 10 000 shots × 1024 px (one second at 10 kHz) must build in well under a second."""
    from shotpair.drivers.base import ShotBlock

    n, px = 10_000, 1024
    rng = np.random.default_rng(1)
    block = ShotBlock(counts=rng.integers(0, 65535, (n, px), dtype=np.uint16), pump_on=np.arange(n) % 2 == 0,
                      frame_id=np.arange(n, dtype=np.int64))
    t0 = time.perf_counter()
    buf = encode_shot_block(block, four_state=False)
    elapsed = time.perf_counter() - t0
    rec = _decode_record(bytes(buf[2 + 8:]))
    np.testing.assert_array_equal(rec["counts"], block.counts)
    assert elapsed < 0.5, f"{elapsed:.3f} s for one second of shots"


# --------------------------------------------------------------------------------------------------
# Faults, latency, query interrupted
# --------------------------------------------------------------------------------------------------


def test_fault_no_reply_from_python_and_from_the_wire(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("shutter")
    s.servers["shutter"].inject("no_reply", count=1)
    c.send(b"*IDN?\n")
    assert c.silent_for(0.1)
    assert c.query(b"SHUT?\n") == b"0\n"
    assert c.query(b"SIM:FAUL NO_REPLY,2;SIM:FAUL?\n") == b"2,0,0\n"  # simulator commands are exempt
    c.send(b"SHUT?\n")
    c.send(b"SHUT?\n")
    assert c.silent_for(0.1)
    assert c.query(b"SIMULATE:FAULT?\n") == b"0,0,0\n"
    c.send(b"SHUT 1\n")  # replies are counted, commands without one are not
    assert c.query(b"SHUT?\n") == b"1\n"


def test_fault_garbled_flips_the_high_bit(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("delay_axis")
    ident = c.query(b"*IDN?\n")
    c.send(b"SIMulate:FAULt garbled,1\n")
    garbled = c.query(b"*IDN?\n")
    assert garbled == bytes(b ^ 0x80 for b in ident[:-1]) + b"\n"
    reader = ReplyReader("delay_axis")
    reader.feed(garbled)
    with pytest.raises(InstrumentReplyError):  # the driver codec refuses it (non-ASCII text)
        reader.next_reply()
    assert c.query(b"*IDN?\n") == ident


def test_fault_disconnect_closes_and_the_next_connection_works(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("chopper")
    s.servers["chopper"].inject("disconnect")
    c.send(b"FREQ 100\n")
    with pytest.raises((ConnectionError, OSError)):
        c.line()
    again = s.connect("chopper")
    assert again.query(b"FREQ?\n") == b"500.0\n"  # the command that met the fault was not executed
    again.send(b"SIM:FAUL disconnect,1\n")
    with pytest.raises((ConnectionError, OSError)):
        again.query(b"*IDN?\n")
    assert s.connect("chopper").query(b"LOCK?\n") == b"1\n"


def test_fault_command_errors(serve: Callable[..., Served]) -> None:
    c = serve().connect("delay_generator")
    for message, code in ((b"SIM:FAUL explode,1\n", -224), (b"SIM:FAUL garbled\n", -109),
                          (b"SIM:FAUL garbled,-1\n", -222), (b"SIM:FAUL garbled,0.5\n", -224)):
        c.send(message)
        assert _error(c)[0] == code, message
    assert c.query(b"SIM:FAUL?\n") == b"0,0,0\n"


def test_latency_is_per_device_wall_time(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("shutter")
    assert c.query(b"SIM:LAT 0.05;SIM:LAT?\n") == b"0.05\n"
    t0 = time.monotonic()
    assert c.query(b"SHUT?\n") == b"0\n"
    assert time.monotonic() - t0 >= 0.05
    other = s.connect("chopper")
    t0 = time.monotonic()
    assert other.query(b"LOCK?\n") == b"1\n"
    assert time.monotonic() - t0 < 0.05  # the chopper's own latency is 0


def test_query_interrupted_discards_the_unread_reply(serve: Callable[..., Served]) -> None:
    settings = _settings(quiet=True, detector={"generator_threads": 1})
    s = serve(settings=settings)
    c = s.connect("detector", rcvbuf=4096)  # a small window: most of a large reply stays at the simulator
    n = 200_000
    full = record_bytes(n, PIXELS, 0)  # 27 MB, more than any socket buffer holds
    c.send(f"ACQ:SHOT? {n}\n".encode())
    head = c.exact(2)
    assert head == b"#8"  # the block started
    c.send(b"SYST:ERR?\n")  # a new message while the reply is unread
    deadline = time.monotonic() + 20.0
    marker = b'-410,"Query INTERRUPTED;'
    while not (c.buf.endswith(b"\n") and marker in c.buf[-200:]):
        assert time.monotonic() < deadline, "no -410 entry"
        readable, _, _ = select.select([c.sock], [], [], 1.0)
        if readable:
            c.buf += c.sock.recv(1 << 20)
    # IEEE 488.2: the rest of the unread response is discarded and -410 queued; here it answers SYST:ERR?.
    assert len(head) + len(c.buf) < full
    c.buf.clear()
    assert c.query(b"*OPC?\n") == b"1\n"


def test_resync_marker_of_the_driver_codec(serve: Callable[..., Served]) -> None:
    c = serve().connect("delay_axis")
    reader = ReplyReader("delay_axis")
    resync = Resync(reader)
    for _ in range(3):  # markers of 2, 3 and 4 *OPC? queries
        c.send(resync.begin())
        reader.feed(c.line())
        assert resync.poll()


def test_input_overrun_is_363_and_the_next_message_works(serve: Callable[..., Served]) -> None:
    c = serve().connect("shutter")
    c.send(b"X" * 70_000 + b"\n")
    assert _error(c)[0] == -363  # input buffer overrun (SCPI-99 vol. 2 ch. 21, from memory)
    assert c.query(b"SHUT?\n") == b"0\n"


# --------------------------------------------------------------------------------------------------
# Real transports, server life cycle, the sans-I/O engine alone
# --------------------------------------------------------------------------------------------------


def test_real_transports_reach_the_servers(serve: Callable[..., Served]) -> None:
    s = serve()
    tcp = make_transport(s.servers["chopper"].address, name="chopper", key_path="test")
    visa = make_transport(s.servers["detector"].visa_address, name="detector", key_path="test")
    tcp.open()
    visa.open()
    try:
        tcp.write(b"LOCK?\n")
        assert tcp.read_until(b"\n", TIMEOUT_S) == b"1\n"
        visa.write(b"ACQ:SHOT? 20\n")
        head = visa.read_exact(2, TIMEOUT_S)
        length = int(visa.read_exact(int(head[1:2]), TIMEOUT_S))
        payload = visa.read_exact(length + 1, TIMEOUT_S)
        assert payload[:4] == b"SPB1" and payload[-1:] == b"\n" and length == record_bytes(20, PIXELS, 0)
    finally:
        tcp.close()
        visa.close()


def test_stop_joins_and_frees_the_port(serve: Callable[..., Served]) -> None:
    s = serve()
    c = s.connect("delay_generator")
    assert c.query(b"*OPC?\n") == b"1\n"
    server = s.servers["delay_generator"]
    port = server.port
    assert server.connections == 1
    assert server.stop(timeout_s=TIMEOUT_S)
    assert server.connections == 0
    with pytest.raises(ConnectionRefusedError):
        socket.create_connection(("127.0.0.1", port), timeout=TIMEOUT_S)


def test_many_connections_share_one_bench() -> None:
    """Threads on different devices of one bench: the shared lock keeps the bench consistent."""
    bench = VirtualBench(_settings(quiet=True), _calibration())
    devices = make_devices(bench)
    errors: list[BaseException] = []
    results: dict[str, list[bytes]] = {}

    def drive(name: str, message: bytes, times: int) -> None:
        try:
            parser = devices[name].parser(stop=threading.Event())
            results[name] = [parser.feed(message) for _ in range(times)]
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=drive, args=a) for a in (
        ("detector", b"ACQ:SHOT? 100\n", 20), ("chopper", b"PHAS 90;PHAS?\n", 200),
        ("delay_axis", b"HOME;*OPC?\n", 20))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(TIMEOUT_S)
    bench.close()
    assert not errors and not any(t.is_alive() for t in threads)
    assert all(r == b"90.0\n" for r in results["chopper"])
    assert all(r == b"1\n" for r in results["delay_axis"])
    frames = np.concatenate([_decode_record(decode_block(r[:-1]))["frame"] for r in results["detector"]])
    assert np.all(np.diff(frames) > 0)  # the laser's shots never go back in time


def test_engine_alone_is_sans_io() -> None:
    device = ScpiDevice("box", ["maker", "box", "7", "1.0"])
    device.add("VALue?", lambda a: "42")
    device.add("VALue", lambda a: None, params=(1, 1))
    p = device.parser()
    assert p.feed(b"*IDN?\r\nVAL?;val 3;VALUE?\n") == b"maker,box,7,1.0\n42;42\n"
    assert p.feed(b"VAL") == b""  # an incomplete message waits for its terminator
    assert p.feed(b"?\n") == b"42\n"
    p.interrupt()  # what a session calls when a reply was left unread
    assert p.feed(b"SYST:ERR?\n").startswith(b'-410,"Query INTERRUPTED')
    with pytest.raises(ValueError):
        ScpiDevice("bad", ["a,b", "c", "d", "e"])
