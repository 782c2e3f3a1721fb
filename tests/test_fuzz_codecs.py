"""Fuzzing the codecs that read bytes from outside: whatever an instrument or a client sends, only the
project's own error types come out (InstrumentReplyError, ConfigError for a bench file's templates,
ProtocolError for the wire protocol), never IndexError, ValueError, struct.error, UnicodeError,
LookupError, RecursionError...

Covered: SCPI replies through ReplyReader into every ``parse_*`` (the path a driver takes) and
``decode_block``; shot records (random, and valid ones mutated field by field); the ASCII template codec
(any encoding name, random templates and patterns, random reply lines); and the wire protocol's decoders
(JSON headers with unbounded numbers, deep nesting, wrong member types). tests/test_scpi_codec.py,
tests/test_scpi_devices.py and tests/test_protocol.py hold the byte-exact tables these complement.
"""

from __future__ import annotations

import json
import math
import struct
from typing import Any, Callable

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shotpair.daemon import protocol
from shotpair.daemon.protocol import decode_arrays, decode_data, decode_reply, decode_request
from shotpair.drivers.ascii_template import OPERATIONS, compile_commands
from shotpair.drivers.errors import ConfigError, InstrumentReplyError, ProtocolError
from shotpair.drivers.scpi import (NEED_DATA, ReplyReader, Resync, decode_block, parse_bool, parse_error,
                                   parse_float, parse_idn, parse_int)
from shotpair.drivers.shot_record import RECORD_HEADER_BYTES, RECORD_MAGIC, decode_shot_record, encode_shot_record

NAME = "detector"
FUZZ = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
PARSERS: list[Callable[..., Any]] = [parse_idn, parse_error, parse_bool, parse_int, parse_float]

# --------------------------------------------------------------------------------------- SCPI

# Bytes a reply is made of, weighted towards what steers the reader (IEEE 488.2 section 8.7.9-8.7.10: '#',
# a digit for the length of the length, digits, the terminator) and the parsers (signs, exponents, quotes).
_TOKENS = st.sampled_from([b"#", b"0", b"1", b"9", b"5", b"\n", b"\r\n", b"\r", b"-", b"+", b".", b"E", b",", b'"',
                           b"#H", b"#Q", b"#B", b"F", b" ", b"\t", b"ON", b"\xff", b"\x00", b"1" * 5000,
                           b"9" * 400, b"nan", b"inf"])
_CHUNKS = st.lists(st.one_of(st.binary(max_size=40), st.lists(_TOKENS, max_size=12).map(b"".join)), max_size=8)


def _read_and_parse(chunks: list[bytes], terminator: bytes) -> int:
    """Feed chunks to a reader, give every text reply to every parser; returns how many replies came."""
    reader = ReplyReader(NAME, terminator=terminator, max_text_bytes=8192, max_block_bytes=8192)
    replies = 0
    for chunk in chunks:
        reader.feed(chunk)
        while True:
            try:
                reply = reader.next_reply()
            except InstrumentReplyError as exc:
                assert exc.instrument == NAME
                reader.reset()
                break
            if reply is NEED_DATA:
                break
            replies += 1
            assert isinstance(reply, (str, bytes))
            for parse in PARSERS:
                try:
                    parse(reply, instrument=NAME)
                except InstrumentReplyError as exc:
                    assert exc.instrument == NAME
    return replies


@FUZZ
@given(chunks=_CHUNKS, terminator=st.sampled_from([b"\n", b"\r\n", b"\r", b";\n"]))
def test_scpi_replies_through_reader_and_parsers(chunks, terminator):
    _read_and_parse(chunks, terminator)


@FUZZ
@given(st.one_of(st.binary(max_size=40), st.lists(_TOKENS, max_size=10).map(b"".join)))
def test_decode_block_only_reply_errors(data):
    try:
        payload = decode_block(data, instrument=NAME)
    except InstrumentReplyError as exc:
        assert exc.instrument == NAME
    else:
        assert data.endswith(payload)


@FUZZ
@given(chunks=_CHUNKS, cycle=st.integers(1, 4))
def test_resync_drains_any_bytes(chunks, cycle):
    # Draining after a timeout meets whatever the instrument sends: bad bytes are kept as errors, not raised.
    resync = Resync(ReplyReader(NAME, max_text_bytes=4096, max_block_bytes=4096), cycle=cycle)
    resync.begin()
    for chunk in chunks:
        resync.reader.feed(chunk)
        assert resync.poll() in (True, False)
    assert all(isinstance(e, InstrumentReplyError) for e in resync.errors)


