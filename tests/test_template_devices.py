"""Template drivers against the example controller: over an in-process pipe (fast) and over a real pty.

The example controller (simulators/wire/serial_controller.py) is first checked on its own, byte for byte.
Then the template delay axis, chopper and shutter run against it through pipe_pair: limits before
anything is sent, homing, settling, stop, chopper and shutter, error replies as typed errors, injected
faults as timeouts with recovery, and a late reply that must never answer the next query. One test
repeats the essentials over a pseudo-terminal opened with pyserial (serial:// address) and measures the
round trip of one query. Server threads wait on select / condition timeouts and a stop event; nothing
sleeps to synchronise. configs/bench-serial.toml is loaded and its templates compiled.
"""

from __future__ import annotations

import copy
import dataclasses
import logging
import os
import statistics
import termios
import threading
import time
import tty
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from shotpair.daemon.config import BenchSettings, load_config
from shotpair.daemon.plan import make_plan
from shotpair.drivers import registry
from shotpair.drivers.ascii_template import ControllerReplyError
from shotpair.drivers.base import Chopper, DelayAxis, Shutter
from shotpair.drivers.errors import (
    ConfigError,
    InstrumentReplyError,
    InstrumentTimeout,
    LimitError,
    StateError,
    TransportError,
)
from shotpair.drivers.template_devices import (
    TemplateChopper,
    TemplateDelayAxis,
    TemplateShutter,
    make_chopper,
    make_delay_axis,
    make_shutter,
)
from shotpair.drivers.transports import Transport, make_transport, pipe_pair
from shotpair.simulators.bench import BenchCalibration, VirtualBench
from shotpair.simulators.settings import SimulationSettings
from shotpair.simulators.wire.pty_server import PtyServer
from shotpair.simulators.wire.serial_controller import ExampleController, Fault, bench_options, make_controller

ROOT = Path(__file__).resolve().parents[1]
POLL_S = 0.01
JOIN_S = 2.0
FAST = {"poll_interval_s": 0.0, "drain_s": 0.02, "reply_timeout_s": 1.0}
SHORT_TIMEOUT = {"reply_timeout_s": 0.05}
#: The controller's own travel, narrower than the bench file's [0, 150] mm: the driver must use [5, 100].
CONTROLLER_TRAVEL_MM = (5.0, 100.0)


# -- helpers ----------------------------------------------------------------------------------------------


