"""ScpiInstrument: connect, exact bytes of commands and queries, the error queue, blocks, resynchronisation.

A scripted device thread (scpi_helpers.ScriptedDevice) plays the instrument on the other end of pipe_pair
and records every line it receives, so each test states the exact conversation. Error codes and their
classes are the standard ones: SCPI-99 (SCPI Consortium, Standard Commands for Programmable Instruments,
1999), vol. 2, the error/event queue chapter [memory for the chapter]; classes as in shared REFERENCES.md
("Instrument protocols": −1xx command, −2xx execution, −3xx device-specific, −4xx query [−4xx from
memory]); *IDN?, *OPC?, *CLS, *RST and definite-length blocks from IEEE 488.2 (§8.7.9 for blocks).
"""

from __future__ import annotations

import logging
import socket
import threading

import pytest
from scpi_helpers import Error, ScriptedDevice, block, gate
from shotpair.drivers.errors import (
    ConfigError,
    InstrumentReplyError,
    InstrumentTimeout,
    LimitError,
    StateError,
    TransportError,
)
from shotpair.drivers.options import parse_options
from shotpair.drivers.scpi import parse_float
from shotpair.drivers.scpi_instrument import (
    MAX_ERROR_READS,
    CommandSet,
    ScpiCommandError,
    ScpiError,
    ScpiInstrument,
    ScpiOptions,
    ScpiRangeError,
)
from shotpair.drivers.transports import make_transport, pipe_pair

NAME = "chopper"
SHORT_S = 0.1  # a reply that is meant not to come
LONG_S = 5.0  # a reply that is meant to come
COMMANDS = {"set_frequency": "FREQuency {frequency_hz}", "query_frequency": "FREQuency?",
            "move": "MOVE:ABSolute {position_mm:.4f}", "stop": "MOVE:STOP"}


def make_link(table=None, *, timeout_s: float = LONG_S, **kw):
    driver_end, device_end = pipe_pair(name=NAME)
    device = ScriptedDevice(device_end, table)
    link = ScpiInstrument(NAME, driver_end, timeout_s=timeout_s, commands=CommandSet(COMMANDS), **kw)
    return link, device


@pytest.fixture
def scripted():
    """make(table, **link options) -> (link, device), connected; everything closed afterwards."""
    made = []

    def make(table=None, *, connect: bool = True, **kw):
        link, device = make_link(table, **kw)
        device.__enter__()
        made.append((link, device))
        if connect:
            link.connect()
        return link, device

    yield make
    for link, device in made:
        link.disconnect()
        device.__exit__(None, None, None)


# --------------------------------------------------------------------------------------------- connect


def test_connect_sends_cls_then_idn_and_keeps_the_identity(scripted):
    link, device = scripted()
    assert device.lines == ["*CLS", "*IDN?"]  # DOC: *CLS on connect by default, then *IDN?
    assert link.identity() == "Acme, Model 7, SN42, 1.0"
    assert link.idn.serial == "SN42" and link.is_connected and link.in_sync


def test_connect_with_reset_checks_the_reset_for_errors(scripted):
    link, device = scripted(reset_on_connect=True)
    assert device.lines == ["*RST", "SYSTem:ERRor?", "*CLS", "*IDN?"]


def test_connect_without_clear_reads_old_errors_and_only_logs_them(scripted, caplog):
    link, device = scripted(connect=False, clear_on_connect=False)
    device.errors.extend(['-350,"Queue overflow"'])
    with caplog.at_level(logging.WARNING):
        link.connect()
    assert device.lines == ["*IDN?", "SYSTem:ERRor?", "SYSTem:ERRor?"]
    assert "-350" in caplog.text


def test_connect_twice_does_nothing(scripted):
    link, device = scripted()
    link.connect()
    assert device.since(0) == ["*CLS", "*IDN?"]


def test_garbled_idn_is_a_reply_error_and_leaves_the_link_closed(scripted):
    link, device = scripted({"*IDN?": "just one field"}, connect=False)
    with pytest.raises(InstrumentReplyError, match=r"\*IDN\?") as info:
        link.connect()
    assert info.value.instrument == NAME and not link.is_connected


