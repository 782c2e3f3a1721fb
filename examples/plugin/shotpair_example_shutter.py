"""A shotpair shutter driver for a relay box: the template for a third-party driver plugin.

The instrument is a small relay box (a made-up one) whose relay channels switch beam shutters. It speaks
a line protocol of its own over any shotpair transport (serial port, TCP socket, VISA resource). Every
command and reply is one line of ASCII ending in LF::

    ID?              ->  relay box, 4 channels, serial 0042, firmware 1.3     identity
    RELAY <ch> ON    ->  DONE          energise channel <ch> (1-4): the shutter opens
    RELAY <ch> OFF   ->  DONE          release it: the shutter closes (also what a power cut does)
    RELAY <ch>?      ->  ON | OFF      the channel's state
    anything wrong   ->  ERR <reason>

The box answers ``DONE`` once the relay has switched. shotpair finds this driver through the entry
point ``shutter.relay`` in the group ``shotpair.drivers`` (see pyproject.toml) and builds it with
:func:`make_shutter` when a bench file says ``driver = "relay"`` under ``[bench.shutter]``.

The parts every driver has: a pure codec (:func:`encode_switch`, :func:`encode_query`,
:func:`parse_reply`; bytes in and out, no I/O), an options model validated by ``parse_options``, an
instrument class implementing the kind's interface from ``shotpair.drivers.base``, and a factory.
This module must not open anything at import or in the factory (``shotpair check`` and the bench build
create drivers before anything is connected), and must not sleep, retry or log bytes itself (the
transport's ``trace = true`` option logs every byte).
"""

from __future__ import annotations

from typing import Any, Mapping

from pydantic import Field
from shotpair.drivers.base import Shutter
from shotpair.drivers.errors import InstrumentReplyError, InstrumentTimeout, StateError
from shotpair.drivers.options import DriverOptions, parse_options
from shotpair.drivers.transports import ReadTimeout, Transport, make_transport

__all__ = [
    "CHANNELS",
    "RelayShutterOptions",
    "RelayShutter",
    "encode_switch",
    "encode_query",
    "parse_reply",
    "make_shutter",
]

#: Relay channels the box has.
CHANNELS = 4
#: Line terminator of commands and replies.
EOL = b"\n"
#: How long to discard late bytes after a timed-out reply before the next command, in s.
RESYNC_S = 0.1


# -- codec: pure functions, bytes in and out ---------------------------------------------------------


def encode_switch(channel: int, on: bool) -> bytes:
    """The command that energises (``on``) or releases a relay channel, e.g. ``b"RELAY 1 ON\\n"``."""
    return f"RELAY {channel} {'ON' if on else 'OFF'}".encode("ascii") + EOL


def encode_query(channel: int) -> bytes:
    """The command that asks for a channel's state, e.g. ``b"RELAY 1?\\n"``."""
    return f"RELAY {channel}?".encode("ascii") + EOL


def parse_reply(line: bytes, *, instrument: str) -> str:
    """The text of one reply line, without the terminator.

    Raises
    ------
    InstrumentReplyError
        If the box reports an error (``ERR ...``) or the line is not printable ASCII.
    """
    try:
        text = line.removesuffix(EOL).decode("ascii").strip()
    except UnicodeDecodeError:
        raise InstrumentReplyError(f"reply is not ASCII: {line!r}", instrument=instrument) from None
    if not text.isprintable():
        raise InstrumentReplyError(f"reply is not printable: {line!r}", instrument=instrument)
    if text.startswith("ERR"):
        raise InstrumentReplyError(f"the relay box refused: {text[3:].strip() or 'no reason given'}",
                                   instrument=instrument)
    return text


# -- options: everything under [bench.shutter.options], validated before anything is opened -------


class RelayShutterOptions(DriverOptions):
    """The ``options`` table of a relay shutter. Unknown keys are errors (DriverOptions forbids them)."""

    address: str = Field(description="Transport address of the relay box, e.g. serial:///dev/ttyUSB0?baudrate=9600 "
                         "or tcp://127.0.0.1:7001.")
    channel: int = Field(1, ge=1, le=CHANNELS, description="Relay channel the shutter is wired to.")
    timeout_s: float = Field(1.0, gt=0.0, le=60.0, description="Longest wait for a reply, s.")
    trace: bool = Field(False, description="Log every byte to and from the box (wire trace).")


# -- the instrument ----------------------------------------------------------------------------------


