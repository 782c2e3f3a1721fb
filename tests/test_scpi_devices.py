"""The five scpi drivers over pipe_pair against a scripted instrument, and the shot-record codec.

Each test states the exact lines the instrument receives (docs/instruments.md, section 2, is the command
set). Limits are checked before anything is sent: those tests show that the next line the instrument
gets is the next command. The shot-record decoder is held to numpy arrays by a round trip (hypothesis)
and to "only InstrumentReplyError, ever" by a fuzz test.
"""

from __future__ import annotations

import logging
import math
import struct
import threading
from decimal import Decimal
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scpi_helpers import Error, ScriptedDevice, block, gate
from shotpair.drivers import registry
from shotpair.drivers.base import Chopper, DelayAxis, DelayGenerator, Detector, Shutter
from shotpair.drivers.errors import (
    ConfigError,
    InstrumentReplyError,
    InstrumentTimeout,
    LimitError,
    StateError,
    TransportError,
)
from shotpair.drivers.scpi_devices import ScpiChopper, ScpiDelayAxis, ScpiDelayGenerator, ScpiDetector, ScpiShutter
from shotpair.drivers.shot_record import RECORD_MAGIC, decode_shot_record, encode_shot_record, record_bytes
from shotpair.drivers.scpi_instrument import ScpiCommandError, ScpiRangeError
from shotpair.drivers.transports import pipe_pair

SHORT_S = 0.1
LONG_S = 5.0
CONNECT = ["*CLS", "*IDN?"]


def bench(**sections):
    """A stand-in for DriverContext with bench settings holding only the given sections."""
    return SimpleNamespace(bench_settings=SimpleNamespace(**{k: SimpleNamespace(**v) for k, v in sections.items()}))


@pytest.fixture
def rig():
    """rig(cls, table, options=None, context=None, connect=True) -> (driver, device); closed afterwards."""
    made = []

    def make(cls, table, *, options=None, context=None, connect=True, name=None):
        name = name or cls.KIND
        driver_end, device_end = pipe_pair(name=name)
        device = ScriptedDevice(device_end, table).__enter__()
        opts = {"address": "loop://", "timeout_s": LONG_S, **(options or {})}
        driver = cls.from_options(name, opts, context, transport=driver_end)
        made.append((driver, device))
        if connect:
            driver.connect()
        return driver, device

    yield make
    for driver, device in made:
        driver.disconnect()
        device.__exit__(None, None, None)


# --------------------------------------------------------------------------------------------- delay axis

AXIS = {"LIMit?": "-5.0,200.0", "HOME:STATe?": "1", "POSition?": "12.5", "MOVE:STATe?": "0",
        "MOVE:ABSolute": None, "HOME": None, "MOVE:STOP": None}


def test_axis_connect_reads_limits_and_homing_and_narrows_the_travel(rig):
    axis, device = rig(ScpiDelayAxis, AXIS, context=bench(delay_axis={"travel_mm": (0.0, 150.0)}))
    assert device.lines == CONNECT + ["LIMit?", "HOME:STATe?"]
    assert axis.travel_mm == (0.0, 150.0) and axis.identity() == "Acme, Model 7, SN42, 1.0"
    narrow, _ = rig(ScpiDelayAxis, {**AXIS, "LIMit?": "10,100"}, context=bench(delay_axis={"travel_mm": (0, 150)}))
    assert narrow.travel_mm == (10.0, 100.0)  # DOC: the narrower wins


def test_axis_travel_before_connect_is_the_bench_files(rig):
    axis, device = rig(ScpiDelayAxis, AXIS, context=bench(delay_axis={"travel_mm": (0.0, 150.0)}), connect=False)
    assert axis.travel_mm == (0.0, 150.0)
    free, _ = rig(ScpiDelayAxis, AXIS, connect=False)  # no bench settings: the controller alone decides
    free.connect()
    assert free.travel_mm == (-5.0, 200.0)


def test_axis_travel_outside_the_controller_limits_is_a_config_error(rig):
    axis, device = rig(ScpiDelayAxis, {**AXIS, "LIMit?": "200,300"},
                       context=bench(delay_axis={"travel_mm": (0.0, 150.0)}), connect=False)
    with pytest.raises(ConfigError, match="200, 300") as info:
        axis.connect()
    assert info.value.key_path == "bench.delay_axis.travel_mm" and not axis.link.is_connected