@pytest.mark.parametrize("parse, text", [
    # Python's int() refuses more than 4300 digits with ValueError (the int_max_str_digits guard)
    (parse_int, "1" * 5000), (parse_int, "-" + "9" * 4301), (parse_error, "1" * 5000 + ',"x"'),
    # a hex integer that long parses, but its value can no longer be shown in a message (str() refuses it)
    (parse_int, "#H" + "F" * 4000),
])
def test_integers_too_long_are_reply_errors(parse, text):
    with pytest.raises(InstrumentReplyError) as info:
        parse(text, instrument=NAME)
    assert info.value.instrument == NAME and len(str(info.value)) < 200


# --------------------------------------------------------------------------------------- shot records


def _valid_record(draw: st.DrawFn) -> tuple[bytes, int, int]:
    n = draw(st.integers(0, 5))
    pixels = draw(st.integers(1, 6))
    ref_width = draw(st.sampled_from([0, 1, pixels]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    counts = rng.integers(0, 65536, (n, pixels), dtype=np.uint16)
    reference = rng.integers(0, 65536, (n, ref_width), dtype=np.uint16) if ref_width else None
    record = encode_shot_record(np.arange(n) + draw(st.integers(-(2**40), 2**40)), rng.integers(0, 4, n), counts,
                                reference, four_state=draw(st.booleans()))
    return record, pixels, ref_width


_U32 = st.one_of(st.sampled_from([0, 1, 2, 3, 0x7FFFFFFF, 0xFFFFFFFF]), st.integers(0, 2**32 - 1))


@st.composite
def mutated_record(draw: st.DrawFn) -> tuple[bytes, int, int]:
    record, pixels, ref_width = _valid_record(draw)
    data = bytearray(record)
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["field", "flip", "cut", "grow", "magic"]))
        if op == "field":  # one of n, pixels, ref_width, flags (docs/instruments.md, section 2)
            at = 4 + 4 * draw(st.integers(0, 3))
            if len(data) >= at + 4:
                struct.pack_into("<I", data, at, draw(_U32))
        elif op == "flip" and data:
            at = draw(st.integers(0, len(data) - 1))
            data[at] ^= 1 << draw(st.integers(0, 7))
        elif op == "cut":
            del data[draw(st.integers(0, len(data))):]
        elif op == "grow":
            data += draw(st.binary(min_size=1, max_size=16))
        elif op == "magic":
            data[0:4] = draw(st.binary(min_size=4, max_size=4))
    return bytes(data), pixels, ref_width


@FUZZ
@given(st.one_of(st.binary(max_size=120).map(lambda b: (b, 4, 0)), mutated_record()),
       st.booleans(), st.one_of(st.none(), st.integers(0, 6)))
def test_shot_records_only_reply_errors(case, expect_shape, max_shots):
    payload, pixels, ref_width = case
    kwargs = {"pixels": pixels, "ref_width": ref_width} if expect_shape else {}
    try:
        block = decode_shot_record(payload, instrument=NAME, max_shots=max_shots, **kwargs)
    except InstrumentReplyError as exc:
        assert exc.instrument == NAME
    else:  # what is accepted is self-consistent
        n = block.n_shots
        assert block.counts.shape == (n, block.pixels) and block.pump_on.shape == (n,)
        assert len(payload) == RECORD_HEADER_BYTES + 9 * n + 2 * n * (block.pixels + (
            0 if block.reference is None else block.reference.shape[1]))
        assert payload[:4] == RECORD_MAGIC and (max_shots is None or n <= max_shots)


@FUZZ
@given(st.data())
def test_valid_shot_records_decode(data):
    record, pixels, ref_width = _valid_record(data.draw)
    block = decode_shot_record(record, pixels=pixels, ref_width=ref_width)
    assert block.pixels == pixels and (block.reference is None) == (ref_width == 0)


# --------------------------------------------------------------------------------------- ASCII templates

SHUTTER = {"open": {"send": "OPEN", "reply": "OK"}, "close": {"send": "SHUT", "reply": "OK"},
           "query_open": {"send": "SHUTTER?", "reply": "SHUTTER (?P<open>OPEN|SHUT)", "true_values": ["OPEN"]}}
STAGE = {"move_absolute": {"send": "GO {position_mm:.4f}", "reply": "OK"},
         "query_position": {"send": "WHERE", "reply": "AT (?P<position_mm>.*)"},
         "query_moving": {"send": "BUSY?", "reply": "BUSY (?P<moving>.*)", "true_values": ["YES"],
                          "false_values": ["NO"]},
         "home": {"send": "HOME", "reply": ""}, "query_homed": {"send": "H?", "reply": "(?P<homed>.)",
                                                               "true_values": ["1"]},
         "stop": {"send": "HALT", "reply": "OK"},
         "query_limits": {"send": "RANGE?", "reply": "(?P<low_mm>\\S*) (?P<high_mm>\\S*)"}}