def test_silent_instrument_is_a_timeout_naming_the_address(scripted):
    link, device = scripted({"*IDN?": None}, connect=False, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout, match=r"pipe://.*\*IDN\?") as info:
        link.connect()
    assert info.value.instrument == NAME and not link.is_connected


def test_nothing_before_connect(scripted):
    link, device = scripted(connect=False)
    with pytest.raises(StateError):
        link.query("FREQuency?")
    with pytest.raises(StateError):
        link.identity()
    link.disconnect()
    link.disconnect()  # idempotent


def closed_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_connection_refused_on_a_closed_port_is_a_transport_error():
    address = f"tcp://127.0.0.1:{closed_port()}"
    link = ScpiInstrument(NAME, make_transport(address, name=NAME, key_path="bench.chopper.options.address"))
    with pytest.raises(TransportError) as info:
        link.connect()
    assert info.value.instrument == NAME and address in str(info.value)
    assert not link.is_connected


def test_visa_connection_refused_on_first_write_is_a_transport_error():
    # LIBRARY-NOTES: pyvisa-py opens a raw socket to a closed port; the first write is refused.
    pytest.importorskip("pyvisa_py")
    address = f"visa://TCPIP0::127.0.0.1::{closed_port()}::SOCKET"
    transport = make_transport(address, name=NAME, key_path="k", options={"open_timeout_s": 1.0})
    link = ScpiInstrument(NAME, transport, timeout_s=1.0)
    with pytest.raises(TransportError) as info:
        link.connect()
    assert info.value.instrument == NAME and address in str(info.value)


# --------------------------------------------------------------------------------------------- commands


def test_write_sends_exact_bytes_then_drains_the_error_queue(scripted):
    link, device = scripted({"FREQuency": None, "MOVE:ABSolute": None})
    link.write("FREQuency", 1000.0)
    link.send("set_frequency", frequency_hz=250)
    link.send("move", position_mm=12.5)  # a format spec in the template formats the value
    assert device.since(2) == ["FREQuency 1000.0", "SYSTem:ERRor?", "FREQuency 250", "SYSTem:ERRor?",
                               "MOVE:ABSolute 12.5000", "SYSTem:ERRor?"]


def test_without_error_checks_only_the_command_is_sent(scripted):
    link, device = scripted({"FREQuency": None, "FREQuency?": "1000"}, check_errors=False)
    link.write("FREQuency", 1.5e-3)
    assert link.query("FREQuency?") == "1000"
    assert device.since(2) == ["FREQuency 0.0015", "FREQuency?"]


# Code -> typed error (SCPI-99 codes; -222/-224 are "data out of range" / "illegal parameter value").
ERROR_TABLE = [
    ('-222,"Data out of range"', ScpiRangeError, r"'FREQuency 99999\.0' refused the value 99999\.0: -222"),
    ('-224,"Illegal parameter value"', ScpiRangeError, r"refused the value 99999\.0: -224"),
    ('-113,"Undefined header"', ScpiCommandError, r"did not understand 'FREQuency 99999\.0': -113"),
    ('-102,"Syntax error"', ScpiCommandError, "did not understand"),
    ('-108,"Parameter not allowed"', ScpiCommandError, "did not understand"),
    ('-200,"Execution error"', ScpiError, r"failed: -200,\"Execution error\" \(execution error\)"),
    ('-221,"Settings conflict"', ScpiError, "-221"),
    ('-350,"Queue overflow"', ScpiError, "device-specific error"),
    ('201,"Blade jammed"', ScpiError, r"201,\"Blade jammed\" \(device-defined error\)"),
]


@pytest.mark.parametrize("entry, kind, message", ERROR_TABLE)
def test_error_queue_entries_become_typed_errors(scripted, entry, kind, message):
    link, device = scripted({"FREQuency": Error(entry)})
    with pytest.raises(kind, match=message) as info:
        link.write("FREQuency", 99999.0)
    err = info.value
    assert type(err) is kind and isinstance(err, InstrumentReplyError) and err.instrument == NAME
    assert err.code == int(entry.split(",")[0]) and err.command == "FREQuency 99999.0"
    assert isinstance(err, LimitError) == (kind is ScpiRangeError)
    if kind is ScpiRangeError:
        assert err.value == 99999.0
    assert device.since(2) == ["FREQuency 99999.0", "SYSTem:ERRor?", "SYSTem:ERRor?"]


