"""The wire format shared by the daemon and its clients: encode and decode messages, no sockets.

Data stream (PUB): multipart ``[topic, header, array frames...]``. The topic is ASCII; the header is a
JSON object with at least ``v`` (protocol version), ``seq`` (+1 per message on the socket), ``scan_id``,
``kind`` (= topic), ``time`` (Unix s) and ``arrays``: a list of ``{name, dtype, shape}`` describing the
raw frames that follow, in order. Arrays are C-contiguous, little-endian (dtype strings like ``"<f8"``).
Control (ROUTER/DEALER): a request is one frame, a JSON object with ``cmd`` and an optional ``id``; a
reply is ``[header, array frames...]`` with ``ok`` and the same ``arrays`` convention. docs/protocol.md
is the full specification; keep the two in step. Pickle never crosses the wire.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from shotpair.drivers.errors import ProtocolError

__all__ = [
    "PROTOCOL_VERSION",
    "TOPICS",
    "ERROR_CODES",
    "Message",
    "encode_arrays",
    "decode_arrays",
    "encode_data",
    "decode_data",
    "encode_request",
    "decode_request",
    "nesting_depth",
    "loads_json",
    "encode_reply",
    "encode_error",
    "decode_reply",
]

#: Bumped when a message changes incompatibly; new fields may be added without a bump.
PROTOCOL_VERSION = 1
TOPICS = ("status", "block", "point", "sweep", "scan", "log")
ERROR_CODES = ("bad_request", "unknown_command", "bad_argument", "illegal_state", "config_error",
               "instrument_error", "storage_error", "internal_error", "forbidden")
_ALLOWED_KINDS = "biuf"  # bool, signed, unsigned, float: no objects, no strings on the wire
MAX_HEADER_BYTES = 1 << 20
#: Deepest nesting of arrays and objects a request may have (RFC 8259 section 9 lets a parser limit it):
#: a scan table needs 5; far deeper ones could not even be echoed back without exhausting the stack.
MAX_REQUEST_DEPTH = 32


@dataclass(frozen=True)
class Message:
    """A decoded message: its topic (data stream) or None (control reply), header and named arrays."""

    topic: str | None
    header: dict[str, Any]
    arrays: dict[str, np.ndarray] = field(default_factory=dict)

    def __getitem__(self, key: str) -> Any:
        return self.header[key]

    def get(self, key: str, default: Any = None) -> Any:
        return self.header.get(key, default)


def _jsonable(value: Any) -> Any:
    """JSON-safe copy: numpy scalars to Python, NaN/inf to None (JSON has no NaN)."""
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _dumps(obj: Mapping[str, Any]) -> bytes:
    try:  # the common case: plain Python values, all finite (about 3x faster than cleaning first)
        return json.dumps(obj, separators=(",", ":"), allow_nan=False).encode("utf-8")
    except (TypeError, ValueError):  # numpy scalars, NaN or inf somewhere
        return json.dumps(_jsonable(obj), separators=(",", ":"), allow_nan=False).encode("utf-8")


def encode_arrays(arrays: Mapping[str, np.ndarray]) -> tuple[list[dict[str, Any]], list[bytes | memoryview]]:
    """Descriptions and little-endian, C-contiguous buffers of named arrays, in order."""
    specs: list[dict[str, Any]] = []
    frames: list[bytes | memoryview] = []
    for name, arr in arrays.items():
        a = np.asarray(arr)
        if a.dtype.kind not in _ALLOWED_KINDS:
            raise ProtocolError(f"array {name!r} has dtype {a.dtype}, not a plain number type", code="internal_error")
        a = np.asarray(a, dtype=a.dtype.newbyteorder("<") if a.dtype.byteorder == ">" else a.dtype, order="C")
        specs.append({"name": str(name), "dtype": a.dtype.str, "shape": list(a.shape)})
        frames.append(memoryview(a).cast("B") if a.size else b"")
    return specs, frames


def decode_arrays(specs: Any, frames: Sequence[bytes | memoryview]) -> dict[str, np.ndarray]:
    """Arrays from their descriptions and frames. Raises ProtocolError if they do not match."""
    if not isinstance(specs, list) or len(specs) != len(frames):
        raise ProtocolError(f"header lists {len(specs) if isinstance(specs, list) else '?'} arrays, "
                            f"{len(frames)} frames follow")
    out: dict[str, np.ndarray] = {}
    for spec, frame in zip(specs, frames):
        # Exactly the types docs/protocol.md section 2.2 gives: a string name, a type string, a list of
        # integers (no 1.5 read as 1, no "12" read as [1, 2], no true read as 1).
        if not (isinstance(spec, dict) and isinstance(spec.get("name"), str) and isinstance(spec.get("dtype"), str)
                and isinstance(spec.get("shape"), list)
                and all(isinstance(s, int) and not isinstance(s, bool) for s in spec["shape"])):
            raise ProtocolError(f"bad array description {_clip(spec)}: needs a string 'name', a type string "
                                "'dtype' and a list of integers 'shape'")
        name, shape = spec["name"], tuple(spec["shape"])
        try:
            dtype = np.dtype(spec["dtype"])
        except (TypeError, ValueError, OverflowError, RecursionError) as exc:
            raise ProtocolError(f"array {_clip(name)}: bad dtype {_clip(spec['dtype'])} ({_clip(exc, 80)})") from None
        if dtype.kind not in _ALLOWED_KINDS or any(s < 0 for s in shape):
            raise ProtocolError(f"array {_clip(name)}: dtype {_clip(dtype.str)} or shape {_clip(shape)} not allowed")
        buf = memoryview(frame).cast("B")
        expected = math.prod(shape) * dtype.itemsize
        if buf.nbytes != expected:
            raise ProtocolError(f"array {_clip(name)}: {buf.nbytes} bytes for shape {_clip(shape)} {dtype.str} "
                                f"({_clip(expected)})")
        try:
            out[name] = np.frombuffer(buf, dtype=dtype).reshape(shape)
        except ValueError as exc:  # e.g. more dimensions than numpy holds, or a zero-size shape of huge sides
            raise ProtocolError(f"array {_clip(name)}: shape {_clip(shape)} cannot be held: {exc}") from None
    return out


def _clip(value: Any, limit: int = 120) -> str:
    """A repr for an error message, cut short: a bad header may hold a megabyte in one field."""
    try:
        text = repr(value)
    except (ValueError, RecursionError):  # an int beyond str()'s digit limit, or nested too deeply
        return f"<a {type(value).__name__} too large to show>"
    return text if len(text) <= limit else text[:limit] + "..."


def _no_constant(name: str) -> Any:
    raise ValueError(f"{name} is not JSON (RFC 8259 section 6: numbers are finite)")


def loads_json(data: bytes) -> Any:
    """Parse JSON as RFC 8259 defines it: UTF-8 text (no other encoding guessed), no NaN or Infinity literals.

    Raises ValueError (UnicodeDecodeError, json.JSONDecodeError) or RecursionError.
    """
    return json.loads(data.decode("utf-8"), parse_constant=_no_constant)


def _header(raw: bytes | memoryview, max_bytes: int = MAX_HEADER_BYTES) -> dict[str, Any]:
    if memoryview(raw).nbytes > max_bytes:  # measured before anything is copied or parsed
        raise ProtocolError(f"header of {memoryview(raw).nbytes} bytes is larger than the limit of {max_bytes} bytes")
    try:
        obj = loads_json(bytes(raw))
    except (ValueError, RecursionError) as exc:  # UnicodeDecodeError and JSONDecodeError are ValueErrors
        raise ProtocolError(f"header is not UTF-8 JSON: {exc}") from None
    if not isinstance(obj, dict):
        raise ProtocolError("header is not a JSON object")
    return obj


def encode_data(topic: str, seq: int, scan_id: str | None, time_s: float, fields: Mapping[str, Any] | None = None,
                arrays: Mapping[str, np.ndarray] | None = None) -> list[bytes | memoryview]:
    """Frames of one data-stream message."""
    if topic not in TOPICS:
        raise ProtocolError(f"unknown topic {topic!r}", code="internal_error")
    specs, frames = encode_arrays(arrays or {})
    header = {"v": PROTOCOL_VERSION, "seq": int(seq), "scan_id": scan_id, "kind": topic, "time": float(time_s),
              **(fields or {}), "arrays": specs}
    return [topic.encode("ascii"), _dumps(header), *frames]


def decode_data(frames: Sequence[bytes | memoryview]) -> Message:
    """A data-stream message from its frames. Raises ProtocolError if malformed or of another version."""
    if len(frames) < 2:
        raise ProtocolError(f"a data message has at least 2 frames, got {len(frames)}")
    try:
        topic = bytes(frames[0]).decode("ascii")
    except UnicodeDecodeError:
        raise ProtocolError("topic is not ASCII") from None
    header = _header(frames[1])
    if header.get("v") != PROTOCOL_VERSION:
        raise ProtocolError(f"protocol version {header.get('v')!r}, this client speaks {PROTOCOL_VERSION}")
    for key in ("seq", "kind", "arrays"):
        if key not in header:
            raise ProtocolError(f"header has no {key!r}")
    return Message(topic, header, decode_arrays(header["arrays"], frames[2:]))


def encode_request(cmd: str, request_id: Any = None, **args: Any) -> list[bytes]:
    """The one frame of a control request."""
    body = {"cmd": cmd, **args}
    if request_id is not None:
        body["id"] = request_id
    return [_dumps(body)]


def nesting_depth(obj: Any, limit: int) -> int:
    """How deeply arrays and objects nest in a decoded JSON value (a scalar is 0), counted up to ``limit + 1``
    at most, level by level (no recursion, whatever the value; a few ms for a list of 200 000 numbers)."""
    depth = 0
    level = [obj] if isinstance(obj, (dict, list)) else []
    while level:
        depth += 1
        if depth > limit:
            return depth
        below: list[Any] = []
        for node in level:
            children = node.values() if isinstance(node, dict) else node
            kinds = set(map(type, children))  # in C: a long list of numbers costs no Python-level loop
            if list in kinds or dict in kinds:
                below.extend([c for c in children if type(c) is list or type(c) is dict])
        level = below
    return depth


def decode_request(frames: Sequence[bytes | memoryview], max_bytes: int = MAX_HEADER_BYTES) -> dict[str, Any]:
    """A control request. Raises ProtocolError (code bad_request) if it is not one JSON object with ``cmd``,
    if it is longer than ``max_bytes`` (checked before parsing) or nests deeper than :data:`MAX_REQUEST_DEPTH`."""
    if len(frames) != 1:
        raise ProtocolError(f"a request is one frame, got {len(frames)}")
    body = _header(frames[0], max_bytes)
    if nesting_depth(body, MAX_REQUEST_DEPTH) > MAX_REQUEST_DEPTH:
        raise ProtocolError(f"request nests arrays and objects deeper than {MAX_REQUEST_DEPTH} levels")
    if not isinstance(body.get("cmd"), str):
        raise ProtocolError("request has no string 'cmd'")
    return body


def encode_reply(request_id: Any = None, arrays: Mapping[str, np.ndarray] | None = None,
                 **fields: Any) -> list[bytes | memoryview]:
    """Frames of a successful reply: ``ok`` true, the request's ``id``, fields and arrays."""
    specs, frames = encode_arrays(arrays or {})
    header = {"v": PROTOCOL_VERSION, "ok": True, "id": request_id, **fields, "arrays": specs}
    return [_dumps(header), *frames]


def encode_error(code: str, message: str, request_id: Any = None, **fields: Any) -> list[bytes]:
    """The frame of an error reply: ``ok`` false, ``error`` {code, message}."""
    if code not in ERROR_CODES:
        code = "internal_error"
    header = {"v": PROTOCOL_VERSION, "ok": False, "id": request_id, "error": {"code": code, "message": message},
              **fields, "arrays": []}
    return [_dumps(header)]


def decode_reply(frames: Sequence[bytes | memoryview]) -> Message:
    """A control reply. Raises ProtocolError if malformed."""
    if not frames:
        raise ProtocolError("empty reply")
    header = _header(frames[0])
    if "ok" not in header:
        raise ProtocolError("reply has no 'ok'")
    return Message(None, header, decode_arrays(header.get("arrays", []), frames[1:]))
