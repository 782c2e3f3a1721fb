"""The five ``scpi`` drivers: delay axis, chopper, shutter, detector, delay generator, and their factories.

What it is for: the drivers/base.py interfaces implemented on :class:`~shotpair.drivers.scpi_instrument.
ScpiInstrument` with the reference command set of docs/instruments.md (section 2), each header replaceable
in the bench file (``options.commands``). Units are converted here: the wire carries mm, Hz, degrees and
seconds; shotpair's delay generator interface speaks ps. The detector's shot record (a binary block) is
decoded with numpy views of the received payload, without per-shot Python loops.

What it must not do: frame bytes or read the error queue itself (scpi_instrument.py does), sleep except
while polling a settling stage, or know anything of scans. The registry (drivers/registry.py) calls the
``make_*`` factories as ``factory(name, options, context)``; they validate everything and open nothing.
"""

from __future__ import annotations

import logging
import math
import numbers
import time
from decimal import Decimal, InvalidOperation
from collections.abc import Mapping
from typing import Any, ClassVar

from pydantic import Field, StrictBool

from .base import Chopper, DelayAxis, DelayGenerator, Detector, ShotBlock, Shutter
from .errors import ConfigError, InstrumentReplyError, InstrumentTimeout, LimitError, ShotpairError, StateError
from .options import parse_options
from .scpi import parse_bool, parse_float, parse_int
from .shot_record import decode_shot_record, max_shots
from .scpi_instrument import CommandSet, ScpiInstrument, ScpiOptions, scpi_error
from .transports import Transport

__all__ = [
    "DELAY_AXIS_COMMANDS",
    "CHOPPER_COMMANDS",
    "SHUTTER_COMMANDS",
    "DETECTOR_COMMANDS",
    "DELAY_GENERATOR_COMMANDS",
    "DelayAxisOptions",
    "ShutterOptions",
    "ScpiDelayAxis",
    "ScpiChopper",
    "ScpiShutter",
    "ScpiDetector",
    "ScpiDelayGenerator",
    "make_delay_axis",
    "make_chopper",
    "make_shutter",
    "make_detector",
    "make_delay_generator",
]

log = logging.getLogger(__name__)

# The reference command sets, docs/instruments.md section 2 (key → template).
DELAY_AXIS_COMMANDS: dict[str, str] = {
    "move_absolute": "MOVE:ABSolute {position_mm}",
    "query_position": "POSition?",
    "query_moving": "MOVE:STATe?",
    "home": "HOME",
    "query_homed": "HOME:STATe?",
    "stop": "MOVE:STOP",
    "query_limits": "LIMit?",
}
CHOPPER_COMMANDS: dict[str, str] = {
    "set_frequency": "FREQuency {frequency_hz}",
    "query_frequency": "FREQuency?",
    "set_phase": "PHASe {phase_deg}",
    "query_phase": "PHASe?",
    "query_locked": "LOCK?",
}
SHUTTER_COMMANDS: dict[str, str] = {"open": "SHUTter 1", "close": "SHUTter 0", "query_open": "SHUTter?"}
DETECTOR_COMMANDS: dict[str, str] = {
    "query_pixels": "SENSe:PIXels?",
    "query_reference": "SENSe:REFerence?",
    "acquire": "ACQuire:SHOTs? {n_shots}",
}
DELAY_GENERATOR_COMMANDS: dict[str, str] = {
    "set_delay": "DELay {delay_s}",
    "query_delay": "DELay?",
    "query_limits": "DELay:LIMit?",
}
# Typical values of each template field, to try an override's format spec when the bench file is read.
_SAMPLES: dict[str, Any] = {"position_mm": 12.5, "frequency_hz": 500.0, "phase_deg": 10.0, "n_shots": 500,
                            "delay_s": Decimal("1.5E-9")}

#: Time between two ``MOVE:STATe?`` polls while a stage settles after ``*OPC?``, in s.
SETTLE_POLL_S = 0.005


# --------------------------------------------------------------------------------------------- helpers


def _number_pair(text: str, *, instrument: str) -> tuple[str, str]:
    parts = [p.strip() for p in str(text).split(",")]
    if len(parts) != 2:
        raise InstrumentReplyError(f"expected 'low,high', got {text!r}", instrument=instrument)
    low, high = (parse_float(p, instrument=instrument) for p in parts)
    if not low < high:
        raise InstrumentReplyError(f"limits must be low,high with low < high, got {text!r}", instrument=instrument)
    return parts[0], parts[1]


