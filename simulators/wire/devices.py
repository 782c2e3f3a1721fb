"""The five wire-simulated instruments of docs/instruments.md, on one shared virtual bench.

What it is for: the device side of shotpair's reference SCPI command set, so that the real ``scpi``
drivers can be tested byte for byte without hardware. Each device wraps the in-process simulated
instrument of simulators/instruments.py (limits, homing, timing all come from the VirtualBench models)
and adds the behaviour of a wire instrument: overlapped operations that ``*OPC?`` waits for, error-queue
entries instead of exceptions, a binary shot record (``SPB1``) for the spectrometer. Every handler runs
under one lock shared by the devices of a bench, since each connection has its own thread.

What it must not do: open sockets or ports (tcp_server.py does), sleep except through the virtual clock
(whose real-time mode is the simulated duration of the work), or change the physics of the bench.

Units on the wire are SCPI's base units: mm, Hz, degrees, s; the bench keeps delays in ps.
"""

from __future__ import annotations

import contextlib
import math
import threading
from typing import Iterator, Mapping

import numpy as np
from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import InstrumentError, LimitError, StateError
from shotpair.drivers.shot_record import encode_shot_block, max_shots
from shotpair.simulators.bench import VirtualBench
from shotpair.simulators.instruments import (
    POLL_S,
    SimChopper,
    SimDelayAxis,
    SimDelayGenerator,
    SimDetector,
    SimShutter,
)

from .scpi_device import Args, Interrupted, ReplyValue, ScpiDevice, ScpiError, format_bool, format_number

__all__ = [
    "DEVICE_NAMES",
    "DEFAULT_LATENCY_S",
    "SHUTTER_S",
    "REALTIME_CHUNK_S",
    "BenchDevice",
    "StageDevice",
    "ChopperDevice",
    "ShutterDevice",
    "SpectrometerDevice",
    "DelayGeneratorDevice",
    "make_devices",
]

#: The devices of a bench, named as the bench file names the instruments.
DEVICE_NAMES = ("delay_axis", "chopper", "shutter", "detector", "delay_generator")

#: Per-message latency of each device in real-time mode, in s (invented, typical of small controllers).
DEFAULT_LATENCY_S: Mapping[str, float] = {
    "delay_axis": 0.002,
    "chopper": 0.001,
    "shutter": 0.001,
    "detector": 0.0005,
    "delay_generator": 0.001,
}

#: Time the shutter blade takes to open or close, in s (virtual time; ``*OPC?`` waits for it).
SHUTTER_S = 0.010

#: In real-time mode a block is exposed in parts of at most this duration, in s, so the bench lock is
#: free in between and a stop is seen quickly.
REALTIME_CHUNK_S = 0.02

@contextlib.contextmanager
def _device_errors() -> Iterator[None]:
    """Turn the simulated instruments' exceptions into error-queue entries."""
    try:
        yield
    except LimitError as exc:
        raise ScpiError(-222, exc.message) from None
    except StateError as exc:
        raise ScpiError(-221, str(exc)) from None
    except InstrumentError as exc:
        raise ScpiError(-200, exc.message) from None


class BenchDevice(ScpiDevice):
    """A device on the virtual bench: its clock is the bench's, waiting follows the bench's mode.

    In fast mode waiting advances virtual time at once; in real-time mode it waits on the session's stop
    event until the (wall-clock-following) virtual clock gets there.
    """

    def __init__(self, name: str, instrument: SimDelayAxis | SimChopper | SimShutter | SimDetector | SimDelayGenerator,
                 *, lock: threading.Lock | None = None, latency_s: float = 0.0) -> None:
        super().__init__(name, [f.strip() for f in instrument.identity().split(",")], lock=lock, latency_s=latency_s)
        instrument.connect()
        self.instrument = instrument
        self.bench: VirtualBench = instrument.bench

    def now_s(self) -> float:
        return self.bench.now_s()

    def wait_until_s(self, t_s: float, stop: threading.Event | None) -> None:
        clock = self.bench.clock
        if not clock.realtime or stop is None:
            clock.advance_to(t_s)
            return
        while (remaining := t_s - clock.now_s()) > 0:
            if stop.wait(remaining):
                raise Interrupted("stopped while waiting for the device")


