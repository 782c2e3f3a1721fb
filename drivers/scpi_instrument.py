"""One SCPI / IEEE 488.2 instrument on one transport: connect, commands, queries, error queue, resync.

What it is for: every ``scpi`` driver (drivers/scpi_devices.py) owns one :class:`ScpiInstrument` and talks
through it. It builds messages (:func:`~shotpair.drivers.scpi.encode_command`, or the bench file's command
templates in a :class:`CommandSet`), drains ``SYSTem:ERRor?`` after every command and raises its entries as
typed errors, reads text replies and definite-length blocks (exact-length reads, so binary payloads cost
no terminator scan), and resynchronises after a read timeout so that a late reply is never taken for the
answer to the next query. :class:`ScpiOptions` is the options model every ``scpi`` driver extends.

What it must not do: know any instrument kind's command set or units (that is scpi_devices.py), parse
bytes itself beyond framing (that is scpi.py), sleep, or retry a command on its own.

Link states (one explicit table; any other step raises :class:`~shotpair.drivers.errors.StateError`)::

    state          event                         next state
    disconnected   connect() succeeds            in sync
    in sync        a reply read times out        out of sync  (bytes of the reply may still come)
    in sync        garbled reply, bad block      out of sync  (where the next reply starts is unknown)
    in sync        TransportError mid-exchange   out of sync  (bytes half sent or half read)
    out of sync    next exchange: marker back    in sync      (late replies discarded, stale errors logged)
    out of sync    marker not back in timeout_s  out of sync  (InstrumentTimeout; tried again next time)
    any            disconnect()                  disconnected
    disconnected   anything but connect()        StateError

Urgent commands (:meth:`ScpiInstrument.send_urgent`: stop a move, close the shutter) are written at once
in every connected state, without waiting for a resynchronisation or for another thread's exchange.
"""

from __future__ import annotations

import contextlib
import logging
import math
import re
import string
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from decimal import Decimal
from typing import Any, NoReturn, TypeVar

from pydantic import Field, StrictBool

from .errors import (
    ConfigError,
    InstrumentError,
    InstrumentReplyError,
    InstrumentTimeout,
    LimitError,
    ShotpairError,
    StateError,
    TransportError,
)
from .options import DriverOptions
from .scpi import (
    ErrorClass,
    ErrorEntry,
    Identity,
    ReplyReader,
    Resync,
    encode_command,
    error_class,
    format_argument,
    parse_error,
    parse_idn,
)
from .transports import ReadTimeout, Transport, make_transport

__all__ = [
    "MAX_ERROR_READS",
    "MAX_BLOCK_BYTES",
    "TransportOptions",
    "ScpiOptions",
    "CommandSet",
    "ScpiError",
    "ScpiCommandError",
    "ScpiRangeError",
    "scpi_error",
    "ScpiInstrument",
]

log = logging.getLogger(__name__)

T = TypeVar("T")

#: Most ``SYSTem:ERRor?`` reads after one command (the queue of a confused instrument may never empty).
MAX_ERROR_READS = 32
#: Largest definite-length block accepted, in bytes: the most that nine length digits can announce.
MAX_BLOCK_BYTES = 999_999_999
#: SCPI codes that mean "this value is not allowed" (SCPI-99: −222 data out of range, −224 illegal
#: parameter value): raised as :class:`ScpiRangeError`.
RANGE_CODES = (-222, -224)

_ERROR_QUERY = "SYSTem:ERRor?"
_CHUNK_BYTES = 65536
_BAD_TEXT = re.compile(rb"[^\t\x20-\x7e]")
_DIGITS = b"0123456789"


# --------------------------------------------------------------------------------------------- options


class TransportOptions(DriverOptions):
    """``options.transport``: passed to :func:`~shotpair.drivers.transports.make_transport`."""

    trace: StrictBool = Field(False, description="Log every byte to and from the instrument "
                              "(logger shotpair.drivers.wire_trace, level DEBUG).")
    open_timeout_s: float = Field(3.0, gt=0.0, le=3600.0, description="Longest wait to open the connection, s.")
    write_timeout_s: float = Field(3.0, gt=0.0, le=3600.0, description="Longest wait to send one message, s.")


class ScpiOptions(DriverOptions):
    """Options shared by every ``scpi`` driver (``[bench.<name>.options]``)."""

    address: str = Field(description="Transport address: visa://..., tcp://host:port, serial://...")
    transport: TransportOptions = Field(default_factory=TransportOptions)
    timeout_s: float = Field(2.0, gt=0.0, le=3600.0, description="Longest wait for a reply to a query, s.")
    reset_on_connect: StrictBool = Field(False, description="Send *RST on connect.")
    clear_on_connect: StrictBool = Field(True, description="Send *CLS on connect.")
    check_errors: StrictBool = Field(True, description="Drain SYSTem:ERRor? after every command.")
    commands: dict[str, str] = Field(default_factory=dict, description="Command templates replacing the "
                                     "reference headers of docs/instruments.md, by key.")


