"""SCPI / IEEE 488.2 message codec in the sans-I/O style: commands to bytes, bytes to replies.

What it is for: every message-based instrument driver (serial, raw socket, VISA) builds its commands with
:func:`encode_command`, pushes whatever bytes the transport returned into a :class:`ReplyReader`, and turns
the replies into values with the ``parse_*`` functions. :class:`Resync` builds the marker query a driver
sends after a timeout so that a late reply is never taken for the answer to the next query.

What it must not do: open, read or write anything, sleep, look at a clock, start threads or import a
transport library. It knows only the open standards (IEEE 488.2 common commands, SCPI error queue,
arbitrary block data) and no particular instrument's command set.

Who is at fault: bytes that came from the instrument and cannot be understood raise
:class:`~shotpair.drivers.errors.InstrumentReplyError` with ``instrument`` set to the name given to the
reader or parser. Wrong arguments from the calling code (an illegal header, an unencodable argument) are
programmer errors and raise :class:`ValueError` or :class:`TypeError`.
"""

from __future__ import annotations

import enum
import math
import numbers
import re
from dataclasses import dataclass
from typing import Final, Literal, NamedTuple, Self, TypeAlias

from .errors import InstrumentReplyError

__all__ = [
    "NEED_DATA",
    "NeedData",
    "Reply",
    "Mnemonic",
    "encode_command",
    "format_argument",
    "encode_block",
    "decode_block",
    "ReplyReader",
    "Resync",
    "Identity",
    "ErrorEntry",
    "ErrorClass",
    "parse_idn",
    "parse_error",
    "parse_bool",
    "parse_int",
    "parse_float",
    "error_class",
    "DEFAULT_MAX_TEXT_BYTES",
    "DEFAULT_MAX_BLOCK_BYTES",
]


class NeedData(enum.Enum):
    """Type of the :data:`NEED_DATA` sentinel (an enum, so it is a singleton that type checkers know)."""

    NEED_DATA = "NEED_DATA"

    def __repr__(self) -> str:
        return "NEED_DATA"


#: Returned by :meth:`ReplyReader.next_reply` when the buffered bytes do not yet hold a whole reply.
NEED_DATA: Final = NeedData.NEED_DATA

#: A complete reply: ``str`` for a text reply (terminator removed), ``bytes`` for a block's payload.
Reply: TypeAlias = str | bytes

#: Longest text reply accepted before the reader decides the terminator is never coming (bytes).
DEFAULT_MAX_TEXT_BYTES: Final = 1 << 20
#: Largest arbitrary block accepted, definite or indefinite (bytes).
DEFAULT_MAX_BLOCK_BYTES: Final = 1 << 28

_MNEMONIC = r"[A-Za-z][A-Za-z0-9_]*"
# One program header: a common command (*IDN) or a SCPI path (:SOURce:FREQuency, MEAS1:VOLT), optional "?".
_HEADER_RE = re.compile(rf"(?:\*[A-Za-z]+|:?{_MNEMONIC}(?::{_MNEMONIC})*)\??")
_MNEMONIC_RE = re.compile(_MNEMONIC)
_NR1_RE = re.compile(r"[+-]?[0-9]+")
_DECIMAL_RE = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NONDECIMAL_RE = re.compile(r"#(?:[Hh]([0-9A-Fa-f]+)|[Qq]([0-7]+)|[Bb]([01]+))")
_ERROR_RE = re.compile(r'([+-]?[0-9]+)\s*,\s*"((?:[^"]|"")*)"')
_DIGITS = b"0123456789"
#: Longest decimal integer parsed: Python's int() refuses more than 4300 digits (ValueError, a guard against
#: quadratic conversion time), and no instrument has a reason to send even a hundred.
_MAX_INT_DIGITS = 1000


def _show(data: bytes | str, limit: int = 40) -> str:
    """A short repr of offending bytes or text for an error message."""
    return repr(data[:limit]) + ("..." if len(data) > limit else "")


# --------------------------------------------------------------------------------------------- commands


class Mnemonic(str):
    """Character program data, sent bare (unquoted): ``MAXimum``, ``DEFault``, ``CH1``.

    Raises
    ------
    ValueError
        If the text is not a mnemonic (a letter, then letters, digits or underscores).
    """

    def __new__(cls, text: str) -> Self:
        if not isinstance(text, str) or not _MNEMONIC_RE.fullmatch(text):
            raise ValueError(f"not a SCPI mnemonic (letter, then letters/digits/_): {text!r}")
        return super().__new__(cls, text)


