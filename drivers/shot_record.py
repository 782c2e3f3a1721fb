"""The shot record a spectrometer sends for ``ACQuire:SHOTs? n`` (docs/instruments.md section 2): encode and
decode, both sides of one codec.

Pure functions over bytes and numpy arrays: the driver (scpi_devices.py) decodes, the wire simulators
(simulators/wire/devices.py) and tests encode. Nothing here touches a port; no per-shot Python loops.
"""

from __future__ import annotations

import struct

import numpy as np

from .base import ShotBlock
from .errors import InstrumentReplyError
from .scpi import DEFAULT_MAX_BLOCK_BYTES

__all__ = [
    "RECORD_MAGIC",
    "RECORD_HEADER_BYTES",
    "MAX_SHOTS_PER_BLOCK",
    "MAX_RECORD_BYTES",
    "record_bytes",
    "max_shots",
    "encode_shot_record",
    "encode_shot_block",
    "decode_shot_record",
]

RECORD_MAGIC = b"SPB1"
_RECORD_HEADER = struct.Struct("<4sIIII")  # magic, n, pixels, ref_width, flags
RECORD_HEADER_BYTES = _RECORD_HEADER.size
_FLAG_FOUR_STATE = 0x1
#: Most shots one ``acquire`` asks for (the simulated detector's limit too).
MAX_SHOTS_PER_BLOCK = 1_000_000
#: Largest shot record one ``acquire`` asks for, bytes (256 MiB: about 130 000 shots at 1024 pixels).
MAX_RECORD_BYTES = DEFAULT_MAX_BLOCK_BYTES


def record_bytes(n: int, pixels: int, ref_width: int) -> int:
    """Length of a shot record in bytes: 20 + 9 n + 2 n (pixels + ref_width)."""
    return RECORD_HEADER_BYTES + 9 * n + 2 * n * (pixels + ref_width)