# --------------------------------------------------------------------------------------------- commands


class _ArgumentFormatter(string.Formatter):
    """Template fields without a format spec are SCPI program data (:func:`format_argument`).

    A :class:`~decimal.Decimal` is sent as its exact decimal text (``1.2345E-9``): a value converted
    between units by a power of ten (ps → s) then reaches the instrument without binary rounding.
    """

    def format_field(self, value: Any, format_spec: str) -> str:
        if format_spec:
            return format(value, format_spec)
        if isinstance(value, Decimal):
            return format(value, "E")
        return format_argument(value).decode("ascii")


_FORMATTER = _ArgumentFormatter()


def _template_fields(template: str) -> list[tuple[str, str, str | None]]:
    """(field name, format spec, conversion) of each replacement field; ValueError if malformed."""
    return [(name, spec or "", conv) for _, name, spec, conv in _FORMATTER.parse(template) if name is not None]


class CommandSet:
    """The command templates of one instrument: the reference defaults, with the bench file's overrides.

    A template is the message text without terminator, with named fields for the values
    (``MOVE:ABSolute {position_mm}``). A field without a format spec is sent as SCPI program data (numbers
    repr-exact); one with a spec is formatted by it (``{position_mm:.4f}``).

    Parameters
    ----------
    defaults:
        Key → reference template (docs/instruments.md, section 2).
    overrides:
        ``options.commands`` from the bench file.
    key_path:
        Where the overrides sit (``bench.delay_axis.options.commands``), for ConfigError.
    samples:
        A typical value for each field name (default 1), to check an override's format specs at once.

    Raises
    ------
    ConfigError
        An unknown key (the message lists the allowed ones), a template that is not printable ASCII, has
        malformed or positional fields, or does not use exactly the fields of the default.
    """

    def __init__(self, defaults: Mapping[str, str], overrides: Mapping[str, str] | None = None, *,
                 key_path: str = "options.commands", samples: Mapping[str, Any] | None = None) -> None:
        self.defaults = dict(defaults)
        self.samples = dict(samples or {})
        self.templates = dict(defaults)
        allowed = ", ".join(sorted(self.defaults))
        for key, template in (overrides or {}).items():
            where = f"{key_path}.{key}"
            if key not in self.defaults:
                raise ConfigError("unknown command key", key_path=where, value=key, allowed=allowed)
            self._check(key, template, where)
            self.templates[key] = template

    def _check(self, key: str, template: Any, where: str) -> None:
        wanted = {name for name, _, _ in _template_fields(self.defaults[key])}
        shape = "a template using " + (", ".join("{" + w + "}" for w in sorted(wanted)) if wanted else "no fields")
        if not isinstance(template, str) or not template.strip():
            raise ConfigError("a command template must be non-empty text", key_path=where, value=template,
                              allowed=shape)
        if not template.isascii() or _BAD_TEXT.search(template.encode("ascii")) or "\t" in template:
            raise ConfigError("a command template must be printable ASCII on one line", key_path=where,
                              value=template, allowed=shape)
        try:
            fields = _template_fields(template)
        except ValueError as exc:
            raise ConfigError(f"malformed template ({exc}; write {{{{ and }}}} for literal braces)",
                              key_path=where, value=template, allowed=shape) from None
        names = set()
        for name, spec, conv in fields:
            if not name.isidentifier() or conv is not None or "{" in spec:
                raise ConfigError("template fields must be plain names, optionally with a format spec "
                                  "({position_mm:.4f})", key_path=where, value=template, allowed=shape)
            names.add(name)
        if names != wanted:
            raise ConfigError("the template must use exactly the fields of the default "
                              f"{self.defaults[key]!r}", key_path=where, value=template, allowed=shape)
        try:
            self.render_text(key, template=template, **{name: self.samples.get(name, 1) for name in names})
        except (ValueError, TypeError) as exc:
            raise ConfigError(f"the template cannot format a number ({exc})", key_path=where, value=template,
                              allowed=shape) from None

    def render_text(self, key: str, *, template: str | None = None, **values: Any) -> str:
        """The message text of ``key`` with its fields filled in (no terminator).

        Raises ValueError/TypeError for a value :func:`~shotpair.drivers.scpi.format_argument` refuses.
        """
        return _FORMATTER.vformat(self.templates[key] if template is None else template, (), values)

    def __getitem__(self, key: str) -> str:
        return self.templates[key]

    def __repr__(self) -> str:
        changed = {k: v for k, v in self.templates.items() if v != self.defaults[k]}
        return f"<CommandSet {len(self.templates)} commands, overrides {changed}>"


