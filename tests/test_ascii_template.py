"""The ASCII template codec: exact bytes out, values in, config errors with key paths, and properties.

Tables of exact bytes for commands and replies (the example controller's command set, from
simulators/wire/serial_controller.py, plus variants); a table of bench-file mistakes with the key path each
must name; property tests that formatting then matching round-trips numbers within the format's precision
(checked against Python's own ``format`` and ``float``), and that the reply parser raises nothing but
InstrumentReplyError on arbitrary bytes and text.
"""

from __future__ import annotations

import copy
import math
import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shotpair.drivers.ascii_template import (
    OPERATIONS,
    ControllerReplyError,
    Template,
    compile_commands,
    parse_number,
)
from shotpair.drivers.errors import ConfigError, InstrumentReplyError
from shotpair.simulators.wire.serial_controller import bench_options

KEY = "bench.stage.options"
KINDS = ("delay_axis", "chopper", "shutter")


def example(kind: str) -> dict:
    """The example controller's options for a kind (a fresh copy to mutate)."""
    return copy.deepcopy(bench_options(kind, "/dev/ttyUSB0"))


def compile_kind(kind: str, options: dict | None = None, **overrides):
    opts = options if options is not None else example(kind)
    opts.update(overrides)
    return compile_commands(kind, opts["commands"], instrument="stage", key_path=KEY, error=opts.get("error"),
                            identity=opts.get("identity"), encoding=opts.get("encoding", "ascii"),
                            write_terminator=opts.get("write_terminator", "\r\n"))


POS = {"position_mm": 12.5, "position_units": 12500.0}

# (kind, operation, values, exact bytes sent)
ENCODE_TABLE = [
    ("delay_axis", "move_absolute", POS, b"GO 12.5000\r\n"),
    ("delay_axis", "move_absolute", {"position_mm": -0.00004, "position_units": 0.0}, b"GO -0.0000\r\n"),
    ("delay_axis", "query_position", {}, b"WHERE\r\n"),
    ("delay_axis", "query_moving", {}, b"BUSY?\r\n"),
    ("delay_axis", "home", {}, b"HOME\r\n"),
    ("delay_axis", "query_homed", {}, b"HOMED?\r\n"),
    ("delay_axis", "stop", {}, b"HALT\r\n"),
    ("delay_axis", "query_limits", {}, b"RANGE?\r\n"),
    ("chopper", "set_frequency", {"frequency_hz": 500.0}, b"SPIN 500.000\r\n"),
    ("chopper", "set_frequency", {"frequency_hz": 499.9996}, b"SPIN 500.000\r\n"),
    ("chopper", "set_phase", {"phase_deg": 359.5}, b"PHASE 359.500\r\n"),
    ("chopper", "query_locked", {}, b"LOCK?\r\n"),
    ("shutter", "open", {}, b"OPEN\r\n"),
    ("shutter", "close", {}, b"SHUT\r\n"),
    ("shutter", "query_open", {}, b"SHUTTER?\r\n"),
]


@pytest.mark.parametrize("kind, op, values, expected", ENCODE_TABLE)
def test_encode_exact_bytes(kind: str, op: str, values: dict, expected: bytes) -> None:
    assert compile_kind(kind).encode(op, values) == expected


# (send template, values, exact bytes with write terminator "\n")
TEMPLATE_TABLE = [
    ("MOVE {position_units:d}", {"position_units": 12345.5}, b"MOVE 12346\n"),  # round() halves to even...
    ("MOVE {position_units:d}", {"position_units": 12344.5}, b"MOVE 12344\n"),  # ...as Python's round does
    ("MOVE {position_units:+08d}", {"position_units": -42.0}, b"MOVE -0000042\n"),
    ("MOVE {position_units:X}", {"position_units": 255.0}, b"MOVE FF\n"),
    ("MA{position_mm:.3e}", {"position_mm": 0.0125}, b"MA1.250e-02\n"),
    ("{{P}} {position_mm:g}", {"position_mm": 1e-7}, b"{P} 1e-07\n"),
    ("P={position_mm:>9.2f};", {"position_mm": 3.14159}, b"P=     3.14;\n"),
    ("P {position_mm}", {"position_mm": 0.1}, b"P 0.1\n"),
    ("P {position_mm:.0%}", {"position_mm": 0.5}, b"P 50%\n"),
]