@pytest.mark.parametrize("reply", ["12", "5,1", "a,b", "1,2,3"])
def test_axis_garbled_limits_are_a_reply_error(rig, reply):
    axis, device = rig(ScpiDelayAxis, {**AXIS, "LIMit?": reply}, connect=False)
    with pytest.raises(InstrumentReplyError):
        axis.connect()


def test_axis_move_sends_the_position_and_checks_errors(rig):
    axis, device = rig(ScpiDelayAxis, AXIS)
    axis.move_to_mm(12.5)
    axis.move_to_mm(0.1 + 0.2)  # repr-exact on the wire
    assert device.since(4) == ["MOVE:ABSolute 12.5", "SYSTem:ERRor?", "MOVE:ABSolute 0.30000000000000004",
                               "SYSTem:ERRor?"]


@pytest.mark.parametrize("position", [-0.001, 150.001, math.nan, math.inf, -math.inf])
def test_axis_limit_check_before_any_byte_is_sent(rig, position):
    axis, device = rig(ScpiDelayAxis, AXIS, context=bench(delay_axis={"travel_mm": (0.0, 150.0)}))
    with pytest.raises(LimitError) as info:
        axis.move_to_mm(position)
    assert (info.value.low, info.value.high) == (0.0, 150.0) and info.value.instrument == "delay_axis"
    assert axis.position_mm() == 12.5
    assert device.since(4) == ["POSition?"]  # nothing was sent for the refused move


def test_axis_refuses_to_move_before_homing(rig):
    axis, device = rig(ScpiDelayAxis, {**AXIS, "HOME:STATe?": "0"})
    with pytest.raises(StateError, match="home the axis first"):
        axis.move_to_mm(10.0)
    assert device.since(4) == ["HOME:STATe?"]  # asked again (homed by hand meanwhile?), then refused
    free, free_device = rig(ScpiDelayAxis, {**AXIS, "HOME:STATe?": "0"}, options={"require_homing": False})
    free.move_to_mm(10.0)
    assert free_device.since(4) == ["MOVE:ABSolute 10.0", "SYSTem:ERRor?"]


def test_axis_controller_refusal_becomes_a_typed_error(rig):
    # DOC: a move before homing gives -221, outside the limits -222 (the controller's own check).
    axis, device = rig(ScpiDelayAxis, {**AXIS, "MOVE:ABSolute": Error('-222,"Data out of range"')})
    with pytest.raises(ScpiRangeError) as info:
        axis.move_to_mm(100.0)
    assert info.value.value == 100.0 and isinstance(info.value, LimitError)


def test_axis_home_waits_for_completion_and_checks_the_result(rig):
    axis, device = rig(ScpiDelayAxis, AXIS)
    axis.home(timeout_s=LONG_S)
    assert device.since(4) == ["HOME", "SYSTem:ERRor?", "*OPC?", "MOVE:STATe?", "HOME:STATe?"]
    unhomed, _ = rig(ScpiDelayAxis, {**AXIS, "HOME:STATe?": "0"})
    with pytest.raises(InstrumentReplyError, match="does not report homed"):
        unhomed.home(timeout_s=LONG_S)


def test_axis_wait_settled_returns_the_readback(rig):
    axis, device = rig(ScpiDelayAxis, AXIS)
    assert axis.wait_settled(timeout_s=LONG_S) == 12.5
    assert device.since(4) == ["*OPC?", "MOVE:STATe?", "POSition?"]


def test_axis_wait_settled_polls_until_settled(rig):
    states = iter(["1", "1", "0"])
    axis, device = rig(ScpiDelayAxis, {**AXIS, "MOVE:STATe?": lambda dev, unit: next(states)})
    assert axis.wait_settled(timeout_s=LONG_S) == 12.5
    assert device.since(4) == ["*OPC?"] + ["MOVE:STATe?"] * 3 + ["POSition?"]


