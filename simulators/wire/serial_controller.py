"""The example controller: a made-up ASCII serial controller of our own, as a sans-I/O device.

What it is for: playing a delay stage, a chopper or a shutter on a serial line, so that the ``template``
driver is exercised byte for byte without hardware. :meth:`ExampleController.feed` takes the bytes a
driver wrote and returns the reply bytes; a server (pty_server.py, or an in-process pipe in tests) moves
them. It wraps the simulated instruments of one shared VirtualBench, so a move shows in the detector's
shots. :func:`bench_options` gives the ``[bench.<name>.options]`` table that drives it with the
template driver (configs/bench-serial.toml holds the same).

The command set (one command per line; ``\\r``, ``\\n`` or ``\\r\\n`` end a line; keywords in any case;
replies end in ``\\r\\n``)::

    every kind   WHO?              ID example-controller <kind> <serial> fw 1.0
    stage        GO <position>     OK                      start a move (position in controller units)
                 WHERE             AT <position>           (4 decimals)
                 BUSY?             BUSY YES | BUSY NO      moving or settling
                 HOME              OK                      start homing (to the low end)
                 HOMED?            HOMED YES | HOMED NO
                 HALT              OK                      stop now
                 RANGE?            RANGE <low> <high>
    chopper      SPIN <hz>         OK                      SPIN? -> SPIN <hz> (3 decimals)
                 PHASE <deg>       OK                      PHASE? -> PHASE <deg> (3 decimals)
                 LOCK?             LOCK YES | LOCK NO
    shutter      OPEN, SHUT        OK                      SHUTTER? -> SHUTTER OPEN | SHUTTER SHUT
    errors       ERR <code> <text>  10 unknown command, 11 bad or missing value, 12 line too long,
                                    20 value out of range, 30 not homed, 40 refused, 99 internal

Controller units are mm times ``position_scale`` (1: mm; 1000: µm). Faults (:meth:`inject`) change what
happens to the reply of the next command(s): none at all, a garbled line, a reply held back until
:meth:`release_late`, or a hang-up. What it must not do: touch a wire, start threads, or wait: latency
(:attr:`latency_s`) is applied by the server, and virtual time only advances by :attr:`command_cost_s`
per command in fast mode. Bench access is guarded by the lock the caller passes in.
"""

from __future__ import annotations

import collections
import enum
import math
import re
import threading
from collections.abc import Callable
from typing import Any

from shotpair.drivers.base import Instrument
from shotpair.drivers.errors import LimitError, ShotpairError, StateError
from shotpair.simulators.bench import VirtualBench
from shotpair.simulators.instruments import POLL_S, SimChopper, SimDelayAxis, SimShutter

__all__ = [
    "KINDS",
    "ERROR_CODES",
    "Fault",
    "ExampleController",
    "make_controller",
    "bench_options",
    "ERROR_PATTERN",
    "IDENTITY_QUERY",
]

#: Instrument kinds the controller can play, and the word it uses for each in its identity.
KINDS: dict[str, str] = {"delay_axis": "stage", "chopper": "chopper", "shutter": "shutter"}

#: The controller's error codes.
ERROR_CODES: dict[int, str] = {
    10: "unknown command",
    11: "bad or missing value",
    12: "line too long",
    20: "value out of range",
    30: "not homed",
    40: "refused",
    99: "internal error",
}

#: Reply pattern of the controller's errors, for the template driver's ``error`` option.
ERROR_PATTERN = r"ERR (?P<code>[0-9]+) (?P<message>.*)"
#: The identity query, for the template driver's ``identity`` option.
IDENTITY_QUERY: dict[str, str] = {"send": "WHO?", "reply": r"ID (?P<identity>.+)"}

_TERMINATOR = b"\r\n"
_NUMBER_RE = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_FIRMWARE = "1.0"


class Fault(enum.StrEnum):
    """What happens to the reply of the next command(s)."""

    NO_REPLY = "no_reply"      #: the command is carried out, nothing is sent back
    GARBLED = "garbled"        #: the reply line arrives scrambled (reversed, with a '#')
    LATE = "late"              #: the reply is held back until :meth:`ExampleController.release_late`
    DISCONNECT = "disconnect"  #: the controller hangs up instead of carrying out the command


class _Refused(Exception):
    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        self.detail = detail
        super().__init__(code, detail)


def _number(args: list[str]) -> float:
    if len(args) != 1 or not _NUMBER_RE.fullmatch(args[0]):
        raise _Refused(11, "expects one decimal number" + (f", got {' '.join(args)}" if args else ""))
    value = float(args[0])
    if not math.isfinite(value):
        raise _Refused(11, f"number out of range {args[0]}")
    return value