class PipeServer:
    """Serves one device on the device end of a pipe_pair in a thread (the in-process twin of PtyServer)."""

    def __init__(self, device: ExampleController, peer: Transport) -> None:
        self.device = device
        self.peer = peer
        self.stop_event = threading.Event()
        self.thread = threading.Thread(target=self._run, name="pipe-controller", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        try:
            while not self.stop_event.is_set():
                data = self.peer.read_available(65536, POLL_S)
                if data:
                    reply = self.device.feed(data)
                    if reply:
                        self.peer.write(reply)
                if self.device.hangup:
                    break
        except TransportError:
            pass  # the driver end was closed
        finally:
            self.peer.close()

    def close(self) -> None:
        self.stop_event.set()
        self.thread.join(JOIN_S)
        assert not self.thread.is_alive(), "pipe server did not stop"


def fast_bench(travel_mm: tuple[float, float] = CONTROLLER_TRAVEL_MM) -> VirtualBench:
    settings = SimulationSettings(seed=1, stage={"velocity_mm_per_s": 2000.0, "settle_s": 0.005})
    calibration = dataclasses.replace(BenchCalibration.demo(pixels=16), travel_mm=travel_mm)
    return VirtualBench(settings, calibration, realtime=False)


def bench_context(**delay_axis: Any) -> registry.DriverContext:
    return registry.DriverContext(bench_settings=BenchSettings(delay_axis=delay_axis))


FACTORIES = {"delay_axis": make_delay_axis, "chopper": make_chopper, "shutter": make_shutter}


class Rig:
    """Builds controller + pipe + driver triples on one shared bench and tears them all down."""

    def __init__(self) -> None:
        self.bench = fast_bench()
        self.lock = threading.RLock()
        self.servers: list[PipeServer] = []
        self.instruments: list[Any] = []

    def make(self, kind: str, options: dict | None = None, *, context: registry.DriverContext | None = None,
             connect: bool = True, **controller: Any) -> tuple[Any, ExampleController]:
        device = make_controller(kind, self.bench, lock=self.lock, **controller)
        opts = options if options is not None else {**bench_options(kind, "/dev/ttyUSB0"), **FAST}
        driver_end, device_end = pipe_pair(name=kind)
        self.servers.append(PipeServer(device, device_end))
        inst = FACTORIES[kind](kind, opts, context or bench_context(), transport=driver_end)
        self.instruments.append(inst)
        if connect:
            inst.connect()
        return inst, device

    def close(self) -> None:
        for inst in self.instruments:
            inst.disconnect()
        for server in self.servers:
            server.close()
        self.bench.close()


@pytest.fixture
def rig() -> Iterator[Rig]:
    r = Rig()
    yield r
    r.close()


def options(kind: str, **overrides: Any) -> dict:
    return copy.deepcopy({**bench_options(kind, "/dev/ttyUSB0"), **FAST, **overrides})


# -- the example controller on its own (sans-I/O) -----------------------------------------------------------


@pytest.fixture
def controllers() -> Iterator[dict[str, ExampleController]]:
    bench = fast_bench()
    lock = threading.Lock()
    yield {kind: make_controller(kind, bench, lock=lock) for kind in ("delay_axis", "chopper", "shutter")}
    bench.close()


CONTROLLER_TABLE = [
    ("delay_axis", b"WHO?\r\n", b"ID example-controller stage EX-1001 fw 1.0\r\n"),
    ("delay_axis", b"RANGE?\r\n", b"RANGE 5.0000 100.0000\r\n"),
    ("delay_axis", b"HOMED?\n", b"HOMED NO\r\n"),
    ("delay_axis", b"GO 50\r\n", b"ERR 30 not homed\r\n"),
    ("delay_axis", b"GO 999\r", b"ERR 20 value out of range 999.0 not in [5.0, 100.0]\r\n"),
    ("delay_axis", b"GO\r\n", b"ERR 11 bad or missing value expects one decimal number\r\n"),
    ("delay_axis", b"GO nan\r\n", b"ERR 11 bad or missing value expects one decimal number, got nan\r\n"),
    ("delay_axis", b"WHERE 3\r\n", b"ERR 11 bad or missing value takes no value, got 3\r\n"),
    ("delay_axis", b"where\r\n", b"AT 52.5000\r\n"),  # keywords in any case; power-up in mid travel
    ("delay_axis", b"FLY\r\n", b"ERR 10 unknown command FLY\r\n"),
    ("delay_axis", b"SPIN?\r\n", b"ERR 10 unknown command SPIN?\r\n"),  # a stage has no chopper commands
    ("delay_axis", b"\r\n\r\n", b""),  # empty lines are ignored
    ("delay_axis", b"X" * 300, b"ERR 12 line too long more than 256 bytes\r\n"),
    ("chopper", b"SPIN?\r\n", b"SPIN 500.000\r\n"),
    ("chopper", b"LOCK?\r\n", b"LOCK YES\r\n"),
    ("chopper", b"SPIN 60000\r\n", b"ERR 20 value out of range 60000.0 not in [1.0, 50000.0]\r\n"),
    ("chopper", b"PHASE 400\r\n", b"ERR 20 value out of range 400.0 not in [0, 360]\r\n"),
    ("shutter", b"SHUTTER?\r\n", b"SHUTTER SHUT\r\n"),
    ("shutter", b"OPEN\r\nSHUTTER?\r\n", b"OK\r\nSHUTTER OPEN\r\n"),
]


@pytest.mark.parametrize("kind, sent, reply", CONTROLLER_TABLE)
def test_controller_exact_bytes(controllers: dict[str, ExampleController], kind: str, sent: bytes,
                                reply: bytes) -> None:
    assert controllers[kind].feed(sent) == reply


def test_controller_reassembles_split_commands_and_homes(controllers: dict[str, ExampleController]) -> None:
    stage = controllers["delay_axis"]
    assert stage.feed(b"HO") == b"" and stage.feed(b"ME\r") == b"OK\r\n"
    # Virtual time advances 1 ms per command in fast mode, so polling ends: homing to 5 mm from 52.5 mm at
    # 2000 mm/s plus 5 ms settling takes ~29 ms of virtual time (~29 commands).
    replies = [stage.feed(b"HOMED?\r\n") for _ in range(100)]
    assert replies[0] == b"HOMED NO\r\n" and replies[-1] == b"HOMED YES\r\n"
    assert 20 <= replies.index(b"HOMED YES\r\n") <= 40
    assert stage.feed(b"WHERE\r\n") == b"AT 5.0000\r\n"
    assert stage.feed(b"GO 12.5\r\nBUSY?\r\n") == b"OK\r\nBUSY YES\r\n"
    assert list(stage.received)[-2:] == ["GO 12.5", "BUSY?"]


def test_controller_faults(controllers: dict[str, ExampleController]) -> None:
    shutter = controllers["shutter"]
    shutter.inject(Fault.NO_REPLY)
    assert shutter.feed(b"OPEN\r\n") == b"" and shutter.instrument.is_open()  # carried out, not answered
    shutter.inject("garbled")
    assert shutter.feed(b"SHUTTER?\r\n") == b"#NEPO RETTUHS\r\n"
    shutter.inject(Fault.LATE, count=2)
    assert shutter.feed(b"SHUT\r\nSHUTTER?\r\n") == b""
    assert shutter.release_late() == b"OK\r\nSHUTTER SHUT\r\n" and shutter.release_late() == b""
    shutter.inject(Fault.DISCONNECT)
    assert shutter.feed(b"OPEN\r\n") == b"" and shutter.hangup and not shutter.instrument.is_open()
    assert shutter.feed(b"SHUTTER?\r\n") == b""


def test_bench_options_are_a_fresh_toml_table() -> None:
    a, b = bench_options("chopper", "/dev/pts/7"), bench_options("chopper", "/dev/pts/7")
    assert a == b and a is not b and a["commands"] is not b["commands"]
    assert a["address"] == "serial:///dev/pts/7"

    def plain(value: Any) -> bool:
        if isinstance(value, dict):
            return all(isinstance(k, str) and plain(v) for k, v in value.items())
        if isinstance(value, list):
            return all(plain(v) for v in value)
        return isinstance(value, (str, int, float, bool))

    assert all(plain(bench_options(kind, "/x")) for kind in ("delay_axis", "chopper", "shutter"))
    with pytest.raises(ValueError):
        bench_options("detector", "/x")


# -- factories and configuration ----------------------------------------------------------------------------


def test_registry_builds_unconnected_template_instruments() -> None:
    context = bench_context()
    for kind, cls, base in (("delay_axis", TemplateDelayAxis, DelayAxis), ("chopper", TemplateChopper, Chopper),
                            ("shutter", TemplateShutter, Shutter)):
        inst = registry.create(kind, "template", kind, options(kind), context)
        assert isinstance(inst, cls) and isinstance(inst, base)
        assert not inst.link.connected
        assert inst.identity() == "template controller at serial:///dev/ttyUSB0"
        with pytest.raises(StateError, match="while disconnected"):
            inst.state()


@pytest.mark.parametrize("overrides, key_path, fragment", [
    ({"speed": 3}, "bench.delay_axis.options.speed", "unknown option"),
    ({"address": "usb://stage"}, "bench.delay_axis.options.address", "unknown transport scheme"),
    ({"address": "serial:///dev/ttyUSB0?baud=9600"}, "bench.delay_axis.options.address", "unknown setting 'baud'"),
    ({"transport": {"tarce": True}}, "bench.delay_axis.options.transport", "unknown transport option 'tarce'"),
    ({"reply_timeout_s": 0.0}, "bench.delay_axis.options.reply_timeout_s", "number of seconds"),
    ({"drain_s": -1.0}, "bench.delay_axis.options.drain_s", "number of seconds"),
    ({"read_terminator": ""}, "bench.delay_axis.options.read_terminator", "must not be empty"),
    ({"position_scale": 0.0}, "bench.delay_axis.options.position_scale", "finite number > 0"),
    ({"encoding": "ascii", "read_terminator": "¶"}, "bench.delay_axis.options.read_terminator", "cannot be encoded"),
    ({"commands": {}}, "bench.delay_axis.options.commands.move_absolute", "required operation is missing"),
    ({"commands": "GO"}, "bench.delay_axis.options.commands", "table of operations"),
    ({"identity": {"sned": "WHO?", "reply": ".*"}}, "bench.delay_axis.options.identity.sned",
     "unknown key (got 'WHO?'); allowed: send, reply"),
    ({"identity": 5}, "bench.delay_axis.options.identity", "a fixed text or a query table"),
])
def test_factory_config_errors(overrides: dict, key_path: str, fragment: str) -> None:
    with pytest.raises(ConfigError) as info:
        make_delay_axis("delay_axis", options("delay_axis", **overrides), bench_context())
    assert info.value.key_path == key_path and fragment in str(info.value)


@pytest.mark.parametrize("op, table, key_path, fragment", [
    ("set_phase", {"send": "PHASE {phase:.3f}", "reply": "OK"}, "set_phase.send", "allowed: {phase_deg}"),
    ("set_phase", {"send": "PHASE {phase_deg:.3f}", "reply": "OK", "ack": "OK"}, "set_phase.ack",
     "unknown key (got 'OK'); allowed: send, reply"),
    ("set_phase", {"send": 3, "reply": "OK"}, "set_phase.send", "non-empty text"),
    ("query_locked", {"send": "LOCK?", "reply": "(?P<locked>.)", "true_values": [1]}, "query_locked.true_values",
     "non-empty list of texts"),
])
def test_factory_reports_a_bad_command_with_its_key_path(op: str, table: dict, key_path: str,
                                                         fragment: str) -> None:
    opts = options("chopper")
    opts["commands"][op] = table
    with pytest.raises(ConfigError) as info:
        make_chopper("chopper", opts, None)
    assert info.value.key_path == f"bench.chopper.options.commands.{key_path}"
    assert fragment in str(info.value)


def test_delay_axis_factory_needs_the_bench_settings() -> None:
    with pytest.raises(ConfigError, match="travel_mm"):
        make_delay_axis("delay_axis", options("delay_axis"), registry.DriverContext())


def test_example_bench_file_loads_plans_and_its_templates_compile() -> None:
    cfg = load_config(ROOT / "configs" / "bench-serial.toml")
    bench = cfg.bench
    plan = make_plan(cfg.require_scan(), bench, cfg.path)
    assert len(plan.delays_ps) == 1 + 13 + 8
    context = registry.DriverContext(bench_settings=bench)
    for kind in ("delay_axis", "chopper", "shutter"):
        section = getattr(bench, kind)
        assert section.driver == "template"
        inst = registry.create(kind, section.driver, kind, section.options, context)
        assert not inst.link.connected
        # The file documents exactly the command set the simulated controller understands.
        written = dict(section.options)
        assert written.pop("address").startswith("serial:///dev/ttyUSB")
        expected = bench_options(kind, "/dev/ttyUSB0")
        expected.pop("address")
        assert written == expected, kind
    assert bench.detector.driver == "sim"


# -- delay axis over the pipe -------------------------------------------------------------------------------


def test_axis_connects_reads_identity_and_narrows_travel(rig: Rig) -> None:
    axis, device = rig.make("delay_axis")
    assert axis.identity() == "example-controller stage EX-1001 fw 1.0"
    assert axis.controller_limits_mm == CONTROLLER_TRAVEL_MM
    assert axis.travel_mm == (5.0, 100.0)  # bench [0, 150] ∩ controller [5, 100]
    assert list(device.received) == ["WHO?", "RANGE?"]


def test_limits_are_checked_before_anything_is_sent(rig: Rig) -> None:
    axis, device = rig.make("delay_axis")
    before = list(device.received)
    for bad in (4.999, 100.001, -1.0, float("nan"), float("inf")):
        with pytest.raises(LimitError) as info:
            axis.move_to_mm(bad)
        assert (info.value.low, info.value.high) == (5.0, 100.0)
    assert list(device.received) == before


def test_moves_need_homing_then_settle_at_the_target(rig: Rig) -> None:
    axis, device = rig.make("delay_axis")
    with pytest.raises(StateError, match="not homed"):
        axis.move_to_mm(50.0)
    assert "GO" not in " ".join(device.received)
    assert not axis.is_homed
    t0 = time.perf_counter()
    axis.home(timeout_s=5.0)
    assert axis.is_homed and axis.position_mm() == 5.0
    axis.move_to_mm(42.1234)
    assert axis.is_moving()
    assert axis.wait_settled(timeout_s=5.0) == 42.1234
    assert not axis.is_moving() and rig.bench.position_mm() == pytest.approx(42.1234, abs=1e-12)
    assert "GO 42.1234" in device.received
    assert time.perf_counter() - t0 < 2.0
    assert axis.state() == {"position_mm": 42.1234, "homed": True, "moving": False, "travel_mm": [5.0, 100.0]}


def test_no_homing_required_lets_the_controller_refuse(rig: Rig) -> None:
    axis, _ = rig.make("delay_axis", context=bench_context(home_before_scan=False))
    assert axis.require_homed is False
    with pytest.raises(ControllerReplyError) as info:
        axis.move_to_mm(50.0)
    err = info.value
    assert (err.code, err.operation, err.command) == ("30", "move_absolute", "GO 50.0000")
    assert err.instrument == "delay_axis" and "not homed" in str(err)
    assert axis.position_mm() == 52.5  # still in step after the error reply


def test_wait_settled_times_out_and_stop_halts(rig: Rig) -> None:
    axis, device = rig.make("delay_axis", context=bench_context(home_before_scan=False))
    rig.bench.stage.home(rig.bench.now_s())
    axis.home(timeout_s=5.0)
    axis.move_to_mm(95.0)
    with pytest.raises(InstrumentTimeout) as info:
        axis.wait_settled(timeout_s=0.0)
    assert info.value.timeout_s == 0.0 and axis.is_moving()
    axis.stop()
    assert device.received[-1] == "HALT"
    assert not axis.is_moving()
    stopped = axis.position_mm()
    assert 5.0 < stopped < 95.0


def test_home_times_out(rig: Rig) -> None:
    axis, device = rig.make("delay_axis")
    with pytest.raises(InstrumentTimeout, match="homing not finished"):
        axis.home(timeout_s=0.0)
    assert device.received[-1] == "HALT"  # stopped after the timeout
    assert not axis.is_homed


def test_stop_never_raises(rig: Rig, caplog: pytest.LogCaptureFixture) -> None:
    axis, device = rig.make("delay_axis", options("delay_axis", **SHORT_TIMEOUT))
    device.inject(Fault.NO_REPLY)
    with caplog.at_level(logging.ERROR, logger="shotpair.drivers.template_devices"):
        axis.stop()
        axis.disconnect()
        axis.stop()
    assert [r.message.split(":")[1].strip() for r in caplog.records] == ["stop failed", "stop failed"]
    assert "no reply to stop 'HALT'" in caplog.records[0].message
    assert "while disconnected" in caplog.records[1].message


def test_position_scale_and_query_done(rig: Rig) -> None:
    opts = options("delay_axis", position_scale=1000.0)
    cmds = opts["commands"]
    cmds["move_absolute"]["send"] = "GO {position_units:d}"
    cmds["query_position"]["reply"] = r"AT (?P<position_units>[-+0-9.]+)"
    cmds["query_limits"]["reply"] = r"RANGE (?P<low_units>[-+0-9.]+) (?P<high_units>[-+0-9.]+)"
    del cmds["query_moving"]
    cmds["query_done"] = {"send": "BUSY?", "reply": "BUSY (?P<done>YES|NO)", "true_values": ["NO"]}
    axis, device = rig.make("delay_axis", opts, position_scale=1000.0)  # the controller speaks µm
    assert axis.travel_mm == (5.0, 100.0)
    axis.home(timeout_s=5.0)
    axis.move_to_mm(12.3456)
    assert device.received[-1] == "GO 12346"  # µm, rounded
    assert axis.wait_settled(timeout_s=5.0) == pytest.approx(12.346, abs=1e-12)
    assert rig.bench.position_mm() == pytest.approx(12.346, abs=1e-12)


def test_controller_limits_that_miss_the_bench_travel_are_a_config_error(rig: Rig) -> None:
    axis, _ = rig.make("delay_axis", connect=False, context=bench_context(travel_mm=(120.0, 150.0),
                                                                          time_zero_mm=130.0))
    with pytest.raises(ConfigError) as info:
        axis.connect()
    assert info.value.key_path == "bench.delay_axis.travel_mm" and "[5.0, 100.0]" in str(info.value)
    assert not axis.link.connected


def test_unknown_command_fails_connect_with_the_controller_error(rig: Rig) -> None:
    opts = options("delay_axis")
    opts["commands"]["query_limits"]["send"] = "LIMITS?"
    axis, _ = rig.make("delay_axis", opts, connect=False)
    with pytest.raises(ControllerReplyError) as info:
        axis.connect()
    assert (info.value.code, info.value.command) == ("10", "LIMITS?")
    assert "unknown command LIMITS?" in str(info.value) and not axis.link.connected


# -- chopper and shutter over the pipe ---------------------------------------------------------------------


def test_chopper_set_query_and_lock(rig: Rig) -> None:
    chopper, device = rig.make("chopper")
    assert chopper.identity() == "example-controller chopper EX-1002 fw 1.0"
    assert chopper.frequency_hz() == 500.0 and chopper.is_locked()  # half of the 1 kHz laser
    chopper.set_frequency_hz(400.0)
    assert chopper.frequency_hz() == 400.0 and not chopper.is_locked()
    chopper.set_frequency_hz(500)
    assert chopper.is_locked()
    chopper.set_phase_deg(30.25)
    assert chopper.phase_deg() == 30.25
    chopper.set_phase_deg(-30.0)
    assert device.received[-1] == "PHASE 330.000" and chopper.phase_deg() == 330.0
    assert chopper.state() == {"frequency_hz": 500.0, "phase_deg": 330.0, "locked": True}
    with pytest.raises(ControllerReplyError) as info:
        chopper.set_frequency_hz(60000.0)
    assert info.value.code == "20" and info.value.command == "SPIN 60000.000"
    before = list(device.received)
    for bad in (0.0, -5.0, float("nan")):
        with pytest.raises(LimitError):
            chopper.set_frequency_hz(bad)
    with pytest.raises(LimitError):
        chopper.set_phase_deg(float("inf"))
    assert list(device.received) == before


def test_chopper_range_and_lock_wait(rig: Rig) -> None:
    chopper, device = rig.make("chopper", options("chopper", frequency_range_hz=[100.0, 1000.0],
                                                  lock_wait_s=0.05))
    with pytest.raises(LimitError) as info:
        chopper.set_frequency_hz(1500.0)
    assert (info.value.low, info.value.high) == (100.0, 1000.0)
    chopper.set_frequency_hz(500.0)
    assert device.received[-1] == "LOCK?" and device.received[-2] == "SPIN 500.000"  # locked at the first poll
    t0 = time.monotonic()
    chopper.set_frequency_hz(300.0)  # never locks: polls for lock_wait_s, then returns
    assert time.monotonic() - t0 >= 0.05 and device.received[-1] == "LOCK?"
    assert not chopper.is_locked()


def test_shutter_open_close_query(rig: Rig) -> None:
    shutter, device = rig.make("shutter")
    assert not shutter.is_open() and not rig.bench.shutter_open
    shutter.open()
    assert shutter.is_open() and rig.bench.shutter_open
    # identity and liveness on connect, is_open, then OPEN and its confirming poll, then is_open again
    assert list(device.received) == ["WHO?", "SHUTTER?", "SHUTTER?", "OPEN", "SHUTTER?", "SHUTTER?"]
    shutter.close()
    assert not shutter.is_open() and not rig.bench.shutter_open
    assert shutter.state() == {"open": False}


def test_shutter_that_never_reports_open_times_out(rig: Rig) -> None:
    opts = options("shutter", settle_timeout_s=0.02)
    opts["commands"]["open"]["send"] = "SHUT"  # a wrong template: the shutter never opens
    shutter, _ = rig.make("shutter", opts)
    with pytest.raises(InstrumentTimeout, match="shutter not open after 0.02 s"):
        shutter.open()


# -- faults and recovery over the pipe ---------------------------------------------------------------------


def test_no_reply_times_out_then_recovers(rig: Rig) -> None:
    axis, device = rig.make("delay_axis", options("delay_axis", **SHORT_TIMEOUT))
    device.inject(Fault.NO_REPLY)
    with pytest.raises(InstrumentTimeout) as info:
        axis.position_mm()
    assert "no reply to query_position 'WHERE' within 0.05 s" in str(info.value)
    assert info.value.instrument == "delay_axis" and axis.link.timeouts == 1
    assert axis.position_mm() == 52.5


def test_garbled_reply_is_a_reply_error_then_recovers(rig: Rig) -> None:
    chopper, device = rig.make("chopper")
    device.inject(Fault.GARBLED)
    with pytest.raises(InstrumentReplyError) as info:
        chopper.frequency_hz()
    assert not isinstance(info.value, ControllerReplyError)
    text = str(info.value)
    assert "query_frequency 'SPIN?'" in text and "bench.chopper.options.commands.query_frequency.reply" in text
    assert "'#000.005 NIPS'" in text
    assert chopper.frequency_hz() == 500.0


def test_late_reply_is_never_taken_for_the_next_one(rig: Rig) -> None:
    axis, device = rig.make("delay_axis", options("delay_axis", **SHORT_TIMEOUT),
                            context=bench_context(home_before_scan=False))
    device.inject(Fault.LATE)
    with pytest.raises(InstrumentTimeout):
        axis.position_mm()  # the controller answers "AT 52.5000", but only later
    rig.bench.stage.stop(rig.bench.now_s())
    rig.bench.stage.home(rig.bench.now_s())
    rig.bench.clock.advance(1.0)  # homed at 5 mm by now
    late = device.release_late()
    assert late == b"AT 52.5000\r\n"
    rig.servers[-1].peer.write(late)  # now in the driver's pipe, ahead of the next reply
    assert axis.position_mm() == 5.0  # the present position, not the stale 52.5
    assert axis.link.drained == late


def test_disconnect_is_a_transport_error(rig: Rig) -> None:
    shutter, device = rig.make("shutter")
    device.inject(Fault.DISCONNECT)
    with pytest.raises(TransportError) as info:
        shutter.is_open()
    assert info.value.instrument == "shutter"
    rig.servers[-1].thread.join(JOIN_S)
    assert not rig.servers[-1].thread.is_alive()


def test_exchanges_from_two_threads_stay_paired(rig: Rig) -> None:
    chopper, _ = rig.make("chopper")
    errors: list[BaseException] = []
    done = threading.Event()

    def worker() -> None:
        try:
            for _ in range(100):
                assert chopper.phase_deg() == 0.0
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)
        finally:
            done.set()

    thread = threading.Thread(target=worker)
    thread.start()
    for _ in range(100):
        assert chopper.frequency_hz() == 500.0
    assert done.wait(JOIN_S)
    thread.join(JOIN_S)
    assert not errors