def format_argument(value: object) -> bytes:
    """Format one program-data argument of a command.

    Parameters
    ----------
    value:
        - ``bool`` → ``1`` / ``0`` (the numeric boolean form, which is also what instruments answer);
        - integer (``int`` or any :class:`numbers.Integral`) → decimal, e.g. ``-12``;
        - real (``float`` or any :class:`numbers.Real`) → Python's shortest round-trip ``repr`` with the
          exponent letter upper-cased: ``0.1``, ``1000.0``, ``1E-05``, ``2.5E+16``. The instrument parses
          back exactly the double that was sent. Non-finite values are refused;
        - :class:`Mnemonic` → sent bare;
        - ``str`` → string program data in double quotes, an embedded ``"`` doubled (``a"b`` → ``"a""b"``);
          printable 7-bit ASCII only;
        - ``bytes`` / ``bytearray`` → a definite-length arbitrary block (:func:`encode_block`).

    Raises
    ------
    ValueError
        Non-finite number, or a string with non-ASCII or control characters.
    TypeError
        Any other type.
    """
    if isinstance(value, bool):
        return b"1" if value else b"0"
    if isinstance(value, numbers.Integral):
        return str(int(value)).encode("ascii")
    if isinstance(value, numbers.Real):
        x = float(value)
        if not math.isfinite(x):
            raise ValueError(f"cannot send a non-finite number to an instrument: {x!r}")
        return repr(x).upper().encode("ascii")
    if isinstance(value, Mnemonic):
        return value.encode("ascii")
    if isinstance(value, str):
        if not value.isascii() or any(ord(c) < 0x20 or ord(c) == 0x7F for c in value):
            raise ValueError(f"string argument must be printable 7-bit ASCII: {value!r}")
        return b'"' + value.replace('"', '""').encode("ascii") + b'"'
    if isinstance(value, (bytes, bytearray)):
        return encode_block(bytes(value))
    raise TypeError(f"cannot format a {type(value).__name__} as SCPI program data: {value!r}")


def encode_command(header: str, *args: object, query: bool = False, terminator: bytes = b"\n") -> bytes:
    """Build one program message: ``HEADER[?][ arg1[,arg2...]]`` plus the terminator.

    Parameters
    ----------
    header:
        One program header: a common command (``*RST``, ``*IDN?``) or a SCPI path with ``:`` separators
        (``SYSTem:ERRor?``, ``:SOURce:FREQuency``). A trailing ``?`` makes it a query. Compound messages
        (``;``) are refused: send one command per call.
    *args:
        Program data, formatted by :func:`format_argument`, separated by ``,``.
    query:
        Append ``?`` to the header if it does not already end with one.
    terminator:
        The program message terminator, by default newline.

    Returns
    -------
    bytes
        The message ready to write, e.g. ``b"*IDN?\\n"``.

    Raises
    ------
    ValueError
        Illegal header, empty terminator, or an argument :func:`format_argument` refuses.
    TypeError
        An argument of an unsupported type.
    """
    if not isinstance(header, str) or not _HEADER_RE.fullmatch(header):
        raise ValueError(f"illegal SCPI header {header!r}: expected '*WORD' or 'WORD[:WORD...]', optional '?'")
    if not isinstance(terminator, bytes) or not terminator:
        raise ValueError(f"terminator must be non-empty bytes, got {terminator!r}")
    if query and not header.endswith("?"):
        header += "?"
    message = header.encode("ascii")
    if args:
        message += b" " + b",".join(format_argument(a) for a in args)
    return message + terminator


# --------------------------------------------------------------------------------------------- blocks


def encode_block(data: bytes) -> bytes:
    """Encode a definite-length arbitrary block: ``#``, one digit n, n digits of byte count, the bytes.

    ``b"ABC"`` → ``b"#13ABC"``; 1000 bytes → ``b"#41000"`` + data; ``b""`` → ``b"#10"``.

    Raises
    ------
    ValueError
        If the length needs more than nine digits (10**9 bytes or more).
    """
    count = str(len(data)).encode("ascii")
    if len(count) > 9:
        raise ValueError(f"a definite-length block holds at most 999999999 bytes, got {len(data)}")
    return b"#" + str(len(count)).encode("ascii") + count + bytes(data)