@pytest.mark.parametrize("send, values, expected", TEMPLATE_TABLE)
def test_template_variants(send: str, values: dict, expected: bytes) -> None:
    opts = example("delay_axis")
    opts["commands"]["move_absolute"]["send"] = send
    cs = compile_kind("delay_axis", opts, write_terminator="\n")
    full = {"position_mm": 0.0, "position_units": 0.0, **values}
    assert cs.encode("move_absolute", full) == expected


# (kind, operation, reply line, parsed values)
PARSE_TABLE = [
    ("delay_axis", "query_position", b"AT 12.5000", {"position_mm": 12.5}),
    ("delay_axis", "query_position", b"AT -0.0001", {"position_mm": -0.0001}),
    ("delay_axis", "query_position", b"AT 1.5e+02", {"position_mm": 150.0}),
    ("delay_axis", "query_moving", b"BUSY YES", {"moving": True}),
    ("delay_axis", "query_moving", b"BUSY NO", {"moving": False}),
    ("delay_axis", "query_homed", b"HOMED YES", {"homed": True}),
    ("delay_axis", "query_limits", b"RANGE 0.0000 150.0000", {"low_mm": 0.0, "high_mm": 150.0}),
    ("delay_axis", "move_absolute", b"OK", {}),
    ("delay_axis", "identity", b"ID example-controller stage EX-1001 fw 1.0",
     {"identity": "example-controller stage EX-1001 fw 1.0"}),
    ("chopper", "query_frequency", b"SPIN 500.000", {"frequency_hz": 500.0}),
    ("chopper", "query_phase", b"PHASE 90.250", {"phase_deg": 90.25}),
    ("chopper", "query_locked", b"LOCK NO", {"locked": False}),
    ("shutter", "query_open", b"SHUTTER OPEN", {"open": True}),
    ("shutter", "query_open", b"SHUTTER SHUT", {"open": False}),
]


@pytest.mark.parametrize("kind, op, line, expected", PARSE_TABLE)
def test_parse_exact_lines(kind: str, op: str, line: bytes, expected: dict) -> None:
    values = compile_kind(kind).parse(op, line, sent="X")
    assert values == expected
    assert all(type(values[k]) is type(expected[k]) for k in expected)


def test_identity_without_group_is_the_whole_line_and_fixed_identity() -> None:
    cs = compile_kind("shutter", identity={"send": "WHO?", "reply": "ID .+"})
    assert cs.parse("identity", b"ID shutter 7") == {"identity": "ID shutter 7"}
    fixed = compile_kind("shutter", identity="home-built shutter, bench 2")
    assert fixed.fixed_identity == "home-built shutter, bench 2" and not fixed.has("identity")


@pytest.mark.parametrize("line, code, text", [
    (b"ERR 20 value out of range 999.0 not in [0.0, 150.0]", "20", "value out of range 999.0 not in [0.0, 150.0]"),
    (b"ERR 10 unknown command FOO", "10", "unknown command FOO"),
    (b"ERR 7 ", "7", ""),
])
def test_error_reply_becomes_controller_reply_error(line: bytes, code: str, text: str) -> None:
    cs = compile_kind("delay_axis")
    with pytest.raises(ControllerReplyError) as info:
        cs.parse("move_absolute", line, sent="GO 999.0000")
    err = info.value
    assert isinstance(err, InstrumentReplyError)
    assert (err.code, err.text, err.operation, err.command, err.reply) == (code, text, "move_absolute",
                                                                          "GO 999.0000", line.decode())
    assert err.instrument == "stage" and "GO 999.0000" in str(err) and f"error {code}" in str(err)


def test_error_pattern_without_code_group() -> None:
    cs = compile_kind("shutter", error=r"\?(?P<message>.*)")
    with pytest.raises(ControllerReplyError) as info:
        cs.parse("open", "?jammed")
    assert (info.value.code, info.value.text) == ("", "jammed")


