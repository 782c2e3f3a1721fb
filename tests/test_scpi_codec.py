"""The SCPI / IEEE 488.2 codec (shotpair.drivers.scpi): tables of exact bytes, reader tables with every
split point, hypothesis round trips, and the fuzz invariant "the reader and the parsers raise
InstrumentReplyError and nothing else, ever".

Sources named beside each check: "REF" is /work/shared/REFERENCES.md, section "Instrument protocols"
(IEEE 488.2 common commands, SCPI error queue, definite-length arbitrary block §8.7.9). "DOC" marks a
choice documented in drivers/scpi.py rather than a fact of the standards.
Pure: no sockets, no threads, no sleeping.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shotpair.drivers.errors import InstrumentError, InstrumentReplyError, ProtocolError, ShotpairError
from shotpair.drivers.scpi import (NEED_DATA, ErrorClass, ErrorEntry, Identity, Mnemonic, ReplyReader, Resync,
                                   decode_block, encode_block, encode_command, error_class, format_argument,
                                   parse_bool, parse_error, parse_float, parse_idn, parse_int)

NAME = "detector"


def drain(reader: ReplyReader) -> list:
    """Every complete reply the reader holds now."""
    out = []
    while (reply := reader.next_reply()) is not NEED_DATA:
        out.append(reply)
    return out


def feed_in_pieces(pieces: list[bytes], **kwargs) -> list:
    reader = ReplyReader(NAME, **kwargs)
    out = []
    for piece in pieces:
        reader.feed(piece)
        out.extend(drain(reader))
    assert reader.buffered_bytes == 0
    return out


# --------------------------------------------------------------------------------------------- commands

COMMAND_TABLE = [
    # REF: IEEE 488.2 common commands, sent as their bare headers.
    (("*IDN?",), {}, b"*IDN?\n"),
    (("*RST",), {}, b"*RST\n"),
    (("*CLS",), {}, b"*CLS\n"),
    (("*OPC?",), {}, b"*OPC?\n"),
    (("*ESR?",), {}, b"*ESR?\n"),
    (("*STB?",), {}, b"*STB?\n"),
    (("*ESE", 32), {}, b"*ESE 32\n"),
    # REF: SCPI error queue query.
    (("SYSTem:ERRor?",), {}, b"SYSTem:ERRor?\n"),
    (("SYSTem:ERRor",), {"query": True}, b"SYSTem:ERRor?\n"),
    (("*IDN?",), {"query": True}, b"*IDN?\n"),  # DOC: query=True does not double the '?'
    (("*IDN",), {"query": True, "terminator": b"\r\n"}, b"*IDN?\r\n"),
    # DOC: argument formats (repr-exact floats, upper-case exponent; booleans 1/0; quoted strings).
    ((":SOURce:FREQuency", 1000.0), {}, b":SOURce:FREQuency 1000.0\n"),
    (("VOLT", 0.1), {}, b"VOLT 0.1\n"),
    (("VOLT", 1e-5), {}, b"VOLT 1E-05\n"),
    (("VOLT", -2.5e16), {}, b"VOLT -2.5E+16\n"),
    (("COUNt", -12), {}, b"COUNt -12\n"),
    (("OUTPut", True), {}, b"OUTPut 1\n"),
    (("OUTPut", False), {}, b"OUTPut 0\n"),
    (("TEXT", 'say "hi"'), {}, b'TEXT "say ""hi"""\n'),
    (("TEXT", ""), {}, b'TEXT ""\n'),
    (("VOLT", Mnemonic("MAXimum")), {}, b"VOLT MAXimum\n"),
    (("MEAS1:VOLT2", 1, 2.0, Mnemonic("DEF")), {"query": True}, b"MEAS1:VOLT2? 1,2.0,DEF\n"),
    # REF: definite-length block as program data: 3 bytes "ABC" -> #13ABC.
    (("DATA", b"ABC"), {}, b"DATA #13ABC\n"),
]


@pytest.mark.parametrize("args, kwargs, expected", COMMAND_TABLE)
def test_encode_command_exact_bytes(args, kwargs, expected):
    assert encode_command(*args, **kwargs) == expected


@pytest.mark.parametrize("header", ["", "IDN ?", "*IDN;*RST", "SYST::ERR", "SYST:ERR:", "1ABC", "*", "**IDN",
                                    "*IDN??", "VOLT\n", "ÄBC", "SYST:ERR? ", ":", "A B", "VOLT,1", 'A"'])