# --------------------------------------------------------------------------------------------- errors


class ScpiError(InstrumentReplyError):
    """The instrument reported an error in its queue for a command shotpair sent.

    Attributes
    ----------
    code : int
        The SCPI error code (negative: standard; positive: the instrument's own).
    description : str
        The instrument's text for it.
    command : str
        The command (message text) it was raised for.
    others : tuple of ErrorEntry
        Further entries read from the queue after the first.
    """

    def __init__(self, message: str, *, instrument: str, entry: ErrorEntry, command: str,
                 others: Iterable[ErrorEntry] = ()) -> None:
        self.code = entry.code
        self.description = entry.message
        self.command = command
        self.others = tuple(others)
        self.error_class = error_class(entry.code)
        # Not super(): ScpiRangeError puts LimitError, whose constructor wants low/high, after this class.
        InstrumentError.__init__(self, message, instrument=instrument)


class ScpiCommandError(ScpiError):
    """A −1xx command error: the instrument did not understand what was sent (a header or argument that
    its dialect does not accept, i.e. shotpair's or the bench file's ``commands`` fault)."""


class ScpiRangeError(ScpiError, LimitError):
    """−222 / −224: the instrument refused a value. Also a LimitError; its range is unknown (``low`` and
    ``high`` are NaN), ``value`` is the value sent."""

    def __init__(self, message: str, *, instrument: str, entry: ErrorEntry, command: str, value: Any,
                 others: Iterable[ErrorEntry] = ()) -> None:
        self.value = value
        self.low = math.nan
        self.high = math.nan
        super().__init__(message, instrument=instrument, entry=entry, command=command, others=others)


def scpi_error(entries: list[ErrorEntry], *, instrument: str, command: str, value: Any = None,
               context: str = "") -> ScpiError:
    """The typed error for the first of ``entries`` (non-empty) read after ``command``.

    −222/−224 → :class:`ScpiRangeError` naming the value; −1xx → :class:`ScpiCommandError` saying the
    command was not understood; anything else → :class:`ScpiError` with the code and its class.
    """
    first, rest = entries[0], entries[1:]
    quoted = f'{first.code},"{first.message}"'
    more = f" (and {len(rest)} more: " + "; ".join(f'{e.code},"{e.message}"' for e in rest) + ")" if rest else ""
    kind = error_class(first.code)
    kw: dict[str, Any] = {"instrument": instrument, "entry": first, "command": command, "others": rest}
    if first.code in RANGE_CODES:
        return ScpiRangeError(f"{command!r} refused the value {value!r}: {quoted}{context}{more}", value=value, **kw)
    if kind is ErrorClass.COMMAND:
        return ScpiCommandError(f"the instrument did not understand {command!r}: {quoted}{context}{more} (check "
                                "the header and arguments, or options.commands, against its manual)", **kw)
    return ScpiError(f"{command!r} failed: {quoted} ({kind}){context}{more}", **kw)


# --------------------------------------------------------------------------------------------- the link


