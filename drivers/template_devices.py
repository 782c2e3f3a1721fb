"""Delay axis, chopper and shutter drivers for ASCII serial controllers described by templates.

What it is for: driver ``template`` of the registry. The bench file gives the transport address, the
line terminators and, per operation, a command template and a reply pattern (ascii_template.py checks and
compiles them); :class:`TemplateDelayAxis`, :class:`TemplateChopper` and :class:`TemplateShutter` keep the
promises of drivers/base.py on top: limits checked before anything is sent, homing required when
configured, polling with timeouts, a drain after every reply timeout so a late reply is never taken for
the next one. The ``make_*`` factories validate everything when the bench file is read and return an
unconnected instrument.

What it must not do: know any controller's command set (that is configuration), parse bytes itself
(the codec does), sleep to synchronise (polls are paced with an Event's timed wait, as a real poll
is), or leave an error without the instrument, the operation, the command and the offending text.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Mapping
from typing import Any

from pydantic import Field, field_validator

from .ascii_template import CommandSet, ControllerReplyError, ReplyValues, compile_commands
from .base import Chopper, DelayAxis, Shutter
from .errors import ConfigError, InstrumentReplyError, InstrumentTimeout, LimitError, StateError
from .options import DriverOptions, parse_options
from .transports import ReadTimeout, Transport, make_transport

__all__ = [
    "TemplateOptions",
    "DelayAxisTemplateOptions",
    "ChopperTemplateOptions",
    "ShutterTemplateOptions",
    "TemplateDelayAxis",
    "TemplateChopper",
    "TemplateShutter",
    "make_delay_axis",
    "make_chopper",
    "make_shutter",
]

log = logging.getLogger(__name__)

#: How many of the bytes discarded by drains are kept for inspection (:attr:`_TemplateLink.drained`).
_DRAINED_KEPT_BYTES = 4096


def _seconds(value: float, low: float, high: float) -> float:
    if not (math.isfinite(value) and low <= value <= high):
        raise ValueError(f"must be a number of seconds in [{low:g}, {high:g}]")
    return value


class TemplateOptions(DriverOptions):
    """Options every template driver takes (``[bench.<name>.options]``)."""

    address: str = Field(description="Transport address: serial:///dev/ttyUSB0?baudrate=115200, tcp://..., ...")
    transport: dict[str, Any] = Field(default_factory=dict, description="Transport options: trace, "
                                      "open_timeout_s, write_timeout_s.")
    write_terminator: str = Field("\r\n", description="Appended to every command.")
    read_terminator: str = Field("\r\n", description="Ends every reply line.")
    encoding: str = Field("ascii", description="Text encoding of commands and replies.")
    reply_timeout_s: float = Field(1.0, description="Longest wait for one reply line, s.")
    poll_interval_s: float = Field(0.01, description="Pause between two status queries while waiting, s.")
    drain_s: float = Field(0.1, description="After a reply timeout (and on connect), discard what arrives for "
                           "this long before the next command, s.")
    # The tables below are checked by ascii_template.compile_commands, which names each inner key's path.
    identity: Any = Field(None, description="A fixed identity text, or a query { send, reply }.")
    commands: Any = Field(description="Operation -> { send, reply[, true_values, false_values] }.")
    error: str | None = Field(None, description="Pattern of the controller's error reply: groups code, message.")

    @field_validator("reply_timeout_s")
    @classmethod
    def _reply_timeout(cls, v: float) -> float:
        return _seconds(v, 1e-3, 600.0)

    @field_validator("poll_interval_s", "drain_s")
    @classmethod
    def _short(cls, v: float) -> float:
        return _seconds(v, 0.0, 60.0)

    @field_validator("read_terminator")
    @classmethod
    def _terminator(cls, v: str) -> str:
        if not v:
            raise ValueError("the read terminator must not be empty")
        return v


class DelayAxisTemplateOptions(TemplateOptions):
    """Delay-axis options: units of the controller and whether moves need homing first."""

    position_scale: float = Field(1.0, description="Controller units per mm (1000 for µm, steps per mm ...).")
    require_homed: bool | None = Field(None, description="Refuse moves until the axis is homed (default: the "
                                       "bench's home_before_scan).")

    @field_validator("position_scale")
    @classmethod
    def _scale(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0):
            raise ValueError("position_scale must be a finite number > 0 (controller units per mm)")
        return v


class ChopperTemplateOptions(TemplateOptions):
    """Chopper options: allowed frequencies and how long to wait for lock after a new frequency."""

    frequency_range_hz: tuple[float, float] | None = Field(None, description="Lowest and highest frequency the "
                                                           "driver sends, Hz (default: any > 0).")
    lock_wait_s: float = Field(0.0, description="After a new frequency, poll query_locked for up to this long, s.")

    @field_validator("frequency_range_hz")
    @classmethod
    def _range(cls, v: tuple[float, float] | None) -> tuple[float, float] | None:
        if v is not None and not (math.isfinite(v[0]) and math.isfinite(v[1]) and 0 < v[0] < v[1]):
            raise ValueError("frequency_range_hz must be [low, high] with 0 < low < high")
        return v

    @field_validator("lock_wait_s")
    @classmethod
    def _lock_wait(cls, v: float) -> float:
        return _seconds(v, 0.0, 600.0)


class ShutterTemplateOptions(TemplateOptions):
    """Shutter options: how long open() and close() wait for query_open to agree."""

    settle_timeout_s: float = Field(2.0, description="Longest wait for the shutter to report open or closed, s.")

    @field_validator("settle_timeout_s")
    @classmethod
    def _settle(cls, v: float) -> float:
        return _seconds(v, 1e-3, 600.0)


def _check_timeout(timeout_s: float, name: str) -> float:
    if isinstance(timeout_s, bool) or not isinstance(timeout_s, (int, float)) or not math.isfinite(timeout_s) \
            or timeout_s < 0:
        raise ValueError(f"{name}: timeout_s must be a finite number >= 0, got {timeout_s!r}")
    return float(timeout_s)


class _TemplateLink:
    """The conversation with one controller: one command, one reply, resynchronised after timeouts.

    Thread-safe: one exchange at a time (a stop from another thread waits for the reply in progress).
    """

    def __init__(self, name: str, options: TemplateOptions, commands: CommandSet, transport: Transport) -> None:
        self.name = name
        self.options = options
        self.commands = commands
        self.transport = transport
        self.read_terminator = options.read_terminator.encode(options.encoding)
        self.identity_text = commands.fixed_identity or ""
        self._lock = threading.RLock()
        self._needs_drain = False
        self._pause = threading.Event()  # never set: wait() paces polls like a real poll loop
        #: Reply timeouts so far, and the last bytes discarded by drains, for logs and tests.
        self.timeouts = 0
        self.drained = b""

    @property
    def connected(self) -> bool:
        return self.transport.is_open

    def open(self) -> None:
        """Open the transport, discard stale bytes, ask the identity when configured."""
        with self._lock:
            self.transport.open()
            self._needs_drain = True
            if self.commands.identity is not None:
                self.identity_text = str(self.exchange("identity")["identity"])

    def close(self) -> None:
        with self._lock:
            self.transport.close()

    def require(self, action: str) -> None:
        if not self.transport.is_open:
            raise StateError("connect first", state="disconnected", action=action)

    def pause(self) -> None:
        self._pause.wait(self.options.poll_interval_s)

    def exchange(self, operation: str, values: Mapping[str, float] | None = None) -> ReplyValues:
        """Send one operation and read its reply (if it has one); the reply's values.

        Raises
        ------
        StateError
            When not connected.
        InstrumentTimeout
            When no whole reply line came within ``reply_timeout_s``; the next exchange drains first.
        ControllerReplyError, InstrumentReplyError
            For an error reply, or a reply that does not match (the next exchange drains first).
        TransportError
            When the bytes cannot be moved.
        """
        self.require(operation)
        with self._lock:
            if self._needs_drain:
                dropped = self.transport.drain(self.options.drain_s)
                if dropped:
                    log.warning("%s: discarded %d late byte(s) before %s: %r", self.name, len(dropped), operation,
                                dropped[:80])
                self.drained = (self.drained + dropped)[-_DRAINED_KEPT_BYTES:]
                self._needs_drain = False
            sent = self.commands.render(operation, values)
            self.transport.write(self.commands.encode(operation, values))
            if not self.commands.expects_reply(operation):
                return {}
            timeout_s = self.options.reply_timeout_s
            try:
                line = self.transport.read_until(self.read_terminator, timeout_s)
            except ReadTimeout as exc:
                self._needs_drain = True
                self.timeouts += 1
                raise InstrumentTimeout(f"no reply to {operation} {sent!r} within {timeout_s:g} s (received so far: "
                                        f"{exc.received!r})", instrument=self.name, timeout_s=timeout_s) from None
            try:
                return self.commands.parse(operation, line[: -len(self.read_terminator)], sent=sent)
            except ControllerReplyError:
                raise  # an error reply answers this command: still in step
            except InstrumentReplyError:
                self._needs_drain = True  # perhaps a late reply to an earlier command: drain before the next
                raise


class _TemplateInstrument:
    """Connection and identity shared by the template drivers (a mixin before the ABC)."""

    def __init__(self, name: str, link: _TemplateLink) -> None:
        super().__init__(name)  # type: ignore[call-arg]
        self.link = link

    def connect(self) -> None:
        """Open the transport and check that the controller answers (identity or a cheap query).

        Raises TransportError (port missing), InstrumentTimeout (no answer), InstrumentReplyError.
        """
        try:
            self.link.open()
            self._after_connect()
        except BaseException:
            self.link.close()
            raise

    def _after_connect(self) -> None:
        raise NotImplementedError

    def disconnect(self) -> None:
        """Close the transport; safe to call twice."""
        self.link.close()

    def identity(self) -> str:
        """The identity the controller gave (or the fixed text, or the address when none is configured)."""
        return self.link.identity_text or f"template controller at {self.link.transport.address}"


class TemplateDelayAxis(_TemplateInstrument, DelayAxis):
    """A delay stage behind an ASCII controller. Positions in mm, times in s.

    Parameters
    ----------
    name : str
        The instrument's name in the bench file.
    link : _TemplateLink
        Transport, options and compiled commands (built by :func:`make_delay_axis`).
    bench_travel_mm : (float, float)
        The bench file's ``travel_mm``; the controller's limits (``query_limits``) narrow it on connect.
    require_homed : bool
        Refuse moves (StateError) until the controller reports the axis homed.
    """

    def __init__(self, name: str, link: _TemplateLink, *, bench_travel_mm: tuple[float, float],
                 require_homed: bool) -> None:
        super().__init__(name, link)
        self.bench_travel_mm = (float(bench_travel_mm[0]), float(bench_travel_mm[1]))
        self.controller_limits_mm: tuple[float, float] | None = None
        self.require_homed = require_homed
        self.scale = float(getattr(link.options, "position_scale", 1.0))
        self._travel_mm = self.bench_travel_mm
        self._homed_seen = False

    def _after_connect(self) -> None:
        self._homed_seen = False
        if self.link.commands.has("query_limits"):
            v = self.link.exchange("query_limits")
            if "low_mm" in v:
                low, high = float(v["low_mm"]), float(v["high_mm"])
            else:
                low, high = float(v["low_units"]) / self.scale, float(v["high_units"]) / self.scale
            low, high = min(low, high), max(low, high)
            self.controller_limits_mm = (low, high)
            lo, hi = max(low, self.bench_travel_mm[0]), min(high, self.bench_travel_mm[1])
            if not lo < hi:
                raise ConfigError(f"does not overlap the controller's limits [{low}, {high}] mm",
                                  key_path=f"bench.{self.name}.travel_mm", value=list(self.bench_travel_mm))
            self._travel_mm = (lo, hi)
        else:
            self.position_mm()  # the controller must answer

    @property
    def travel_mm(self) -> tuple[float, float]:
        """Bench ``travel_mm``, narrowed to the controller's limits once connected (when it reports them)."""
        return self._travel_mm

    @property
    def is_homed(self) -> bool:
        """Asks the controller (query_homed). Raises InstrumentTimeout, InstrumentReplyError, StateError."""
        homed = bool(self.link.exchange("query_homed")["homed"])
        self._homed_seen = homed
        return homed

    def home(self, timeout_s: float) -> None:
        """Start homing and poll until the controller reports the axis homed and at rest.

        Raises
        ------
        InstrumentTimeout
            When not homed within ``timeout_s`` (s); the axis is stopped first.
        ControllerReplyError, InstrumentReplyError, TransportError, StateError
            From the exchanges.
        """
        timeout_s = _check_timeout(timeout_s, self.name)
        deadline = time.monotonic() + timeout_s
        self._homed_seen = False
        self.link.exchange("home")
        while True:
            if self.is_homed and not self.is_moving():
                return
            if time.monotonic() >= deadline:
                self.stop()
                raise InstrumentTimeout(f"homing not finished within {timeout_s:g} s (axis stopped)",
                                        instrument=self.name, timeout_s=timeout_s)
            self.link.pause()

    def move_to_mm(self, position_mm: float) -> None:
        """Start a move to ``position_mm`` (mm); returns at once.

        Raises
        ------
        LimitError
            For a non-finite target or one outside :attr:`travel_mm`; nothing is sent.
        StateError
            When homing is required and the controller says the axis is not homed (the move is not sent).
        ControllerReplyError, InstrumentReplyError, InstrumentTimeout, TransportError
            From the exchange.
        """
        low, high = self._travel_mm
        if isinstance(position_mm, bool) or not isinstance(position_mm, (int, float)) \
                or not (math.isfinite(position_mm) and low <= position_mm <= high):
            raise LimitError("target position in mm", instrument=self.name, value=position_mm, low=low, high=high)
        self.link.require("move")
        if self.require_homed and not self._homed_seen and not self.is_homed:
            raise StateError("home the axis first (require_homed)", state="not homed", action="move")
        position_mm = float(position_mm)
        self.link.exchange("move_absolute", {"position_mm": position_mm, "position_units": position_mm * self.scale})

    def is_moving(self) -> bool:
        """Asks the controller (query_moving, or not query_done)."""
        if self.link.commands.has("query_moving"):
            return bool(self.link.exchange("query_moving")["moving"])
        return not bool(self.link.exchange("query_done")["done"])

    def wait_settled(self, timeout_s: float) -> float:
        """Poll until the axis stops moving; returns the read-back position in mm.

        Raises InstrumentTimeout when it still moves after ``timeout_s`` (s); the axis keeps going.
        """
        timeout_s = _check_timeout(timeout_s, self.name)
        deadline = time.monotonic() + timeout_s
        while self.is_moving():
            if time.monotonic() >= deadline:
                raise InstrumentTimeout(f"axis still moving after {timeout_s:g} s", instrument=self.name,
                                        timeout_s=timeout_s)
            self.link.pause()
        return self.position_mm()

    def position_mm(self) -> float:
        """The read-back position in mm (query_position; ``position_units`` are divided by position_scale)."""
        v = self.link.exchange("query_position")
        return float(v["position_mm"]) if "position_mm" in v else float(v["position_units"]) / self.scale

    def stop(self) -> None:
        """Send the stop command. Never raises: a failure is logged (and the caller's safety path goes on)."""
        try:
            self.link.exchange("stop")
        except Exception as exc:  # noqa: BLE001 - stop runs on every exit path, after any error
            log.error("%s: stop failed: %s", self.name, exc)

    def state(self) -> dict[str, Any]:
        return {"position_mm": self.position_mm(), "homed": self.is_homed, "moving": self.is_moving(),
                "travel_mm": list(self._travel_mm)}