def max_shots(pixels: int, ref_width: int) -> int:
    """Most shots one record may hold: :data:`MAX_SHOTS_PER_BLOCK`, or fewer to stay within
    :data:`MAX_RECORD_BYTES` (the largest block the driver's reader accepts)."""
    per_shot = 9 + 2 * (pixels + ref_width)
    return int(min(MAX_SHOTS_PER_BLOCK, (MAX_RECORD_BYTES - RECORD_HEADER_BYTES) // per_shot))


def encode_shot_record(frame_id: np.ndarray, state: np.ndarray, counts: np.ndarray,
                       reference: np.ndarray | None = None, *, four_state: bool = False) -> bytes:
    """The shot record of docs/instruments.md (the device side; for simulators and tests).

    ``frame_id`` (n,) integers, ``state`` (n,) bits (0: pump on, 1: probe on), ``counts`` (n, pixels) and
    ``reference`` (n, 0/1/pixels) raw counts (uint16 range). Raises ValueError for inconsistent shapes.
    """
    counts = np.asarray(counts)
    if counts.ndim != 2:
        raise ValueError(f"counts must be (n, pixels), got shape {counts.shape}")
    n, pixels = counts.shape
    ref = np.zeros((n, 0), dtype="<u2") if reference is None else np.asarray(reference)
    if ref.ndim != 2 or ref.shape[0] != n or ref.shape[1] not in (0, 1, pixels):
        raise ValueError(f"reference must be (n, 0, 1 or pixels), got {ref.shape} for counts {counts.shape}")
    frame_id, state = np.asarray(frame_id), np.asarray(state)
    if frame_id.shape != (n,) or state.shape != (n,):
        raise ValueError(f"frame_id and state must be ({n},), got {frame_id.shape} and {state.shape}")
    header = _RECORD_HEADER.pack(RECORD_MAGIC, n, pixels, ref.shape[1], _FLAG_FOUR_STATE if four_state else 0)
    return b"".join((header, frame_id.astype("<i8").tobytes(), state.astype(np.uint8).tobytes(),
                     counts.astype("<u2").tobytes(), ref.astype("<u2").tobytes()))


def _view(buf: memoryview, dtype: str, count: int, offset: int, native: type) -> np.ndarray:
    """A read-only view of the payload; copied only when it is unaligned or not native-endian.

    Unaligned uint16 costs numpy 25-80 % more in every later pass (measured: astype, max), more than the
    one copy; the frame counters (8 B each at offset 20) are never aligned and always copied (9 B/shot).
    """
    arr = np.frombuffer(buf, dtype=dtype, count=count, offset=offset)
    if not arr.flags.aligned or arr.dtype != np.dtype(native):
        arr = arr.astype(native)
    return arr


def decode_shot_record(payload: bytes | bytearray | memoryview, *, instrument: str = "detector",
                       pixels: int | None = None, ref_width: int | None = None,
                       max_shots: int | None = None) -> ShotBlock:
    """Decode a shot record (the payload of the ``ACQuire:SHOTs?`` block) into a :class:`ShotBlock`.

    ``counts`` and ``reference`` are views of ``payload`` (no copy unless unaligned); ``pump_on`` is state
    bit 0; ``probe_on`` is bit 1 when flags bit 0 (four-state mode) is set, else None; ``reference`` is None
    when ref_width is 0.

    Parameters
    ----------
    pixels, ref_width:
        When given, what the detector reported on connect: a record that disagrees is refused.
    max_shots:
        The shots asked for: a record may hold fewer (dropped frames), never more.

    Raises
    ------
    InstrumentReplyError
        Wrong magic, a length that is not 20 + 9 n + 2 n (pixels + ref_width), a ref_width other than
        0, 1 or pixels, reserved flag bits set, or a disagreement with the arguments above.
    """
    buf = memoryview(payload)
    size = buf.nbytes

    def bad(message: str) -> InstrumentReplyError:
        return InstrumentReplyError(f"bad shot record: {message}", instrument=instrument)

    if size < RECORD_HEADER_BYTES:
        raise bad(f"{size} bytes, shorter than its {RECORD_HEADER_BYTES}-byte header")
    magic, n, pix, refw, flags = _RECORD_HEADER.unpack_from(buf)
    if magic != RECORD_MAGIC:
        raise bad(f"magic {magic!r}, expected {RECORD_MAGIC!r}")
    if pix < 1:
        raise bad("0 pixels per spectrum")
    if pixels is not None and pix != pixels:
        raise bad(f"{pix} pixels per spectrum, the detector reported {pixels}")
    if refw not in (0, 1, pix):
        raise bad(f"reference width {refw}, expected 0, 1 or the pixel count {pix}")
    if ref_width is not None and refw != ref_width:
        raise bad(f"reference width {refw}, the detector reported {ref_width}")
    if flags & ~_FLAG_FOUR_STATE:
        raise bad(f"reserved flag bits set (flags {flags:#x})")
    expected = record_bytes(n, pix, refw)
    if size != expected:
        raise bad(f"{size} bytes, but n = {n}, pixels = {pix}, ref_width = {refw} need {expected}")
    if max_shots is not None and n > max_shots:
        raise bad(f"{n} shots, more than the {max_shots} asked for")
    offset = RECORD_HEADER_BYTES
    frame_id = _view(buf, "<i8", n, offset, np.int64)
    offset += 8 * n
    state = np.frombuffer(buf, dtype=np.uint8, count=n, offset=offset)
    offset += n
    counts = _view(buf, "<u2", n * pix, offset, np.uint16).reshape(n, pix)
    offset += 2 * n * pix
    reference = _view(buf, "<u2", n * refw, offset, np.uint16).reshape(n, refw) if refw else None
    probe_on = (state & 2) != 0 if flags & _FLAG_FOUR_STATE else None
    return ShotBlock(counts=counts, pump_on=(state & 1) != 0, frame_id=frame_id, reference=reference,
                     probe_on=probe_on)


def encode_shot_block(block: ShotBlock, *, four_state: bool) -> bytearray:
    """The ``SPB1`` record of a block as one definite-length block ``#<d><len><record>`` (no terminator).

    Built in one buffer with numpy views (one copy of each array, no per-shot loop). The state byte has
    bit 0 for pump on and bit 1 for probe on (always set when the probe is not chopped).

    Raises
    ------
    ValueError
        If the record would need more than nine length digits.
    """
    counts = block.counts
    n, pixels = counts.shape
    reference = block.reference
    ref_width = 0 if reference is None else int(reference.shape[1])
    length = record_bytes(n, pixels, ref_width)
    digits = str(length).encode("ascii")
    if len(digits) > 9:
        raise ValueError(f"a shot record of {length} bytes does not fit a definite-length block")
    head = b"#" + str(len(digits)).encode("ascii") + digits
    buf = bytearray(len(head) + length)
    buf[:len(head)] = head
    at = len(head)
    _RECORD_HEADER.pack_into(buf, at, RECORD_MAGIC, n, pixels, ref_width, 1 if four_state else 0)
    at += _RECORD_HEADER.size
    np.frombuffer(buf, dtype="<i8", count=n, offset=at)[:] = block.frame_id
    at += 8 * n
    state = np.frombuffer(buf, dtype=np.uint8, count=n, offset=at)
    state[:] = block.pump_on
    state |= 2 if block.probe_on is None else block.probe_on.astype(np.uint8) << 1
    at += n
    np.frombuffer(buf, dtype="<u2", count=n * pixels, offset=at).reshape(n, pixels)[:] = counts
    at += 2 * n * pixels
    if reference is not None:
        np.frombuffer(buf, dtype="<u2", count=n * ref_width, offset=at).reshape(n, ref_width)[:] = reference
    return buf