def test_the_queue_is_drained_to_zero_and_the_first_entry_raised(scripted):
    link, device = scripted({"FREQuency": None, "FREQuency 1.0": lambda dev, unit: dev.errors.extend(
        ['-222,"Data out of range"', '-221,"Settings conflict"', '301,"Motor hot"']) or None})
    with pytest.raises(ScpiRangeError, match="and 2 more") as info:
        link.write("FREQuency", 1.0)
    assert [e.code for e in info.value.others] == [-221, 301]
    assert device.since(2) == ["FREQuency 1.0"] + ["SYSTem:ERRor?"] * 4
    link.write("FREQuency", 2.0)  # the queue is empty again: no error left over for the next command


def test_an_error_queue_that_never_empties_is_read_at_most_32_times(scripted):
    link, device = scripted({"SYSTem:ERRor?": '-200,"Execution error"'})
    with pytest.raises(ScpiError, match=f"and {MAX_ERROR_READS - 1} more"):
        link.write("FREQuency", 1.0)
    assert device.since(2) == ["FREQuency 1.0"] + ["SYSTem:ERRor?"] * MAX_ERROR_READS


def test_garbled_error_reply_is_a_reply_error(scripted):
    link, device = scripted({"SYSTem:ERRor?": "what?"})
    with pytest.raises(InstrumentReplyError, match="SYSTem:ERRor"):
        link.write("FREQuency", 1.0)


# --------------------------------------------------------------------------------------------- queries


def test_query_returns_the_text_reply(scripted):
    link, device = scripted({"FREQuency?": "1.5E+03"})
    assert link.query("FREQuency?") == "1.5E+03"
    assert link.ask("query_frequency", parse_float) == 1500.0
    assert device.since(2) == ["FREQuency?", "FREQuency?"]  # queries are not followed by SYSTem:ERRor?


def test_non_ascii_reply_is_a_reply_error(scripted):
    link, device = scripted({"FREQuency?": b"1\xff0\n"})
    with pytest.raises(InstrumentReplyError, match="not printable ASCII"):
        link.query("FREQuency?")
    # Garbled: perhaps a piece of something longer, so the driver resyncs, which also asks the queue.
    assert device.since(2) == ["FREQuency?", "*OPC?;*OPC?", "SYSTem:ERRor?"]
    assert link.in_sync


def test_unparsable_text_reply_makes_the_driver_ask_the_queue(scripted):
    link, device = scripted({"FREQuency?": "fast"})
    with pytest.raises(InstrumentReplyError, match="expected a decimal number"):
        link.ask("query_frequency", parse_float)
    assert device.since(2) == ["FREQuency?", "SYSTem:ERRor?"]  # DOC: a reply that does not parse


def test_unparsable_reply_explained_by_the_queue_raises_the_queued_error(scripted):
    link, device = scripted({"FREQuency?": lambda dev, unit: dev.errors.append('-230,"Data corrupt or stale"')
                             or "stale"})
    with pytest.raises(ScpiError, match=r"-230.*reply: expected a decimal number"):
        link.ask("query_frequency", parse_float)


def test_refused_query_sends_nothing_and_its_queued_error_is_raised(scripted):
    # A query the instrument refuses gets no reply; the driver times out, resyncs and reads the queue.
    link, device = scripted({"FREQuency?": Error('-113,"Undefined header"')}, timeout_s=SHORT_S)
    with pytest.raises(ScpiCommandError, match=r"did not understand 'FREQuency\?'.*no reply within") as info:
        link.query("FREQuency?")
    assert isinstance(info.value.__cause__, InstrumentTimeout)
    assert device.since(2) == ["FREQuency?", "*OPC?;*OPC?", "SYSTem:ERRor?", "SYSTem:ERRor?"]
    assert link.in_sync


# --------------------------------------------------------------------------------------------- resync