class RelayShutter(Shutter):
    """A beam shutter on one channel of the relay box; energised is open.

    Parameters
    ----------
    name : str
        The instrument's key in the bench file (``shutter``), used in every error message.
    transport : Transport
        A closed or open transport to the box; :meth:`connect` opens it. The driver owns it from here on.
    channel : int
        Relay channel, 1 to :data:`CHANNELS`.
    timeout_s : float
        Longest wait for each reply, s.

    Not thread-safe: the runner's worker thread is its only user.
    """

    def __init__(self, name: str, transport: Transport, *, channel: int = 1, timeout_s: float = 1.0) -> None:
        super().__init__(name)
        self.transport = transport
        self.channel = channel
        self.timeout_s = timeout_s
        self._identity: str | None = None
        # Set after a reply timed out: the late reply may still come and must not answer the next command.
        self._stale = False

    # Instrument

    def connect(self) -> None:
        """Open the transport and check that a relay box answers ``ID?``.

        Raises TransportError (cannot open), InstrumentTimeout (no answer), InstrumentReplyError (not a
        relay box). The transport is closed again on failure.
        """
        self.transport.open()
        try:
            reply = self._query(b"ID?" + EOL)
            if not reply.lower().startswith("relay box"):
                raise InstrumentReplyError(f"not a relay box: ID? answered {reply!r}", instrument=self.name)
        except BaseException:
            self.transport.close()
            raise
        self._identity = reply

    def disconnect(self) -> None:
        """Close the transport; the relay keeps its state. Never raises."""
        self.transport.close()
        self._identity = None

    def identity(self) -> str:
        """The box's answer to ``ID?`` and the channel, e.g. ``relay box, ..., serial 0042, ... (channel 1)``."""
        if self._identity is None:
            raise StateError("connect first", state="disconnected", action="identify")
        return f"{self._identity} (channel {self.channel})"

    def state(self) -> dict[str, Any]:
        return {"channel": self.channel, "open": self.is_open()}

    # Shutter

    def open(self) -> None:
        """Energise the relay; returns once the box says it has switched. Raises as :meth:`_command`."""
        self._command(encode_switch(self.channel, True))

    def close(self) -> None:
        """Release the relay; returns once the box says it has switched.

        Safe to call after any error: a stale reply is discarded first. It raises (StateError when not
        connected, TransportError, InstrumentTimeout) rather than pretend the beam is blocked, so the
        daemon can report that the shutter may still be open.
        """
        self._command(encode_switch(self.channel, False))

    def is_open(self) -> bool:
        """Whether the channel is energised, as the box reports it."""
        reply = self._query(encode_query(self.channel))
        if reply not in ("ON", "OFF"):
            raise InstrumentReplyError(f"expected ON or OFF, got {reply!r}", instrument=self.name)
        return reply == "ON"

    # The one place bytes go out and come back.

    def _command(self, command: bytes) -> None:
        reply = self._query(command)
        if reply != "DONE":
            raise InstrumentReplyError(f"expected DONE to {command!r}, got {reply!r}", instrument=self.name)

    def _query(self, command: bytes) -> str:
        """Send one command line and read its reply line.

        Raises StateError before :meth:`connect`, TransportError, InstrumentTimeout after ``timeout_s``,
        InstrumentReplyError for an ``ERR`` or unreadable reply.
        """
        if not self.transport.is_open:
            raise StateError("connect first", state="disconnected", action=f"send {command!r}")
        if self._stale:
            # A reply that arrives after its timeout would otherwise be read as the answer to this command.
            self.transport.drain(RESYNC_S)
            self._stale = False
        self.transport.write(command)
        try:
            line = self.transport.read_until(EOL, self.timeout_s)
        except ReadTimeout as exc:
            self._stale = True
            raise InstrumentTimeout(f"no reply to {command!r} within {self.timeout_s:g} s (received "
                                    f"{exc.received!r})", instrument=self.name, timeout_s=self.timeout_s) from None
        return parse_reply(line, instrument=self.name)


# -- the factory the entry point names ---------------------------------------------------------------


def make_shutter(name: str, options: Mapping[str, Any], context: Any) -> RelayShutter:
    """Build (do not connect) the relay shutter ``name`` from its bench-file ``options``.

    ``context`` (a ``shotpair.drivers.registry.DriverContext``: bench settings, simulation) is not needed
    by this driver. Raises ConfigError naming ``bench.<name>.options.<key>`` for any bad option or address;
    nothing is opened.
    """
    key_path = f"bench.{name}.options"
    opts = parse_options(RelayShutterOptions, options, key_path)
    transport = make_transport(opts.address, name=name, key_path=f"{key_path}.address",
                               options={"trace": opts.trace})
    return RelayShutter(name, transport, channel=opts.channel, timeout_s=opts.timeout_s)
