"""Fuzzing the control socket of a served daemon (`shotpair serve`, real time, 127.0.0.1): whatever frames
arrive, every message the daemon reads gets one reply with a documented error code (never
``internal_error``), the request's ``id`` comes back when the request had a readable one, the daemon stays
up, and a scan started before the fuzz completes with every point in its file.

Frames: random bytes, random JSON values, mutated valid requests, several frames at once, other text
encodings, ids nested past the limit. Then floods (thousands of requests from several clients, large ones
too) while a scan runs: status still answers within a bounded time, the status heartbeat keeps coming, and
the daemon drops no progress event. Finally the size limits: a request over ``max_request_bytes`` gets
``bad_request`` unread; a frame over 4 times that makes libzmq drop the connection (ZMQ_MAXMSGSIZE, see the
libzmq zmq_setsockopt manual), and the client's socket reconnects by itself.
"""

from __future__ import annotations

import json
import math
import os
import re
import threading
import time
import tomllib
from pathlib import Path
from typing import Any, Iterator

import h5py
import pytest
import zmq
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from zmq.utils.monitor import recv_monitor_message

from daemon_helpers import Served, write_bench, write_scan
from shotpair.daemon import protocol
from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.drivers.errors import DaemonError

REPLY_TIMEOUT_S = 10.0
SCAN_TIMEOUT_S = 60.0
MAX_REQUEST_BYTES = 1 << 20  # the [stream] max_request_bytes default (daemon/config.py, docs/protocol.md)
REPO = Path(__file__).resolve().parents[1]


def documented_codes() -> set[str]:
    """The error codes of docs/protocol.md section 7 (the table's first column)."""
    text = (REPO / "docs" / "protocol.md").read_text()
    section = text.split("## 7. Error codes", 1)[1].split("\n## ", 1)[0]
    return set(re.findall(r"^\| `([a-z_]+)` \|", section, flags=re.MULTILINE))


CODES = documented_codes()


def test_documented_codes_are_the_codecs():
    assert {"bad_request", "unknown_command", "bad_argument", "illegal_state"} <= CODES
    assert CODES <= set(protocol.ERROR_CODES)


# --------------------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    folder = tmp_path_factory.mktemp("fuzz-control")
    bench = write_bench(folder)
    # a stage that needs no homing and moves fast: the scans below last as long as their shots (real time)
    bench.write_text(bench.read_text() + "\n[simulation.stage]\nneeds_homing = false\nvelocity_mm_per_s = 1000.0\n")
    daemon = Served(bench, fast=False)
    daemon.folder = folder  # type: ignore[attr-defined]
    try:
        yield daemon
    finally:
        daemon.stop()
        if daemon.proc.poll() is None:
            daemon.proc.kill()
            daemon.proc.wait(timeout=SCAN_TIMEOUT_S)


class Raw:
    """A DEALER that sends any frames and reads the reply in lockstep (one request in flight)."""

    def __init__(self, endpoint: str, context: zmq.Context[Any]) -> None:
        self.sock = context.socket(zmq.DEALER)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.connect(endpoint)

    def round_trip(self, frames: list[bytes], timeout_s: float = REPLY_TIMEOUT_S) -> protocol.Message:
        self.sock.send_multipart(frames)
        assert self.sock.poll(int(timeout_s * 1000), zmq.POLLIN), f"no reply to {frames!r:.200}"
        return protocol.decode_reply(self.sock.recv_multipart())  # a reply the protocol's own decoder reads

    def close(self) -> None:
        self.sock.close(linger=0)


@pytest.fixture
def context() -> Iterator[zmq.Context[Any]]:
    ctx = zmq.Context()
    try:
        yield ctx
    finally:
        ctx.term()


def scan_table(folder: Path, name: str, shots: int, step: float) -> dict[str, Any]:
    return tomllib.loads(write_scan(folder, name, shots=shots, step=step).read_text())["scan"]


def start_scan(control: ControlClient, folder: Path, name: str, shots: int = 300, step: float = 0.5) -> str:
    reply = control.start(scan=scan_table(folder, name, shots, step))
    return str(reply["scan_id"])