def test_axis_can_wait_by_polling_instead_of_opc(rig):
    # A timed-out *OPC? stays pending, and a controller that executes nothing after it until the move
    # ends would hold back a stop too; polling leaves nothing pending.
    states = iter(["1", "1", "0", "1", "1", "1"])
    axis, device = rig(ScpiDelayAxis, {**AXIS, "MOVE:STATe?": lambda dev, unit: next(states, "1")},
                       options={"poll_interval_s": 0.0})
    assert axis.wait_settled(timeout_s=LONG_S) == 12.5
    assert device.since(4) == ["MOVE:STATe?"] * 3 + ["POSition?"]
    with pytest.raises(InstrumentTimeout, match="the move not finished within 0.1 s"):
        axis.wait_settled(timeout_s=SHORT_S)
    assert axis.link.in_sync


def test_axis_wait_settled_timeout(rig):
    release = threading.Event()
    axis, device = rig(ScpiDelayAxis, {**AXIS, "*OPC?": gate(release, "1")})
    try:
        with pytest.raises(InstrumentTimeout, match="the move not finished within 0.1 s"):
            axis.wait_settled(timeout_s=SHORT_S)
    finally:
        release.set()


def test_axis_stop_is_sent_at_once_and_never_raises(rig, caplog):
    release = threading.Event()
    axis, device = rig(ScpiDelayAxis, {**AXIS, "*OPC?": gate(release, "1")})
    with pytest.raises(InstrumentTimeout):
        axis.wait_settled(timeout_s=SHORT_S)
    axis.stop()  # out of sync: written at once, no resync first
    release.set()
    assert device.wait_lines(6)[4:6] == ["*OPC?", "MOVE:STOP"]
    # refused: logged, not raised
    device.table["MOVE:STOP"] = Error('-113,"Undefined header"')
    device.table["*OPC?"] = "1"
    axis.position_mm()  # back in sync
    with caplog.at_level(logging.ERROR):
        axis.stop()
    assert "did not understand 'MOVE:STOP'" in caplog.text
    # broken link and disconnected: logged or nothing, never raised
    axis.link.transport.close()
    axis.stop()
    axis.disconnect()
    axis.stop()


def test_axis_state_is_best_effort(rig):
    axis, device = rig(ScpiDelayAxis, {**AXIS, "MOVE:STATe?": "maybe"})
    state = axis.state()
    assert state["position_mm"] == 12.5 and state["homed"] is True and "moving" not in state
    assert state["travel_mm"] == [-5.0, 200.0] and len(state["errors"]) == 1
    axis.disconnect()
    assert axis.state()["connected"] is False


def test_axis_command_overrides_change_the_wire(rig):
    axis, device = rig(ScpiDelayAxis, {**AXIS, "PA": None, "TP?": "3.25"},
                       options={"commands": {"move_absolute": "PA {position_mm:.3f}", "query_position": "TP?"}})
    axis.move_to_mm(1.23456)
    assert axis.position_mm() == 3.25
    assert device.since(4) == ["PA 1.235", "SYSTem:ERRor?", "TP?"]


# --------------------------------------------------------------------------------------------- chopper

CHOPPER = {"FREQuency": None, "FREQuency?": "500.0", "PHASe": None, "PHASe?": "12.5", "LOCK?": "1"}


def test_chopper_sets_and_reads(rig):
    chopper, device = rig(ScpiChopper, CHOPPER)
    chopper.set_frequency_hz(500)
    chopper.set_phase_deg(-12.5)
    assert chopper.frequency_hz() == 500.0 and chopper.phase_deg() == 12.5 and chopper.is_locked() is True
    assert device.since(2) == ["FREQuency 500.0", "SYSTem:ERRor?", "PHASe -12.5", "SYSTem:ERRor?", "FREQuency?",
                               "PHASe?", "LOCK?"]
    assert chopper.state() == {"frequency_hz": 500.0, "phase_deg": 12.5, "locked": True}


@pytest.mark.parametrize("call", [lambda c: c.set_frequency_hz(0.0), lambda c: c.set_frequency_hz(-1.0),
                                  lambda c: c.set_frequency_hz(math.nan), lambda c: c.set_phase_deg(math.inf)])
