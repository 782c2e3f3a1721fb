"""The ``visa://`` transport: one explicit VISA resource through pyvisa (pyvisa-py unless ``?library=``).

``visa://TCPIP0::127.0.0.1::5025::SOCKET`` or ``visa://TCPIP0::10.0.0.7::5025::SOCKET?library=@ivi``.
pyvisa's own termination handling is bypassed: the resource reads with "END" reporting on, so a read
returns what has arrived, and the termination character (the terminator's last byte) is enabled only
while waiting for a line, so a reply is returned as soon as it is complete. Lines and exact-length blocks are then cut by :class:`~shotpair.drivers.transports.Transport`
whatever the payload contains (with termination on, replies with many 0x0A bytes are quadratically slow,
and pyvisa's ``read_bytes`` loses the partial data on a timeout).

Opening a raw socket to a closed port succeeds in pyvisa-py; the first write fails, and that failure is
a TransportError. This module never lists resources (that broadcasts on the network), never closes the
resource manager (its session is shared by every resource of the process), and never interprets bytes.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .errors import TransportError
from .transports import Address, Transport

__all__ = ["VisaTransport", "from_address", "DEFAULT_LIBRARY"]

#: The VISA library used unless the address says ``?library=...``: pyvisa-py, pure Python.
DEFAULT_LIBRARY = "@py"


def from_address(address: Address, *, name: str, options: Mapping[str, Any]) -> VisaTransport:
    """Build a closed :class:`VisaTransport` from a parsed ``visa://`` address (ConfigError if bad)."""
    address.reject_query(("library",))
    resource = address.target
    if "::" not in resource or not resource.split("::")[0]:
        raise address.error("visa:// needs a VISA resource string",
                            allowed="visa://TCPIP0::host::port::SOCKET, visa://TCPIP0::host::INSTR, ...")
    library = address.query.get("library", DEFAULT_LIBRARY)
    if not library:
        raise address.error("library must not be empty", allowed="@py, @ivi, or a path to a VISA library")
    return VisaTransport(address.text, name=name, resource=resource, library=library,
                         open_timeout_s=float(options.get("open_timeout_s", 3.0)))


class VisaTransport(Transport):
    """A message-based VISA resource opened by its explicit resource string."""

    def __init__(self, address: str, *, name: str, resource: str, library: str = DEFAULT_LIBRARY,
                 open_timeout_s: float = 3.0) -> None:
        super().__init__(address, name=name)
        self.resource = resource
        self.library = library
        self.open_timeout_s = open_timeout_s
        self._inst: Any = None
        self._termchar: int | None = None
        self._timeout_ms: int | None = None

    @property
    def is_open(self) -> bool:
        return self._inst is not None

    def open(self) -> None:
        if self._inst is not None:
            return
        try:
            import pyvisa
            from pyvisa import constants
        except ImportError as exc:
            raise TransportError("visa:// needs pyvisa (and pyvisa-py for @py)", instrument=self.name) from exc
        try:
            manager = pyvisa.ResourceManager(self.library)
            inst = manager.open_resource(self.resource, open_timeout=int(self.open_timeout_s * 1000))
        except Exception as exc:  # library-specific failures (missing library, bad resource, no connection)
            raise TransportError(f"cannot open VISA resource {self.resource} with {self.library}: {exc}",
                                 instrument=self.name) from exc
        try:
            inst.read_termination = None
            inst.write_termination = None
            inst.set_visa_attribute(constants.ResourceAttribute.suppress_end_enabled, constants.VI_FALSE)
            inst.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_FALSE)
        except Exception as exc:
            inst.close()
            raise TransportError(f"cannot configure VISA resource {self.resource}: {exc}",
                                 instrument=self.name) from exc
        self._termchar = None
        self._timeout_ms = None
        self._rx.clear()
        self._inst = inst

    def close(self) -> None:
        inst, self._inst = self._inst, None
        if inst is not None:
            try:
                inst.close()
            except Exception:  # close must never raise
                pass

    def write(self, data: bytes) -> None:
        self._require_open()
        from pyvisa.errors import VisaIOError

        try:
            self._inst.write_raw(bytes(data))
        except (OSError, VisaIOError) as exc:  # ConnectionRefusedError on the first write to a closed port
            raise TransportError(f"write to {self.resource} failed: {exc!r}", instrument=self.name) from exc

    def _set_termchar(self, byte: int | None) -> None:
        if self._inst is None or byte == self._termchar:
            return
        from pyvisa import constants

        if byte is None:
            self._inst.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_FALSE)
        else:
            self._inst.set_visa_attribute(constants.ResourceAttribute.termchar, byte)
            self._inst.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_TRUE)
        self._termchar = byte

    def _recv(self, max_bytes: int, timeout_s: float, terminator: bytes | None) -> bytes:
        from pyvisa import constants
        from pyvisa.errors import VisaIOError

        # With END reporting on, the library returns early only at the termination character, so waiting
        # for a line enables it (the terminator's last byte); the base checks the whole terminator.
        self._set_termchar(terminator[-1] if terminator else None)

        timeout_ms = max(1, int(timeout_s * 1000 + 0.5))
        try:
            if timeout_ms != self._timeout_ms:
                self._inst.timeout = timeout_ms
                self._timeout_ms = timeout_ms
            # A full chunk is normal here (the caller asked for at most max_bytes), not worth a warning.
            with self._inst.ignore_warning(constants.StatusCode.success_max_count_read):
                data, _status = self._inst.visalib.read(self._inst.session, max_bytes)
        except VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                return b""
            raise TransportError(f"read from {self.resource} failed: {exc}", instrument=self.name) from exc
        except OSError as exc:
            raise TransportError(f"read from {self.resource} failed: {exc!r}", instrument=self.name) from exc
        return bytes(data)