def wait_scan_end(control: ControlClient, data: str, scan_id: str) -> dict[str, Any]:
    """Until status says idle with this scan as the last one (docs/protocol.md section 10.4), asking again
    after each status heartbeat of the stream (or a 1 s wait on it)."""
    deadline = time.monotonic() + SCAN_TIMEOUT_S
    with Subscriber(data, topics=["status"]) as beats:
        while time.monotonic() < deadline:
            now = control.status()
            if now["state"] == "idle" and now["last_scan_id"] == scan_id:
                return now
            beats.receive(1.0)
    raise AssertionError(f"scan {scan_id} did not end within {SCAN_TIMEOUT_S} s")


def assert_complete(control: ControlClient, data: str, scan_id: str) -> None:
    end = wait_scan_end(control, data, scan_id)
    assert end["last_scan_state"] == "complete", end
    assert end["points_done"] == end["points_total"] > 0, end
    snap = control.snapshot()
    assert snap["scan_id"] == scan_id and bool(snap.arrays["completed"].all())
    with h5py.File(end["output"], "r") as f:  # every point is in the file, and the file says complete
        assert f["entry/state"][()].decode() == "complete"
        assert bool(f["entry/sweeps/completed"][()].all())


# --------------------------------------------------------------------------------------- what to expect