def test_encode_command_rejects_illegal_headers(header):
    # DOC: an illegal header is the calling code's mistake: ValueError, never an instrument error.
    with pytest.raises(ValueError, match="illegal SCPI header"):
        encode_command(header)


@pytest.mark.parametrize("value, error", [(math.nan, ValueError), (math.inf, ValueError), (-math.inf, ValueError),
                                          ("tab\there", ValueError), ("naïve", ValueError), (None, TypeError),
                                          ([1, 2], TypeError), (1j, TypeError)])
def test_format_argument_refuses(value, error):
    with pytest.raises(error):
        format_argument(value)


def test_mnemonic_and_terminator_validation():
    with pytest.raises(ValueError):
        Mnemonic("MAX MIN")
    with pytest.raises(ValueError):
        encode_command("*RST", terminator=b"")
    with pytest.raises(ValueError):
        ReplyReader(NAME, terminator=b"")


@given(st.floats(allow_nan=False, allow_infinity=False))
def test_float_argument_round_trips_exactly(x):
    # DOC: repr-exact floats: the instrument (here parse_float) reads back the very same double.
    assert parse_float(format_argument(x).decode("ascii")) == x


# --------------------------------------------------------------------------------------------- blocks

BLOCK_TABLE = [
    (b"ABC", b"#13ABC"),  # REF: 3 bytes "ABC" -> #13ABC
    (b"", b"#10"),
    (b"\n\n", b"#12\n\n"),
    (bytes(range(10)), b"#210" + bytes(range(10))),
    (b"x" * 1000, b"#41000" + b"x" * 1000),  # REF: 1000 bytes -> #41000 + data
]


@pytest.mark.parametrize("data, expected", BLOCK_TABLE)
def test_encode_block_exact_bytes(data, expected):
    assert encode_block(data) == expected
    assert decode_block(expected) == data


def test_reference_1000_byte_block_header():
    # REF: '#', one digit n (=4), n digits of byte count ("1000"), then the bytes.
    block = encode_block(bytes(1000))
    assert block[:6] == b"#41000" and len(block) == 1006


@pytest.mark.parametrize("bad", [b"", b"#", b"#0", b"ABC", b"#A3ABC", b"#13AB", b"#13ABCD", b"#2x3ABC", b"#33ABC"])
def test_decode_block_rejects_malformed(bad):
    with pytest.raises(InstrumentReplyError) as info:
        decode_block(bad, instrument=NAME)
    assert info.value.instrument == NAME


# --------------------------------------------------------------------------------------------- reader

# A stream of replies, how the instrument sent them, and what the reader must return.
READER_TABLE = [
    (b"1\n", ["1"]),  # REF: *OPC? returns "1"
    (b'0,"No error"\n', ['0,"No error"']),  # REF: empty error queue
    (b"Maker,Model 1,SN42,1.0\n", ["Maker,Model 1,SN42,1.0"]),
    (b"\n", [""]),  # an empty text reply is still a reply
    (b"#13ABC\n", [b"ABC"]),  # REF: block "ABC"
    (b"#13A\nC\n", [b"A\nC"]),  # LIBRARY-NOTES: a block holding 0x0A is read by length, not by terminator
    (b"#12\n\n\n", [b"\n\n"]),
    (b"#10\n", [b""]),
    (b"#0raw bytes\n", [b"raw bytes"]),  # DOC: indefinite block runs to the terminator
    (b"#0\n", [b""]),
    (b"#HFF\n", ["#HFF"]),  # DOC: '#' + letter is a non-decimal number, i.e. text
    (b"#\n", ["#"]),
    (b"1\n2.5E+00\n", ["1", "2.5E+00"]),  # two replies in one feed
    (b"#13\n\n\n\n+1\n#0xy\n", [b"\n\n\n", "+1", b"xy"]),
    (b"#41000" + bytes(range(256)) * 3 + bytes(232) + b"\n", [bytes(range(256)) * 3 + bytes(232)]),  # REF
]


@pytest.mark.parametrize("stream, expected", READER_TABLE)
def test_reader_whole_feed(stream, expected):
    assert feed_in_pieces([stream]) == expected


@pytest.mark.parametrize("stream, expected", [row for row in READER_TABLE if len(row[0]) < 100])
def test_reader_split_at_every_byte_boundary(stream, expected):
    for cut in range(len(stream) + 1):
        assert feed_in_pieces([stream[:cut], stream[cut:]]) == expected, cut


@pytest.mark.parametrize("stream, expected", [row for row in READER_TABLE if len(row[0]) < 100])
def test_reader_one_byte_at_a_time(stream, expected):
    assert feed_in_pieces([stream[i:i + 1] for i in range(len(stream))]) == expected