class TemplateChopper(_TemplateInstrument, Chopper):
    """A chopper behind an ASCII controller. Frequencies in Hz, phases in degrees."""

    def __init__(self, name: str, link: _TemplateLink, *, frequency_range_hz: tuple[float, float] | None,
                 lock_wait_s: float) -> None:
        super().__init__(name, link)
        self.frequency_range_hz = frequency_range_hz
        self.lock_wait_s = lock_wait_s

    def _after_connect(self) -> None:
        self.frequency_hz()

    def frequency_hz(self) -> float:
        """The blade frequency in Hz (query_frequency)."""
        return float(self.link.exchange("query_frequency")["frequency_hz"])

    def set_frequency_hz(self, frequency_hz: float) -> None:
        """Set the frequency; with ``lock_wait_s`` > 0, then poll query_locked for up to that long.

        Raises LimitError (nothing sent) for a non-finite value, one <= 0 or outside
        ``frequency_range_hz``; errors of the exchanges otherwise. Not locking in time is not an error
        here (the runner checks the lock).
        """
        low, high = self.frequency_range_hz or (0.0, math.inf)
        ok = not isinstance(frequency_hz, bool) and isinstance(frequency_hz, (int, float)) \
            and math.isfinite(frequency_hz) and frequency_hz > 0 and low <= frequency_hz <= high
        if not ok:
            raise LimitError("chopper frequency in Hz", instrument=self.name, value=frequency_hz, low=low, high=high)
        self.link.exchange("set_frequency", {"frequency_hz": float(frequency_hz)})
        if self.lock_wait_s > 0:
            deadline = time.monotonic() + self.lock_wait_s
            while not self.is_locked() and time.monotonic() < deadline:
                self.link.pause()

    def phase_deg(self) -> float:
        """The phase in degrees (query_phase)."""
        return float(self.link.exchange("query_phase")["phase_deg"])

    def set_phase_deg(self, phase_deg: float) -> None:
        """Set the phase; sent reduced to [0, 360) degrees. Raises LimitError (nothing sent) if not finite."""
        if isinstance(phase_deg, bool) or not isinstance(phase_deg, (int, float)) or not math.isfinite(phase_deg):
            raise LimitError("chopper phase in degrees", instrument=self.name, value=phase_deg, low=-math.inf,
                             high=math.inf)
        phase = float(phase_deg) % 360.0
        self.link.exchange("set_phase", {"phase_deg": 0.0 if phase >= 360.0 else phase})

    def is_locked(self) -> bool:
        """Whether the controller reports lock (query_locked)."""
        return bool(self.link.exchange("query_locked")["locked"])

    def state(self) -> dict[str, Any]:
        return {"frequency_hz": self.frequency_hz(), "phase_deg": self.phase_deg(), "locked": self.is_locked()}