@pytest.mark.parametrize("op, line, fragment", [
    ("query_position", b"AT twelve", "does not match bench.stage.options.commands.query_position.reply"),
    ("query_position", b"AT 1.2.3", "'1.2.3' is not a decimal number"),
    ("query_position", b"AT 1e999", "out of the range of a float"),
    ("query_position", b"at 12.5", "got 'at 12.5'"),  # patterns are case-sensitive (Python re)
    ("query_position", b"AT 12.5 ", "does not match"),  # fullmatch: a trailing space is not ignored
    ("query_moving", b"BUSY MAYBE", "does not match"),
    ("move_absolute", b"OK?", "does not match"),
    ("query_position", b"AT \xff", "is not ascii text"),
])
def test_bad_replies_name_operation_command_pattern_and_text(op: str, line: bytes, fragment: str) -> None:
    cs = compile_kind("delay_axis")
    with pytest.raises(InstrumentReplyError) as info:
        cs.parse(op, line, sent="WHERE")
    assert not isinstance(info.value, ControllerReplyError)
    message = str(info.value)
    assert fragment in message and message.startswith("stage: ") and "WHERE" in message


def test_false_values_make_unknown_flag_texts_errors() -> None:
    opts = example("delay_axis")
    opts["commands"]["query_homed"] = {"send": "H?", "reply": "(?P<homed>.)", "true_values": ["1"],
                                       "false_values": ["0"]}
    cs = compile_kind("delay_axis", opts)
    assert cs.parse("query_homed", "1") == {"homed": True}
    assert cs.parse("query_homed", "0") == {"homed": False}
    with pytest.raises(InstrumentReplyError, match="in neither true_values"):
        cs.parse("query_homed", "?")
    # Without false_values, anything that is not a true value is False.
    assert compile_kind("delay_axis").parse("query_homed", "HOMED NO") == {"homed": False}


def test_optional_group_that_matched_nothing_is_a_reply_error() -> None:
    opts = example("delay_axis")
    opts["commands"]["query_position"]["reply"] = r"AT ?(?P<position_mm>[0-9.]+)?"
    with pytest.raises(InstrumentReplyError, match="matched nothing"):
        compile_kind("delay_axis", opts).parse("query_position", "AT")


def test_units_alternative_and_query_done() -> None:
    opts = example("delay_axis")
    opts["commands"]["query_position"]["reply"] = r"AT (?P<position_units>-?[0-9]+)"
    opts["commands"]["query_limits"]["reply"] = r"(?P<low_units>[0-9]+),(?P<high_units>[0-9]+)"
    del opts["commands"]["query_moving"]
    opts["commands"]["query_done"] = {"send": "DONE?", "reply": "(?P<done>[01])", "true_values": ["1"]}
    cs = compile_kind("delay_axis", opts)
    assert cs.parse("query_position", "AT -250") == {"position_units": -250.0}
    assert cs.parse("query_limits", "0,150000") == {"low_units": 0.0, "high_units": 150000.0}
    assert cs.parse("query_done", "1") == {"done": True} and cs.encode("query_done") == b"DONE?\r\n"


@pytest.mark.parametrize("value, error", [(math.nan, ValueError), (math.inf, ValueError), (-math.inf, ValueError),
                                          (True, TypeError), ("12", TypeError)])
def test_non_finite_or_non_numbers_are_refused_before_formatting(value: object, error: type) -> None:
    cs = compile_kind("delay_axis")
    with pytest.raises(error):
        cs.encode("move_absolute", {"position_mm": value, "position_units": 1.0})


def test_missing_value_and_unconfigured_operation() -> None:
    cs = compile_kind("delay_axis")
    with pytest.raises(ValueError, match="needs a value for 'position_mm'"):
        cs.encode("move_absolute", {})
    with pytest.raises(KeyError, match="query_done"):
        cs.encode("query_done")