# Every name a bench file might put in `encoding`, including codecs that are not text encodings at all.
ENCODINGS = ["ascii", "latin-1", "utf-8", "utf-16", "utf-32", "utf-7", "cp037", "idna", "punycode",
             "unicode_escape", "raw_unicode_escape", "rot13", "base64", "hex", "zlib", "bz2", "uu", "undefined",
             "quopri", "no-such-codec", "", "UTF8"]


@FUZZ
@given(encoding=st.sampled_from(ENCODINGS) | st.text(max_size=8), terminator=st.sampled_from(["\r\n", "\n", "", "é"]),
       send=st.text(max_size=12), reply=st.text(max_size=12), error=st.none() | st.text(max_size=16))
def test_compile_commands_only_config_errors(encoding, terminator, send, reply, error):
    commands = {**SHUTTER, "open": {"send": send, "reply": reply}}
    try:
        compile_commands("shutter", commands, instrument="shutter", key_path="bench.shutter.options", error=error,
                         encoding=encoding, write_terminator=terminator)
    except ConfigError as exc:
        assert exc.key_path.startswith("bench.shutter.options")


_LINES = st.one_of(st.binary(max_size=30), st.text(max_size=30),
                   st.sampled_from([b"AT 1" + b"0" * 400, b"AT nan", b"AT 1e999", b"BUSY MAYBE", b"ERR 7 hot",
                                    b"\xff\xfe", b"xn--", b"-" * 70, b"\\x", b"+AGE-", b"AT ", b" ", b""]))


@FUZZ
@given(encoding=st.sampled_from([e for e in ENCODINGS if e not in ("rot13", "base64", "hex", "zlib", "bz2", "uu",
                                                                      "undefined", "quopri", "no-such-codec", "")]),
       op=st.sampled_from(sorted(STAGE)), line=_LINES)
def test_template_replies_only_reply_errors(encoding, op, line):
    commands = compile_commands("delay_axis", STAGE, instrument="stage", key_path="bench.delay_axis.options",
                                error="ERR (?P<code>[0-9]+) (?P<message>.*)", encoding=encoding)
    try:
        values = commands.parse(op, line, sent="x")
    except InstrumentReplyError as exc:  # ControllerReplyError included
        assert exc.instrument == "stage"
    else:
        for name, value in values.items():
            assert name in OPERATIONS["delay_axis"][op].group_names
            assert not isinstance(value, float) or math.isfinite(value)


@pytest.mark.parametrize("encoding", ["rot13", "base64", "zlib", "undefined", "a\x00b"])
def test_codecs_that_are_not_text_encodings_are_config_errors(encoding):
    # str.encode refuses binary codecs with LookupError, the codec "undefined" with UnicodeError, and
    # codecs.lookup a name with a NUL (TOML can write "\u0000") with ValueError: all escaped from
    # compile_commands (and so from `shotpair check` on a bench file).
    with pytest.raises(ConfigError) as info:
        compile_commands("shutter", SHUTTER, instrument="shutter", key_path="bench.shutter.options",
                         encoding=encoding)
    assert info.value.key_path in ("bench.shutter.options.encoding", "bench.shutter.options.write_terminator")


@pytest.mark.parametrize("encoding, line", [("idna", b"xn--"), ("punycode", b"OK")])
def test_replies_that_break_a_codec_are_reply_errors(encoding, line):
    # idna and punycode raise a plain UnicodeError (not UnicodeDecodeError) for what they cannot decode.
    commands = compile_commands("shutter", SHUTTER, instrument="shutter", key_path="bench.shutter.options",
                                encoding=encoding)
    with pytest.raises(InstrumentReplyError, match=f"is not {encoding} text"):
        commands.parse("query_open", line)


# --------------------------------------------------------------------------------------- wire protocol

_NUMBER = st.one_of(st.integers(), st.sampled_from([10**400, -(10**400), 2**64, -1, 0, 1.5, 1e308, -0.0]),
                    st.floats(allow_nan=False, allow_infinity=False))
_SCALAR = st.one_of(st.none(), st.booleans(), _NUMBER, st.text(max_size=8),
                    st.sampled_from(["<f8", ">i4", "|b1", "O", "<U3", "c8", "f8,f8", "(2,)i4", "M8", "V8", "12",
                                     "point", "status"]))
_JSON = st.recursive(_SCALAR, lambda c: st.lists(c, max_size=4) | st.dictionaries(
    st.sampled_from(["name", "dtype", "shape", "v", "ok", "cmd", "id", "seq", "kind", "arrays", "x"]), c,
    max_size=4), max_leaves=14)
_SPEC = st.fixed_dictionaries({}, optional={"name": _JSON, "dtype": _JSON,
                                            "shape": st.lists(_NUMBER | _SCALAR, max_size=70) | _JSON})