def decode_block(data: bytes, *, instrument: str = "?") -> bytes:
    """Decode exactly one complete definite-length block (no terminator, nothing after it).

    Raises
    ------
    InstrumentReplyError
        If ``data`` is not one well-formed definite-length block.
    """
    if len(data) < 2 or data[0:1] != b"#" or data[1] not in _DIGITS[1:]:
        raise InstrumentReplyError(f"not a definite-length block (expected '#' and a digit 1-9): {_show(data)}",
                                   instrument=instrument)
    n = data[1] - 0x30
    digits = data[2:2 + n]
    if len(digits) < n or any(d not in _DIGITS for d in digits):
        raise InstrumentReplyError(f"block length field must be {n} decimal digits: {_show(data)}",
                                   instrument=instrument)
    length = int(digits)
    payload = data[2 + n:]
    if len(payload) != length:
        raise InstrumentReplyError(f"block announces {length} bytes but holds {len(payload)}", instrument=instrument)
    return bytes(payload)


# --------------------------------------------------------------------------------------------- reader


class ReplyReader:
    """Turn bytes from an instrument into replies, one at a time; never touches a transport.

    Framing (auto-detected from the first bytes of each reply):

    - ``#`` followed by a digit 1-9: a definite-length arbitrary block. Exactly the announced number of
      bytes is taken as payload, whatever it contains (terminator bytes included); the terminator must
      follow it. Returned as ``bytes``.
    - ``#0``: an indefinite-length block. Over serial and sockets the END signal of the bus is not visible,
      so the payload runs to the first terminator and cannot itself contain one. Returned as ``bytes``.
    - anything else (including ``#H1F``-style non-decimal numbers): a text reply up to the terminator,
      returned as ``str`` without it. It must be 7-bit ASCII without control characters (tab allowed).

    A response that mixes text and a block in one message (``1,#13ABC``) is not supported: it is read as
    text and stops at the first terminator byte.

    Parameters
    ----------
    instrument:
        The instrument's name in the bench file; set on every error raised.
    terminator:
        The response message terminator, by default newline (use ``b"\\r\\n"`` for instruments that end
        their lines that way).
    max_text_bytes, max_block_bytes:
        Limits in bytes. A text reply that grows past ``max_text_bytes`` without a terminator, or a block
        announcing more than ``max_block_bytes``, is an error rather than unbounded buffering.

    Notes
    -----
    After an :class:`InstrumentReplyError` the reader is stopped: every later :meth:`next_reply` raises
    again until :meth:`reset` drops the buffered bytes (the stream position is unknown, so the driver must
    resynchronise, see :class:`Resync`).
    """

    def __init__(self, instrument: str = "?", *, terminator: bytes = b"\n",
                 max_text_bytes: int = DEFAULT_MAX_TEXT_BYTES, max_block_bytes: int = DEFAULT_MAX_BLOCK_BYTES) -> None:
        if not isinstance(terminator, bytes) or not terminator:
            raise ValueError(f"terminator must be non-empty bytes, got {terminator!r}")
        if max_text_bytes < 1 or max_block_bytes < 0:
            raise ValueError(f"limits must be positive, got max_text_bytes={max_text_bytes}, "
                             f"max_block_bytes={max_block_bytes}")
        self.instrument = instrument
        self.terminator = terminator
        self.max_text_bytes = max_text_bytes
        self.max_block_bytes = max_block_bytes
        self._buffer = bytearray()
        self._scanned = 0  # bytes already searched for a terminator, so long replies are scanned once
        self._error: InstrumentReplyError | None = None

    @property
    def buffered_bytes(self) -> int:
        """Number of bytes fed but not yet returned as a reply."""
        return len(self._buffer)

    @property
    def stopped(self) -> bool:
        """Whether an earlier bad reply stopped the reader (see :meth:`reset`)."""
        return self._error is not None

    def feed(self, data: bytes) -> None:
        """Append bytes received from the transport (any amount, any split; ``b""`` is a no-op)."""
        self._buffer += data

    def reset(self) -> int:
        """Drop every buffered byte and clear a stopped state; returns how many bytes were dropped."""
        dropped = len(self._buffer)
        self._buffer.clear()
        self._scanned = 0
        self._error = None
        return dropped

    def next_reply(self) -> Reply | Literal[NeedData.NEED_DATA]:
        """Return the next complete reply, or :data:`NEED_DATA` if the buffer does not hold one yet.

        Returns
        -------
        str | bytes | NEED_DATA
            A text reply (terminator removed), a block's payload, or the sentinel.

        Raises
        ------
        InstrumentReplyError
            The instrument sent bytes that are not a reply (malformed block, non-ASCII text, reply too
            long), or the reader was stopped by such an earlier error.
        """
        if self._error is not None:
            raise InstrumentReplyError(f"reader stopped after an earlier bad reply ({self._error.message}); "
                                       "reset() and resynchronise", instrument=self.instrument)
        try:
            return self._next()
        except InstrumentReplyError as exc:
            self._error = exc
            raise

    # -- internals

    def _fail(self, message: str) -> InstrumentReplyError:
        return InstrumentReplyError(f"instrument sent {message}", instrument=self.instrument)

    def _next(self) -> Reply | Literal[NeedData.NEED_DATA]:
        buf = self._buffer
        if not buf:
            return NEED_DATA
        if buf[0] == 0x23:  # '#'
            if len(buf) < 2:
                return NEED_DATA
            if buf[1] == 0x30:  # '#0'
                return self._indefinite_block()
            if buf[1] in _DIGITS:
                return self._definite_block()
        return self._text()

    def _find_terminator(self, start: int, limit: int, what: str) -> int | Literal[NeedData.NEED_DATA]:
        buf = self._buffer
        at = buf.find(self.terminator, max(start, self._scanned - len(self.terminator) + 1))
        if at < 0:
            self._scanned = len(buf)
            if len(buf) - start > limit:
                raise self._fail(f"{what} longer than {limit} bytes without a terminator "
                                 f"{self.terminator!r}: {_show(bytes(buf[:40]))}")
            return NEED_DATA
        if at - start > limit:
            raise self._fail(f"{what} of {at - start} bytes, longer than the limit of {limit}")
        return at

    def _consume(self, count: int) -> None:
        del self._buffer[:count]
        self._scanned = 0

    def _text(self) -> str | Literal[NeedData.NEED_DATA]:
        at = self._find_terminator(0, self.max_text_bytes, "a text reply")
        if at is NEED_DATA:
            return NEED_DATA
        raw = bytes(self._buffer[:at])
        self._consume(at + len(self.terminator))
        if not raw.isascii():
            raise self._fail(f"non-ASCII bytes in a text reply: {_show(raw)}")
        if any(b < 0x20 and b != 0x09 or b == 0x7F for b in raw):
            hint = (" (a carriage return: if the instrument ends its lines with b'\\r\\n', give the reader "
                    "that terminator)" if b"\r" in raw else "")
            raise self._fail(f"control characters in a text reply: {_show(raw)}{hint}")
        return raw.decode("ascii")

    def _indefinite_block(self) -> bytes | Literal[NeedData.NEED_DATA]:
        at = self._find_terminator(2, self.max_block_bytes, "an indefinite-length block")
        if at is NEED_DATA:
            return NEED_DATA
        payload = bytes(self._buffer[2:at])
        self._consume(at + len(self.terminator))
        return payload

    def _definite_block(self) -> bytes | Literal[NeedData.NEED_DATA]:
        buf = self._buffer
        n = buf[1] - 0x30
        if len(buf) < 2 + n:
            if any(d not in _DIGITS for d in buf[2:]):
                raise self._fail(f"a block whose length field is not {n} decimal digits: {_show(bytes(buf))}")
            return NEED_DATA
        digits = bytes(buf[2:2 + n])
        if any(d not in _DIGITS for d in digits):
            raise self._fail(f"a block whose length field is not {n} decimal digits: {_show(bytes(buf))}")
        length = int(digits)
        if length > self.max_block_bytes:
            raise self._fail(f"a block of {length} bytes, more than the limit of {self.max_block_bytes}")
        start = 2 + n
        end = start + length
        term = self.terminator
        if len(buf) < end + len(term):
            # Check whatever part of the terminator has already arrived, to fail early on a wrong length.
            tail = bytes(buf[end:])
            if tail and not term.startswith(tail):
                raise self._fail(f"a block of {length} bytes not followed by the terminator {term!r} "
                                 f"(got {_show(tail)}: wrong length field?)")
            return NEED_DATA
        if buf[end:end + len(term)] != term:
            raise self._fail(f"a block of {length} bytes not followed by the terminator {term!r} "
                             f"(got {_show(bytes(buf[end:end + len(term)]))}: wrong length field?)")
        payload = bytes(buf[start:end])
        self._consume(end + len(term))
        return payload


