"""Device side of SCPI / IEEE 488.2 in the sans-I/O style: program messages in, response bytes out.

What it is for: a simulated instrument is a :class:`ScpiDevice` holding a table of headers and handlers
(devices.py fills it); every connection to it gets a :class:`ScpiParser` that is fed the bytes a
controller sent and returns the bytes the instrument answers. Here live the IEEE 488.2 common commands
(``*IDN?``, ``*RST``, ``*CLS``, ``*OPC``, ``*OPC?``, ``*WAI``, ``*ESR?``), the SCPI error queue
(``SYSTem:ERRor[:NEXT]?``, 16 entries, -350 on overflow), header matching with short and long forms,
compound messages (``;``), parameter checks, and the simulator-only ``SIMulate:FAULt`` and
``SIMulate:LATency`` commands with the fault behaviour (no reply, garbled reply, disconnect).

What it must not do: open sockets, start threads, sleep or read the wall clock by itself. Waiting (the
command latency, ``*OPC?`` on a moving stage in real-time mode) happens only through the stop event a
session hands to the parser and the device's :meth:`ScpiDevice.wait_until_s`; without a stop event a
parser never waits on the wall clock. It knows no instrument physics and no transport.

Errors a controller causes never raise out of :meth:`ScpiParser.receive`: they become entries of the
device's error queue, as on an instrument. The only exception it raises is :class:`Interrupted`, when the
session's stop event is set during a wait.
"""

from __future__ import annotations

import logging
import math
import re
import threading
from collections import deque
from dataclasses import dataclass, field
from typing import Callable, Final, Sequence, TypeAlias

from shotpair.drivers.errors import ShotpairError
from shotpair.drivers.scpi import format_argument

__all__ = [
    "STANDARD_ERRORS",
    "ERROR_QUEUE_SIZE",
    "FAULTS",
    "ScpiError",
    "Interrupted",
    "WaitUntil",
    "Args",
    "Command",
    "ErrorQueue",
    "Faults",
    "ScpiDevice",
    "ScpiParser",
    "format_number",
    "format_bool",
    "garble",
]

#: Standard error texts, SCPI-99 vol. 2 ch. 21 / IEEE 488.2 (texts from memory, codes as in the standard).
STANDARD_ERRORS: Final[dict[int, str]] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
}

#: Entries the error queue holds; the last one becomes -350 when more errors arrive.
ERROR_QUEUE_SIZE: Final = 16

#: Faults a simulated device can be told to show (``SIMulate:FAULt <name>,<count>`` or ``inject``).
FAULTS: Final = ("no_reply", "garbled", "disconnect")

# Event status register bits (IEEE 488.2 §11.5.1.1).
_ESR_OPC, _ESR_QYE, _ESR_DDE, _ESR_EXE, _ESR_CME = 1, 4, 8, 16, 32

_HEADER_RE = re.compile(r"\*[A-Za-z]+\??|:?[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*\??")
_PATTERN_NODE_RE = re.compile(r"\[:([A-Za-z]+)\]|:?([A-Za-z]+)")
_DECIMAL_RE = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_MAX_COUNT = 1_000_000

log = logging.getLogger(__name__)


class ScpiError(ShotpairError):
    """A command the device refuses; becomes the error-queue entry ``code,"<standard text>;<detail>"``.

    Raised by handlers and parameter helpers inside a device, caught by the parser; it never reaches a
    controller as an exception.
    """

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = int(code)
        self.detail = detail
        super().__init__(f"{code}: {STANDARD_ERRORS.get(code, 'Device error')}" + (f"; {detail}" if detail else ""))


class Interrupted(ShotpairError):
    """The session's stop event was set while the device waited (latency, ``*OPC?``, a real-time block)."""


@dataclass(frozen=True)
class WaitUntil:
    """What a handler returns to wait, without the device lock, until virtual time ``t_s`` (s).

    ``then`` (called with the lock held again) gives the reply; None means no reply.
    """

    t_s: float
    then: Callable[[], "ReplyValue"] | None = None


#: What a handler returns: text (a reply), bytes (a reply, e.g. a block), None (no reply) or a wait.
ReplyValue: TypeAlias = "str | bytes | bytearray | WaitUntil | None"