def test_chopper_refuses_impossible_values_before_sending(rig, call):
    chopper, device = rig(ScpiChopper, CHOPPER)
    with pytest.raises(LimitError):
        call(chopper)
    assert chopper.is_locked()
    assert device.since(2) == ["LOCK?"]


def test_chopper_out_of_range_frequency_is_the_controllers_limit_error(rig):
    chopper, device = rig(ScpiChopper, {**CHOPPER, "FREQuency": Error('-222,"Data out of range"')})
    with pytest.raises(LimitError, match="refused the value 99999.0"):
        chopper.set_frequency_hz(99999.0)


# --------------------------------------------------------------------------------------------- shutter


class ShutterDevice:
    """A shutter whose SHUTter? answers what it was last told."""

    def __init__(self, stuck_open: bool = False):
        self.open = False
        self.stuck_open = stuck_open

    def table(self):
        def set_(dev, unit):
            self.open = unit.endswith("1") or self.stuck_open

        return {"SHUTter": set_, "SHUTter?": lambda dev, unit: "1" if self.open else "0"}


def test_shutter_open_and_close_wait_and_confirm(rig):
    model = ShutterDevice()
    shutter, device = rig(ScpiShutter, model.table())
    shutter.open()
    assert shutter.is_open() and model.open
    shutter.close()
    assert not shutter.is_open()
    assert device.since(2) == ["SHUTter 1", "SYSTem:ERRor?", "*OPC?", "SHUTter?", "SHUTter?",
                               "SHUTter 0", "SYSTem:ERRor?", "*OPC?", "SHUTter?", "SHUTter?"]
    assert shutter.state() == {"open": False}


def test_shutter_close_raises_when_it_cannot_confirm(rig):
    shutter, device = rig(ScpiShutter, ShutterDevice(stuck_open=True).table())
    with pytest.raises(InstrumentReplyError, match="still reports open"):
        shutter.close()
    shutter.link.transport.close()  # the link broke
    with pytest.raises(TransportError):
        shutter.close()
    shutter.disconnect()
    with pytest.raises(StateError):
        shutter.close()


def test_shutter_close_refused_is_raised(rig):
    shutter, device = rig(ScpiShutter, {"SHUTter": Error('-200,"Execution error"'), "SHUTter?": "0"})
    with pytest.raises(InstrumentReplyError, match="'SHUTter 0' failed: -200"):
        shutter.close()


def test_shutter_close_is_sent_before_resynchronising(rig):
    release = threading.Event()
    model = ShutterDevice()
    shutter, device = rig(ScpiShutter, {**model.table(), "SHUTter?": gate(release, "1")},
                          options={"actuate_timeout_s": LONG_S})
    shutter.link.timeout_s = SHORT_S
    with pytest.raises(InstrumentTimeout):
        shutter.is_open()
    device.table["SHUTter?"] = lambda dev, unit: "1" if model.open else "0"
    release.set()
    shutter.link.timeout_s = LONG_S
    shutter.close()
    assert device.since(2)[:3] == ["SHUTter?", "*OPC?;*OPC?", "SHUTter 0"]


# --------------------------------------------------------------------------------------------- detector


def record(n=4, pixels=8, ref_width=0, four_state=False, seed=0):
    rng = np.random.default_rng(seed)
    frame = np.arange(100, 100 + n, dtype=np.int64)
    state = rng.integers(0, 4, n).astype(np.uint8)
    counts = rng.integers(0, 65536, (n, pixels)).astype(np.uint16)
    ref = rng.integers(0, 65536, (n, ref_width)).astype(np.uint16) if ref_width else None
    return frame, state, counts, ref, encode_shot_record(frame, state, counts, ref, four_state=four_state)


def detector_table(payloads, pixels=8, ref_width=0):
    queue = list(payloads)
    return {"SENSe:PIXels?": str(pixels), "SENSe:REFerence?": str(ref_width),
            "ACQuire:SHOTs?": lambda dev, unit: block(queue.pop(0))}