# --------------------------------------------------------------------------------------------- resync


class Resync:
    """Drain a late reply after a timeout, using a marker query made of IEEE 488.2 common commands only.

    After a query times out its reply may still arrive and would be taken for the answer to the next
    query. The driver then calls :meth:`begin`, writes the bytes it returns, and keeps feeding the reader
    and calling :meth:`poll` until it returns True (or its own timeout expires; then it calls
    :meth:`begin` again or reconnects). Everything before the marker's reply is discarded.

    The marker is ``*OPC?;*OPC?`` with 2 to ``cycle + 1`` copies, rotating at each :meth:`begin`; its
    reply is ``1;1``, ``1;1;1``... (each ``*OPC?`` answers ``1`` once pending operations are complete).
    The rotation means a late reply to an earlier marker is not taken for the current one. It changes no
    instrument setting and reads no status register that a driver may rely on (``*ESR?`` clears).

    Bad bytes met while draining are not fatal: the reader is reset, the error kept in :attr:`errors`,
    and draining goes on (the marker reply may then be lost, which the driver sees as a timeout).
    """

    def __init__(self, reader: ReplyReader, *, cycle: int = 8) -> None:
        if cycle < 1:
            raise ValueError(f"cycle must be at least 1, got {cycle}")
        self.reader = reader
        self.cycle = cycle
        self._count = 0
        self.expected: str | None = None
        self.discarded: list[Reply] = []
        self.errors: list[InstrumentReplyError] = []

    def begin(self) -> bytes:
        """Start a new resynchronisation; returns the marker message to write to the instrument.

        The buffered bytes are kept: they may be the first part of the late reply.
        """
        copies = 2 + self._count % self.cycle
        self._count += 1
        self.expected = ";".join(["1"] * copies)
        self.discarded = []
        self.errors = []
        return ";".join(["*OPC?"] * copies).encode("ascii") + self.reader.terminator

    def poll(self) -> bool:
        """Consume buffered replies; True once the marker's reply has been consumed.

        Raises
        ------
        RuntimeError
            If :meth:`begin` was not called first (a programming error in the driver).
        """
        if self.expected is None:
            raise RuntimeError("Resync.poll() called before begin()")
        while True:
            try:
                reply = self.reader.next_reply()
            except InstrumentReplyError as exc:
                self.errors.append(exc)
                self.reader.reset()
                return False
            if reply is NEED_DATA:
                return False
            if reply == self.expected:
                self.expected = None
                return True
            self.discarded.append(reply)