def test_terminator_in_a_rendered_value_is_refused() -> None:
    opts = example("delay_axis")
    opts["commands"]["move_absolute"]["send"] = "GO {position_mm:\n>12.3f}"  # fill character "\n"
    cs = compile_kind("delay_axis", opts, write_terminator="\n")
    with pytest.raises(ValueError, match="contains the write terminator"):
        cs.encode("move_absolute", POS)


# -- configuration mistakes: (mutation of the example delay-axis options, key path, text in the message)


def _set(path: str, value: object):
    def apply(opts: dict) -> None:
        *head, last = path.split(".")
        node = opts
        for part in head:
            node = node[part]
        if value is _DELETE:
            del node[last]
        else:
            node[last] = value
    return apply


_DELETE = object()
C = "bench.stage.options.commands"

CONFIG_ERRORS = [
    (_set("commands.move_absolute.send", "GO {target_mm:.4f}"), f"{C}.move_absolute.send",
     "unknown template field {target_mm}"),
    (_set("commands.query_position.send", "WHERE {position_mm}"), f"{C}.query_position.send",
     "unknown template field {position_mm}"),
    (_set("commands.move_absolute.send", "GO {}"), f"{C}.move_absolute.send", "must be a plain name"),
    (_set("commands.move_absolute.send", "GO {0}"), f"{C}.move_absolute.send", "must be a plain name"),
    (_set("commands.move_absolute.send", "GO {position_mm.real}"), f"{C}.move_absolute.send", "plain name"),
    (_set("commands.move_absolute.send", "GO {position_mm!r}"), f"{C}.move_absolute.send", "conversions"),
    (_set("commands.move_absolute.send", "GO {position_mm:{w}}"), f"{C}.move_absolute.send", "nested"),
    (_set("commands.move_absolute.send", "GO {position_mm:.4q}"), f"{C}.move_absolute.send", "bad format spec"),
    (_set("commands.move_absolute.send", "GO {position_mm:s}"), f"{C}.move_absolute.send", "not for numbers"),
    (_set("commands.move_absolute.send", "GO {position_mm"), f"{C}.move_absolute.send", "syntax error"),
    (_set("commands.move_absolute.send", "GO } {position_mm}"), f"{C}.move_absolute.send", "syntax error"),
    (_set("commands.move_absolute.send", "  "), f"{C}.move_absolute.send", "non-empty"),
    (_set("commands.move_absolute.send", "GO\r\n{position_mm}"), f"{C}.move_absolute.send",
     "contains the write terminator"),
    (_set("commands.move_absolute.send", "GO→{position_mm}"), f"{C}.move_absolute.send", "cannot encode"),
    (_set("commands.query_position.reply", "AT (?P<position_mm>[0-9.+"), f"{C}.query_position.reply",
     "not a valid regular expression"),
    (_set("commands.query_position.reply", r"AT (?P<pos>\S+)"), f"{C}.query_position.reply",
     "does not read"),
    (_set("commands.query_position.reply", r"AT (\S+)"), f"{C}.query_position.reply", "lacks the group"),
    (_set("commands.query_position.reply", ""), f"{C}.query_position.reply", "cannot be empty"),
    (_set("commands.query_position.reply", r"(?P<position_mm>\S+) (?P<position_units>\S+)"),
     f"{C}.query_position.reply", "two alternatives"),
    (_set("commands.query_limits.reply", r"(?P<low_mm>\S+) (?P<high_units>\S+)"), f"{C}.query_limits.reply",
     "part of a group set"),
    (_set("commands.move_absolute.reply", "OK (?P<position_mm>.*)"), f"{C}.move_absolute.reply", "does not read"),
    (_set("commands.query_moving.true_values", _DELETE), f"{C}.query_moving.true_values", "needs true_values"),
    (_set("commands.query_moving.true_values", []), f"{C}.query_moving.true_values", "non-empty list"),
    (_set("commands.query_moving.true_values", "YES"), f"{C}.query_moving.true_values", "non-empty list"),
    (_set("commands.query_moving.false_values", ["YES", "NO"]), f"{C}.query_moving.false_values", "both"),
    (_set("commands.query_position.true_values", ["1"]), f"{C}.query_position.true_values",
     "allowed: send, reply"),
    (_set("commands.home.wait", 1), f"{C}.home.wait", "unknown key"),
    (_set("commands.home.reply", _DELETE), f"{C}.home.reply", "required key is missing"),
    (_set("commands.home", "HOME"), f"{C}.home", "table with send and reply"),
    (_set("commands.move_relative", {"send": "GOBY 1", "reply": "OK"}), f"{C}.move_relative",
     "unknown operation"),
    (_set("commands.query_homed", _DELETE), f"{C}.query_homed", "required operation is missing"),
    (_set("commands.query_moving", _DELETE), C, "exactly one of query_moving or query_done"),
    (_set("commands.query_done", {"send": "D?", "reply": "(?P<done>1|0)", "true_values": ["1"]}), C,
     "exactly one of"),
    (_set("error", "ERR (?P<code>[0-9]+)"), "bench.stage.options.error", "(?P<message>...)"),
    (_set("error", "ERR (?P<code>[0-9]+) (?P<message>.*) (?P<extra>.)"), "bench.stage.options.error",
     "unknown group(s) extra"),
    (_set("error", "ERR ("), "bench.stage.options.error", "not a valid regular expression"),
    (_set("identity", {"send": "WHO?", "reply": "(?P<name>.*)"}), "bench.stage.options.identity.reply",
     "does not read"),
    (_set("identity", {"send": "WHO? {position_mm}", "reply": ".*"}), "bench.stage.options.identity.send",
     "unknown template field"),
    (_set("identity", " "), "bench.stage.options.identity", "non-empty"),
    (_set("encoding", "klingon-8"), "bench.stage.options.encoding", "unknown text encoding"),
    (_set("write_terminator", ""), "bench.stage.options.write_terminator", "non-empty"),
    (_set("commands", ["GO"]), f"{C}", "table of operations"),
]