def format_number(value: float) -> str:
    """A float as the device sends it: shortest round-trip decimal, upper-case exponent (``1.5E-06``)."""
    return format_argument(float(value)).decode("ascii")


def format_bool(value: bool) -> str:
    """``1`` or ``0``."""
    return "1" if value else "0"


@dataclass
class Args:
    """The parameters of one program message unit, as text tokens, with typed accessors.

    ``stop`` is the session's stop event (None in a pure sans-I/O use) for handlers that wait themselves.
    Every accessor raises :class:`ScpiError` with the standard code for what is wrong.
    """

    tokens: list[str]
    stop: threading.Event | None = None

    def number(self, i: int, what: str) -> float:
        """Token ``i`` as a decimal number; -104 if it is not one, -222 if it overflows a double."""
        token = self.tokens[i]
        if not _DECIMAL_RE.fullmatch(token):
            raise ScpiError(-104, f"expected a number for {what}, got {token!r}")
        value = float(token)
        if not math.isfinite(value):
            raise ScpiError(-222, f"{what} {token} is beyond the range of a double")
        return value

    def integer(self, i: int, what: str) -> int:
        """Token ``i`` as an integer; -104 if not a number, -224 if it is not a whole number."""
        value = self.number(i, what)
        if value != math.floor(value):
            raise ScpiError(-224, f"{what} must be a whole number, got {self.tokens[i]!r}")
        return int(value)

    def boolean(self, i: int, what: str) -> bool:
        """``1``/``ON`` or ``0``/``OFF``; anything else is -224 (stricter than rounding other numbers)."""
        word = self.tokens[i].upper()
        if word in ("1", "ON"):
            return True
        if word in ("0", "OFF"):
            return False
        raise ScpiError(-224, f"{what} must be 1/0/ON/OFF, got {self.tokens[i]!r}")

    def choice(self, i: int, what: str, choices: Sequence[str]) -> str:
        """Token ``i`` as one of ``choices`` (case-insensitive, returned as in ``choices``); -224 otherwise."""
        token = self.tokens[i]
        for choice in choices:
            if token.lower() == choice.lower():
                return choice
        raise ScpiError(-224, f"{what} must be one of {', '.join(choices)}, got {token!r}")


Handler: TypeAlias = Callable[[Args], ReplyValue]


def _expand_pattern(pattern: str) -> tuple[bool, list[tuple[tuple[str, str], ...]]]:
    """``SYSTem:ERRor[:NEXT]?`` → (query, every node sequence of (short, long) upper-case forms)."""
    query = pattern.endswith("?")
    body = pattern[:-1] if query else pattern
    if body.startswith("*"):
        word = body.upper()
        return query, [((word, word),)]
    nodes: list[tuple[str, str, bool]] = []
    pos = 0
    for m in _PATTERN_NODE_RE.finditer(body):
        if m.start() != pos:
            break
        mnemonic = m.group(1) or m.group(2)
        short = "".join(c for c in mnemonic if c.isupper() or c.isdigit()) or mnemonic.upper()
        nodes.append((short.upper(), mnemonic.upper(), m.group(1) is not None))
        pos = m.end()
    if pos != len(body) or not nodes:
        raise ValueError(f"bad header pattern {pattern!r}")
    alternatives: list[tuple[tuple[str, str], ...]] = [()]
    for short, long, optional in nodes:
        with_node = [alt + ((short, long),) for alt in alternatives]
        alternatives = with_node + (alternatives if optional else [])
    return query, alternatives


@dataclass(frozen=True)
class Command:
    """One entry of a device's header table.

    Attributes
    ----------
    pattern:
        The header in SCPI notation: upper case is the short form, the whole word the long form,
        ``[:NODE]`` optional, a final ``?`` for a query (``MOVE:ABSolute``, ``SYSTem:ERRor[:NEXT]?``).
    handler:
        Called with the unit's :class:`Args`; returns the reply (see :data:`ReplyValue`).
    params:
        (fewest, most) parameters; fewer is -109, more is -108.
    locked:
        Call the handler with the device lock held (False: the handler takes it itself, to wait between
        parts of a long operation).
    simulator_only:
        A ``SIMulate`` command: messages holding one are exempt from injected faults.
    """

    pattern: str
    handler: Handler
    params: tuple[int, int] = (0, 0)
    locked: bool = True
    simulator_only: bool = False
    query: bool = field(init=False)
    forms: tuple[tuple[tuple[str, str], ...], ...] = field(init=False)

    def __post_init__(self) -> None:
        query, forms = _expand_pattern(self.pattern)
        object.__setattr__(self, "query", query)
        object.__setattr__(self, "forms", tuple(forms))

    def matches(self, nodes: Sequence[str], query: bool) -> bool:
        """Whether upper-case header ``nodes`` (query or not) name this command."""
        if query != self.query:
            return False
        return any(len(form) == len(nodes) and all(n in sl for n, sl in zip(nodes, form)) for form in self.forms)