# --------------------------------------------------------------------------------------------- parsers


@dataclass(frozen=True)
class Identity:
    """The four fields of an ``*IDN?`` reply (IEEE 488.2): manufacturer, model, serial, firmware.

    An instrument without a serial number or firmware level reports ``0`` in that field.
    """

    manufacturer: str
    model: str
    serial: str
    firmware: str

    def __str__(self) -> str:
        return f"{self.manufacturer} {self.model} (serial {self.serial}, firmware {self.firmware})"


class ErrorEntry(NamedTuple):
    """One entry of the SCPI error queue: ``code`` (0 = no error) and its ``message``."""

    code: int
    message: str


class ErrorClass(enum.StrEnum):
    """The class of a SCPI error code."""

    NO_ERROR = "no error"  # 0
    COMMAND = "command error"  # -100..-199
    EXECUTION = "execution error"  # -200..-299
    DEVICE_SPECIFIC = "device-specific error"  # -300..-399
    QUERY = "query error"  # -400..-499
    OTHER_STANDARD = "other standard event"  # any other negative code
    DEVICE_DEFINED = "device-defined error"  # positive


def _text_arg(text: object, what: str, instrument: str) -> str:
    if not isinstance(text, str):
        raise InstrumentReplyError(f"{what} reply must be text, got {type(text).__name__} {_show(text)}"
                                   if isinstance(text, (bytes, bytearray)) else
                                   f"{what} reply must be text, got {type(text).__name__}", instrument=instrument)
    return text.strip()