def _range(text: str, *, instrument: str) -> tuple[float, float]:
    """``low,high`` (e.g. a ``LIMit?`` reply) → two floats, low < high."""
    low, high = _number_pair(text, instrument=instrument)
    return float(low), float(high)


def _seconds_to_ps(text: str, *, instrument: str) -> float:
    """A reply in s → ps, through the exact decimal (``1.2345E-09`` → 1234.5, not 1234.4999999999998)."""
    parse_float(text, instrument=instrument)  # refuses what is not an SCPI decimal number
    value = float(Decimal(text.strip()).scaleb(12))
    if not math.isfinite(value):
        raise InstrumentReplyError(f"delay {text.strip()!r} s is out of any range", instrument=instrument)
    return value


def _range_ps(text: str, *, instrument: str) -> tuple[float, float]:
    low, high = _number_pair(text, instrument=instrument)
    return _seconds_to_ps(low, instrument=instrument), _seconds_to_ps(high, instrument=instrument)


def _ps_to_seconds(delay_ps: float) -> Decimal:
    """ps → s as the exact decimal of the float's shortest repr shifted by 12 places (sent as ``1.2345E-9``)."""
    try:
        return Decimal(repr(float(delay_ps))).scaleb(-12)
    except InvalidOperation as exc:  # pragma: no cover - finite floats always convert
        raise ValueError(f"cannot convert {delay_ps!r} ps to seconds") from exc


def _bench_section(context: Any, kind: str) -> Any:
    """``context.bench_settings.<kind>`` when the context has it, else None."""
    settings = getattr(context, "bench_settings", None)
    return getattr(settings, kind, None) if settings is not None else None


def _intersect(name: str, what: str, key_path: str, bench: tuple[float, float], device: tuple[float, float],
               unit: str) -> tuple[float, float]:
    low, high = max(bench[0], device[0]), min(bench[1], device[1])
    if not low < high:
        raise ConfigError(f"{what} does not overlap what {name} reports", key_path=key_path, value=list(bench),
                          allowed=f"within [{device[0]:g}, {device[1]:g}] {unit}")
    return low, high


class _ScpiDevice:
    """What the five drivers share: the link, connect/disconnect/identity, construction from options.

    A mixin placed before the interface ABC; subclasses set ``KIND``, ``COMMANDS``, ``OPTIONS`` and
    implement ``_on_connect`` (queries made once the link is up) and ``_from_context``.
    """

    KIND: ClassVar[str]
    COMMANDS: ClassVar[dict[str, str]]
    OPTIONS: ClassVar[type[ScpiOptions]] = ScpiOptions

    def __init__(self, name: str, link: ScpiInstrument) -> None:
        super().__init__(name)  # type: ignore[call-arg]
        self.link = link

    @classmethod
    def from_options(cls, name: str, options: Mapping[str, Any], context: Any = None, *,
                     transport: Transport | None = None) -> Any:
        """Validate ``options`` (``bench.<name>.options``) and build the driver, not connected.

        ``transport`` replaces the one ``options.address`` names (tests, in-process simulators).
        Raises ConfigError naming the offending key.
        """
        key_path = f"bench.{name}.options"
        opts = parse_options(cls.OPTIONS, options, key_path)
        commands = CommandSet(cls.COMMANDS, opts.commands, key_path=f"{key_path}.commands", samples=_SAMPLES)
        link = ScpiInstrument.from_options(name, opts, commands, key_path=key_path, transport=transport)
        return cls(name, link, **cls._from_context(opts, _bench_section(context, cls.KIND)))

    @classmethod
    def _from_context(cls, options: Any, section: Any) -> dict[str, Any]:
        return {}

    def connect(self) -> None:
        """Connect the link (``*CLS``, ``*IDN?``), then read what the driver needs (limits, pixels...).

        Raises TransportError, InstrumentTimeout, InstrumentReplyError; ConfigError when the bench file's
        limits do not overlap the instrument's. On failure the link is closed again.
        """
        self.link.connect()
        try:
            self._on_connect()
        except BaseException:
            self.link.disconnect()
            raise

    def _on_connect(self) -> None:
        pass

    def disconnect(self) -> None:
        """Close the link. Never raises."""
        self.link.disconnect()

    def identity(self) -> str:
        """``maker, model, serial, firmware`` from ``*IDN?`` (StateError before the first connect)."""
        return self.link.identity()

    def _best_effort(self, out: dict[str, Any], **queries: Any) -> dict[str, Any]:
        """Fill ``out`` with each query's result; failures go to ``out['errors']`` (for state())."""
        if not self.link.is_connected:
            out["connected"] = False
            return out
        for key, query in queries.items():
            try:
                out[key] = query()
            except ShotpairError as exc:
                out.setdefault("errors", []).append(f"{key}: {exc}")
        return out