def test_a_late_reply_is_never_taken_for_the_next_query(scripted):
    # LIBRARY-NOTES: after a timeout the late reply arrives and would answer the next query.
    release = threading.Event()
    link, device = scripted({"POSition?": gate(release, "12.5"), "FREQuency?": "1000"}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout, match=r"no reply to 'POSition\?' within 0\.1 s"):
        link.query("POSition?")  # the instrument is stuck: the immediate resync fails too
    assert not link.in_sync
    release.set()  # now the late "12.5" and the first marker's "1;1" arrive
    assert link.query("FREQuency?") == "1000"
    assert link.in_sync
    # a fresh marker (three *OPC?) so that the late "1;1" of the first one is not taken for it
    assert device.wait_lines(7)[2:] == ["POSition?", "*OPC?;*OPC?", "*OPC?;*OPC?;*OPC?", "SYSTem:ERRor?",
                                        "FREQuency?"]


def test_a_slow_reply_is_discarded_by_the_resync_right_after_the_timeout(scripted):
    release = threading.Event()
    link, device = scripted({"POSition?": gate(release, "12.5"), "FREQuency?": "1000"}, timeout_s=SHORT_S)
    link.timeout_s = LONG_S  # the resync waits long enough for the late reply
    timer = threading.Timer(0.3, release.set)
    timer.start()
    try:
        with pytest.raises(InstrumentTimeout):
            link.query("POSition?", timeout_s=SHORT_S)
    finally:
        timer.join()
    assert link.in_sync
    assert link.query("FREQuency?") == "1000"


def test_a_late_block_is_discarded_whole_even_when_it_holds_marker_bytes(scripted):
    # The late reply is a block whose payload looks like marker replies and terminators: it is framed
    # by its length, so none of it is taken for the marker or for the next reply.
    release = threading.Event()
    payload = b"1;1\n1;1;1\n" * 50
    link, device = scripted({"DATA?": gate(release, block(payload)), "FREQuency?": "7"}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout):
        link.query_block("DATA?")
    release.set()
    assert link.query("FREQuency?") == "7"


def test_a_block_cut_by_a_timeout_is_framed_by_its_length_on_resync(scripted):
    # The header and half the payload arrive in time, the rest late: the driver has consumed the header,
    # and hands it to the resync so that the rest is recognised as the same block.
    release = threading.Event()
    payload = b"\n1;1;1\n" * 40

    def half_now_half_later(dev, unit):
        whole = block(payload)
        dev.end.write(whole[:120])
        release.wait(10.0)
        return whole[120:]

    link, device = scripted({"DATA?": half_now_half_later, "FREQuency?": "7"}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout, match="B of it arrived"):
        link.query_block("DATA?")
    release.set()
    assert link.query("FREQuency?") == "7"


def test_a_block_the_instrument_cut_short_does_not_swallow_the_marker(scripted):
    # IEEE 488.2 query interrupted: a new message while a reply is unsent makes the instrument drop the
    # rest (and queue -410). The driver's resync must not wait for the announced length: it drops the
    # stump after a quiet spell and sends a fresh marker; -410 is its own doing and is not raised.
    def truncated(dev, unit):
        dev.errors.append('-410,"Query INTERRUPTED"')
        return block(bytes(5000))[:1000]

    link, device = scripted({"DATA?": truncated, "FREQuency?": "7"}, timeout_s=SHORT_S)
    link.timeout_s = 1.0  # for the resync after the read timeout
    with pytest.raises(InstrumentTimeout, match="no reply to 'DATA\\?' within 0.1 s"):
        link.query_block("DATA?", timeout_s=SHORT_S)
    assert link.in_sync
    assert link.query("FREQuency?") == "7"
    lines = device.since(2)
    assert lines[0] == "DATA?" and lines[1:3] == ["*OPC?;*OPC?", "*OPC?;*OPC?;*OPC?"]
    assert lines[-3:] == ["SYSTem:ERRor?", "SYSTem:ERRor?", "FREQuency?"]


def test_a_garbled_block_is_a_reply_error_and_the_link_recovers(scripted):
    # Every byte with its high bit flipped except the terminators (the wire simulators' "garbled" fault).
    raw = block(b"\x8a" * 50 + bytes(range(256)))
    garbled = bytes(b ^ 0x80 if b != 0x0A else b for b in raw)
    link, device = scripted({"DATA?": garbled, "FREQuency?": "7"})
    with pytest.raises(InstrumentReplyError, match="not a definite-length block"):
        link.query_block("DATA?")
    assert link.in_sync and link.query("FREQuency?") == "7"