class ErrorQueue:
    """The SCPI error queue: first in, first out, :data:`ERROR_QUEUE_SIZE` entries; thread-safe.

    When it is full, a new error replaces the newest entry by -350 "Queue overflow" (SCPI-99 vol. 2
    §21.8, from memory): the oldest errors are kept, later ones are lost.
    """

    def __init__(self, size: int = ERROR_QUEUE_SIZE) -> None:
        self.size = size
        self._entries: deque[tuple[int, str]] = deque()
        self._lock = threading.Lock()

    def push(self, code: int, detail: str = "") -> None:
        text = STANDARD_ERRORS.get(code, "Device error") + (f";{detail}" if detail else "")
        with self._lock:
            if len(self._entries) >= self.size:
                self._entries[-1] = (-350, STANDARD_ERRORS[-350])
            else:
                self._entries.append((code, text))

    def pop(self) -> tuple[int, str]:
        """The oldest entry, removed; ``(0, "No error")`` when empty."""
        with self._lock:
            return self._entries.popleft() if self._entries else (0, STANDARD_ERRORS[0])

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)


class Faults:
    """Counts of armed faults of one device (shared by its connections); thread-safe."""

    def __init__(self) -> None:
        self._counts = {name: 0 for name in FAULTS}
        self._lock = threading.Lock()

    def arm(self, name: str, count: int = 1) -> None:
        """Show fault ``name`` on the next ``count`` replies (messages, for ``disconnect``); 0 disarms.

        Raises
        ------
        ValueError
            Unknown fault name or a count outside [0, 1e6].
        """
        if name not in FAULTS:
            raise ValueError(f"unknown fault {name!r}; faults: {', '.join(FAULTS)}")
        if isinstance(count, bool) or not isinstance(count, int) or not 0 <= count <= _MAX_COUNT:
            raise ValueError(f"fault count must be an integer in [0, {_MAX_COUNT}], got {count!r}")
        with self._lock:
            self._counts[name] = count

    def take(self, name: str) -> bool:
        """True (and one fewer left) if fault ``name`` is armed."""
        with self._lock:
            if self._counts[name] > 0:
                self._counts[name] -= 1
                return True
            return False

    def counts(self) -> dict[str, int]:
        with self._lock:
            return dict(self._counts)


def garble(chunks: list[bytes | bytearray]) -> list[bytes | bytearray]:
    """Flip the high bit of every byte of a response except its final terminator (``*IDN?`` → non-ASCII)."""
    out: list[bytes | bytearray] = []
    for chunk in chunks[:-1]:
        out.append(bytes(chunk).translate(_FLIP_HIGH_BIT))
    return out + chunks[-1:]


_FLIP_HIGH_BIT: Final = bytes(b ^ 0x80 for b in range(256))