class TemplateShutter(_TemplateInstrument, Shutter):
    """A shutter behind an ASCII controller."""

    def __init__(self, name: str, link: _TemplateLink, *, settle_timeout_s: float) -> None:
        super().__init__(name, link)
        self.settle_timeout_s = settle_timeout_s

    def _after_connect(self) -> None:
        self.is_open()

    def _set(self, want_open: bool) -> None:
        self.link.exchange("open" if want_open else "close")
        deadline = time.monotonic() + self.settle_timeout_s
        while self.is_open() != want_open:
            if time.monotonic() >= deadline:
                raise InstrumentTimeout(f"shutter not {'open' if want_open else 'closed'} after "
                                        f"{self.settle_timeout_s:g} s", instrument=self.name,
                                        timeout_s=self.settle_timeout_s)
            self.link.pause()

    def open(self) -> None:
        """Open and poll query_open until it agrees. Raises InstrumentTimeout after ``settle_timeout_s``."""
        self._set(True)

    def close(self) -> None:
        """Close and poll until closed. Callable in any state; raises (StateError when disconnected,
        InstrumentTimeout, reply errors) rather than pretend the beam is blocked."""
        self._set(False)

    def is_open(self) -> bool:
        """Whether the controller reports the shutter open (query_open)."""
        return bool(self.link.exchange("query_open")["open"])

    def state(self) -> dict[str, Any]:
        return {"open": self.is_open()}