def test_detector_connect_reads_pixels_and_reference(rig):
    det, device = rig(ScpiDetector, detector_table([], pixels=8, ref_width=1), connect=False,
                      context=bench(detector={"pixels": 1024, "has_reference": False}))
    assert det.pixels == 1024 and det.has_reference is False  # before connect: the bench file's
    det.connect()
    assert device.lines == CONNECT + ["SENSe:PIXels?", "SENSe:REFerence?"]
    assert det.pixels == 8 and det.has_reference is True
    bare, _ = rig(ScpiDetector, detector_table([]), connect=False)
    with pytest.raises(StateError):
        _ = bare.pixels


@pytest.mark.parametrize("ref_width, four_state", [(0, False), (1, False), (8, True), (0, True)])
def test_detector_acquire_round_trip(rig, ref_width, four_state):
    frame, state, counts, ref, payload = record(n=5, pixels=8, ref_width=ref_width, four_state=four_state)
    det, device = rig(ScpiDetector, detector_table([payload], pixels=8, ref_width=ref_width))
    shots = det.acquire(5, timeout_s=LONG_S)
    assert device.since(4) == ["ACQuire:SHOTs? 5"]
    np.testing.assert_array_equal(shots.counts, counts)
    np.testing.assert_array_equal(shots.frame_id, frame)
    np.testing.assert_array_equal(shots.pump_on, (state & 1).astype(bool))
    assert shots.counts.dtype == np.uint16 and shots.frame_id.dtype == np.int64 and shots.pump_on.dtype == bool
    if four_state:
        np.testing.assert_array_equal(shots.probe_on, (state & 2).astype(bool))
    else:
        assert shots.probe_on is None
    if ref_width:
        np.testing.assert_array_equal(shots.reference, ref)
    else:
        assert shots.reference is None


def test_detector_fewer_shots_than_asked_is_fine_more_is_not(rig):
    _, _, _, _, three = record(n=3)
    _, _, _, _, five = record(n=5)
    det, device = rig(ScpiDetector, detector_table([three, five]))
    assert det.acquire(4, timeout_s=LONG_S).n_shots == 3  # dropped frames
    with pytest.raises(InstrumentReplyError, match="more than the 4 asked"):
        det.acquire(4, timeout_s=LONG_S)