def _deep(depth: int) -> str:
    return "[" * depth + "]" * depth


@st.composite
def header_frames(draw: st.DrawFn) -> list[bytes]:
    header = draw(st.dictionaries(st.sampled_from(["v", "ok", "cmd", "id", "seq", "kind", "x"]), _JSON, max_size=5))
    specs = draw(st.lists(_SPEC, max_size=3) | _JSON)
    header = {"v": 1, "ok": True, "seq": 0, "kind": "point", "cmd": "status", **header, "arrays": specs}
    text = json.dumps(header)
    if draw(st.integers(0, 6)) == 0:
        text = text[:-1] + ', "deep": ' + _deep(draw(st.sampled_from([31, 32, 33, 500, 985, 2000]))) + "}"
    frames = draw(st.lists(st.binary(max_size=24), max_size=3))
    n = len(specs) if isinstance(specs, list) else 0
    if draw(st.booleans()):  # as many frames as descriptions, to get past the count check
        frames = (frames * 4)[:n] if frames else [b""] * n
    return [text.encode("utf-8", "surrogatepass"), *frames]


def only_protocol_errors(frames: list[bytes]) -> None:
    for decode in (decode_request, decode_reply, lambda f: decode_data([b"point", *f])):
        try:
            decode(frames)
        except ProtocolError as exc:
            assert len(str(exc)) < 2000, len(str(exc))  # a bad header may be large; the message is not


@FUZZ
@given(header_frames())
def test_protocol_headers_only_protocol_errors(frames):
    only_protocol_errors(frames)


@FUZZ
@given(st.lists(st.binary(max_size=48) | st.sampled_from([b"NaN", b"[1e400]", b'{"a":Infinity}', b"\xef\xbb\xbf{}",
                                                           '{"cmd":"x"}'.encode("utf-16")]), max_size=4))
def test_protocol_random_frames_only_protocol_errors(frames):
    only_protocol_errors(frames)


@pytest.mark.parametrize("spec", [
    # read leniently before: 1.5 as 1, "12" as [1, 2], true as 1, a missing dtype as float64
    {"name": "a", "dtype": "|u1", "shape": [1.5]},
    {"name": "a", "dtype": "|u1", "shape": "12"},
    {"name": "a", "dtype": "|u1", "shape": [True]},
    {"name": "a", "dtype": None, "shape": [1]},
    {"name": {"not": "a name"}, "dtype": "|u1", "shape": [1]},
])
def test_array_descriptions_of_the_wrong_types_are_refused(spec):
    with pytest.raises(ProtocolError):
        decode_arrays([spec], [b"\x00" * 8])


def test_messages_about_huge_descriptions_stay_short():
    # A header of a megabyte made the error message a megabyte too (the whole description was quoted).
    spec = {"name": "a" * 100_000, "dtype": "f8," * 100_000, "shape": [1]}
    with pytest.raises(ProtocolError) as info:
        decode_arrays([spec], [b"\x00" * 8])
    assert len(str(info.value)) < 1000


@pytest.mark.parametrize("frame, words", [
    (b'{"cmd":"status","x":NaN}', "not JSON"),  # RFC 8259 section 6: no NaN or Infinity
    ('{"cmd":"status"}'.encode("utf-16"), "not UTF-8"),  # RFC 8259 section 8.1: UTF-8 only
    (('{"cmd":"status","x":' + _deep(40) + "}").encode(), "deeper than 32"),
])
def test_requests_outside_rfc_json_or_too_deep_are_refused(frame, words):
    with pytest.raises(ProtocolError, match=words):
        decode_request([frame])


def test_request_size_limit_is_checked_before_parsing():
    frame = b"{" + b" " * 2000 + b"}"  # not even JSON, and never parsed
    with pytest.raises(ProtocolError, match="larger than the limit of 1024 bytes"):
        decode_request([frame], max_bytes=1024)
    assert decode_request([b'{"cmd":"status"' + b" " * 900 + b"}"], max_bytes=1024) == {"cmd": "status"}


@given(st.recursive(st.integers(0, 3), lambda c: st.lists(c, max_size=3) | st.dictionaries(st.text(max_size=2), c,
                                                                                             max_size=3), max_leaves=20))
def test_nesting_depth_matches_a_recursive_count(value):
    def depth(v: Any) -> int:
        if isinstance(v, dict):
            return 1 + max((depth(x) for x in v.values()), default=0)
        if isinstance(v, list):
            return 1 + max((depth(x) for x in v), default=0)
        return 0

    assert protocol.nesting_depth(value, 1000) == depth(value)
    assert protocol.nesting_depth(value, 1) == min(depth(value), 2)
