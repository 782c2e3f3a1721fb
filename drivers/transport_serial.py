"""The ``serial://`` transport: a serial port (or any pyserial URL) through pyserial.

``serial:///dev/ttyUSB0?baudrate=115200&parity=N&bytesize=8&stopbits=1`` opens a device path;
``serial://socket://127.0.0.1:7000`` (also ``rfc2217://``, ``loop://``) goes through pyserial's URL
handlers. Reads take ``max(1, in_waiting)`` bytes at a time (``readline`` reads one byte per call);
lines are split by :class:`~shotpair.drivers.transports.Transport`. pyserial is imported only when a
port is opened, so addresses validate without it. This module must not enumerate or probe ports, toggle
modem lines, or interpret the bytes.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .errors import TransportError
from .transports import Address, Transport

try:  # pyserial's flush() on POSIX calls termios.tcdrain, which raises termios.error (EIO on a hung-up line)
    from termios import error as _TermiosError
except ImportError:  # not POSIX
    class _TermiosError(Exception):  # type: ignore[no-redef]
        """Never raised: stands in for termios.error where there is no termios."""

__all__ = ["SerialSettings", "SerialTransport", "from_address", "serial_settings"]

PARITIES = ("N", "E", "O", "M", "S")
BYTESIZES = (5, 6, 7, 8)
STOPBITS = (1, 1.5, 2)
#: pyserial URL handlers allowed after ``serial://`` (no port enumeration, no traffic spying).
URL_SCHEMES = ("socket", "rfc2217", "loop")
_BOOLS = {"true": True, "1": True, "yes": True, "false": False, "0": False, "no": False}

SerialSettings = dict[str, Any]


def serial_settings(address: Address) -> SerialSettings:
    """The pyserial settings in an address's query, validated; defaults 9600 8N1, no flow control.

    Raises
    ------
    ConfigError
        For an unknown key or a value outside what is allowed (both named in the message).
    """
    address.reject_query(("baudrate", "parity", "bytesize", "stopbits", "rtscts", "xonxoff"))
    q = address.query
    settings: SerialSettings = {"baudrate": 9600, "parity": "N", "bytesize": 8, "stopbits": 1,
                                "rtscts": False, "xonxoff": False}
    if "baudrate" in q:
        try:
            settings["baudrate"] = int(q["baudrate"])
        except ValueError:
            settings["baudrate"] = -1
        if not 50 <= settings["baudrate"] <= 20_000_000:
            raise address.error(f"baudrate {q['baudrate']!r} is not a rate in bit/s",
                                allowed="an integer in 50..20000000")
    if "parity" in q:
        if q["parity"].upper() not in PARITIES:
            raise address.error(f"parity {q['parity']!r} is not allowed", allowed=", ".join(PARITIES))
        settings["parity"] = q["parity"].upper()
    if "bytesize" in q:
        if q["bytesize"] not in {str(b) for b in BYTESIZES}:
            raise address.error(f"bytesize {q['bytesize']!r} is not allowed", allowed="5, 6, 7, 8")
        settings["bytesize"] = int(q["bytesize"])
    if "stopbits" in q:
        if q["stopbits"] not in ("1", "1.5", "2"):
            raise address.error(f"stopbits {q['stopbits']!r} is not allowed", allowed="1, 1.5, 2")
        settings["stopbits"] = float(q["stopbits"]) if q["stopbits"] == "1.5" else int(q["stopbits"])
    for flag in ("rtscts", "xonxoff"):
        if flag in q:
            if q[flag].lower() not in _BOOLS:
                raise address.error(f"{flag} {q[flag]!r} is not a boolean", allowed="true, false")
            settings[flag] = _BOOLS[q[flag].lower()]
    return settings


def from_address(address: Address, *, name: str, options: Mapping[str, Any]) -> SerialTransport:
    """Build a closed :class:`SerialTransport` from a parsed ``serial://`` address (ConfigError if bad)."""
    port = address.target
    if "://" in port:
        inner = port.partition("://")[0].lower()
        if inner not in URL_SCHEMES:
            raise address.error(f"pyserial URL scheme {inner!r} is not allowed",
                                allowed=", ".join(f"serial://{s}://..." for s in URL_SCHEMES))
    elif not port:
        raise address.error("serial:// needs a port", allowed="serial:///dev/ttyUSB0, serial://COM3")
    return SerialTransport(address.text, name=name, port=port, settings=serial_settings(address),
                           write_timeout_s=float(options.get("write_timeout_s", 3.0)))


class SerialTransport(Transport):
    """A pyserial port; ``port`` is a device path or a pyserial URL, ``settings`` as from :func:`serial_settings`."""

    def __init__(self, address: str, *, name: str, port: str, settings: SerialSettings,
                 write_timeout_s: float = 3.0) -> None:
        super().__init__(address, name=name)
        self.port = port
        self.settings = dict(settings)
        self.write_timeout_s = write_timeout_s
        self._serial: Any = None
        self._timeout_s: float | None = None

    @property
    def is_open(self) -> bool:
        return self._serial is not None

    def open(self) -> None:
        if self._serial is not None:
            return
        try:
            import serial
        except ImportError as exc:
            raise TransportError("serial:// needs pyserial (pip install pyserial)", instrument=self.name) from exc
        try:
            port = serial.serial_for_url(self.port, do_not_open=True, timeout=0,
                                         write_timeout=self.write_timeout_s, **self.settings)
            port.open()
        except (serial.SerialException, OSError, ValueError) as exc:
            raise TransportError(f"cannot open serial port {self.port}: {exc}", instrument=self.name) from exc
        self._timeout_s = 0.0
        self._rx.clear()
        self._serial = port

    def close(self) -> None:
        port, self._serial = self._serial, None
        if port is not None:
            try:
                port.close()
            except Exception:  # close must never raise; the port is gone either way
                pass

    def write(self, data: bytes) -> None:
        self._require_open()
        import serial

        try:
            self._serial.write(data)
            self._serial.flush()
        except serial.SerialTimeoutException as exc:
            raise TransportError(f"write to {self.port} did not finish within {self.write_timeout_s:g} s "
                                 "(flow control?)", instrument=self.name) from exc
        except (serial.SerialException, OSError, _TermiosError) as exc:
            raise TransportError(f"write to {self.port} failed: {exc}", instrument=self.name) from exc

    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        import serial

        port = self._serial
        try:
            waiting = port.in_waiting
            if waiting:
                return port.read(min(waiting, max_bytes))
            # Block for the first byte only; setting the timeout reconfigures the port, so only when it changes.
            if self._timeout_s != timeout_s:
                port.timeout = timeout_s
                self._timeout_s = timeout_s
            first = port.read(1)  # a timeout returns b"", it does not raise
            if not first or max_bytes == 1:
                return first
            waiting = port.in_waiting
            return first + port.read(min(waiting, max_bytes - 1)) if waiting else first
        except (serial.SerialException, OSError) as exc:
            raise TransportError(f"read from {self.port} failed: {exc}", instrument=self.name) from exc
