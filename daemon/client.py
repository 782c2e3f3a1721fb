"""Python client of the shotpair daemon: control calls with timeouts, and a data-stream subscriber.

Uses only the documented wire format (daemon/protocol.py, docs/protocol.md). Each object owns its socket
and closes it with linger 0. Not thread-safe: use one client per thread. With ``keys``
(:func:`shotpair.daemon.auth.load_client_keys`) the sockets are CURVE clients of an authenticating daemon.
"""

from __future__ import annotations

import itertools
import time
from typing import Any, Callable, Iterator, Sequence

import zmq

from shotpair.drivers.errors import DaemonError, DaemonUnavailable

from . import protocol
from .auth import ClientKeys, HandshakeWatch
from .protocol import Message

__all__ = ["ControlClient", "Subscriber", "DEFAULT_CONTROL", "DEFAULT_DATA"]

DEFAULT_DATA = "tcp://127.0.0.1:5561"
DEFAULT_CONTROL = "tcp://127.0.0.1:5562"


class ControlClient:
    """Request/reply control over a DEALER socket.

    Every call waits at most ``timeout_s`` and raises DaemonUnavailable when nothing answers, DaemonError
    (with the protocol's ``code``) when the daemon refuses. A late reply to an earlier, timed-out request
    is recognised by its ``id`` and discarded. A daemon refuses unknown keys without a word; the
    DaemonUnavailable message then says what the handshake showed (key refused, keys missing, wrong
    daemon key) from the socket's monitor events.
    """

    def __init__(self, endpoint: str = DEFAULT_CONTROL, timeout_s: float = 5.0,
                 context: zmq.Context[Any] | None = None, keys: ClientKeys | None = None) -> None:
        self.endpoint = endpoint
        self.timeout_s = timeout_s
        self.keys = keys
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.DEALER)
        self._sock.setsockopt(zmq.LINGER, 0)
        if keys is not None:
            keys.apply(self._sock)
        self._watch = HandshakeWatch(self._sock)
        self._sock.connect(endpoint)
        self._ids = itertools.count(1)

    def close(self) -> None:
        self._watch.close()
        self._sock.close(linger=0)

    def __enter__(self) -> "ControlClient":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def request(self, cmd: str, timeout_s: float | None = None, **args: Any) -> Message:
        """Send one command and return the decoded reply. Raises DaemonUnavailable or DaemonError."""
        request_id = next(self._ids)
        self._sock.send_multipart(protocol.encode_request(cmd, request_id, **args))
        deadline = time.monotonic() + (self.timeout_s if timeout_s is None else timeout_s)
        while True:
            left_ms = int(max(0.0, deadline - time.monotonic()) * 1000)
            if not self._sock.poll(left_ms, zmq.POLLIN):
                exc = DaemonUnavailable(self.endpoint, self.timeout_s if timeout_s is None else timeout_s)
                hint = self._watch.explain(self.keys)
                if hint:
                    exc.args = (f"{exc.args[0]}; {hint}",)
                raise exc
            reply = protocol.decode_reply(self._sock.recv_multipart())
            if reply.get("id") != request_id:
                continue  # a late answer to an earlier request
            if not reply["ok"]:
                err = reply.get("error") or {}
                raise DaemonError(str(err.get("message", "refused")), code=str(err.get("code", "internal_error")),
                                  endpoint=self.endpoint)
            return reply

    def status(self) -> dict[str, Any]:
        return self.request("status").header

    def status_record(self) -> Any:
        """The status as a typed :class:`~shotpair.daemon.records.StatusRecord`."""
        from .records import to_record

        return to_record(self.request("status"))

    def start(self, *, scan: dict[str, Any] | None = None, path: str | None = None,
              output: str | None = None) -> dict[str, Any]:
        args: dict[str, Any] = {}
        if scan is not None:
            args["scan"] = scan
        if path is not None:
            args["path"] = path
        if output is not None:
            args["output"] = output
        return self.request("start", **args).header

    def pause(self) -> dict[str, Any]:
        return self.request("pause").header

    def resume(self) -> dict[str, Any]:
        return self.request("resume").header

    def abort(self, reason: str | None = None) -> dict[str, Any]:
        return self.request("abort", **({"reason": reason} if reason else {})).header

    def snapshot(self) -> Message:
        return self.request("snapshot")

    def move(self, delay_ps: float) -> dict[str, Any]:
        return self.request("move", delay_ps=float(delay_ps)).header

    def shutdown(self) -> dict[str, Any]:
        return self.request("shutdown").header


class Subscriber:
    """Receives data-stream messages, decoded; counts the messages lost to gaps in ``seq``.

    ``topics``: the topics to receive (all when None). Mind the slow-joiner effect of PUB/SUB: messages
    published right after connecting may be missed; ask ``snapshot`` for the present state.
    """

    def __init__(self, endpoint: str = DEFAULT_DATA, topics: Sequence[str] | None = None,
                 context: zmq.Context[Any] | None = None, receive_hwm: int = 10_000,
                 receive_buffer_bytes: int | None = None, keys: ClientKeys | None = None) -> None:
        self.endpoint = endpoint
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.SUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        if keys is not None:  # a daemon that does not know the keys sends nothing: receive() times out
            keys.apply(self._sock)
        self._sock.setsockopt(zmq.RCVHWM, receive_hwm)
        if receive_buffer_bytes is not None:  # the kernel's TCP buffer; must be set before connecting
            self._sock.setsockopt(zmq.RCVBUF, receive_buffer_bytes)
        for topic in topics or [""]:
            self._sock.setsockopt(zmq.SUBSCRIBE, topic.encode("ascii"))
        self._sock.connect(endpoint)
        self._last_seq: int | None = None
        self.lost = 0
        self.topics = list(topics) if topics else None

    def close(self) -> None:
        self._sock.close(linger=0)

    def __enter__(self) -> "Subscriber":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def receive_record(self, timeout_s: float) -> Any:
        """The next message as a typed record (see daemon/records.py), or None on timeout."""
        from .records import to_record

        msg = self.receive(timeout_s)
        return None if msg is None else to_record(msg)

    def receive(self, timeout_s: float) -> Message | None:
        """The next message, or None if none arrives within ``timeout_s``. Raises ProtocolError if malformed."""
        if not self._sock.poll(int(timeout_s * 1000), zmq.POLLIN):
            return None
        msg = protocol.decode_data(self._sock.recv_multipart(copy=True))
        seq = int(msg["seq"])
        # with a topic filter, seq gaps are expected (other topics); count losses only unfiltered
        if self._last_seq is not None and self.topics is None and seq > self._last_seq + 1:
            self.lost += seq - self._last_seq - 1
        self._last_seq = seq
        return msg

    def __iter__(self) -> Iterator[Message]:
        while True:
            msg = self.receive(3600.0)
            if msg is not None:
                yield msg

    def run(self, callback: Callable[[Message], bool | None], timeout_s: float = 1.0,
            should_stop: Callable[[], bool] = lambda: False) -> None:
        """Call ``callback`` for each message until it returns True or ``should_stop()`` is true."""
        while not should_stop():
            msg = self.receive(timeout_s)
            if msg is not None and callback(msg):
                return