# --------------------------------------------------------------------------------------------- delay axis


class DelayAxisOptions(ScpiOptions):
    """Options of the ``scpi`` delay axis."""

    require_homing: StrictBool = Field(True, description="Refuse moves until the controller reports homed.")
    poll_interval_s: float | None = Field(None, ge=0.0, le=10.0, description="Wait for moves and homing by "
                                          "polling MOVE:STATe? at this interval, s (0: without pause); unset: "
                                          "wait with *OPC?.")


class ScpiDelayAxis(_ScpiDevice, DelayAxis):
    """A delay stage controller speaking the reference delay-stage commands. Positions in mm.

    ``travel_mm`` is the bench file's travel intersected with the controller's ``LIMit?`` (read on connect).
    """

    KIND = "delay_axis"
    COMMANDS = DELAY_AXIS_COMMANDS
    OPTIONS = DelayAxisOptions

    def __init__(self, name: str, link: ScpiInstrument, *, travel_mm: tuple[float, float] | None = None,
                 require_homing: bool = True, poll_interval_s: float | None = None) -> None:
        super().__init__(name, link)
        self.poll_interval_s = poll_interval_s
        self._bench_travel = (-math.inf, math.inf) if travel_mm is None else (float(travel_mm[0]),
                                                                               float(travel_mm[1]))
        self._travel = self._bench_travel
        self.require_homing = require_homing
        self._homed = False

    @classmethod
    def _from_context(cls, options: DelayAxisOptions, section: Any) -> dict[str, Any]:
        return {"travel_mm": getattr(section, "travel_mm", None), "require_homing": options.require_homing,
                "poll_interval_s": options.poll_interval_s}

    def _on_connect(self) -> None:
        controller = self.link.ask("query_limits", _range)
        self._travel = _intersect(self.name, "travel_mm", f"bench.{self.name}.travel_mm", self._bench_travel,
                                  controller, "mm (the controller's LIMit?)")
        self._homed = self.link.ask("query_homed", parse_bool)

    @property
    def travel_mm(self) -> tuple[float, float]:
        """Bench travel ∩ controller limits, mm (the bench travel alone before connecting)."""
        return self._travel

    @property
    def is_homed(self) -> bool:
        """Asks the controller (``HOME:STATe?``); the last known answer while disconnected."""
        if self.link.is_connected:
            self._homed = self.link.ask("query_homed", parse_bool)
        return self._homed

    def home(self, timeout_s: float) -> None:
        """Send ``HOME`` and wait until done (see :meth:`wait_settled`); raises InstrumentTimeout after
        ``timeout_s`` s (the controller keeps homing), InstrumentReplyError if it then does not report homed."""
        self.link.send("home")
        self._wait_idle(timeout_s, "homing")
        if not self.is_homed:
            raise InstrumentReplyError("homing finished but the controller does not report homed",
                                       instrument=self.name)

    def _wait_idle(self, timeout_s: float, what: str) -> None:
        """Wait with ``*OPC?`` (unless ``poll_interval_s`` is set), then poll ``MOVE:STATe?`` until 0.

        A timed-out ``*OPC?`` stays pending in the controller; one that executes nothing after it until
        the move ends would then also hold back a stop command: ``poll_interval_s`` avoids that.
        """
        deadline = time.monotonic() + timeout_s
        if self.poll_interval_s is None:
            self.link.wait_complete(timeout_s, what=what)
        interval = SETTLE_POLL_S if self.poll_interval_s is None else self.poll_interval_s
        while self.is_moving():
            left = deadline - time.monotonic()
            if left <= 0:
                raise InstrumentTimeout(f"{what} not finished within {timeout_s:g} s (still moving)",
                                        instrument=self.name, timeout_s=timeout_s)
            if interval:
                time.sleep(min(interval, left))

    def move_to_mm(self, position_mm: float) -> None:
        """Start a move; returns at once.

        Raises LimitError outside ``travel_mm`` (before anything is sent), StateError when not connected,
        or when homing is required and the controller is not homed; ScpiError if the controller refuses.
        """
        x = float(position_mm)
        low, high = self._travel
        if not (math.isfinite(x) and low <= x <= high):
            raise LimitError("delay stage position in mm", instrument=self.name, value=x, low=low, high=high)
        self.link.require_connected("move")
        if self.require_homing and not self._homed and not self.is_homed:
            raise StateError("home the axis first", state="not homed", action="move")
        self.link.send("move_absolute", position_mm=x)

    def is_moving(self) -> bool:
        return self.link.ask("query_moving", parse_bool)

    def wait_settled(self, timeout_s: float) -> float:
        """Wait for the move (``*OPC?``, or polling when ``poll_interval_s`` is set) until ``MOVE:STATe?``
        reports 0; returns ``POSition?`` in mm.

        Raises InstrumentTimeout if the axis has not settled within ``timeout_s`` (s).
        """
        self._wait_idle(timeout_s, "the move")
        return self.position_mm()

    def position_mm(self) -> float:
        return self.link.ask("query_position", parse_float)

    def stop(self) -> None:
        """Send the stop command at once; never raises (failures are logged), does nothing if disconnected."""
        if not self.link.is_connected:
            log.debug("%s: stop while disconnected: nothing sent", self.name)
            return
        try:
            entries = self.link.send_urgent("stop")
        except Exception as exc:  # noqa: BLE001 - stop must never raise
            log.error("%s: could not send the stop command: %s", self.name, exc)
            return
        if entries:
            log.error("%s: %s", self.name, scpi_error(entries, instrument=self.name,
                                                      command=self.link.commands["stop"]).message)

    def state(self) -> dict[str, Any]:
        out: dict[str, Any] = {"travel_mm": list(self._travel), "homed": self._homed}
        return self._best_effort(out, position_mm=self.position_mm, homed=lambda: self.is_homed,
                                 moving=self.is_moving)