def _no_value(args: list[str]) -> None:
    if args:
        raise _Refused(11, f"takes no value, got {' '.join(args)}")


def _yes(flag: bool) -> str:
    return "YES" if flag else "NO"


class ExampleController:
    """The device side of the example controller for one instrument.

    Parameters
    ----------
    kind : str
        ``delay_axis``, ``chopper`` or ``shutter``.
    instrument : SimDelayAxis, SimChopper or SimShutter
        The simulated instrument it drives (connected here).
    lock : threading.Lock or RLock
        Held around every access to the shared bench (other controllers and the simulated detector use
        the same bench from other threads).
    latency_s : float
        Wall-clock time between a command and its reply, applied by the server (0 in fast mode).
    position_scale : float
        Controller units per mm (stage only).
    serial : str, optional
        Serial number in the identity.
    command_cost_s : float
        Virtual time each command takes in fast mode, in s (so polling loops end).
    max_line_bytes : int
        A longer line without terminator is discarded with error 12.
    """

    def __init__(self, kind: str, instrument: Instrument, *, lock: Any, latency_s: float = 0.0,
                 position_scale: float = 1.0, serial: str | None = None, command_cost_s: float = POLL_S,
                 max_line_bytes: int = 256) -> None:
        expected = {"delay_axis": SimDelayAxis, "chopper": SimChopper, "shutter": SimShutter}
        if kind not in expected:
            raise ValueError(f"unknown kind {kind!r}; kinds: {', '.join(KINDS)}")
        if not isinstance(instrument, expected[kind]):
            raise TypeError(f"a {kind} controller drives a {expected[kind].__name__}, got {type(instrument).__name__}")
        if not (math.isfinite(position_scale) and position_scale > 0):
            raise ValueError(f"position_scale must be finite and > 0, got {position_scale!r}")
        if not (math.isfinite(latency_s) and latency_s >= 0):
            raise ValueError(f"latency_s must be finite and >= 0, got {latency_s!r}")
        self.kind = kind
        self.instrument = instrument
        self.bench: VirtualBench = instrument.bench  # type: ignore[attr-defined]
        self.lock = lock
        self.latency_s = float(latency_s)
        self.position_scale = float(position_scale)
        self.serial = serial or {"delay_axis": "EX-1001", "chopper": "EX-1002", "shutter": "EX-1003"}[kind]
        self.command_cost_s = float(command_cost_s)
        self.max_line_bytes = int(max_line_bytes)
        #: The last commands received (text, stripped), newest last, for tests and logs.
        self.received: collections.deque[str] = collections.deque(maxlen=1000)
        self._buffer = bytearray()
        self._faults: collections.deque[Fault] = collections.deque()
        self._late = bytearray()
        self._hangup = False
        self._state_lock = threading.Lock()  # faults and held replies: set from the test's thread
        instrument.connect()
        self._handlers = self._table()

    # -- faults ----------------------------------------------------------------------------------------
    def inject(self, fault: Fault | str, count: int = 1) -> None:
        """Apply ``fault`` to the replies of the next ``count`` commands (a hang-up happens once)."""
        fault = Fault(fault)
        if count < 1:
            raise ValueError(f"count must be >= 1, got {count!r}")
        with self._state_lock:
            self._faults.extend([fault] * (1 if fault is Fault.DISCONNECT else count))

    def release_late(self) -> bytes:
        """The replies held back by :attr:`Fault.LATE`, now to be sent (and forgotten here)."""
        with self._state_lock:
            out = bytes(self._late)
            self._late.clear()
        return out

    @property
    def hangup(self) -> bool:
        """True once a DISCONNECT fault fired: the server should close the connection."""
        return self._hangup

    # -- bytes in, bytes out ---------------------------------------------------------------------------
    def feed(self, data: bytes) -> bytes:
        """Take bytes from the driver; return the replies to every complete command line in them."""
        if self._hangup:
            return b""
        self._buffer += data
        out = bytearray()
        while True:
            ends = [i for i in (self._buffer.find(b"\r"), self._buffer.find(b"\n")) if i >= 0]
            if not ends:
                if len(self._buffer) > self.max_line_bytes:
                    self._buffer.clear()
                    out += self._apply_fault(self._error(12, f"more than {self.max_line_bytes} bytes"))
                break
            end = min(ends)
            raw = bytes(self._buffer[:end])
            del self._buffer[:end + 1]
            line = raw.decode("ascii", errors="replace").strip()
            if not line:
                continue
            self.received.append(line)
            with self._state_lock:
                fault = self._faults[0] if self._faults else None
            if fault is Fault.DISCONNECT:
                with self._state_lock:
                    self._faults.popleft()
                self._hangup = True
                self._buffer.clear()
                break
            out += self._apply_fault(self._execute(line))
        return bytes(out)

    def _apply_fault(self, reply: bytes) -> bytes:
        with self._state_lock:
            fault = self._faults.popleft() if self._faults else None
            if fault is Fault.NO_REPLY:
                return b""
            if fault is Fault.LATE:
                self._late += reply
                return b""
        if fault is Fault.GARBLED:
            return b"#" + reply[: -len(_TERMINATOR)][::-1] + _TERMINATOR
        return reply

    @staticmethod
    def _error(code: int, detail: str = "") -> bytes:
        text = ERROR_CODES[code] + (f" {detail}" if detail else "")
        return f"ERR {code} {text}".encode("ascii", errors="replace") + _TERMINATOR

    def _execute(self, line: str) -> bytes:
        words = line.split()
        keyword, args = words[0].upper(), words[1:]
        handler = self._handlers.get(keyword)
        if handler is None:
            return self._error(10, keyword[:32])
        try:
            with self.lock:
                if not self.bench.clock.realtime and self.command_cost_s > 0:
                    self.bench.clock.advance(self.command_cost_s)
                reply = handler(args)
        except _Refused as exc:
            return self._error(exc.code, exc.detail)
        except LimitError as exc:
            return self._error(20, f"{exc.value!r} not in [{exc.low!r}, {exc.high!r}]")
        except StateError as exc:
            if "homed" in exc.state:
                return self._error(30)
            return self._error(40, exc.state)
        except ShotpairError as exc:
            return self._error(40, str(exc)[:80])
        except Exception as exc:  # noqa: BLE001 - a bug must not kill the server thread; it shows as ERR 99
            return self._error(99, type(exc).__name__)
        return reply.encode("ascii") + _TERMINATOR

    # -- the command set -------------------------------------------------------------------------------
    def _table(self) -> dict[str, Callable[[list[str]], str]]:
        table: dict[str, Callable[[list[str]], str]] = {"WHO?": self._who}
        if self.kind == "delay_axis":
            table.update({"GO": self._go, "WHERE": self._where, "BUSY?": self._busy, "HOME": self._home,
                          "HOMED?": self._homed, "HALT": self._halt, "RANGE?": self._range})
        elif self.kind == "chopper":
            table.update({"SPIN": self._spin, "SPIN?": self._spin_q, "PHASE": self._phase, "PHASE?": self._phase_q,
                          "LOCK?": self._lock_q})
        else:
            table.update({"OPEN": self._open, "SHUT": self._shut, "SHUTTER?": self._shutter_q})
        return table

    def _who(self, args: list[str]) -> str:
        _no_value(args)
        return f"ID example-controller {KINDS[self.kind]} {self.serial} fw {_FIRMWARE}"

    @property
    def _axis(self) -> SimDelayAxis:
        assert isinstance(self.instrument, SimDelayAxis)
        return self.instrument

    def _go(self, args: list[str]) -> str:
        self._axis.move_to_mm(_number(args) / self.position_scale)
        return "OK"

    def _where(self, args: list[str]) -> str:
        _no_value(args)
        return f"AT {self._axis.position_mm() * self.position_scale:.4f}"

    def _busy(self, args: list[str]) -> str:
        _no_value(args)
        return f"BUSY {_yes(self.bench.stage.is_moving(self.bench.now_s()))}"

    def _home(self, args: list[str]) -> str:
        _no_value(args)
        self.bench.stage.home(self.bench.now_s())  # starts homing; HOMED? tells when it is done
        return "OK"

    def _homed(self, args: list[str]) -> str:
        _no_value(args)
        return f"HOMED {_yes(self._axis.is_homed)}"

    def _halt(self, args: list[str]) -> str:
        _no_value(args)
        self._axis.stop()
        return "OK"

    def _range(self, args: list[str]) -> str:
        _no_value(args)
        low, high = self._axis.travel_mm
        return f"RANGE {low * self.position_scale:.4f} {high * self.position_scale:.4f}"

    @property
    def _chopper(self) -> SimChopper:
        assert isinstance(self.instrument, SimChopper)
        return self.instrument

    def _spin(self, args: list[str]) -> str:
        self._chopper.set_frequency_hz(_number(args))
        return "OK"

    def _spin_q(self, args: list[str]) -> str:
        _no_value(args)
        return f"SPIN {self._chopper.frequency_hz():.3f}"

    def _phase(self, args: list[str]) -> str:
        value = _number(args)
        if not 0.0 <= value <= 360.0:
            raise _Refused(20, f"{value!r} not in [0, 360]")
        self._chopper.set_phase_deg(value)
        return "OK"

    def _phase_q(self, args: list[str]) -> str:
        _no_value(args)
        return f"PHASE {self._chopper.phase_deg():.3f}"

    def _lock_q(self, args: list[str]) -> str:
        _no_value(args)
        return f"LOCK {_yes(self._chopper.is_locked())}"

    @property
    def _shutter(self) -> SimShutter:
        assert isinstance(self.instrument, SimShutter)
        return self.instrument

    def _open(self, args: list[str]) -> str:
        _no_value(args)
        self._shutter.open()
        return "OK"

    def _shut(self, args: list[str]) -> str:
        _no_value(args)
        self._shutter.close()
        return "OK"

    def _shutter_q(self, args: list[str]) -> str:
        _no_value(args)
        return f"SHUTTER {'OPEN' if self._shutter.is_open() else 'SHUT'}"