# -- over a real pseudo-terminal with pyserial ---------------------------------------------------------------


@pytest.fixture
def pty_bench() -> Iterator[tuple[VirtualBench, threading.RLock, dict[str, ExampleController], dict[str, PtyServer]]]:
    bench = fast_bench()
    lock = threading.RLock()
    devices = {kind: make_controller(kind, bench, lock=lock) for kind in ("delay_axis", "chopper", "shutter")}
    servers = {kind: PtyServer(dev, name=kind) for kind, dev in devices.items()}
    for server in servers.values():
        server.start()
    yield bench, lock, devices, servers
    for server in servers.values():
        server.stop()
        assert not server.is_running
    bench.close()


def test_template_drivers_over_a_pty(pty_bench, capsys: pytest.CaptureFixture[str]) -> None:
    bench, _, devices, servers = pty_bench
    context = bench_context()
    made = {}
    for kind, factory in FACTORIES.items():
        opts = {**bench_options(kind, servers[kind].slave_path), **FAST, **SHORT_TIMEOUT}
        made[kind] = factory(kind, opts, context)
        assert made[kind].link.transport.address == f"serial://{servers[kind].slave_path}"
    axis, chopper, shutter = made["delay_axis"], made["chopper"], made["shutter"]
    try:
        for inst in made.values():
            inst.connect()
        assert axis.travel_mm == (5.0, 100.0)
        with pytest.raises(StateError):
            axis.move_to_mm(20.0)
        axis.home(timeout_s=5.0)
        axis.move_to_mm(20.0)
        assert axis.wait_settled(timeout_s=5.0) == 20.0
        chopper.set_phase_deg(90.0)
        assert chopper.phase_deg() == 90.0 and chopper.is_locked()
        shutter.open()
        assert shutter.is_open() and bench.shutter_open
        shutter.close()
        assert not bench.shutter_open

        devices["delay_axis"].inject(Fault.NO_REPLY)
        with pytest.raises(InstrumentTimeout):
            axis.position_mm()
        assert axis.position_mm() == 20.0  # recovered after the drain

        # Round trip of one query (WHERE -> AT ...) through pyserial and the pty, driver parsing included.
        times = []
        for _ in range(200):
            t0 = time.perf_counter()
            axis.position_mm()
            times.append(time.perf_counter() - t0)
        median_ms = statistics.median(times) * 1e3
        p95_ms = sorted(times)[int(0.95 * len(times))] * 1e3
        with capsys.disabled():
            print(f"\n[pty round trip] one query: median {median_ms:.3f} ms, p95 {p95_ms:.3f} ms (n=200)")
        assert median_ms < 20.0
        assert servers["delay_axis"].bytes_in > 200 * len(b"WHERE\r\n")

        devices["shutter"].inject(Fault.DISCONNECT)
        with pytest.raises(TransportError):
            shutter.is_open()
    finally:
        for inst in made.values():
            inst.disconnect()


