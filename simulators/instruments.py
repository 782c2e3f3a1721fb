"""Simulated instruments: the drivers/base.py interfaces implemented on the shared virtual bench.

``SimDelayAxis``, ``SimChopper``, ``SimShutter`` and ``SimDetector`` behave as the real drivers promise
(limits, homing, timeouts, errors) but act on one :class:`~shotpair.simulators.bench.VirtualBench`, so
the stage position, the chopper phase and the shutter all show in the detector's shots. The four
``make_*`` factories are what the driver registry calls for driver ``"sim"``. No wires, no sleeping:
waiting advances the virtual clock (which paces itself in real-time mode).
"""

from __future__ import annotations

import math
from importlib.metadata import PackageNotFoundError, version
from typing import Any, Mapping

from shotpair.drivers.base import Chopper, DelayAxis, DelayGenerator, Detector, Shutter, ShotBlock
from shotpair.drivers.errors import ConfigError, InstrumentTimeout, LimitError, StateError

from .bench import VirtualBench

__all__ = [
    "POLL_S",
    "CHOPPER_RANGE_HZ",
    "MAX_SHOTS_PER_BLOCK",
    "SimDelayAxis",
    "SimChopper",
    "SimShutter",
    "SimDetector",
    "SimDelayGenerator",
    "make_delay_axis",
    "make_chopper",
    "make_shutter",
    "make_detector",
    "make_delay_generator",
]

#: Virtual time one status query of the stage costs, in s (a serial round trip), so that a loop polling
#: ``is_moving`` ends in fast mode too.
POLL_S = 1e-3
#: Frequencies the simulated chopper accepts, in Hz.
CHOPPER_RANGE_HZ = (1.0, 50_000.0)
#: Largest block one ``acquire`` may ask for.
MAX_SHOTS_PER_BLOCK = 1_000_000


def _firmware() -> str:
    try:
        return version("shotpair")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0"


class _SimInstrument:
    """Connection bookkeeping shared by the simulated instruments (a mixin before the ABC)."""

    _kind = "instrument"
    _serial = "sim-0000"

    def __init__(self, name: str, bench: VirtualBench) -> None:
        super().__init__(name)  # type: ignore[call-arg]
        self.bench = bench
        self._connected = False

    def connect(self) -> None:
        """Open the (simulated) connection; never fails."""
        self._connected = True

    def disconnect(self) -> None:
        """Close the connection; safe to call twice."""
        self._connected = False

    def identity(self) -> str:
        """``shotpair simulator, <kind>, <serial>, <version>``."""
        return f"shotpair simulator, {self._kind}, {self._serial}, {_firmware()}"

    def _require(self, action: str) -> None:
        if not self._connected:
            raise StateError("connect first", state="disconnected", action=action)