def _finite_or_none(value: Any) -> Any:
    """A JSON value as the daemon echoes it: non-finite floats (1e400 parses to inf) become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite_or_none(v) for v in value]
    return value


def expected_id(frames: list[bytes]) -> Any:
    """The id the reply must carry (docs/protocol.md section 5.2): the request's, if it was one frame of at
    most max_request_bytes holding an RFC 8259 JSON object (UTF-8, no NaN) with an id nested no deeper than
    the request limit; else null."""
    if len(frames) != 1 or len(frames[0]) > MAX_REQUEST_BYTES:
        return None
    try:
        obj = json.loads(frames[0].decode("utf-8"), parse_constant=lambda c: (_ for _ in ()).throw(ValueError(c)))
    except (ValueError, RecursionError):
        return None
    if not isinstance(obj, dict):
        return None
    found = obj.get("id")
    if protocol.nesting_depth(found, protocol.MAX_REQUEST_DEPTH) > protocol.MAX_REQUEST_DEPTH:
        return None
    return _finite_or_none(found)


def check_reply(frames: list[bytes], reply: protocol.Message, state_during_scan: bool = True) -> None:
    assert reply["v"] == protocol.PROTOCOL_VERSION
    assert reply["id"] == expected_id(frames), (frames[:1], reply.header)
    if reply["ok"] is not True:
        error = reply["error"]
        assert error["code"] in CODES, reply.header          # a documented code
        assert error["code"] != "internal_error", reply.header  # a client's mistake is never our bug
        assert isinstance(error["message"], str) and len(error["message"]) < 4000
        assert reply["arrays"] == []


# --------------------------------------------------------------------------------------- the fuzz

#: Commands the fuzz must not send: they would stop the scan or the daemon (legitimately).
STOPPERS = {"abort", "pause", "shutdown"}

_json_scalar = (st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=12)
                | st.sampled_from([10**400, -(2**63), 2**64, 1e308, "status", "", "\ud800"]))
_json = st.recursive(_json_scalar, lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=8), c,
                                                                                      max_size=4), max_leaves=12)
_deep = (st.sampled_from([0, 1, 31, 32, 33, 100, 5000]) | st.integers(960, 1000)).map(lambda d: "[" * d + "1" + "]" * d)

VALID = [
    {"cmd": "status", "id": 1},
    {"cmd": "snapshot", "id": "snap"},
    {"cmd": "move", "delay_ps": 1.5, "id": [1, 2]},
    {"cmd": "resume", "id": {"n": 3}},
    {"cmd": "start", "id": 4, "scan": {"title": "t", "shots_per_point": 100, "output": "fuzz.h5",
                                       "delays": [{"kind": "linear", "start_ps": -1.0, "stop_ps": 1.0,
                                                   "step_ps": 0.5}]}},
    {"cmd": "start", "id": 5, "path": "/dev/zero"},
]


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = []
    items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else ()
    for key, child in items:
        out.append((*prefix, key))
        out.extend(_paths(child, (*prefix, key)))
    return out


@st.composite
def mutated_request(draw: st.DrawFn) -> bytes:
    req = json.loads(json.dumps(draw(st.sampled_from(VALID))))
    for _ in range(draw(st.integers(0, 3))):
        paths = _paths(req)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = req
        for key in path[:-1]:
            parent = parent[key]
        op = draw(st.sampled_from(["replace", "delete", "add", "cmd"]))
        if op == "replace":
            parent[path[-1]] = draw(_json)
        elif op == "delete":
            del parent[path[-1]]
        elif op == "add" and isinstance(parent, dict):
            parent[draw(st.text(max_size=6))] = draw(_json)
        elif op == "cmd":
            req["cmd"] = draw(st.text(max_size=10) | _json | st.sampled_from(["Status", "_cmd_status", "__init__",
                                                                              "status ", "commands", "_require"]))
    text = json.dumps(req)  # NaN literals where floats are NaN, as a careless program might send them
    if draw(st.integers(0, 5)) == 0:  # an id nested as deep as the limit, or deeper
        text = text[:-1] + ', "id": ' + draw(_deep) + "}"
    encoding = draw(st.sampled_from(["utf-8", "utf-8", "utf-8", "utf-16", "latin-1"]))
    return text.encode(encoding, errors="replace") if encoding != "utf-8" else text.encode("utf-8", "surrogatepass")


FRAME = st.one_of(st.binary(max_size=64), _json.map(lambda v: json.dumps(v).encode("utf-8", "surrogatepass")),
                  mutated_request(), mutated_request(), mutated_request())
FRAMES = st.one_of(FRAME.map(lambda f: [f]), FRAME.map(lambda f: [f]), st.lists(FRAME, min_size=2, max_size=3))


def _commands(frames: list[bytes]) -> set[str]:
    found = set()
    for frame in frames:
        try:
            obj = json.loads(frame)
        except (ValueError, RecursionError):
            continue
        if isinstance(obj, dict) and isinstance(obj.get("cmd"), str):
            found.add(obj["cmd"])
    return found


RUNNING = ("preparing", "acquiring")


def test_fuzzed_frames_during_a_scan(served, context):
    raw = Raw(served.control, context)
    with ControlClient(served.control, timeout_s=REPLY_TIMEOUT_S) as control:
        scan_id = start_scan(control, served.folder, "fuzzed", shots=250, step=0.25)  # about 2.5 s at 1 kHz
        states: list[str] = [control.status()["state"]]

        @settings(max_examples=150, deadline=None, database=None,
                  suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
        @given(frames=FRAMES)
        def fuzz(frames: list[bytes]) -> None:
            # Never stop the scan or the daemon; once the scan is over, start and move would be legal (and
            # would start a scan or move the stage as asked), so they are left out then.
            forbidden = STOPPERS | (set() if states[-1] in RUNNING else {"start", "move"})
            assume(not _commands(frames) & forbidden)
            reply = raw.round_trip(frames)
            check_reply(frames, reply)
            states.append(reply.get("state") or states[-1])  # error replies say the state they met

        try:
            fuzz()
        finally:
            raw.close()
        during = sum(state in RUNNING for state in states)
        assert during >= 50, f"only {during} of {len(states)} fuzzed requests met the running scan"
        assert_complete(control, served.data, scan_id)
        assert served.proc.poll() is None


# --------------------------------------------------------------------------------------- found by fuzzing


def test_ids_nested_near_the_parser_limit_do_not_kill_the_daemon(served, context):
    # An id nested about 985 deep parsed (Python's json stops near 1000) but could not be encoded again:
    # the reply raised RecursionError, so did the error reply, and the daemon's loop died with it (exit 1).
    raw = Raw(served.control, context)
    try:
        for depth in range(965, 1001):
            for cmd in (b"status", b"warp"):
                frame = b'{"cmd":"' + cmd + b'","id":' + b"[" * depth + b"]" * depth + b"}"
                reply = raw.round_trip([frame])
                assert reply["ok"] is False and reply["error"]["code"] == "bad_request", reply.header
                assert reply["id"] is None
        assert raw.round_trip([b'{"cmd":"status","id":"after"}'])["ok"] is True
    finally:
        raw.close()
    assert served.proc.poll() is None


@pytest.mark.parametrize("frames, code", [
    # a JSON integer beyond a double: np.isfinite raised TypeError, answered internal_error
    ([b'{"cmd":"move","delay_ps":1' + b"0" * 400 + b',"id":7}'], "bad_argument"),
    # NaN is not JSON (RFC 8259 section 6); Python's parser took it
    ([b'{"cmd":"move","delay_ps":NaN,"id":8}'], "bad_request"),
    # JSON in UTF-16 (RFC 8259 section 8.1: exchanged JSON is UTF-8): the id was guessed anyway
    (['{"cmd":"status","id":9}'.encode("utf-16")], "bad_request"),
])
def test_requests_found_by_fuzzing(served, context, frames, code):
    raw = Raw(served.control, context)
    try:
        reply = raw.round_trip(frames)
        assert reply["ok"] is False and reply["error"]["code"] == code, reply.header
        assert reply["id"] == expected_id(frames)
        assert raw.round_trip([b'{"cmd":"status","id":"after"}'])["ok"] is True  # still serving
    finally:
        raw.close()
    assert served.proc.poll() is None


def test_start_paths_that_would_hang_or_crash_are_config_errors(served, tmp_path):
    fifo = tmp_path / "pipe.toml"
    os.mkfifo(fifo)
    with ControlClient(served.control, timeout_s=REPLY_TIMEOUT_S) as control:
        # /dev/zero never ends (read_bytes grew without bound); a FIFO blocked the daemon until written;
        # a NUL in the name raised ValueError (internal_error)
        for path, words in [("/dev/zero", "not a regular file"), (str(fifo), "not a regular file"),
                            ("a\x00b.toml", "not a usable file name"), ("x" * 5000, "cannot read the file")]:
            with pytest.raises(DaemonError) as info:
                control.start(path=path)
            assert info.value.code == "config_error" and words in str(info.value), info.value
        assert control.status()["state"] == "idle"


def test_bad_moves_move_nothing(served):
    with ControlClient(served.control, timeout_s=REPLY_TIMEOUT_S) as control, \
            Subscriber(served.data, topics=["log", "status"]) as logs:
        assert logs.receive(SCAN_TIMEOUT_S) is not None  # a heartbeat: the subscription is live (slow joiner)
        for delay in (10**400, -(10**400), 1e308, "1.0", True, None, [1.0], {"ps": 1}):
            with pytest.raises(DaemonError) as info:
                control.request("move", delay_ps=delay)
            assert info.value.code == "bad_argument", info.value
        # A good move now: the first log on the stream must be its result (ordered on one PUB socket), so none
        # of the refused ones moved the stage.
        control.move(0.5)
        deadline = time.monotonic() + SCAN_TIMEOUT_S
        while time.monotonic() < deadline:
            msg = logs.receive(1.0)
            if msg is not None and msg.topic == "log":
                assert msg["message"].startswith("moved to 0.5 ps"), msg.header
                break
        else:
            raise AssertionError("the good move was never reported")


# --------------------------------------------------------------------------------------- floods


def _flood(endpoint: str, context: zmq.Context[Any], frames: list[bytes], batches: int, batch: int,
           counts: list[int], errors: list[str]) -> None:
    """One client: send ``batch`` requests without waiting, then read their replies; ``batches`` times."""
    sock = context.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(endpoint)
    try:
        for _ in range(batches):
            for _ in range(batch):
                sock.send_multipart(frames)
            for _ in range(batch):
                if not sock.poll(int(REPLY_TIMEOUT_S * 1000), zmq.POLLIN):
                    errors.append("a reply did not come")
                    return
                reply = protocol.decode_reply(sock.recv_multipart())
                if reply["ok"] is not True and reply["error"]["code"] not in CODES - {"internal_error"}:
                    errors.append(str(reply.header))
                counts.append(1)
    finally:
        sock.close(linger=0)


FLOODS = {
    "status": [b'{"cmd":"status"}'],
    "garbage": [b"\xff not json at all"],
    "illegal start": [json.dumps({"cmd": "start", "scan": {"shots_per_point": 10}}).encode()],
    "two frames": [b"{}", b"{}"],
    # requests of nearly the size limit that parse slowly (a long list of numbers)
    "large": [b'{"cmd":"status","pad":[' + b",".join([b"0"] * 200_000) + b"]}"],
}


def test_flood_during_a_scan(served, context):
    with ControlClient(served.control, timeout_s=REPLY_TIMEOUT_S) as control, \
            Subscriber(served.data, topics=["status"]) as beats:
        control.status()
        before = control.status()["dropped_events"]
        scan_id = start_scan(control, served.folder, "flooded", shots=250, step=0.25)  # about 2.5 s
        counts: list[int] = []
        errors: list[str] = []
        # 100 slow requests from one client at once: answered in one turn of the loop they would hold back
        # the heartbeat for seconds; the loop's time budget per turn keeps it coming.
        plan = [("status", 2, 300), ("garbage", 3, 400), ("illegal start", 2, 300), ("two frames", 2, 300),
                ("large", 1, 40)]
        threads = [threading.Thread(target=_flood, args=(served.control, context, FLOODS[name], batches, batch,
                                                         counts, errors), daemon=True)
                   for name, batches, batch in plan]
        for t in threads:
            t.start()
        latencies: list[float] = []
        beat_times: list[float] = []
        states: list[str] = []
        while any(t.is_alive() for t in threads):
            t0 = time.monotonic()
            state = control.status()["state"]
            latencies.append(time.monotonic() - t0)
            states.append(state)
            while beats.receive(0.05) is not None:  # heartbeats, and the pace of this loop
                beat_times.append(time.monotonic())
            if state == "idle":
                break
        for t in threads:
            t.join(timeout=SCAN_TIMEOUT_S)
            assert not t.is_alive()
        assert errors == []
        assert len(counts) == sum(b * n for _, b, n in plan)  # every request of the flood was answered
        assert sum(state in RUNNING for state in states) >= 3, states  # the flood met the running scan
        # Bounded, and far below what the flood costs the daemon in all (seconds): no request waits behind
        # the whole flood. The bounds leave room for a loaded 2-core machine.
        assert max(latencies) < 1.5, max(latencies)
        gaps = [b - a for a, b in zip(beat_times, beat_times[1:])]
        assert len(beat_times) >= 3 and max(gaps) < 1.5, gaps  # the 0.2 s heartbeat kept coming
        assert_complete(control, served.data, scan_id)
        assert control.status()["dropped_events"] == before  # no progress event was starved out
    assert served.proc.poll() is None


# --------------------------------------------------------------------------------------- size limits


def test_request_over_the_limit_is_refused_unread(served, context):
    raw = Raw(served.control, context)
    try:
        big = b'{"cmd":"status","id":1,"pad":"' + b"a" * MAX_REQUEST_BYTES + b'"}'
        t0 = time.monotonic()
        reply = raw.round_trip([big])
        assert reply["ok"] is False and reply["error"]["code"] == "bad_request"
        assert "larger than the limit of 1048576 bytes" in reply["error"]["message"]
        assert reply["id"] is None  # nothing of it was parsed, not even the id
        assert time.monotonic() - t0 < REPLY_TIMEOUT_S
    finally:
        raw.close()


def test_frame_over_the_transport_limit_drops_the_connection(served, context):
    # ZMQ_MAXMSGSIZE (libzmq zmq_setsockopt manual): "If a peer sends a message larger than ZMQ_MAXMSGSIZE
    # it is disconnected." The client's DEALER reconnects by itself and is answered again.
    raw = Raw(served.control, context)
    monitor = raw.sock.get_monitor_socket(zmq.EVENT_DISCONNECTED | zmq.EVENT_CONNECTED)
    try:
        assert raw.round_trip([b'{"cmd":"status","id":0}'])["id"] == 0
        raw.sock.send_multipart([b"{" + b" " * (4 * MAX_REQUEST_BYTES) + b"}"])
        events = []
        while zmq.EVENT_DISCONNECTED not in events:
            assert monitor.poll(int(REPLY_TIMEOUT_S * 1000)), f"no disconnect seen, events {events}"
            events.append(recv_monitor_message(monitor)["event"])
        assert raw.sock.poll(0, zmq.POLLIN) == 0  # no reply to the oversized frame
        reply = raw.round_trip([b'{"cmd":"status","id":"again"}'])  # after the automatic reconnection
        assert reply["ok"] is True and reply["id"] == "again"
    finally:
        raw.sock.disable_monitor()
        monitor.close(linger=0)
        raw.close()
    assert served.proc.poll() is None