def test_hang_up_between_write_and_flush_is_a_transport_error() -> None:
    """Found with the pty disconnect fault: pyserial's flush() (termios.tcdrain) raises termios.error, not
    an OSError, when the line hangs up right after a write. Made deterministic here by closing the pty in
    the middle of the transport's write (one thread: nobody waits on the fds)."""
    master, slave = os.openpty()
    tty.setraw(slave)
    transport = make_transport(f"serial://{os.ttyname(slave)}", name="shutter", key_path="k")
    transport.open()
    try:
        port = transport._serial  # the pyserial port (private: this test needs the seam)
        real_write = port.write

        def write_then_hang_up(data: bytes) -> int:
            sent = real_write(data)
            os.close(master)
            os.close(slave)
            return sent

        port.write = write_then_hang_up
        with pytest.raises(TransportError, match="write to .* failed") as info:
            transport.write(b"OPEN\r\n")
        assert isinstance(info.value.__cause__, termios.error)
    finally:
        transport.close()


def test_unreachable_port_is_a_transport_error_naming_it(tmp_path: Path) -> None:
    missing = tmp_path / "no-such-tty"
    axis = make_delay_axis("delay_axis", options("delay_axis", address=f"serial://{missing}"), bench_context())
    with pytest.raises(TransportError) as info:
        axis.connect()
    assert str(missing) in str(info.value) and info.value.instrument == "delay_axis"
    axis.disconnect()