class ScpiDevice:
    """A simulated SCPI instrument: identity, header table, error queue, status, faults and latency.

    Parameters
    ----------
    name:
        The instrument's name (``delay_axis``...), for logs.
    identity:
        The four ``*IDN?`` fields (maker, model, serial, firmware); no commas inside.
    lock:
        Lock held around every handler (share one between the devices of one virtual bench).
    latency_s:
        Wall-clock time each program message takes before it is executed, in s (0: none).

    Subclasses add their commands with :meth:`add` and override :meth:`reset`, :meth:`busy_until_s`,
    :meth:`now_s` and :meth:`wait_until_s` (the defaults know no clock: nothing is ever pending).
    """

    def __init__(self, name: str, identity: Sequence[str], *, lock: threading.Lock | None = None,
                 latency_s: float = 0.0) -> None:
        fields = [str(f) for f in identity]
        if len(fields) != 4 or any("," in f or not f for f in fields):
            raise ValueError(f"*IDN? needs four non-empty fields without commas, got {fields!r}")
        self.name = name
        self.identity = ",".join(fields)
        self.lock = lock if lock is not None else threading.Lock()
        self.errors = ErrorQueue()
        self.faults = Faults()
        self.latency_s = 0.0
        self.set_latency_s(latency_s)
        self._esr = 0
        self._status_lock = threading.Lock()  # errors are pushed from parsers outside the device lock
        self._opc_at_s: float | None = None
        self._commands: list[Command] = []
        self.add("*IDN?", lambda a: self.identity)
        self.add("*RST", self._rst)
        self.add("*CLS", self._cls)
        self.add("*ESR?", self._esr_query)
        self.add("*OPC", self._opc)
        self.add("*OPC?", self._opc_query)
        self.add("*WAI", self._wai)
        self.add("SYSTem:ERRor[:NEXT]?", self._error_query)
        self.add("SIMulate:FAULt", self._fault, params=(2, 2), simulator_only=True)
        self.add("SIMulate:FAULt?", self._fault_query, simulator_only=True)
        self.add("SIMulate:LATency", self._latency, params=(1, 1), simulator_only=True)
        self.add("SIMulate:LATency?", lambda a: format_number(self.latency_s), simulator_only=True)

    # -- table ---------------------------------------------------------------------------------------
    def add(self, pattern: str, handler: Handler, *, params: tuple[int, int] = (0, 0), locked: bool = True,
            simulator_only: bool = False) -> None:
        """Add (or replace) the command ``pattern``; see :class:`Command`."""
        command = Command(pattern, handler, params, locked, simulator_only)
        self._commands = [c for c in self._commands if c.pattern.upper() != pattern.upper()]
        self._commands.append(command)

    def lookup(self, nodes: Sequence[str], query: bool) -> Command | None:
        """The command named by upper-case header ``nodes``, or None."""
        for command in self._commands:
            if command.matches(nodes, query):
                return command
        return None

    def parser(self, *, stop: threading.Event | None = None) -> "ScpiParser":
        """A parser for one connection; ``stop`` makes waits wall-clock waits that stop can interrupt."""
        return ScpiParser(self, stop=stop)

    def set_latency_s(self, latency_s: float) -> None:
        """Set the per-message latency in s. Raises ValueError outside [0, 10]."""
        if not (isinstance(latency_s, (int, float)) and math.isfinite(latency_s) and 0.0 <= latency_s <= 10.0):
            raise ValueError(f"latency must be in [0, 10] s, got {latency_s!r}")
        self.latency_s = float(latency_s)

    def push_error(self, code: int, detail: str = "") -> None:
        """Queue an error and set its event-status bit."""
        self.errors.push(code, detail)
        bit = {1: _ESR_CME, 2: _ESR_EXE, 3: _ESR_DDE, 4: _ESR_QYE}.get(-code // 100, _ESR_DDE) if code < 0 \
            else _ESR_DDE
        with self._status_lock:
            self._esr |= bit

    # -- hooks for subclasses --------------------------------------------------------------------------
    def reset(self) -> None:
        """``*RST``: back to the power-up settings (called with the lock held). The error queue stays."""

    def now_s(self) -> float:
        """Present time of the device's clock, in s."""
        return 0.0

    def busy_until_s(self) -> float:
        """Time at which every overlapped operation is complete, in s (called with the lock held)."""
        return self.now_s()

    def wait_until_s(self, t_s: float, stop: threading.Event | None) -> None:
        """Wait (without the lock) until the device's clock reaches ``t_s``. Raises Interrupted on stop."""

    # -- common commands -------------------------------------------------------------------------------
    def _rst(self, args: Args) -> None:
        self._opc_at_s = None
        self.reset()

    def _cls(self, args: Args) -> None:
        self.errors.clear()
        with self._status_lock:
            self._esr = 0
        self._opc_at_s = None

    def _esr_query(self, args: Args) -> str:
        done = self._opc_at_s is not None and self.now_s() >= self._opc_at_s
        if done:
            self._opc_at_s = None
        with self._status_lock:
            value, self._esr = self._esr | (_ESR_OPC if done else 0), 0
        return str(value)

    def _opc(self, args: Args) -> None:
        self._opc_at_s = self.busy_until_s()

    def _opc_query(self, args: Args) -> ReplyValue:
        t = self.busy_until_s()
        return "1" if t <= self.now_s() else WaitUntil(t, lambda: "1")

    def _wai(self, args: Args) -> ReplyValue:
        t = self.busy_until_s()
        return None if t <= self.now_s() else WaitUntil(t)

    def _error_query(self, args: Args) -> str:
        code, text = self.errors.pop()
        return f'{code},"{text.replace(chr(34), chr(34) * 2)}"'

    def _fault(self, args: Args) -> None:
        name = args.choice(0, "fault", FAULTS)
        count = args.integer(1, "fault count")
        if not 0 <= count <= _MAX_COUNT:
            raise ScpiError(-222, f"fault count {count} outside [0, {_MAX_COUNT}]")
        self.faults.arm(name, count)

    def _fault_query(self, args: Args) -> str:
        counts = self.faults.counts()
        return ",".join(str(counts[name]) for name in FAULTS)

    def _latency(self, args: Args) -> None:
        value = args.number(0, "latency in s")
        if not 0.0 <= value <= 10.0:
            raise ScpiError(-222, f"latency {value} s outside [0, 10]")
        self.set_latency_s(value)


def _split_outside_quotes(text: str, sep: str) -> list[str]:
    """Split at ``sep`` outside '...' and "..." strings; -102 for an unterminated string."""
    parts: list[str] = []
    start, quote = 0, ""
    for i, c in enumerate(text):
        if quote:
            if c == quote:
                quote = ""
        elif c in "\"'":
            quote = c
        elif c == sep:
            parts.append(text[start:i])
            start = i + 1
    if quote:
        raise ScpiError(-102, "unterminated string")
    parts.append(text[start:])
    return parts


class ScpiParser:
    """One connection's view of a device: bytes in, response bytes out (sans-I/O).

    Program messages end in LF (a CR before it is dropped); units are separated by ``;`` and each is
    ``HEADER[?] [param{,param}]``. After a ``;`` a header is looked up from the root first, then below the
    previous header's path (SCPI's tree rule). A command error (-1xx) skips the rest of its message;
    execution errors (-2xx) skip only their unit. Replies of one message are joined by ``;`` and end in
    LF; a query that fails gives no reply.

    Parameters
    ----------
    device:
        The device whose table, error queue and faults are used.
    stop:
        The session's stop event: with it, the device latency is waited on the wall clock and waits raise
        :class:`Interrupted` when it is set. Without it, latency is ignored.
    max_message_bytes:
        Longest program message; a longer one is dropped with -363.
    """

    def __init__(self, device: ScpiDevice, *, stop: threading.Event | None = None,
                 max_message_bytes: int = 1 << 16) -> None:
        self.device = device
        self.stop = stop
        self.max_message_bytes = max_message_bytes
        #: Set when a ``disconnect`` fault fired: the session must close the connection now.
        self.close_requested = False
        self._buffer = bytearray()
        self._overrun = False

    def feed(self, data: bytes) -> bytes:
        """:meth:`receive`, joined into one bytes object (for tests and small replies)."""
        return b"".join(self.receive(data))

    def receive(self, data: bytes) -> list[bytes | bytearray]:
        """Execute every complete program message in the bytes received so far.

        Returns
        -------
        list of bytes-like
            The response bytes in order (several chunks, to avoid copying large blocks).

        Raises
        ------
        Interrupted
            If the stop event was set during a wait; the rest of the input is dropped.
        """
        self._buffer += data
        out: list[bytes | bytearray] = []
        while not self.close_requested:
            at = self._buffer.find(b"\n")
            if at < 0:
                if len(self._buffer) > self.max_message_bytes:
                    self.device.push_error(-363, f"program message longer than {self.max_message_bytes} bytes")
                    self._buffer.clear()
                    self._overrun = True
                break
            line = bytes(self._buffer[:at])
            del self._buffer[:at + 1]
            if self._overrun:  # the end of the message that overran the buffer
                self._overrun = False
                continue
            if len(line) > self.max_message_bytes:
                self.device.push_error(-363, f"program message longer than {self.max_message_bytes} bytes")
                continue
            out.extend(self._message(line))
        return out

    def interrupt(self) -> None:
        """The controller sent a new message while a reply was unread: queue -410 (the caller drops it)."""
        self.device.push_error(-410, "a new command arrived before the reply was read; reply discarded")

    # -- internals --------------------------------------------------------------------------------------
    def _message(self, line: bytes) -> list[bytes | bytearray]:
        if line.endswith(b"\r"):
            line = line[:-1]
        if not line.strip():
            return []
        try:
            text = line.decode("ascii")
        except UnicodeDecodeError:
            self.device.push_error(-101, "non-ASCII byte in the program message")
            return []
        try:
            units = [u.strip() for u in _split_outside_quotes(text, ";")]
        except ScpiError as exc:
            self.device.push_error(exc.code, exc.detail)
            return []
        units = [u for u in units if u]
        simulator = any(self._simulator_only(u) for u in units)
        faults = self.device.faults
        if not simulator and faults.take("disconnect"):
            self.close_requested = True
            return []
        if self.stop is not None and self.device.latency_s > 0 and self.stop.wait(self.device.latency_s):
            raise Interrupted("stopped during the command latency")
        replies: list[bytes | bytearray] = []
        previous: tuple[str, ...] = ()
        for unit in units:
            try:
                value, previous = self._unit(unit, previous)
            except ScpiError as exc:
                self.device.push_error(exc.code, exc.detail)
                if -199 <= exc.code <= -100:
                    break
                continue
            except Interrupted:
                raise
            except Exception as exc:  # a simulator bug must show in the queue and the log, not kill the line
                log.exception("%s: handler of %r failed", self.device.name, unit)
                self.device.push_error(-200, f"simulator fault: {exc}")
                continue
            if value is not None:
                replies.append(value.encode("ascii") if isinstance(value, str) else value)
        if not replies:
            return []
        chunks: list[bytes | bytearray] = []
        for i, reply in enumerate(replies):
            if i:
                chunks.append(b";")
            chunks.append(reply)
        chunks.append(b"\n")
        if not simulator:
            if faults.take("no_reply"):
                return []
            if faults.take("garbled"):
                return garble(chunks)
        return chunks

    def _simulator_only(self, unit: str) -> bool:
        """Whether ``unit`` names a simulator-only (``SIMulate``) command of the device."""
        header = unit.split(None, 1)[0]
        if not _HEADER_RE.fullmatch(header):
            return False
        query = header.endswith("?")
        command = self.device.lookup(tuple(header.rstrip("?").lstrip(":").upper().split(":")), query)
        return command is not None and command.simulator_only

    def _unit(self, unit: str, previous: tuple[str, ...]) -> tuple[str | bytes | bytearray | None, tuple[str, ...]]:
        header, *more = unit.split(None, 1)
        rest = more[0] if more else ""
        if not _HEADER_RE.fullmatch(header):
            raise ScpiError(-102, f"bad header {header!r}")
        query = header.endswith("?")
        path = header[:-1] if query else header
        absolute = path.startswith((":", "*"))
        nodes = tuple(path.lstrip(":").upper().split(":"))
        device = self.device
        command = device.lookup(nodes, query)
        if command is None and not absolute and previous:
            nodes = previous + nodes
            command = device.lookup(nodes, query)
        if command is None:
            raise ScpiError(-113, header)
        tokens = [t.strip() for t in _split_outside_quotes(rest, ",")] if rest.strip() else []
        if any(not t for t in tokens):
            raise ScpiError(-102, f"empty parameter in {unit!r}")
        low, high = command.params
        if len(tokens) < low:
            raise ScpiError(-109, f"{header} needs {low} parameter(s)")
        if len(tokens) > high:
            raise ScpiError(-108, f"{header} takes {high} parameter(s), got {len(tokens)}")
        args = Args(tokens, self.stop)
        if command.locked:
            with device.lock:
                value = command.handler(args)
        else:
            value = command.handler(args)
        while isinstance(value, WaitUntil):
            device.wait_until_s(value.t_s, self.stop)
            then = value.then
            if then is None:
                value = None
                break
            with device.lock:
                value = then()
        here = nodes[:-1] if not nodes[0].startswith("*") else previous
        return value, here