# --------------------------------------------------------------------------------------------- chopper


class ScpiChopper(_ScpiDevice, Chopper):
    """A chopper controller: frequency in Hz, phase in degrees."""

    KIND = "chopper"
    COMMANDS = CHOPPER_COMMANDS

    def frequency_hz(self) -> float:
        return self.link.ask("query_frequency", parse_float)

    def set_frequency_hz(self, frequency_hz: float) -> None:
        """Set the frequency. LimitError for a non-positive or non-finite value (nothing sent), or when the
        controller refuses it (ScpiRangeError, −222/−224)."""
        f = float(frequency_hz)
        if not (math.isfinite(f) and f > 0):
            raise LimitError("chopper frequency in Hz", instrument=self.name, value=f, low=0.0, high=math.inf)
        self.link.send("set_frequency", frequency_hz=f)

    def phase_deg(self) -> float:
        return self.link.ask("query_phase", parse_float)

    def set_phase_deg(self, phase_deg: float) -> None:
        """Set the phase. LimitError for a non-finite value (nothing sent) or one the controller refuses."""
        p = float(phase_deg)
        if not math.isfinite(p):
            raise LimitError("chopper phase in degrees", instrument=self.name, value=p, low=-math.inf,
                             high=math.inf)
        self.link.send("set_phase", phase_deg=p)

    def is_locked(self) -> bool:
        return self.link.ask("query_locked", parse_bool)

    def state(self) -> dict[str, Any]:
        return self._best_effort({}, frequency_hz=self.frequency_hz, phase_deg=self.phase_deg,
                                 locked=self.is_locked)


# --------------------------------------------------------------------------------------------- shutter


class ShutterOptions(ScpiOptions):
    """Options of the ``scpi`` shutter."""

    actuate_timeout_s: float = Field(5.0, gt=0.0, le=600.0, description="Longest wait for the shutter to "
                                     "open or close, s.")