class ScpiInstrument:
    """One SCPI instrument on one transport (not connected until :meth:`connect`).

    Every exchange holds a lock, so two threads never interleave their commands and replies; urgent
    commands take only the short write lock (:meth:`send_urgent`).

    Parameters
    ----------
    name:
        The instrument's name in the bench file, in every error message.
    transport:
        A closed transport (:func:`~shotpair.drivers.transports.make_transport`); owned from now on.
    timeout_s:
        Longest wait for the reply to an ordinary query, and for a resynchronisation marker, in s.
    reset_on_connect, clear_on_connect:
        Send ``*RST`` / ``*CLS`` on connect.
    check_errors:
        Drain ``SYSTem:ERRor?`` after every command that is not a query, and after a query whose reply
        does not parse or never came, raising the first entry as a typed error.
    commands:
        The command templates for :meth:`send`, :meth:`ask` and :meth:`ask_block`.
    terminator:
        Program and response message terminator.
    """

    def __init__(self, name: str, transport: Transport, *, timeout_s: float = 2.0, reset_on_connect: bool = False,
                 clear_on_connect: bool = True, check_errors: bool = True, commands: CommandSet | None = None,
                 terminator: bytes = b"\n") -> None:
        if not (isinstance(timeout_s, (int, float)) and math.isfinite(timeout_s) and timeout_s > 0):
            raise ValueError(f"timeout_s must be a finite number > 0, got {timeout_s!r}")
        self.name = name
        self.transport = transport
        self.timeout_s = float(timeout_s)
        self.reset_on_connect = reset_on_connect
        self.clear_on_connect = clear_on_connect
        self.check_errors = check_errors
        self.commands = commands if commands is not None else CommandSet({})
        self.terminator = terminator
        self._lock = threading.RLock()
        self._write_lock = threading.Lock()
        self._connected = False
        self._in_sync = True
        # Bytes of an incomplete reply already taken from the transport (a block's header): a resync
        # feeds them first, so the late rest of the reply is framed correctly and discarded whole.
        self._partial = b""
        self._resync_reader = ReplyReader(name, terminator=terminator, max_block_bytes=MAX_BLOCK_BYTES)
        self._resync = Resync(self._resync_reader)
        self._idn: Identity | None = None

    @classmethod
    def from_options(cls, name: str, options: ScpiOptions, commands: CommandSet, *, key_path: str,
                     transport: Transport | None = None) -> "ScpiInstrument":
        """Build the link from validated options; the transport comes from ``options.address`` unless given.

        Raises ConfigError for a bad address (naming ``<key_path>.address``); nothing is opened.
        """
        if transport is None:
            transport = make_transport(options.address, name=name, key_path=f"{key_path}.address",
                                       options=options.transport.model_dump())
        return cls(name, transport, timeout_s=options.timeout_s, reset_on_connect=options.reset_on_connect,
                   clear_on_connect=options.clear_on_connect, check_errors=options.check_errors, commands=commands)

    # -- state ---------------------------------------------------------------------------------------

    @property
    def address(self) -> str:
        return self.transport.address

    @property
    def is_connected(self) -> bool:
        return self._connected

    @property
    def in_sync(self) -> bool:
        """False after a read timeout until the next exchange has resynchronised."""
        return self._in_sync

    @property
    def idn(self) -> Identity | None:
        """The parsed ``*IDN?`` reply of the last connect (None before the first)."""
        return self._idn

    def require_connected(self, action: str) -> None:
        """Raise StateError unless connected (``action`` names what was attempted)."""
        if not self._connected:
            raise StateError(f"{self.name} is not connected; connect first", state="disconnected", action=action)

    def __repr__(self) -> str:
        state = "disconnected" if not self._connected else "in sync" if self._in_sync else "out of sync"
        return f"<ScpiInstrument {self.name} {self.address} {state}>"

    # -- connection ----------------------------------------------------------------------------------

    def connect(self) -> None:
        """Open the transport, send ``*RST`` (if asked) and ``*CLS`` (if asked), read and keep ``*IDN?``.

        With ``clear_on_connect`` off and ``check_errors`` on, entries already in the error queue are read
        and logged (they predate this connection). Connecting a connected instrument does nothing.

        Raises
        ------
        TransportError
            The address cannot be opened or the first message cannot be sent (message names the address).
        InstrumentTimeout
            No answer to ``*IDN?`` within ``timeout_s``.
        InstrumentReplyError
            An ``*IDN?`` reply that does not parse, or an error reported for ``*RST``.
        """
        with self._lock:
            if self._connected:
                return
            try:
                self.transport.open()
            except TransportError as exc:
                raise TransportError(f"cannot connect to {self.address}: {exc.message}", instrument=self.name) from exc
            except OSError as exc:
                raise TransportError(f"cannot connect to {self.address}: {exc}", instrument=self.name) from exc
            self._connected = True
            self._in_sync = True
            self._partial = b""
            self._resync_reader.reset()
            try:
                if self.reset_on_connect:
                    self._command(self._encode("*RST"), "*RST", None)
                if self.clear_on_connect:
                    self._write(self._encode("*CLS"))  # clears the queue: nothing to check
                self._idn = self._query(self._encode("*IDN?"), "*IDN?", self.timeout_s, recover=False,
                                        parse=lambda text: parse_idn(text, instrument=self.name))
                if not self.clear_on_connect and self.check_errors:
                    stale = self._read_error_queue()
                    if stale:
                        log.warning("%s: error queue held %d entries from before this connection: %s", self.name,
                                    len(stale), "; ".join(f'{e.code},"{e.message}"' for e in stale))
            except (TransportError, OSError) as exc:
                self.disconnect()
                detail = exc.message if isinstance(exc, InstrumentError) else str(exc)
                raise TransportError(f"no connection to {self.address}: {detail}", instrument=self.name) from exc
            except InstrumentTimeout as exc:
                self.disconnect()
                raise InstrumentTimeout(f"{self.address} did not answer: {exc.message}", instrument=self.name,
                                        timeout_s=exc.timeout_s) from exc
            except BaseException:
                self.disconnect()
                raise

    def disconnect(self) -> None:
        """Close the transport. Idempotent; never raises."""
        with self._lock:
            self._connected = False
            self._partial = b""
            try:
                self.transport.close()
            except Exception as exc:  # noqa: BLE001 - close must never raise
                log.warning("%s: error closing %s: %s", self.name, self.address, exc)

    def identity(self) -> str:
        """``maker, model, serial, firmware`` from the last ``*IDN?``. Raises StateError before the first connect."""
        if self._idn is None:
            raise StateError(f"{self.name} has not been connected yet", state="disconnected", action="identify")
        i = self._idn
        return f"{i.manufacturer}, {i.model}, {i.serial}, {i.firmware}"

    # -- public exchanges: header and arguments ------------------------------------------------------

    def write(self, header: str, *args: object) -> None:
        """Send one command (``encode_command(header, *args)``), then drain the error queue.

        Raises
        ------
        ScpiRangeError
            −222 / −224: the value was refused (also a LimitError).
        ScpiCommandError
            −1xx: the command was not understood.
        ScpiError
            Any other error code.
        StateError, TransportError, InstrumentTimeout
            Not connected; link broken; no answer to ``SYSTem:ERRor?``.
        """
        message = self._encode(header, *args)
        self._command(message, _text_of(message), _value_of(args))

    def query(self, header: str, *args: object, timeout_s: float | None = None) -> str:
        """Send a query and return its text reply (terminator removed).

        Raises InstrumentTimeout when no reply comes within ``timeout_s`` (default: the instrument's); if the
        error queue then names a reason, that typed error is raised instead. InstrumentReplyError for a
        reply that is not ASCII text.
        """
        message = self._encode(header, *args)
        return self._query(message, _text_of(message), self._timeout(timeout_s), value=_value_of(args))

    def query_block(self, header: str, *args: object, timeout_s: float | None = None) -> bytes:
        """Send a query whose reply is one definite-length block; return its payload.

        The block is read by length (header, then exactly the announced bytes, then the terminator): a
        payload full of terminator bytes costs nothing extra. Raises like :meth:`query`, and
        InstrumentReplyError when the reply is not a well-formed block.
        """
        message = self._encode(header, *args)
        return self._query_block(message, _text_of(message), self._timeout(timeout_s), value=_value_of(args))

    def wait_complete(self, timeout_s: float, what: str = "the pending operation") -> None:
        """Block until every pending operation is complete (``*OPC?`` returns ``1``).

        Raises InstrumentTimeout (naming ``what``) when that takes longer than ``timeout_s`` (s); the link is
        then out of sync until the next exchange (the late ``1`` is discarded then).
        """
        try:
            reply = self._query(self._encode("*OPC?"), "*OPC?", self._timeout(timeout_s), recover=False)
        except InstrumentTimeout as exc:
            raise InstrumentTimeout(f"{what} not finished within {timeout_s:g} s (no reply to *OPC?)",
                                    instrument=self.name, timeout_s=timeout_s) from exc
        if reply.strip() != "1":
            raise InstrumentReplyError(f"*OPC? must answer 1, got {reply!r}", instrument=self.name)

    def read_errors(self) -> list[ErrorEntry]:
        """Read the error queue until ``0,...`` (at most :data:`MAX_ERROR_READS` reads); returns the entries."""
        with self._lock:
            self.require_connected("read the error queue")
            return self._read_error_queue()

    def resynchronise(self, timeout_s: float | None = None) -> list[ErrorEntry]:
        """Resynchronise now (whatever the state): discard late replies until the marker comes back.

        Returns the error-queue entries then found (when ``check_errors``). Raises InstrumentTimeout when
        the marker does not come back within ``timeout_s``.
        """
        with self._lock:
            self.require_connected("resynchronise")
            return self._resync_now(self._timeout(timeout_s))

    # -- public exchanges: command templates ---------------------------------------------------------

    def send(self, key: str, **values: Any) -> None:
        """Send the command template ``key`` with ``values``, then drain the error queue (see :meth:`write`)."""
        message = self._render(key, values)
        self._command(message, _text_of(message), _value_of(tuple(values.values())))

    def ask(self, key: str, parse: Callable[..., T] | None = None, *, timeout_s: float | None = None,
            **values: Any) -> T | str:
        """Send the query template ``key``; return its text, or ``parse(text, instrument=name)``.

        A reply that ``parse`` refuses makes the driver read the error queue: a queued error is raised as
        its typed error, else the parse error. Timeouts as in :meth:`query`.
        """
        message = self._render(key, values)
        parser = None if parse is None else (lambda text: parse(text, instrument=self.name))
        return self._query(message, _text_of(message), self._timeout(timeout_s), parse=parser,
                           value=_value_of(tuple(values.values())))

    def ask_block(self, key: str, *, timeout_s: float | None = None, **values: Any) -> bytes:
        """Send the query template ``key``; return the payload of its block reply (see :meth:`query_block`)."""
        message = self._render(key, values)
        return self._query_block(message, _text_of(message), self._timeout(timeout_s),
                                 value=_value_of(tuple(values.values())))

    def send_urgent(self, key: str, **values: Any) -> list[ErrorEntry]:
        """Write the command template ``key`` at once: for stopping a move or closing a shutter.

        It does not wait for a resynchronisation or for another thread's exchange to finish (only for
        another write, which is short). When the link is in sync and no other exchange runs, the error
        queue is then drained and its entries returned (not raised); else nothing is checked and ``[]`` is
        returned.

        Raises StateError when not connected, TransportError when the bytes cannot be sent.
        """
        self.require_connected(f"send {key}")
        message = self._render(key, values)
        self._write(message)
        if not self.check_errors or not self._lock.acquire(blocking=False):
            return []
        try:
            return self._read_error_queue() if self._in_sync and self._connected else []
        finally:
            self._lock.release()

    # -- internals: messages -------------------------------------------------------------------------

    def _encode(self, header: str, *args: object) -> bytes:
        return encode_command(header, *args, terminator=self.terminator)

    def _render(self, key: str, values: Mapping[str, Any]) -> bytes:
        return self.commands.render_text(key, **values).encode("ascii") + self.terminator

    def _timeout(self, timeout_s: float | None) -> float:
        if timeout_s is None:
            return self.timeout_s
        if not (isinstance(timeout_s, (int, float)) and math.isfinite(timeout_s) and timeout_s >= 0):
            raise ValueError(f"timeout_s must be a finite number >= 0, got {timeout_s!r}")
        return float(timeout_s)

    def _write(self, message: bytes) -> None:
        with self._write_lock:
            self.transport.write(message)

    def _text_reply(self, line: bytes, what: str) -> str:
        raw = line[:-len(self.terminator)]
        if _BAD_TEXT.search(raw):
            hint = " (carriage return: does the instrument end its lines with CR LF?)" if b"\r" in raw else ""
            raise InstrumentReplyError(f"reply to {what!r} is not printable ASCII text: {raw[:40]!r}{hint}",
                                       instrument=self.name)
        return raw.decode("ascii")

    # -- internals: exchanges (call with the lock held, or through the public methods) ---------------

    def _begin(self, action: str) -> None:
        """Check the connection and, when out of sync, resynchronise before a new exchange."""
        self.require_connected(action)
        if not self._in_sync:
            stale = self._resync_now(self.timeout_s)
            if stale:
                log.warning("%s: errors from before the resynchronisation (not raised): %s", self.name,
                            "; ".join(f'{e.code},"{e.message}"' for e in stale))

    @contextlib.contextmanager
    def _exchange(self, action: str) -> Iterator[None]:
        """Hold the lock for one exchange, resynchronised first; a TransportError leaves it out of sync
        (bytes may have been half sent or half read)."""
        with self._lock:
            self._begin(action)
            try:
                yield
            except TransportError:
                self._in_sync = False
                raise

    def _command(self, message: bytes, what: str, value: Any) -> None:
        with self._exchange(f"send {what}"):
            self._write(message)
            if self.check_errors:
                entries = self._read_error_queue()
                if entries:
                    raise scpi_error(entries, instrument=self.name, command=what, value=value)

    def _query(self, message: bytes, what: str, timeout_s: float, *, recover: bool = True,
               parse: Callable[[str], T] | None = None, value: Any = None, explain: bool = True) -> Any:
        with self._exchange(f"query {what}"):
            self._write(message)
            try:
                line = self.transport.read_until(self.terminator, timeout_s)
            except ReadTimeout as exc:
                self._timed_out(exc, what, timeout_s, recover, value)
            if line[:1] == b"#" and line[1:2] in _DIGITS[1:]:
                # A definite-length block where text was expected: its payload may hold terminator bytes,
                # so where it ends is unknown here; the resync frames it by its length and discards it.
                self._partial = line
                self._in_sync = False
                raise InstrumentReplyError(f"reply to {what!r} is a binary block, expected text", instrument=self.name)
            try:
                text = self._text_reply(line, what)
            except InstrumentReplyError as exc:
                # Not text at all: garbled, perhaps a piece of something longer. Resynchronise now (that
                # reads the error queue too) rather than trust the next line.
                self._in_sync = False
                if explain:
                    self._recover_bad_reply(exc, what, value)
                raise
            if parse is None:
                return text
            try:
                return parse(text)
            except InstrumentReplyError as exc:
                if explain:
                    self._raise_queued(exc, what, value)
                raise

    def _query_block(self, message: bytes, what: str, timeout_s: float, *, value: Any = None) -> bytes:
        t = self.transport
        term = self.terminator
        with self._exchange(f"query {what}"):
            self._write(message)
            deadline = time.monotonic() + timeout_s
            taken: list[bytes] = []  # what has been read of this reply, for a resync after a timeout
            try:
                head = t.read_exact(1, timeout_s)
                taken.append(head)
                if head != b"#":
                    line = head if term == head else head + t.read_until(term, _left(deadline))
                    taken.clear()
                    exc = InstrumentReplyError(f"reply to {what!r} is not a definite-length block: "
                                               f"{line[:40]!r}", instrument=self.name)
                    if _BAD_TEXT.search(line[:-len(term)]):  # garbled: where it ends is unknown
                        self._in_sync = False
                        self._recover_bad_reply(exc, what, value)
                    else:  # a text line: perhaps the instrument's own way of refusing
                        self._raise_queued(exc, what, value)
                    raise exc
                digit = t.read_exact(1, _left(deadline))
                taken.append(digit)
                if digit not in _DIGITS[1:]:
                    self._partial = b"".join(taken)
                    self._in_sync = False
                    raise InstrumentReplyError(f"reply to {what!r} is not a definite-length block (#{digit!r}...)",
                                               instrument=self.name)
                count = t.read_exact(digit[0] - 0x30, _left(deadline))
                taken.append(count)
                if any(c not in _DIGITS for c in count):
                    self._partial = b"".join(taken)
                    self._in_sync = False
                    raise InstrumentReplyError(f"block length field {count!r} of the reply to {what!r} is not "
                                               "decimal", instrument=self.name)
                length = int(count)
                payload = t.read_exact(length, _left(deadline))
                taken.append(payload)
                end = t.read_exact(len(term), _left(deadline))
            except ReadTimeout as exc:
                self._partial = b"".join(taken)
                self._timed_out(exc, what, timeout_s, True, value)
            if end != term:
                # The length field was wrong, or the instrument sent more: where the next reply starts is
                # unknown. The resync reads on from here to its marker.
                self._partial = end
                self._in_sync = False
                raise InstrumentReplyError(f"block of {length} bytes in the reply to {what!r} is not followed by "
                                           f"the terminator {term!r} (got {end!r}: wrong length field?)",
                                           instrument=self.name)
            return payload

    def _timed_out(self, exc: ReadTimeout, what: str, timeout_s: float, recover: bool, value: Any) -> NoReturn:
        """After a read timeout: out of sync; raise InstrumentTimeout, or the queued error that explains it.

        With ``recover`` (and ``check_errors``) the link is resynchronised at once and the error queue read,
        so that a query the instrument refused (it then sends no reply) is reported with its error code.
        Not for ``*OPC?``: the marker would wait for the same pending operation.
        """
        self._in_sync = False
        got = len(self._partial) + len(exc.received)
        timeout = InstrumentTimeout(f"no reply to {what!r} within {timeout_s:g} s"
                                    + (f" ({got} B of it arrived)" if got else ""),
                                    instrument=self.name, timeout_s=timeout_s)
        if recover and self.check_errors:
            try:
                stale = self._resync_now(self.timeout_s)
            except ShotpairError as late:
                log.info("%s: still out of sync after the timeout of %r: %s", self.name, what, late)
                raise timeout from exc
            explaining = self._explaining(stale, what)
            if explaining:
                raise scpi_error(explaining, instrument=self.name, command=what, value=value,
                                 context=f" (no reply within {timeout_s:g} s)") from timeout
        raise timeout from exc

    def _explaining(self, stale: list[ErrorEntry], what: str) -> list[ErrorEntry]:
        """The entries read by a resync that explain a missing or bad reply to ``what``.

        Query errors (−4xx: −410 query interrupted when the marker cut short an unsent reply) are what
        the resync itself caused; they are logged, not raised.
        """
        explaining = [e for e in stale if error_class(e.code) is not ErrorClass.QUERY]
        if len(explaining) < len(stale):
            log.info("%s: after the failed reply to %r the queue held %s", self.name, what,
                     "; ".join(f'{e.code},"{e.message}"' for e in stale))
        return explaining

    def _recover_bad_reply(self, exc: InstrumentReplyError, what: str, value: Any) -> None:
        """A reply that is not text or not a block: resynchronise now and raise the queued error, if any.

        Without ``check_errors`` (or when the resync fails) the link stays out of sync until the next
        exchange, and the caller raises ``exc``.
        """
        if not self.check_errors:
            return
        try:
            stale = self._resync_now(self.timeout_s)
        except ShotpairError as late:
            log.info("%s: still out of sync after the bad reply to %r: %s", self.name, what, late)
            return
        explaining = self._explaining(stale, what)
        if explaining:
            raise scpi_error(explaining, instrument=self.name, command=what, value=value,
                             context=f" (reply: {exc.message})") from exc

    def _raise_queued(self, exc: InstrumentReplyError, what: str, value: Any) -> None:
        """A reply that does not parse: if the error queue explains it, raise that error instead."""
        if not self.check_errors:
            return
        try:
            entries = self._read_error_queue()
        except ShotpairError as second:
            log.warning("%s: could not read the error queue after a bad reply to %r: %s", self.name, what, second)
            return
        if entries:
            raise scpi_error(entries, instrument=self.name, command=what, value=value,
                             context=f" (reply: {exc.message})") from exc

    def _read_error_queue(self) -> list[ErrorEntry]:
        entries: list[ErrorEntry] = []
        message = self._encode(_ERROR_QUERY)
        for _ in range(MAX_ERROR_READS):
            entry = self._query(message, _ERROR_QUERY, self.timeout_s, recover=False, explain=False,
                                parse=lambda text: parse_error(text, instrument=self.name))
            if entry.code == 0:
                return entries
            entries.append(entry)
        log.warning("%s: error queue not empty after %d reads of %s", self.name, MAX_ERROR_READS, _ERROR_QUERY)
        return entries

    def _resync_now(self, timeout_s: float) -> list[ErrorEntry]:
        """Write a fresh marker, discard every reply before its own, then read the error queue (if checked).

        Raises InstrumentTimeout (state stays out of sync) when the marker's reply is not back in time.
        """
        self._in_sync = False
        reader = self._resync_reader
        if self._partial:
            reader.feed(self._partial)
            self._partial = b""
        deadline = time.monotonic() + timeout_s
        # A reply cut short (the instrument dropped the rest of a block on the marker's arrival: -410
        # query interrupted; or a block whose length field is too large) would swallow the marker's reply
        # into its announced length. So after a quiet spell with such an incomplete reply buffered, it is
        # dropped and a fresh marker sent; after garbage (the reader resets itself) too.
        quiet_s = max(0.01, timeout_s / 4)
        markers = 1
        self._write(self._resync.begin())
        while not self._resync.poll():
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise InstrumentTimeout(f"out of sync, and none of {markers} resync markers (*OPC?;*OPC?...) came "
                                        f"back within {timeout_s:g} s", instrument=self.name, timeout_s=timeout_s)
            if self._resync.errors:
                log.debug("%s: garbage while resynchronising: %s", self.name, self._resync.errors[-1])
                self._write(self._resync.begin())
                markers += 1
                continue
            data = self.transport.read_available(_CHUNK_BYTES, min(remaining, quiet_s), self.terminator)
            if data:
                reader.feed(data)
            elif reader.buffered_bytes:
                log.debug("%s: dropping %d B of a reply that stopped short", self.name, reader.reset())
                self._write(self._resync.begin())
                markers += 1
        if reader.buffered_bytes:  # nothing was asked after the marker: these bytes answer nothing
            log.warning("%s: %d unexpected bytes after the resync marker dropped", self.name, reader.reset())
        discarded = self._resync.discarded
        log.info("%s: resynchronised; %d late replies discarded%s", self.name, len(discarded),
                 "".join(f"; {r[:40]!r}" if isinstance(r, str) else f"; block of {len(r)} B" for r in discarded[:4]))
        self._in_sync = True
        return self._read_error_queue() if self.check_errors else []


def _left(deadline: float) -> float:
    return max(0.0, deadline - time.monotonic())


def _text_of(message: bytes) -> str:
    return message.decode("ascii", "replace").rstrip("\r\n")


def _value_of(args: tuple[Any, ...]) -> Any:
    """The value a range error names: the one argument, or all of them."""
    if not args:
        return None
    return args[0] if len(args) == 1 else args