@pytest.mark.parametrize("n", [0, -1, 10**9, 2.5, True])
def test_detector_refuses_impossible_shot_counts_before_sending(rig, n):
    det, device = rig(ScpiDetector, detector_table([]))
    with pytest.raises(LimitError):
        det.acquire(n, timeout_s=LONG_S)
    assert device.since(4) == []
    assert det.max_shots() == min(1_000_000, (2**28 - 20) // (9 + 2 * 8))


def _tamper(payload: bytes, offset: int, fmt: str, value) -> bytes:
    raw = bytearray(payload)
    struct.pack_into(fmt, raw, offset, value)
    return bytes(raw)


_, _, _, _, GOOD = record(n=4, pixels=8)
GARBLED = [
    (GOOD[:19], "shorter than its 20-byte header"),
    (GOOD[:-1], "need"),  # short record
    (GOOD + b"\0", "need"),
    (b"SPB2" + GOOD[4:], "magic"),
    (_tamper(GOOD, 4, "<I", 5), "need"),  # n says 5, data for 4
    (_tamper(GOOD, 8, "<I", 16), "16 pixels per spectrum, the detector reported 8"),
    (_tamper(GOOD, 12, "<I", 3), "reference width 3"),
    (_tamper(GOOD, 16, "<I", 2), "reserved flag bits"),
    (_tamper(GOOD, 8, "<I", 0), "0 pixels"),
]


@pytest.mark.parametrize("payload, message", GARBLED)
def test_detector_garbled_record_is_a_reply_error(rig, payload, message):
    det, device = rig(ScpiDetector, detector_table([payload, GOOD]))
    with pytest.raises(InstrumentReplyError, match=message) as info:
        det.acquire(4, timeout_s=LONG_S)
    assert info.value.instrument == "detector"
    assert det.acquire(4, timeout_s=LONG_S).n_shots == 4  # the block framing was fine: still in sync


def test_detector_timeout_then_next_block_is_its_own(rig):
    release = threading.Event()
    _, _, first, _, late = record(n=4, seed=1)
    _, _, second, _, fresh = record(n=4, seed=2)
    replies = iter([gate(release, block(late)), block(fresh)])
    det, device = rig(ScpiDetector, {**detector_table([]), "ACQuire:SHOTs?": lambda dev, unit: next(replies)})
    det.link.timeout_s = SHORT_S
    with pytest.raises(InstrumentTimeout):
        det.acquire(4, timeout_s=SHORT_S)
    release.set()
    det.link.timeout_s = LONG_S
    np.testing.assert_array_equal(det.acquire(4, timeout_s=LONG_S).counts, second)


def test_detector_text_reply_explained_by_the_queue(rig):
    det, device = rig(ScpiDetector, {**detector_table([]),
                                     "ACQuire:SHOTs?": lambda dev, unit: dev.errors.append('-113,"Undefined header"')
                                     or "ERR"})
    with pytest.raises(ScpiCommandError, match="not a definite-length block"):
        det.acquire(4, timeout_s=LONG_S)


@settings(max_examples=150, deadline=None)
@given(n=st.integers(0, 40), pixels=st.integers(1, 64), ref=st.sampled_from(["none", "one", "full"]),
       four_state=st.booleans(), seed=st.integers(0, 2**32 - 1))
def test_shot_record_round_trip_equals_the_arrays(n, pixels, ref, four_state, seed):
    rng = np.random.default_rng(seed)
    ref_width = {"none": 0, "one": 1, "full": pixels}[ref]
    frame = rng.integers(-(2**63), 2**63 - 1, n, dtype=np.int64)
    state = rng.integers(0, 256, n).astype(np.uint8)
    counts = rng.integers(0, 65536, (n, pixels)).astype(np.uint16)
    reference = rng.integers(0, 65536, (n, ref_width)).astype(np.uint16) if ref_width else None
    payload = encode_shot_record(frame, state, counts, reference, four_state=four_state)
    assert len(payload) == record_bytes(n, pixels, ref_width) == 20 + 9 * n + 2 * n * (pixels + ref_width)  # DOC
    shots = decode_shot_record(payload, pixels=pixels, ref_width=ref_width, max_shots=n)
    np.testing.assert_array_equal(shots.counts, counts)
    np.testing.assert_array_equal(shots.frame_id, frame)
    np.testing.assert_array_equal(shots.pump_on, (state & 1) == 1)
    assert shots.counts.flags.aligned and shots.counts.shape == (n, pixels)
    if four_state:
        np.testing.assert_array_equal(shots.probe_on, (state & 2) == 2)
    else:
        assert shots.probe_on is None
    if reference is None:
        assert shots.reference is None
    else:
        np.testing.assert_array_equal(shots.reference, reference)


def test_shot_record_layout_exact_bytes():
    # DOC: magic, n, pixels, ref_width, flags (uint32 LE), then frame int64, state uint8, counts uint16.
    payload = encode_shot_record(np.array([7, 9]), np.array([1, 2]), np.array([[1, 2], [3, 0xABCD]]),
                                 four_state=True)
    assert payload == (RECORD_MAGIC + struct.pack("<IIII", 2, 2, 0, 1) + struct.pack("<qq", 7, 9) + b"\x01\x02"
                       + struct.pack("<HHHH", 1, 2, 3, 0xABCD))


@settings(max_examples=300, deadline=None)
@given(st.one_of(st.binary(max_size=200), st.builds(lambda head, body: RECORD_MAGIC + head + body,
                                                    st.binary(min_size=16, max_size=16), st.binary(max_size=200))))
def test_fuzz_shot_record_only_reply_errors(payload):
    try:
        decode_shot_record(payload)
    except InstrumentReplyError as exc:
        assert exc.instrument == "detector"


# --------------------------------------------------------------------------------------------- generator

GENERATOR = {"DELay:LIMit?": "0,1.0E-03", "DELay": None, "DELay?": "1.2345E-09"}


def test_generator_range_is_the_narrower_of_bench_and_device(rig):
    gen, device = rig(ScpiDelayGenerator, GENERATOR, context=bench(delay_generator={"range_ps": (0.0, 1.0e10)}))
    assert device.lines == CONNECT + ["DELay:LIMit?"]
    assert gen.range_ps == (0.0, 1.0e9)  # 1E-03 s = 1e9 ps
    with pytest.raises(ConfigError) as info:
        rig(ScpiDelayGenerator, GENERATOR, context=bench(delay_generator={"range_ps": (2.0e9, 3.0e9)}))
    assert info.value.key_path == "bench.delay_generator.range_ps"


def test_generator_converts_ps_to_seconds_exactly(rig):
    gen, device = rig(ScpiDelayGenerator, GENERATOR)
    gen.set_delay_ps(1234.5)
    gen.set_delay_ps(0.0)
    gen.set_delay_ps(1e8 + 0.001)
    assert gen.delay_ps() == 1234.5  # not 1234.4999999999998 from 1.2345e-09 * 1e12
    assert device.since(3) == ["DELay 1.2345E-9", "SYSTem:ERRor?", "DELay 0E-13", "SYSTem:ERRor?",
                               "DELay 1.00000000001E-4", "SYSTem:ERRor?", "DELay?"]


@pytest.mark.parametrize("delay_ps", [-1.0, 1.0e9 + 1, math.nan, math.inf])
def test_generator_limit_check_before_sending(rig, delay_ps):
    gen, device = rig(ScpiDelayGenerator, GENERATOR)
    with pytest.raises(LimitError):
        gen.set_delay_ps(delay_ps)
    gen.delay_ps()
    assert device.since(3) == ["DELay?"]


@settings(max_examples=300)
@given(st.floats(allow_nan=False, allow_infinity=False, min_value=-1e15, max_value=1e15))
def test_generator_wire_value_is_the_exact_decimal_of_the_ps_value(delay_ps):
    from shotpair.drivers.scpi_devices import _ps_to_seconds, _seconds_to_ps

    seconds = _ps_to_seconds(delay_ps)
    text = format(seconds, "E")
    assert Decimal(text) == Decimal(repr(delay_ps)) / Decimal(10) ** 12
    assert _seconds_to_ps(text, instrument="g") == delay_ps  # an instrument echoing it reads back the same


# --------------------------------------------------------------------------------------------- factories


KINDS = [("delay_axis", DelayAxis, ScpiDelayAxis), ("chopper", Chopper, ScpiChopper),
         ("shutter", Shutter, ScpiShutter), ("detector", Detector, ScpiDetector),
         ("delay_generator", DelayGenerator, ScpiDelayGenerator)]


@pytest.mark.parametrize("kind, interface, cls", KINDS)
def test_registry_builds_unconnected_scpi_drivers(kind, interface, cls):
    inst = registry.create(kind, "scpi", kind, {"address": "tcp://127.0.0.1:5025"}, registry.DriverContext())
    assert isinstance(inst, interface) and type(inst) is cls and not inst.link.is_connected


@pytest.mark.parametrize("kind, interface, cls", KINDS)
def test_factory_bad_options_name_the_key(kind, interface, cls):
    context = registry.DriverContext()
    cases = [({"address": "tcp://127.0.0.1:5025", "speed": 1}, f"bench.{kind}.options.speed"),
             ({}, f"bench.{kind}.options.address"),
             ({"address": "nope"}, f"bench.{kind}.options.address"),
             ({"address": "tcp://127.0.0.1:5025", "commands": {"bogus": "X"}}, f"bench.{kind}.options.commands.bogus")]
    for options, key_path in cases:
        with pytest.raises(ConfigError) as info:
            registry.create(kind, "scpi", kind, options, context)
        assert info.value.key_path == key_path, options
    with pytest.raises(ConfigError) as info:
        registry.create(kind, "scpi", kind, {"address": "tcp://127.0.0.1:5025", "commands": {"bogus": "X"}}, context)
    assert ", ".join(sorted(cls.COMMANDS)) == info.value.allowed


def test_driver_specific_options():
    with pytest.raises(ConfigError) as info:
        registry.create("shutter", "scpi", "shutter", {"address": "loop://", "actuate_timeout_s": 0},
                        registry.DriverContext())
    assert info.value.key_path == "bench.shutter.options.actuate_timeout_s"
    with pytest.raises(ConfigError) as info:
        registry.create("chopper", "scpi", "chopper", {"address": "loop://", "require_homing": False},
                        registry.DriverContext())
    assert info.value.key_path == "bench.chopper.options.require_homing"  # only the axis has it