class SimDelayAxis(_SimInstrument, DelayAxis):
    """The bench's delay stage. Positions in mm, times in s (virtual)."""

    _kind = "delay axis"
    _serial = "sim-0001"

    def __init__(self, name: str, bench: VirtualBench) -> None:
        super().__init__(name, bench)
        bench.stage.name = name  # limit errors name the instrument as the bench file does

    @property
    def travel_mm(self) -> tuple[float, float]:
        return self.bench.stage.travel_mm

    @property
    def is_homed(self) -> bool:
        return self.bench.stage.is_homed(self.bench.now_s())

    def home(self, timeout_s: float) -> None:
        """Drive to the reference switch at the low end of the travel; blocks (virtual time) until done.

        Raises InstrumentTimeout when homing takes longer than ``timeout_s`` (the stage keeps going).
        """
        self._require("home")
        clock = self.bench.clock
        done_s = self.bench.stage.home(clock.now_s())
        self._wait_until(done_s, timeout_s, "homing")

    def move_to_mm(self, position_mm: float) -> None:
        """Start a move; returns at once. Raises LimitError outside the travel, StateError before homing."""
        self._require("move")
        self.bench.stage.move_to(float(position_mm), self.bench.now_s())

    def is_moving(self) -> bool:
        """Whether the stage moves or settles; each query costs :data:`POLL_S` of virtual time."""
        self._require("query")
        self.bench.clock.advance(POLL_S)
        return self.bench.stage.is_moving(self.bench.now_s())

    def wait_settled(self, timeout_s: float) -> float:
        """Advance virtual time until the stage has settled; returns the position in mm.

        Raises InstrumentTimeout if that takes longer than ``timeout_s`` (virtual time then is
        ``timeout_s`` later and the stage still moves).
        """
        self._require("wait")
        self._wait_until(self.bench.stage.settled_at_s(), timeout_s, "settling")
        return self.position_mm()

    def _wait_until(self, t_s: float, timeout_s: float, what: str) -> None:
        clock = self.bench.clock
        remaining = t_s - clock.now_s()
        if remaining > timeout_s:
            clock.advance(max(0.0, timeout_s))
            raise InstrumentTimeout(f"{what} not finished within {timeout_s} s", instrument=self.name,
                                    timeout_s=timeout_s)
        clock.advance_to(t_s)

    def position_mm(self) -> float:
        """Read-back position in mm (exact: the simulated encoder has no noise)."""
        self._require("query")
        return self.bench.position_mm()

    def stop(self) -> None:
        """Stop at once; safe at any time, also when disconnected."""
        self.bench.stage.stop(self.bench.now_s())

    def state(self) -> dict[str, Any]:
        now = self.bench.now_s()
        st = self.bench.stage
        return {"position_mm": st.position_mm(now), "target_mm": st.target_mm(), "homed": st.is_homed(now),
                "moving": st.is_moving(now)}


class SimChopper(_SimInstrument, Chopper):
    """The bench's pump chopper. Frequencies in Hz, phases in degrees."""

    _kind = "chopper"
    _serial = "sim-0002"

    def frequency_hz(self) -> float:
        self._require("query")
        return self.bench.chopper.frequency_hz

    def set_frequency_hz(self, frequency_hz: float) -> None:
        """Set the blade frequency; it locks to the laser at half the repetition rate. Raises LimitError."""
        self._require("set frequency")
        low, high = CHOPPER_RANGE_HZ
        if not (math.isfinite(frequency_hz) and low <= frequency_hz <= high):
            raise LimitError("chopper frequency in Hz", instrument=self.name, value=frequency_hz, low=low, high=high)
        bench = self.bench
        bench.chopper.set_frequency_hz(frequency_hz, max(bench.next_shot, bench.shot_at(bench.now_s())))

    def phase_deg(self) -> float:
        self._require("query")
        return self.bench.chopper.phase_deg

    def set_phase_deg(self, phase_deg: float) -> None:
        """Set the phase (kept modulo 360°); 0-90° and 270-360° pump even shots, 90-270° odd ones."""
        self._require("set phase")
        if not math.isfinite(phase_deg):
            raise LimitError("chopper phase in degrees", instrument=self.name, value=phase_deg,
                             low=-math.inf, high=math.inf)
        self.bench.chopper.set_phase_deg(phase_deg)

    def is_locked(self) -> bool:
        self._require("query")
        return self.bench.chopper.is_locked()

    def state(self) -> dict[str, Any]:
        ch = self.bench.chopper
        return {"frequency_hz": ch.frequency_hz, "phase_deg": ch.phase_deg, "locked": ch.is_locked()}


class SimShutter(_SimInstrument, Shutter):
    """The bench's shutter; closed blocks pump and probe (dark measurement). Closed at power-up."""

    _kind = "shutter"
    _serial = "sim-0003"

    def open(self) -> None:
        self._require("open")
        self.bench.shutter_open = True

    def close(self) -> None:
        """Close; safe at any time, also when disconnected."""
        self.bench.shutter_open = False

    def is_open(self) -> bool:
        self._require("query")
        return self.bench.shutter_open

    def state(self) -> dict[str, Any]:
        return {"open": self.bench.shutter_open}