class StageDevice(BenchDevice):
    """The delay stage: ``MOVE:ABSolute``, ``POSition?``, ``MOVE:STATe?``, ``HOME``, ``HOME:STATe?``,
    ``MOVE:STOP``, ``LIMit?``. Moves and homing are overlapped (``*OPC?`` waits until settled); a move
    before homing is -221, outside the travel -222 (no motion either way). A status query costs
    :data:`~shotpair.simulators.instruments.POLL_S` of virtual time, so a polling loop ends in fast mode."""

    def __init__(self, bench: VirtualBench, *, name: str = "delay_axis", lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        self.axis = SimDelayAxis(name, bench)
        super().__init__(name, self.axis, lock=lock, latency_s=latency_s)
        self.add("MOVE:ABSolute", self._move, params=(1, 1))
        self.add("POSition?", lambda a: format_number(self.axis.position_mm()))
        self.add("MOVE:STATe?", lambda a: format_bool(self.axis.is_moving()))
        self.add("HOME", self._home)
        self.add("HOME:STATe?", self._homed)
        self.add("MOVE:STOP", lambda a: self.axis.stop())
        self.add("LIMit?", lambda a: ",".join(format_number(x) for x in self.axis.travel_mm))

    def _move(self, args: Args) -> None:
        target_mm = args.number(0, "position in mm")
        with _device_errors():
            self.axis.move_to_mm(target_mm)

    def _home(self, args: Args) -> None:
        self.bench.stage.home(self.bench.now_s())

    def _homed(self, args: Args) -> str:
        self.bench.clock.advance(POLL_S)
        return format_bool(self.axis.is_homed)

    def busy_until_s(self) -> float:
        return max(self.bench.now_s(), self.bench.stage.settled_at_s())

    def reset(self) -> None:
        """``*RST`` stops the stage where it is (homing is kept unless a homing run is cut short)."""
        self.axis.stop()


class ChopperDevice(BenchDevice):
    """The pump chopper: ``FREQuency``, ``FREQuency?`` (Hz), ``PHASe``, ``PHASe?`` (degrees), ``LOCK?``.

    It locks at half the laser repetition rate; frequencies outside the simulated chopper's range are
    -222."""

    def __init__(self, bench: VirtualBench, *, name: str = "chopper", lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        self.chopper = SimChopper(name, bench)
        super().__init__(name, self.chopper, lock=lock, latency_s=latency_s)
        self.add("FREQuency", self._frequency, params=(1, 1))
        self.add("FREQuency?", lambda a: format_number(self.chopper.frequency_hz()))
        self.add("PHASe", self._phase, params=(1, 1))
        self.add("PHASe?", lambda a: format_number(self.chopper.phase_deg()))
        self.add("LOCK?", lambda a: format_bool(self.chopper.is_locked()))

    def _frequency(self, args: Args) -> None:
        value_hz = args.number(0, "frequency in Hz")
        with _device_errors():
            self.chopper.set_frequency_hz(value_hz)

    def _phase(self, args: Args) -> None:
        value_deg = args.number(0, "phase in degrees")
        with _device_errors():
            self.chopper.set_phase_deg(value_deg)

    def reset(self) -> None:
        """``*RST``: half the repetition rate (locked), phase 0."""
        self.chopper.set_frequency_hz(0.5 * self.bench.calibration.repetition_rate_hz)
        self.chopper.set_phase_deg(0.0)


class ShutterDevice(BenchDevice):
    """The beam shutter: ``SHUTter 1|0|ON|OFF`` (overlapped: ``*OPC?`` waits :data:`SHUTTER_S`),
    ``SHUTter?``. The beam is blocked or let through at the command; closed at power-up and on ``*RST``."""

    def __init__(self, bench: VirtualBench, *, name: str = "shutter", lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        self.shutter = SimShutter(name, bench)
        super().__init__(name, self.shutter, lock=lock, latency_s=latency_s)
        self._done_s = 0.0
        self.add("SHUTter", self._set, params=(1, 1))
        self.add("SHUTter?", lambda a: format_bool(self.shutter.is_open()))

    def _set(self, args: Args) -> None:
        want_open = args.boolean(0, "shutter state")
        if want_open != self.shutter.is_open():
            self._done_s = self.bench.now_s() + SHUTTER_S
        with _device_errors():
            if want_open:
                self.shutter.open()
            else:
                self.shutter.close()

    def busy_until_s(self) -> float:
        return max(self.bench.now_s(), self._done_s)

    def reset(self) -> None:
        """``*RST`` closes the shutter."""
        self.shutter.close()


class SpectrometerDevice(BenchDevice):
    """The spectrometer: ``SENSe:PIXels?``, ``SENSe:REFerence?`` and ``ACQuire:SHOTs? n``, which answers
    the next n laser shots as one ``SPB1`` record in a definite-length block.

    In fast mode the block is one call of :meth:`VirtualBench.generate_shots`, so it equals what a twin
    bench with the same seed generates. In real-time mode it is exposed in parts of at most
    :data:`REALTIME_CHUNK_S` (the reply comes when the last shot has happened). ``n`` outside
    [1, :func:`max_shots`] is -222 and no reply."""

    def __init__(self, bench: VirtualBench, *, name: str = "detector", lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        self.detector = SimDetector(name, bench)
        super().__init__(name, self.detector, lock=lock, latency_s=latency_s)
        self.ref_width = self.detector.pixels if self.detector.has_reference else 0
        self.add("SENSe:PIXels?", lambda a: str(self.detector.pixels))
        self.add("SENSe:REFerence?", lambda a: str(self.ref_width))
        self.add("ACQuire:SHOTs?", self._acquire, params=(1, 1), locked=False)

    def _acquire(self, args: Args) -> ReplyValue:
        n = args.integer(0, "number of shots")
        high = max_shots(self.detector.pixels, self.ref_width)
        if not 1 <= n <= high:
            raise ScpiError(-222, f"number of shots {n} outside [1, {high}]")
        bench = self.bench
        if not bench.clock.realtime:
            with self.lock:
                block = bench.generate_shots(n)
        else:
            block = self._acquire_paced(n, args.stop)
        return encode_shot_block(block, four_state=bench.settings.probe.chopped)

    def _acquire_paced(self, n: int, stop: threading.Event | None) -> ShotBlock:
        bench = self.bench
        step = max(1, int(REALTIME_CHUNK_S * bench.calibration.repetition_rate_hz))
        parts: list[ShotBlock] = []
        left = n
        while left > 0:
            if stop is not None and stop.is_set():
                raise Interrupted("stopped during an acquisition")
            take = min(step, left)
            with self.lock:
                parts.append(bench.generate_shots(take))
            left -= take
        if len(parts) == 1:
            return parts[0]

        def cat(name: str) -> np.ndarray | None:
            arrays = [getattr(p, name) for p in parts]
            return None if arrays[0] is None else np.concatenate(arrays)

        return ShotBlock(counts=cat("counts"), pump_on=cat("pump_on"), frame_id=cat("frame_id"),  # type: ignore[arg-type]
                         reference=cat("reference"), probe_on=cat("probe_on"), meta=dict(parts[0].meta))


class DelayGeneratorDevice(BenchDevice):
    """The delay generator: ``DELay`` / ``DELay?`` in s, ``DELay:LIMit?`` ``low,high`` in s; its setting
    is the bench's ``generator_setting_ps``. Electronic: takes effect at once. Outside the range: -222."""

    def __init__(self, bench: VirtualBench, *, name: str = "delay_generator", lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        self.generator = SimDelayGenerator(name, bench)
        super().__init__(name, self.generator, lock=lock, latency_s=latency_s)
        self.add("DELay", self._set, params=(1, 1))
        self.add("DELay?", lambda a: format_number(self.generator.delay_ps() / 1e12))
        self.add("DELay:LIMit?", lambda a: ",".join(format_number(x / 1e12) for x in self.generator.range_ps))

    def _set(self, args: Args) -> None:
        delay_s = args.number(0, "delay in s")
        low_ps, high_ps = self.generator.range_ps
        if not (math.isfinite(delay_s) and low_ps <= delay_s * 1e12 <= high_ps):
            raise ScpiError(-222, f"delay {format_number(delay_s)} s outside [{format_number(low_ps / 1e12)}, "
                                  f"{format_number(high_ps / 1e12)}] s")
        with _device_errors():
            self.generator.set_delay_ps(delay_s * 1e12)

    def reset(self) -> None:
        """``*RST``: back to the power-up setting, the calibration's time-zero setting."""
        self.generator.set_delay_ps(self.bench.calibration.generator_time_zero_ps)


_CLASSES: Mapping[str, type[BenchDevice]] = {
    "delay_axis": StageDevice,
    "chopper": ChopperDevice,
    "shutter": ShutterDevice,
    "detector": SpectrometerDevice,
    "delay_generator": DelayGeneratorDevice,
}


def make_devices(bench: VirtualBench, *, names: tuple[str, ...] = DEVICE_NAMES, lock: threading.Lock | None = None,
                 latency_s: float | Mapping[str, float] = 0.0) -> dict[str, BenchDevice]:
    """Build the devices ``names`` (from :data:`DEVICE_NAMES`) on one bench, sharing one lock.

    ``latency_s`` is one latency for all, or one per name (missing names get 0), in s.

    Raises
    ------
    ValueError
        Unknown device name or a latency outside [0, 10] s.
    """
    shared = lock if lock is not None else threading.Lock()
    out: dict[str, BenchDevice] = {}
    for name in names:
        if name not in _CLASSES:
            raise ValueError(f"unknown device {name!r}; devices: {', '.join(DEVICE_NAMES)}")
        latency = latency_s.get(name, 0.0) if isinstance(latency_s, Mapping) else latency_s
        out[name] = _CLASSES[name](bench, name=name, lock=shared, latency_s=latency)
    return out