class ScpiShutter(_ScpiDevice, Shutter):
    """A beam shutter: ``open``/``close`` are overlapped commands confirmed by ``*OPC?`` and ``SHUTter?``.

    :meth:`close` raises when it cannot confirm that the shutter is closed, on a broken link too: a safety
    action that failed must never pass silently (Bench.make_safe catches, logs and reports it). It sends
    the close command at once, without waiting for a resynchronisation or another exchange.
    """

    KIND = "shutter"
    COMMANDS = SHUTTER_COMMANDS
    OPTIONS = ShutterOptions

    def __init__(self, name: str, link: ScpiInstrument, *, actuate_timeout_s: float = 5.0) -> None:
        super().__init__(name, link)
        self.actuate_timeout_s = actuate_timeout_s

    @classmethod
    def _from_context(cls, options: ShutterOptions, section: Any) -> dict[str, Any]:
        return {"actuate_timeout_s": options.actuate_timeout_s}

    def open(self) -> None:
        """Open and wait until open. InstrumentTimeout after ``actuate_timeout_s``; InstrumentReplyError if
        the shutter then does not report open."""
        self.link.send("open")
        self.link.wait_complete(self.actuate_timeout_s, what="opening the shutter")
        if not self.is_open():
            raise InstrumentReplyError("the shutter does not report open after opening", instrument=self.name)

    def close(self) -> None:
        """Close and wait until closed (confirmed by ``SHUTter?``).

        Raises
        ------
        StateError
            Not connected: nothing can be sent.
        TransportError, InstrumentTimeout, InstrumentReplyError
            The command could not be sent, was refused, did not finish within ``actuate_timeout_s``, or
            the shutter still reports open.
        """
        entries = self.link.send_urgent("close")
        if entries:
            raise scpi_error(entries, instrument=self.name, command=self.link.commands["close"])
        self.link.wait_complete(self.actuate_timeout_s, what="closing the shutter")
        if self.is_open():
            raise InstrumentReplyError("the shutter still reports open after closing", instrument=self.name)

    def is_open(self) -> bool:
        return self.link.ask("query_open", parse_bool)

    def state(self) -> dict[str, Any]:
        return self._best_effort({}, open=self.is_open)


# --------------------------------------------------------------------------------------------- detector


class ScpiDetector(_ScpiDevice, Detector):
    """A spectrometer serving shot records (docs/instruments.md) as ``ACQuire:SHOTs?`` blocks.

    ``pixels`` and ``has_reference`` come from ``SENSe:PIXels?`` / ``SENSe:REFerence?`` on connect; before
    that from the bench file (StateError when it does not say).
    """

    KIND = "detector"
    COMMANDS = DETECTOR_COMMANDS

    def __init__(self, name: str, link: ScpiInstrument, *, pixels: int | None = None,
                 has_reference: bool | None = None) -> None:
        super().__init__(name, link)
        self._pixels = pixels
        self._has_reference = has_reference
        self._ref_width: int | None = None

    @classmethod
    def _from_context(cls, options: ScpiOptions, section: Any) -> dict[str, Any]:
        return {"pixels": getattr(section, "pixels", None), "has_reference": getattr(section, "has_reference", None)}

    def _on_connect(self) -> None:
        pixels = self.link.ask("query_pixels", parse_int)
        if not 1 <= pixels <= 1 << 20:
            raise InstrumentReplyError(f"implausible pixel count {pixels}", instrument=self.name)
        ref_width = self.link.ask("query_reference", parse_int)
        if ref_width not in (0, 1, pixels):
            raise InstrumentReplyError(f"reference width {ref_width}: expected 0, 1 or the pixel count {pixels}",
                                       instrument=self.name)
        self._pixels, self._ref_width, self._has_reference = pixels, ref_width, ref_width > 0

    @property
    def pixels(self) -> int:
        if self._pixels is None:
            raise StateError("the pixel count is known once connected", state="disconnected", action="get pixels")
        return self._pixels

    @property
    def has_reference(self) -> bool:
        if self._has_reference is None:
            raise StateError("the reference width is known once connected", state="disconnected",
                             action="get has_reference")
        return self._has_reference

    def max_shots(self) -> int:
        """Most shots one block may hold (shot_record.max_shots, the wire simulator's limit too)."""
        return max_shots(self.pixels, self._ref_width or 0)

    def acquire(self, n_shots: int, timeout_s: float) -> ShotBlock:
        """Ask for ``n_shots`` shots (``ACQuire:SHOTs? n``) and decode the record.

        Raises LimitError for ``n_shots`` outside [1, max_shots()] (nothing sent); InstrumentTimeout when
        the block has not arrived within ``timeout_s``; InstrumentReplyError for a garbled block or record.
        """
        self.link.require_connected("acquire")
        high = self.max_shots()
        if isinstance(n_shots, bool) or not isinstance(n_shots, numbers.Integral) or not 1 <= n_shots <= high:
            raise LimitError("shots per block", instrument=self.name, value=n_shots, low=1, high=high)
        n = int(n_shots)
        payload = self.link.ask_block("acquire", timeout_s=timeout_s, n_shots=n)
        return decode_shot_record(payload, instrument=self.name, pixels=self._pixels, ref_width=self._ref_width,
                                  max_shots=n)

    def state(self) -> dict[str, Any]:
        return {"pixels": self._pixels, "reference_width": self._ref_width, "connected": self.link.is_connected}