def test_a_lost_connection_leaves_the_link_out_of_sync(scripted):
    link, device = scripted({"FREQuency?": "7"})
    device.end.close()
    with pytest.raises(TransportError):
        link.query("FREQuency?")
    assert not link.in_sync


def test_urgent_commands_are_sent_at_once_even_out_of_sync(scripted):
    release = threading.Event()
    link, device = scripted({"POSition?": gate(release, "12.5"), "MOVE:STOP": None}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout):
        link.query("POSition?")
    assert link.send_urgent("stop") == []  # out of sync: nothing is checked
    release.set()
    lines = device.wait_lines(5)
    assert lines[2:5] == ["POSition?", "*OPC?;*OPC?", "MOVE:STOP"]  # no new marker before the stop


def test_urgent_commands_do_not_wait_for_another_threads_exchange(scripted):
    link, device = scripted({"MOVE:STOP": None})
    held, done = threading.Event(), threading.Event()

    def busy():
        with link._lock:  # another thread in the middle of a long exchange
            held.set()
            done.wait(10.0)

    worker = threading.Thread(target=busy)
    worker.start()
    try:
        assert held.wait(5.0)
        assert link.send_urgent("stop") == []
        assert device.wait_lines(3)[2] == "MOVE:STOP"
    finally:
        done.set()
        worker.join()


def test_wait_complete_timeout_then_the_late_opc_is_discarded(scripted):
    release = threading.Event()
    link, device = scripted({"*OPC?": gate(release, "1"), "FREQuency?": "3"}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout, match="the move not finished within 0.1 s") as info:
        link.wait_complete(SHORT_S, what="the move")
    assert info.value.timeout_s == SHORT_S
    assert device.since(2) == ["*OPC?"]  # no immediate resync: its marker would wait for the same move
    release.set()
    device.table["*OPC?"] = "1"
    link.timeout_s = LONG_S
    assert link.query("FREQuency?") == "3"


def test_wait_complete(scripted):
    link, device = scripted()
    link.wait_complete(LONG_S)
    assert device.since(2) == ["*OPC?"]


# --------------------------------------------------------------------------------------------- blocks


@pytest.mark.parametrize("payload", [b"", b"ABC", b"\n\n\n", bytes(range(256)) * 8, b"#13ABC\n" * 3])
def test_query_block_returns_the_payload_whatever_it_holds(scripted, payload):
    link, device = scripted({"DATA?": block(payload), "FREQuency?": "2"})
    assert link.query_block("DATA?") == payload
    assert link.query("FREQuency?") == "2"  # the terminator after the block was consumed


def test_text_where_a_block_was_expected_is_a_reply_error(scripted):
    link, device = scripted({"DATA?": "1.0", "FREQuency?": "2"})
    with pytest.raises(InstrumentReplyError, match="not a definite-length block"):
        link.query_block("DATA?")
    assert device.since(2) == ["DATA?", "SYSTem:ERRor?"]
    assert link.in_sync and link.query("FREQuency?") == "2"


@pytest.mark.parametrize("raw, message", [
    (b"#A3ABC\n", "not a definite-length block"),
    (b"#3x12ABC\n", "not decimal"),
    (b"#13ABCD\n", "not followed by the terminator"),  # longer than announced
])
def test_garbled_block_is_a_reply_error_and_the_link_recovers(scripted, raw, message):
    link, device = scripted({"DATA?": raw, "FREQuency?": "2"})
    with pytest.raises(InstrumentReplyError, match=message):
        link.query_block("DATA?")
    assert not link.in_sync  # where the next reply starts is unknown
    assert link.query("FREQuency?") == "2"


def test_short_block_times_out_and_does_not_swallow_the_next_reply(scripted):
    # The block announces 10 bytes but holds 5: the driver waits for the rest, times out, resyncs.
    link, device = scripted({"DATA?": b"#210ABCDE\n", "FREQuency?": "2"}, timeout_s=SHORT_S)
    with pytest.raises(InstrumentTimeout):
        link.query_block("DATA?")
    link.timeout_s = LONG_S
    assert link.query("FREQuency?") == "2"