def parse_idn(text: str, *, instrument: str = "?") -> Identity:
    """Parse an ``*IDN?`` reply: exactly four comma-separated fields, surrounding blanks removed.

    Raises
    ------
    InstrumentReplyError
        Not four fields, or an empty manufacturer or model.
    """
    fields = [f.strip() for f in _text_arg(text, "*IDN?", instrument).split(",")]
    if len(fields) != 4:
        raise InstrumentReplyError(f"*IDN? reply must have 4 comma-separated fields, got {len(fields)}: "
                                   f"{_show(text)}", instrument=instrument)
    if not fields[0] or not fields[1]:
        raise InstrumentReplyError(f"*IDN? reply has an empty manufacturer or model: {_show(text)}",
                                   instrument=instrument)
    return Identity(*fields)


def parse_error(text: str, *, instrument: str = "?") -> ErrorEntry:
    """Parse a ``SYSTem:ERRor?`` reply ``<code>,"<message>"``: ``-113,"Undefined header"`` → (-113, ...).

    A doubled quote inside the message stands for one quote. ``0,"No error"`` means the queue is empty.

    Raises
    ------
    InstrumentReplyError
        Anything that is not an integer, a comma and a quoted string.
    """
    match = _ERROR_RE.fullmatch(_text_arg(text, "SYSTem:ERRor?", instrument))
    if match is None or len(match.group(1)) > _MAX_INT_DIGITS:
        raise InstrumentReplyError(f'SYSTem:ERRor? reply must be <code>,"<message>": {_show(text)}',
                                   instrument=instrument)
    return ErrorEntry(int(match.group(1)), match.group(2).replace('""', '"'))


def parse_bool(text: str, *, instrument: str = "?") -> bool:
    """Parse a boolean reply: ``1``/``0`` (what the standards prescribe), also ``ON``/``OFF`` in any case.

    Raises
    ------
    InstrumentReplyError
        Anything else, including ``2`` or ``1.0``.
    """
    word = _text_arg(text, "boolean", instrument).upper()
    if word in ("1", "ON"):
        return True
    if word in ("0", "OFF"):
        return False
    raise InstrumentReplyError(f"expected a boolean (1/0/ON/OFF), got {_show(text)}", instrument=instrument)


def parse_int(text: str, *, instrument: str = "?") -> int:
    """Parse an integer reply: decimal NR1 (``-12``, ``+7``) or non-decimal ``#HFF``, ``#Q17``, ``#B101``.

    Raises
    ------
    InstrumentReplyError
        Anything else, including ``1.0``, ``1E3``, blanks inside the number and more than 1000 digits.
    """
    word = _text_arg(text, "integer", instrument)
    if _NR1_RE.fullmatch(word) and len(word) <= _MAX_INT_DIGITS:
        return int(word)
    match = _NONDECIMAL_RE.fullmatch(word)
    if match is not None and len(word) <= _MAX_INT_DIGITS:  # a longer one would exceed str()'s digit limit
        hex_, oct_, bin_ = match.groups()
        return int(hex_, 16) if hex_ else int(oct_, 8) if oct_ else int(bin_, 2)
    raise InstrumentReplyError(f"expected an integer, got {_show(text)}", instrument=instrument)


def parse_float(text: str, *, instrument: str = "?") -> float:
    """Parse a decimal numeric reply (NR1 ``12``, NR2 ``1.5``, NR3 ``-1.5E-03``) to a float.

    Only the decimal forms are accepted: words such as ``nan``, ``inf`` or ``1_0`` that Python's own
    ``float()`` would take are refused. The value is returned as sent (no mapping of special values).

    Raises
    ------
    InstrumentReplyError
        Anything that is not a decimal number, or one too large for a double.
    """
    word = _text_arg(text, "numeric", instrument)
    if not _DECIMAL_RE.fullmatch(word):
        raise InstrumentReplyError(f"expected a decimal number, got {_show(text)}", instrument=instrument)
    value = float(word)
    if not math.isfinite(value):
        raise InstrumentReplyError(f"number out of the range of a double: {_show(text)}", instrument=instrument)
    return value


def error_class(code: int) -> ErrorClass:
    """Name the class of a SCPI error code.

    0 no error; -100..-199 command; -200..-299 execution; -300..-399 device-specific; -400..-499 query;
    other negative codes are other standard events; positive codes are defined by the device.
    """
    if code == 0:
        return ErrorClass.NO_ERROR
    if code > 0:
        return ErrorClass.DEVICE_DEFINED
    return {1: ErrorClass.COMMAND, 2: ErrorClass.EXECUTION, 3: ErrorClass.DEVICE_SPECIFIC,
            4: ErrorClass.QUERY}.get(-code // 100, ErrorClass.OTHER_STANDARD)