@pytest.mark.parametrize("mutate, key_path, fragment", CONFIG_ERRORS,
                         ids=[f"{i}-{case[1].rpartition('.')[2]}" for i, case in enumerate(CONFIG_ERRORS)])
def test_config_mistakes_name_their_key_path(mutate, key_path: str, fragment: str) -> None:
    opts = example("delay_axis")
    mutate(opts)
    with pytest.raises(ConfigError) as info:
        compile_kind("delay_axis", opts)
    assert info.value.key_path == key_path
    assert fragment in str(info.value)
    assert str(info.value).startswith(f"<config>: {key_path}: ")


def test_every_example_command_set_compiles_and_covers_its_kind() -> None:
    for kind in KINDS:
        cs = compile_kind(kind)
        required = {op for op, spec in OPERATIONS[kind].items() if spec.required}
        assert required <= set(cs.commands), kind
        assert cs.identity is not None and cs.error is not None


# -- numbers ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("text, value", [("12", 12.0), ("-0.5", -0.5), ("+1.25e-3", 0.00125), (".5", 0.5),
                                         ("5.", 5.0), ("1E3", 1000.0)])
def test_parse_number_accepts_decimals(text: str, value: float) -> None:
    assert parse_number(text) == value


@pytest.mark.parametrize("text", ["nan", "inf", "-Infinity", "1_000", " 1", "1 ", "", "+", ".", "e5", "0x10",
                                  "1e400", "١٢"])
def test_parse_number_refuses_what_float_would_take_or_cannot(text: str) -> None:
    with pytest.raises(InstrumentReplyError):
        parse_number(text, instrument="stage", what="position")


# -- properties ---------------------------------------------------------------------------------------

FORMATS = [".4f", ".0f", ".2f", "+.6f", ".3e", ".6e", ".6g", ".10g", "g", "", "d"]


def _tolerance(x: float, spec: str) -> float:
    """Largest |parsed - x| the format's precision allows, from the format-spec rules of Python's docs."""
    kind = spec[-1] if spec and spec[-1].isalpha() else ""
    digits = int(re.search(r"\.(\d+)", spec).group(1)) if "." in spec else 6
    ulp = 4 * math.ulp(x) + 5e-324
    if kind == "f":
        return 0.5 * 10.0 ** -digits + ulp
    if kind == "e":
        return 0.5 * abs(x) * 10.0 ** -digits + ulp
    if kind == "g":
        return 0.5 * abs(x) * 10.0 ** (1 - max(digits, 1)) + ulp
    if kind == "d":
        return 0.5
    return 0.0  # no spec: repr, which round-trips exactly