def test_reader_needs_the_terminator_after_a_block():
    # A block is complete only with its terminator; until then the reader asks for more.
    reader = ReplyReader(NAME)
    reader.feed(b"#13ABC")
    assert reader.next_reply() is NEED_DATA
    reader.feed(b"\n")
    assert reader.next_reply() == b"ABC"
    assert reader.next_reply() is NEED_DATA


def test_reader_crlf_terminator():
    assert feed_in_pieces([b"1\r\n#12\r\n\r\n#0a\rb\r\n"], terminator=b"\r\n") == ["1", b"\r\n", b"a\rb"]


GARBAGE = [
    (b"#13ABCD\n", "not followed by the terminator"),  # block longer than announced
    (b"#15ABC\nXY\n", "not followed by the terminator"),  # shorter than announced
    (b"#2A3ABC\n", "length field"),
    (b"#3 12\n", "length field"),
    (b"caf\xc3\xa9\n", "non-ASCII"),
    (b"\xff\xfe\n", "non-ASCII"),
    (b"1\x002\n", "control characters"),
    (b"1.0\r\n", "carriage return"),  # instrument ends lines with CR LF, reader set for LF
    (b"#9999999999", "more than the limit"),
]


@pytest.mark.parametrize("stream, message", GARBAGE)
def test_reader_garbage_is_the_instruments_fault(stream, message):
    reader = ReplyReader(NAME)
    reader.feed(stream)
    with pytest.raises(InstrumentReplyError, match=message) as info:
        reader.next_reply()
    assert info.value.instrument == NAME
    assert not isinstance(info.value, ProtocolError)


def test_reader_stops_after_garbage_until_reset():
    reader = ReplyReader(NAME)
    reader.feed(b"\xff\n1\n")
    with pytest.raises(InstrumentReplyError):
        reader.next_reply()
    assert reader.stopped
    with pytest.raises(InstrumentReplyError, match="reset"):
        reader.next_reply()  # "1" is buffered but the stream position is no longer trusted
    assert reader.reset() == 2
    assert not reader.stopped and reader.buffered_bytes == 0
    reader.feed(b"2\n")
    assert reader.next_reply() == "2"


def test_reader_limits_bound_the_buffer():
    reader = ReplyReader(NAME, max_text_bytes=8, max_block_bytes=4)
    reader.feed(b"12345678")
    assert reader.next_reply() is NEED_DATA  # at the limit, still waiting
    reader.feed(b"9")
    with pytest.raises(InstrumentReplyError, match="longer than 8"):
        reader.next_reply()
    reader.reset()
    reader.feed(b"#15ABCDE\n")
    with pytest.raises(InstrumentReplyError, match="limit of 4"):
        reader.next_reply()
    reader.reset()
    reader.feed(b"#0ABCDE")
    with pytest.raises(InstrumentReplyError, match="longer than 4"):
        reader.next_reply()


def test_reader_text_scan_is_incremental():
    # A long text reply arriving in many pieces is found once its terminator arrives, also when the
    # terminator is split between two feeds.
    reader = ReplyReader(NAME, terminator=b"\r\n")
    for _ in range(1000):
        reader.feed(b"1.0,")
        assert reader.next_reply() is NEED_DATA
    reader.feed(b"2\r")
    assert reader.next_reply() is NEED_DATA
    reader.feed(b"\n")
    assert reader.next_reply() == "1.0," * 1000 + "2"


# --------------------------------------------------------------------------------------------- properties

text_replies = st.text(alphabet=st.characters(min_codepoint=0x20, max_codepoint=0x7E), max_size=40)
replies = st.one_of(text_replies.filter(lambda t: not (t.startswith("#") and t[1:2].isdigit())),
                    st.binary(max_size=300))


def wire(reply) -> bytes:
    return encode_block(reply) + b"\n" if isinstance(reply, bytes) else reply.encode("ascii") + b"\n"


def split(stream: bytes, cuts: list[int]) -> list[bytes]:
    points = sorted({c % (len(stream) + 1) for c in cuts})
    return [stream[a:b] for a, b in zip([0, *points], [*points, len(stream)])]


@given(st.binary(max_size=2000), st.lists(st.integers(min_value=0), max_size=10))
def test_block_round_trip_any_bytes_any_split(data, cuts):
    # REF: definite-length block; content never matters, 0x0A and '#' included.
    assert feed_in_pieces(split(encode_block(data) + b"\n", cuts)) == [data]