# --------------------------------------------------------------------------------------------- generator


class ScpiDelayGenerator(_ScpiDevice, DelayGenerator):
    """A digital delay generator. shotpair speaks ps; the wire carries seconds, converted exactly.

    ``range_ps`` is ``DELay:LIMit?`` intersected with the bench file's ``range_ps`` (the narrower wins).
    """

    KIND = "delay_generator"
    COMMANDS = DELAY_GENERATOR_COMMANDS

    def __init__(self, name: str, link: ScpiInstrument, *, range_ps: tuple[float, float] | None = None) -> None:
        super().__init__(name, link)
        self._bench_range = (-math.inf, math.inf) if range_ps is None else (float(range_ps[0]), float(range_ps[1]))
        self._range = self._bench_range

    @classmethod
    def _from_context(cls, options: ScpiOptions, section: Any) -> dict[str, Any]:
        return {"range_ps": getattr(section, "range_ps", None)}

    def _on_connect(self) -> None:
        device = self.link.ask("query_limits", _range_ps)
        self._range = _intersect(self.name, "range_ps", f"bench.{self.name}.range_ps", self._bench_range, device,
                                 "ps (the generator's DELay:LIMit?)")

    @property
    def range_ps(self) -> tuple[float, float]:
        """Bench range ∩ generator limits, ps (the bench range alone before connecting)."""
        return self._range

    def set_delay_ps(self, delay_ps: float) -> None:
        """Set the delay; returns once the generator has taken it (its error queue is empty).

        Raises LimitError outside ``range_ps`` (nothing sent). The value is sent in s as the exact decimal
        of the ps value (1234.5 ps → ``DELay 1.2345E-9``), so no digit is lost or added.
        """
        x = float(delay_ps)
        low, high = self._range
        if not (math.isfinite(x) and low <= x <= high):
            raise LimitError("delay generator setting in ps", instrument=self.name, value=x, low=low, high=high)
        self.link.send("set_delay", delay_s=_ps_to_seconds(x))

    def delay_ps(self) -> float:
        return self.link.ask("query_delay", _seconds_to_ps)

    def state(self) -> dict[str, Any]:
        return self._best_effort({"range_ps": list(self._range)}, delay_ps=self.delay_ps)


# --------------------------------------------------------------------------------------------- factories


def make_delay_axis(name: str, options: Mapping[str, Any], context: Any) -> ScpiDelayAxis:
    """Registry factory for ``delay_axis`` driver ``scpi``. Raises ConfigError for bad options."""
    return ScpiDelayAxis.from_options(name, options, context)


def make_chopper(name: str, options: Mapping[str, Any], context: Any) -> ScpiChopper:
    """Registry factory for ``chopper`` driver ``scpi``. Raises ConfigError for bad options."""
    return ScpiChopper.from_options(name, options, context)


def make_shutter(name: str, options: Mapping[str, Any], context: Any) -> ScpiShutter:
    """Registry factory for ``shutter`` driver ``scpi``. Raises ConfigError for bad options."""
    return ScpiShutter.from_options(name, options, context)


def make_detector(name: str, options: Mapping[str, Any], context: Any) -> ScpiDetector:
    """Registry factory for ``detector`` driver ``scpi``. Raises ConfigError for bad options."""
    return ScpiDetector.from_options(name, options, context)


def make_delay_generator(name: str, options: Mapping[str, Any], context: Any) -> ScpiDelayGenerator:
    """Registry factory for ``delay_generator`` driver ``scpi``. Raises ConfigError for bad options."""
    return ScpiDelayGenerator.from_options(name, options, context)