# -- factories -------------------------------------------------------------------------------------------


def _link(kind: str, name: str, options: Mapping[str, Any], model: type[TemplateOptions],
          transport: Transport | None) -> _TemplateLink:
    key = f"bench.{name}.options"
    opts = parse_options(model, options, key)
    commands = compile_commands(kind, opts.commands, instrument=name, key_path=key, error=opts.error,
                                identity=opts.identity, encoding=opts.encoding,
                                write_terminator=opts.write_terminator)
    try:
        opts.read_terminator.encode(opts.encoding)
    except UnicodeError:  # encode errors, and codecs such as idna that raise the base class
        raise ConfigError(f"the read terminator cannot be encoded as {opts.encoding}",
                          key_path=f"{key}.read_terminator", value=opts.read_terminator) from None
    # Transport options first on their own key path (make_transport names the address's otherwise).
    make_transport("loop://", name=name, key_path=f"{key}.transport", options=opts.transport)
    made = make_transport(opts.address, name=name, key_path=f"{key}.address", options=opts.transport)
    return _TemplateLink(name, opts, commands, transport if transport is not None else made)


def _delay_axis_settings(name: str, context: Any) -> Any:
    settings = getattr(getattr(context, "bench_settings", None), "delay_axis", None)
    if settings is None or not hasattr(settings, "travel_mm"):
        raise ConfigError("the template delay axis needs the bench's delay_axis settings (travel_mm)",
                          key_path=f"bench.{name}.travel_mm")
    return settings