@given(st.lists(replies, max_size=8), st.lists(st.integers(min_value=0), max_size=12))
def test_reply_sequence_round_trip_any_split(sequence, cuts):
    stream = b"".join(wire(r) for r in sequence)
    assert feed_in_pieces(split(stream, cuts)) == sequence


@settings(max_examples=500)
@given(st.lists(st.binary(max_size=64), max_size=12))
def test_fuzz_reader_only_instrument_reply_error(chunks):
    # Invariant: arbitrary bytes give replies, NEED_DATA or InstrumentReplyError, never IndexError,
    # ValueError, UnicodeDecodeError...
    check_only_reply_errors(chunks)


def check_only_reply_errors(chunks: list[bytes]) -> None:
    reader = ReplyReader(NAME, max_block_bytes=10_000)
    for chunk in chunks:
        reader.feed(chunk)
        try:
            for reply in drain(reader):
                assert isinstance(reply, (str, bytes))
        except InstrumentReplyError as exc:
            assert exc.instrument == NAME
            reader.reset()


@settings(max_examples=300)
@given(st.lists(st.sampled_from([b"#", b"0", b"1", b"3", b"9", b"\n", b"\r", b"A", b"\xff", b",", b'"']),
                max_size=40))
def test_fuzz_reader_with_protocol_alphabet(tokens):
    # Same invariant with bytes chosen to hit the block-header paths far more often than random bytes.
    check_only_reply_errors([b"".join(tokens)])


# --------------------------------------------------------------------------------------------- resync


def test_resync_drains_the_late_reply():
    # LIBRARY-NOTES: after a timeout the late reply arrives; it must never be taken for the next one.
    reader = ReplyReader(NAME)
    resync = Resync(reader)
    reader.feed(b"+1.2")  # part of the reply to the query that timed out
    marker = resync.begin()
    assert marker == b"*OPC?;*OPC?\n"  # REF: *OPC? only; *OPC? returns "1", so the reply is "1;1"
    assert not resync.poll()
    reader.feed(b"5E-03\n1;")
    assert not resync.poll()
    reader.feed(b"1\n")
    assert resync.poll()
    assert resync.discarded == ["+1.25E-03"]
    reader.feed(b"42\n")
    assert reader.next_reply() == "42"  # the next query gets its own reply


def test_resync_markers_rotate_so_an_old_marker_is_not_taken_for_the_new():
    reader = ReplyReader(NAME)
    resync = Resync(reader, cycle=3)
    assert [resync.begin() for _ in range(4)] == [b"*OPC?;*OPC?\n", b"*OPC?;*OPC?;*OPC?\n",
                                                  b"*OPC?;*OPC?;*OPC?;*OPC?\n", b"*OPC?;*OPC?\n"]
    resync.begin()  # expects "1;1;1"
    reader.feed(b"1;1\n#12\n\n\n1;1;1\n")  # late reply to the previous marker, a late block, then ours
    assert resync.poll()
    assert resync.discarded == ["1;1", b"\n\n"]


def test_resync_survives_garbage():
    reader = ReplyReader(NAME)
    resync = Resync(reader)
    resync.begin()
    reader.feed(b"\xff\xff\n")
    assert not resync.poll()
    assert len(resync.errors) == 1 and resync.errors[0].instrument == NAME
    reader.feed(b"1;1\n")
    assert resync.poll()


def test_resync_poll_before_begin_is_a_programming_error():
    with pytest.raises(RuntimeError):
        Resync(ReplyReader(NAME)).poll()


# --------------------------------------------------------------------------------------------- parsers


@pytest.mark.parametrize("text, expected", [
    # REF: *IDN? has four comma-separated fields: manufacturer, model, serial, firmware.
    ("Maker,Model 7,SN001,1.02", Identity("Maker", "Model 7", "SN001", "1.02")),
    ("Maker, Model 7 ,0,0\n", Identity("Maker", "Model 7", "0", "0")),
    ("A,B,,", Identity("A", "B", "", "")),
])
def test_parse_idn(text, expected):
    assert parse_idn(text) == expected


@pytest.mark.parametrize("junk", ["", "Maker,Model,SN", "A,B,C,D,E", ",Model,1,2", "Maker,,1,2", b"A,B,C,D"])
def test_parse_idn_junk(junk):
    with pytest.raises(InstrumentReplyError, match=r"\*IDN\?") as info:
        parse_idn(junk, instrument=NAME)
    assert info.value.instrument == NAME