class SimDetector(_SimInstrument, Detector):
    """The bench's line camera (and its reference camera, when the calibration has one)."""

    _kind = "detector"
    _serial = "sim-0004"

    @property
    def pixels(self) -> int:
        return self.bench.calibration.pixels

    @property
    def has_reference(self) -> bool:
        return self.bench.calibration.has_reference

    def acquire(self, n_shots: int, timeout_s: float) -> ShotBlock:
        """Read the next ``n_shots`` laser shots (fewer when frames drop); takes n / rep of virtual time.

        Raises LimitError for ``n_shots`` outside [1, MAX_SHOTS_PER_BLOCK]; InstrumentTimeout when the
        shots need longer than ``timeout_s`` (virtual time then is ``timeout_s`` later).
        """
        self._require("acquire")
        if not (1 <= n_shots <= MAX_SHOTS_PER_BLOCK):
            raise LimitError("shots per block", instrument=self.name, value=n_shots, low=1, high=MAX_SHOTS_PER_BLOCK)
        duration_s = n_shots / self.bench.calibration.repetition_rate_hz
        if duration_s > timeout_s:
            self.bench.clock.advance(max(0.0, timeout_s))
            raise InstrumentTimeout(f"{n_shots} shots need {duration_s} s", instrument=self.name,
                                    timeout_s=timeout_s)
        return self.bench.generate_shots(int(n_shots))

    def state(self) -> dict[str, Any]:
        cal = self.bench.calibration
        return {"pixels": cal.pixels, "has_reference": cal.has_reference,
                "repetition_rate_hz": cal.repetition_rate_hz}


class SimDelayGenerator(_SimInstrument, DelayGenerator):
    """The bench's digital delay generator: delays the pump trigger by a setting in ps."""

    _kind = "delay generator"
    _serial = "sim-0005"

    @property
    def range_ps(self) -> tuple[float, float]:
        return self.bench.calibration.generator_range_ps

    def set_delay_ps(self, delay_ps: float) -> None:
        """Set the delay at once (electronic: no settling). Raises LimitError outside ``range_ps``."""
        self._require("set delay")
        low, high = self.range_ps
        if not (math.isfinite(delay_ps) and low <= delay_ps <= high):
            raise LimitError("delay generator setting in ps", instrument=self.name, value=delay_ps, low=low, high=high)
        self.bench.generator_setting_ps = float(delay_ps)

    def delay_ps(self) -> float:
        self._require("query")
        return self.bench.generator_setting_ps

    def state(self) -> dict[str, Any]:
        return {"delay_ps": self.bench.generator_setting_ps}


def _bench_for(name: str, options: Mapping[str, Any], context: Any) -> VirtualBench:
    for key in options:
        raise ConfigError("the simulated driver takes no options", key_path=f"bench.{name}.options.{key}",
                          value=options[key], allowed="none")
    bench = getattr(context, "simulation", None)
    if not isinstance(bench, VirtualBench):
        raise ConfigError("simulated drivers need the simulated bench ([simulation] section)",
                          key_path=f"bench.{name}.driver", value="sim")
    return bench


def make_delay_axis(name: str, options: Mapping[str, Any], context: Any) -> SimDelayAxis:
    """Registry factory for ``delay_axis`` driver ``sim``. Raises ConfigError for any option."""
    return SimDelayAxis(name, _bench_for(name, options, context))


def make_chopper(name: str, options: Mapping[str, Any], context: Any) -> SimChopper:
    """Registry factory for ``chopper`` driver ``sim``. Raises ConfigError for any option."""
    return SimChopper(name, _bench_for(name, options, context))


def make_shutter(name: str, options: Mapping[str, Any], context: Any) -> SimShutter:
    """Registry factory for ``shutter`` driver ``sim``. Raises ConfigError for any option."""
    return SimShutter(name, _bench_for(name, options, context))


def make_detector(name: str, options: Mapping[str, Any], context: Any) -> SimDetector:
    """Registry factory for ``detector`` driver ``sim``. Raises ConfigError for any option."""
    return SimDetector(name, _bench_for(name, options, context))


def make_delay_generator(name: str, options: Mapping[str, Any], context: Any) -> SimDelayGenerator:
    """Registry factory for ``delay_generator`` driver ``sim``. Raises ConfigError for any option."""
    return SimDelayGenerator(name, _bench_for(name, options, context))