def make_delay_axis(name: str, options: Mapping[str, Any], context: Any, *,
                    transport: Transport | None = None) -> TemplateDelayAxis:
    """Registry factory for ``delay_axis`` driver ``template``; nothing is opened.

    Uses ``context.bench_settings.delay_axis`` (``travel_mm``, ``home_before_scan``). ``transport``, when
    given, is used instead of the one the address names (the address is still validated): the seam for
    in-process simulators and tests. Raises ConfigError for any problem in the options, naming its key path.
    """
    settings = _delay_axis_settings(name, context)
    link = _link("delay_axis", name, options, DelayAxisTemplateOptions, transport)
    opts = link.options
    assert isinstance(opts, DelayAxisTemplateOptions)
    require = opts.require_homed if opts.require_homed is not None else bool(getattr(settings, "home_before_scan",
                                                                                     True))
    return TemplateDelayAxis(name, link, bench_travel_mm=tuple(settings.travel_mm), require_homed=require)


def make_chopper(name: str, options: Mapping[str, Any], context: Any, *,
                 transport: Transport | None = None) -> TemplateChopper:
    """Registry factory for ``chopper`` driver ``template``; nothing is opened (``transport`` as for
    :func:`make_delay_axis`). Raises ConfigError."""
    link = _link("chopper", name, options, ChopperTemplateOptions, transport)
    opts = link.options
    assert isinstance(opts, ChopperTemplateOptions)
    return TemplateChopper(name, link, frequency_range_hz=opts.frequency_range_hz, lock_wait_s=opts.lock_wait_s)


def make_shutter(name: str, options: Mapping[str, Any], context: Any, *,
                 transport: Transport | None = None) -> TemplateShutter:
    """Registry factory for ``shutter`` driver ``template``; nothing is opened (``transport`` as for
    :func:`make_delay_axis`). Raises ConfigError."""
    link = _link("shutter", name, options, ShutterTemplateOptions, transport)
    opts = link.options
    assert isinstance(opts, ShutterTemplateOptions)
    return TemplateShutter(name, link, settle_timeout_s=opts.settle_timeout_s)