@pytest.mark.parametrize("text, expected", [
    ('0,"No error"', (0, "No error")),  # REF
    ('-113,"Undefined header"', (-113, "Undefined header")),  # REF
    ('-113, "Undefined header;FOO:BAR"', (-113, "Undefined header;FOO:BAR")),
    ('+201,"Device says ""hot"""', (201, 'Device says "hot"')),
    (' -222 ,""', (-222, "")),
])
def test_parse_error(text, expected):
    entry = parse_error(text)
    assert entry == expected and isinstance(entry, ErrorEntry) and isinstance(entry.code, int)


@pytest.mark.parametrize("junk", ["", "No error", "0", '0,No error', '"No error",0', '1.5,"x"', '0,"a"b"',
                                  '0,"unterminated', "-113;\"Undefined header\""])
def test_parse_error_junk(junk):
    with pytest.raises(InstrumentReplyError, match="SYSTem:ERRor"):
        parse_error(junk, instrument=NAME)


@pytest.mark.parametrize("code, expected", [
    (0, ErrorClass.NO_ERROR),  # REF: 0 = "No error"
    (-100, ErrorClass.COMMAND), (-113, ErrorClass.COMMAND), (-199, ErrorClass.COMMAND),  # REF: -1xx command
    (-200, ErrorClass.EXECUTION), (-222, ErrorClass.EXECUTION),  # REF: -2xx execution
    (-300, ErrorClass.DEVICE_SPECIFIC), (-350, ErrorClass.DEVICE_SPECIFIC),  # REF: -3xx device-specific
    (-400, ErrorClass.QUERY), (-499, ErrorClass.QUERY),  # REF: -4xx query [from memory]
    (-99, ErrorClass.OTHER_STANDARD), (-500, ErrorClass.OTHER_STANDARD), (-1, ErrorClass.OTHER_STANDARD),
    (1, ErrorClass.DEVICE_DEFINED), (2000, ErrorClass.DEVICE_DEFINED),  # REF: positive device-defined
])
def test_error_class(code, expected):
    assert error_class(code) is expected


@pytest.mark.parametrize("text, expected", [("1", True), ("0", False), (" 1\n", True), ("ON", True),
                                            ("off", False)])
def test_parse_bool(text, expected):
    assert parse_bool(text) is expected


@pytest.mark.parametrize("text, expected", [("1", 1), ("+7", 7), ("-12", -12), ("007", 7), ("#HFF", 255),
                                            ("#hff", 255), ("#Q17", 15), ("#B101", 5)])
def test_parse_int(text, expected):
    assert parse_int(text) == expected


@pytest.mark.parametrize("text, expected", [("12", 12.0), ("1.5", 1.5), ("-1.5E-03", -1.5e-3), ("+.5", 0.5),
                                            ("5.", 5.0), ("2e3", 2000.0), ("9.9E37", 9.9e37)])
def test_parse_float(text, expected):
    assert parse_float(text) == expected


JUNK_NUMBERS = ["", "abc", "1 0", "1,0", "--1", "1e", "E3", ".", "0x10", "1_0", "١", "½"]


@pytest.mark.parametrize("parse, junk", [(parse_bool, j) for j in ["2", "1.0", "TRUE", "yes", ""]]
                         + [(parse_int, j) for j in [*JUNK_NUMBERS, "1.0", "1E3", "#HXY", "#B102", "#Q8"]]
                         + [(parse_float, j) for j in [*JUNK_NUMBERS, "nan", "inf", "-Infinity", "1E999",
                                                       b"1.0"]])
def test_parse_numbers_junk(parse, junk):
    with pytest.raises(InstrumentReplyError) as info:
        parse(junk, instrument=NAME)
    assert info.value.instrument == NAME


@given(st.integers(min_value=-(10**6), max_value=10**6), st.text(max_size=30).filter(str.isascii))
def test_parse_error_round_trip(code, message):
    text = f'{code},"{message.replace(chr(34), chr(34) * 2)}"'
    assert parse_error(text) == (code, message)


@given(st.integers())
def test_parse_int_round_trip(n):
    assert parse_int(format_argument(n).decode("ascii")) == n


@settings(max_examples=300)
@given(st.one_of(st.text(max_size=30), st.binary(max_size=30), st.none(), st.integers()))
def test_fuzz_parsers_only_instrument_reply_error(junk):
    for parse in (parse_idn, parse_error, parse_bool, parse_int, parse_float):
        try:
            parse(junk, instrument=NAME)
        except InstrumentReplyError as exc:
            assert exc.instrument == NAME


def test_errors_belong_to_the_one_hierarchy():
    assert issubclass(InstrumentReplyError, InstrumentError) and issubclass(InstrumentReplyError, ShotpairError)