def make_controller(kind: str, bench: VirtualBench, *, lock: Any, name: str | None = None,
                    **settings: Any) -> ExampleController:
    """An :class:`ExampleController` for ``kind`` on a new simulated instrument of ``bench``.

    ``name`` is the instrument's name in error texts (default: the kind); ``settings`` go to the
    controller (``latency_s``, ``position_scale``, ...).
    """
    classes = {"delay_axis": SimDelayAxis, "chopper": SimChopper, "shutter": SimShutter}
    if kind not in classes:
        raise ValueError(f"unknown kind {kind!r}; kinds: {', '.join(KINDS)}")
    with lock:
        instrument = classes[kind](name or kind, bench)
    return ExampleController(kind, instrument, lock=lock, **settings)


_NUMBER = r"[-+0-9.eE]+"

_COMMANDS: dict[str, dict[str, dict[str, Any]]] = {
    "delay_axis": {
        "move_absolute": {"send": "GO {position_mm:.4f}", "reply": "OK"},
        "query_position": {"send": "WHERE", "reply": f"AT (?P<position_mm>{_NUMBER})"},
        "query_moving": {"send": "BUSY?", "reply": "BUSY (?P<moving>YES|NO)", "true_values": ["YES"]},
        "home": {"send": "HOME", "reply": "OK"},
        "query_homed": {"send": "HOMED?", "reply": "HOMED (?P<homed>YES|NO)", "true_values": ["YES"]},
        "stop": {"send": "HALT", "reply": "OK"},
        "query_limits": {"send": "RANGE?", "reply": f"RANGE (?P<low_mm>{_NUMBER}) (?P<high_mm>{_NUMBER})"},
    },
    "chopper": {
        "set_frequency": {"send": "SPIN {frequency_hz:.3f}", "reply": "OK"},
        "query_frequency": {"send": "SPIN?", "reply": f"SPIN (?P<frequency_hz>{_NUMBER})"},
        "set_phase": {"send": "PHASE {phase_deg:.3f}", "reply": "OK"},
        "query_phase": {"send": "PHASE?", "reply": f"PHASE (?P<phase_deg>{_NUMBER})"},
        "query_locked": {"send": "LOCK?", "reply": "LOCK (?P<locked>YES|NO)", "true_values": ["YES"]},
    },
    "shutter": {
        "open": {"send": "OPEN", "reply": "OK"},
        "close": {"send": "SHUT", "reply": "OK"},
        "query_open": {"send": "SHUTTER?", "reply": "SHUTTER (?P<open>OPEN|SHUT)", "true_values": ["OPEN"]},
    },
}


def bench_options(kind: str, path: str) -> dict[str, Any]:
    """The ``[bench.<name>.options]`` table that drives the example controller with the template driver.

    Parameters
    ----------
    kind : str
        ``delay_axis``, ``chopper`` or ``shutter``.
    path : str
        The serial port (a pty's slave path such as ``/dev/pts/5``); the address is ``serial://<path>``.

    Returns
    -------
    dict
        A fresh, TOML-writable table (strings, numbers, lists, tables only), for a controller in mm.

    Raises
    ------
    ValueError
        For an unknown kind or an empty path.
    """
    if kind not in _COMMANDS:
        raise ValueError(f"unknown kind {kind!r}; kinds: {', '.join(KINDS)}")
    if not path:
        raise ValueError("path must name a serial port")
    return {
        "address": f"serial://{path}",
        "write_terminator": "\r\n",
        "read_terminator": "\r\n",
        "reply_timeout_s": 1.0,
        "identity": dict(IDENTITY_QUERY),
        "error": ERROR_PATTERN,
        "commands": {op: {k: (list(v) if isinstance(v, list) else v) for k, v in table.items()}
                     for op, table in _COMMANDS[kind].items()},
    }