def test_block_where_text_was_expected_is_a_reply_error_and_the_link_recovers(scripted):
    link, device = scripted({"FREQuency?": block(b"1\n2\n3"), "PHASe?": "4"})
    with pytest.raises(InstrumentReplyError, match="binary block"):
        link.query("FREQuency?")
    assert link.query("PHASe?") == "4"


# --------------------------------------------------------------------------------------------- options


KEY = "bench.chopper.options"


@pytest.mark.parametrize("options, key_path", [
    ({}, f"{KEY}.address"),  # required
    ({"address": "tcp://127.0.0.1:5025", "timeout": 1}, f"{KEY}.timeout"),
    ({"address": "tcp://127.0.0.1:5025", "timeout_s": 0}, f"{KEY}.timeout_s"),
    ({"address": "tcp://127.0.0.1:5025", "timeout_s": "slow"}, f"{KEY}.timeout_s"),
    ({"address": "tcp://127.0.0.1:5025", "check_errors": "yes"}, f"{KEY}.check_errors"),
    ({"address": "tcp://127.0.0.1:5025", "transport": {"trace": 1}}, f"{KEY}.transport.trace"),
    ({"address": "tcp://127.0.0.1:5025", "transport": {"baud": 9600}}, f"{KEY}.transport.baud"),
    ({"address": "tcp://127.0.0.1:5025", "transport": {"open_timeout_s": -1}}, f"{KEY}.transport.open_timeout_s"),
])
def test_bad_options_name_their_key(options, key_path):
    with pytest.raises(ConfigError) as info:
        parse_options(ScpiOptions, options, KEY)
    assert info.value.key_path == key_path


@pytest.mark.parametrize("overrides, key, allowed", [
    ({"set_freq": "F {frequency_hz}"}, "set_freq", "move, query_frequency, set_frequency, stop"),
    ({"set_frequency": "FREQ {f}"}, "set_frequency", "{frequency_hz}"),
    ({"set_frequency": "FREQ"}, "set_frequency", "{frequency_hz}"),
    ({"query_frequency": "FREQ? {frequency_hz}"}, "query_frequency", "no fields"),
    ({"set_frequency": "FREQ {frequency_hz!r}"}, "set_frequency", None),
    ({"set_frequency": "FREQ {0}"}, "set_frequency", None),
    ({"set_frequency": "FREQ {frequency_hz:.4q}"}, "set_frequency", None),
    ({"set_frequency": "FREQ {frequency_hz"}, "set_frequency", None),
    ({"stop": ""}, "stop", None),
    ({"stop": "STOP\nRUN"}, "stop", None),
    ({"stop": "ARRÊT"}, "stop", None),
    ({"stop": 3}, "stop", None),
])
def test_bad_command_overrides_name_their_key(overrides, key, allowed):
    with pytest.raises(ConfigError) as info:
        CommandSet(COMMANDS, overrides, key_path=f"{KEY}.commands")
    assert info.value.key_path == f"{KEY}.commands.{key}"
    if allowed:
        assert allowed in info.value.allowed


def test_command_overrides_replace_the_defaults():
    commands = CommandSet(COMMANDS, {"set_frequency": "SOUR:FREQ {frequency_hz:.3f} HZ", "stop": "ST;*WAI"})
    assert commands.render_text("set_frequency", frequency_hz=500) == "SOUR:FREQ 500.000 HZ"
    assert commands.render_text("stop") == "ST;*WAI"
    assert commands.render_text("query_frequency") == "FREQuency?"
    assert commands.render_text("set_frequency", template="{{x}} {frequency_hz}", frequency_hz=0.1) == "{x} 0.1"


def test_from_options_builds_the_transport_from_the_address():
    options = parse_options(ScpiOptions, {"address": "tcp://127.0.0.1:5025", "timeout_s": 0.5,
                                          "transport": {"trace": True}}, KEY)
    link = ScpiInstrument.from_options(NAME, options, CommandSet(COMMANDS), key_path=KEY)
    assert link.address == "tcp://127.0.0.1:5025" and link.timeout_s == 0.5 and not link.is_connected
    with pytest.raises(ConfigError) as info:
        ScpiInstrument.from_options(NAME, parse_options(ScpiOptions, {"address": "gpib://7"}, KEY),
                                    CommandSet(COMMANDS), key_path=KEY)
    assert info.value.key_path == f"{KEY}.address"
