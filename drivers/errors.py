"""The one exception hierarchy of shotpair.

Every error shotpair raises on purpose derives from :class:`ShotpairError`. The children say who is at
fault: the user's configuration, an instrument's reply, the transport to it, a timeout, an illegal state
change, or a client's message. Exceptions carry fields, not only text, so callers can act on them.
This module must not import anything from the rest of shotpair.
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "ShotpairError",
    "ConfigError",
    "InstrumentError",
    "InstrumentReplyError",
    "TransportError",
    "InstrumentTimeout",
    "LimitError",
    "StateError",
    "ProtocolError",
    "StorageError",
    "DaemonError",
    "DaemonUnavailable",
]


class ShotpairError(Exception):
    """Root of every error shotpair raises on purpose."""


class ConfigError(ShotpairError):
    """The user's configuration is wrong: names the file, the key path, the bad value and what is allowed."""

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        key_path: str | None = None,
        value: Any = None,
        allowed: str | None = None,
    ) -> None:
        self.file = file
        self.key_path = key_path
        self.value = value
        self.allowed = allowed
        self.message = message
        super().__init__(self.render())

    def render(self) -> str:
        where = self.file or "<config>"
        if self.key_path:
            where += f": {self.key_path}"
        text = f"{where}: {self.message}"
        if self.value is not None:
            text += f" (got {self.value!r})"
        if self.allowed:
            text += f"; allowed: {self.allowed}"
        return text


class InstrumentError(ShotpairError):
    """An instrument misbehaved or refused; ``instrument`` names it as the bench file does."""

    def __init__(self, message: str, *, instrument: str = "?") -> None:
        self.instrument = instrument
        self.message = message
        super().__init__(f"{instrument}: {message}")


class InstrumentReplyError(InstrumentError):
    """The instrument answered, but with an error or with something that cannot be parsed."""


class TransportError(InstrumentError):
    """Bytes could not be moved to or from the instrument (port missing, connection refused, closed)."""


class InstrumentTimeout(InstrumentError):
    """The instrument did not answer, or did not finish, within the allowed time."""

    def __init__(self, message: str, *, instrument: str = "?", timeout_s: float | None = None) -> None:
        self.timeout_s = timeout_s
        super().__init__(message, instrument=instrument)


class LimitError(InstrumentError):
    """A requested setting lies outside what the instrument or the bench file allows."""

    def __init__(self, message: str, *, instrument: str = "?", value: float, low: float, high: float) -> None:
        self.value = value
        self.low = low
        self.high = high
        super().__init__(f"{message}: {value!r} is outside [{low!r}, {high!r}]", instrument=instrument)


class StateError(ShotpairError):
    """A step that is illegal in the current state (of a run or of a device)."""

    def __init__(self, message: str, *, state: str, action: str) -> None:
        self.state = state
        self.action = action
        super().__init__(f"cannot {action} while {state}: {message}" if message else f"cannot {action} while {state}")


class ProtocolError(ShotpairError):
    """A client sent a message that does not follow the protocol."""

    def __init__(self, message: str, *, code: str = "bad_request") -> None:
        self.code = code
        super().__init__(message)


class StorageError(ShotpairError):
    """The output file cannot be created or written."""

    def __init__(self, message: str, *, path: str) -> None:
        self.path = path
        super().__init__(f"{path}: {message}")


class DaemonError(ShotpairError):
    """The daemon answered a control request with an error; ``code`` is the protocol's error code."""

    def __init__(self, message: str, *, code: str = "internal_error", endpoint: str = "") -> None:
        self.code = code
        self.endpoint = endpoint
        super().__init__(f"{endpoint}: {message}" if endpoint else message)


class DaemonUnavailable(DaemonError):
    """No daemon answered at the endpoint within the timeout."""

    def __init__(self, endpoint: str, timeout_s: float) -> None:
        self.timeout_s = timeout_s
        super().__init__(f"no shotpair daemon answered within {timeout_s:g} s (is `shotpair serve` running "
                         "there?)", code="unavailable", endpoint=endpoint)