@settings(max_examples=300, deadline=None)
@given(x=st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False),
       spec=st.sampled_from(FORMATS))
def test_format_then_match_round_trips_within_precision(x: float, spec: str) -> None:
    opts = example("delay_axis")
    opts["commands"]["move_absolute"]["send"] = "GO {position_mm:" + spec + "}" if spec else "GO {position_mm}"
    opts["commands"]["query_position"]["reply"] = r"GO (?P<position_mm>[-+0-9.eE]+)"
    cs = compile_kind("delay_axis", opts)
    sent = cs.encode("move_absolute", {"position_mm": x, "position_units": 0.0})
    assert sent.endswith(b"\r\n")
    parsed = cs.parse("query_position", sent[:-2])["position_mm"]
    # Reference: Python's own formatting and parsing of the same value (format(), float()).
    reference = float(format(round(x), spec)) if spec == "d" else float(format(x, spec))
    assert parsed == reference
    assert abs(parsed - x) <= _tolerance(x, spec)


@settings(max_examples=100, deadline=None)
@given(hz=st.floats(min_value=0.001, max_value=1e5), deg=st.floats(min_value=0, max_value=359.999))
def test_chopper_values_round_trip_through_example_templates(hz: float, deg: float) -> None:
    cs = compile_kind("chopper")
    freq_line = cs.encode("set_frequency", {"frequency_hz": hz})[:-2]  # "SPIN x" is also the query's reply
    assert abs(cs.parse("query_frequency", freq_line)["frequency_hz"] - hz) <= 0.0005 + math.ulp(hz) * 4
    phase_line = cs.encode("set_phase", {"phase_deg": deg})[:-2]
    assert abs(cs.parse("query_phase", phase_line)["phase_deg"] - deg) <= 0.0005 + math.ulp(deg) * 4


_COMPILED = {kind: compile_kind(kind) for kind in KINDS}
_OPS = [(kind, op) for kind in KINDS for op in [*_COMPILED[kind].commands, "identity"]
        if _COMPILED[kind].expects_reply(op)]


# Near misses: a real reply word, then characters that numbers and flags are made of.
_NEAR = st.builds(lambda head, tail: head + tail,
                  st.sampled_from(["AT ", "SPIN ", "PHASE ", "RANGE ", "ERR ", "BUSY ", "LOCK ", "SHUTTER ", "ID "]),
                  st.text(alphabet="-+0123456789.eE YESNOP", max_size=20))


@settings(max_examples=300, deadline=None)
@given(case=st.sampled_from(_OPS), line=st.one_of(st.binary(max_size=64), st.text(max_size=64), _NEAR))
def test_reply_parser_raises_only_instrument_reply_errors(case: tuple[str, str], line: bytes | str) -> None:
    kind, op = case
    try:
        values = _COMPILED[kind].parse(op, line)
    except InstrumentReplyError as exc:
        assert exc.instrument == "stage"
        return
    assert isinstance(values, dict)
    for value in values.values():
        assert isinstance(value, (bool, str)) or math.isfinite(value)


@settings(max_examples=150, deadline=None)
@given(text=st.lists(st.sampled_from(["{", "}", "position_mm", "speed", ":", ".4f", "!r", "d", "s", "GO ", "{{", "}}",
                                      "0", ">9", "\n", "."]), max_size=10).map("".join) | st.text(max_size=12))
def test_template_parse_raises_only_config_errors(text: str) -> None:
    try:
        template = Template.parse(text, allowed={"position_mm"}, key_path="k")
    except ConfigError as exc:
        assert exc.key_path == "k"
        return
    assert template.fields <= {"position_mm"}
    rendered = template.render({"position_mm": 1.25})
    assert isinstance(rendered, str)
