"""A client written from docs/protocol.md alone, driving a real daemon over real sockets.

It uses only pyzmq, json and numpy: nothing from shotpair is imported here (a test below checks this
file's imports), so whatever it needs to know must be in the document. The daemon runs as a separate
process (`serve --fast` on the simulated bench) on free ports of 127.0.0.1. Every wait is a poll with a
timeout; every socket is closed with linger 0; the process is killed if it is still alive at the end.
"""

from __future__ import annotations

import ast
import itertools
import json
import os
import queue
import re
import subprocess
import sys
import threading
import time
import tomllib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zmq

DOC = Path(__file__).resolve().parent.parent / "docs" / "protocol.md"
START_TIMEOUT_S = 30.0   # the daemon process printing its endpoints (imports, bench connect)
REPLY_TIMEOUT_S = 5.0    # section 10.5: the daemon answers from memory; a few seconds is ample
SCAN_TIMEOUT_S = 60.0    # the whole small scan, with a wide margin for a loaded CI machine

PIXELS = 256
GRID_PS = [-3.0, 0.5, 1.0, 1.5, 2.0]
SWEEPS = 2

CONFIG = """
[bench]
name = "foreign client bench"
dark_shots = 200

[bench.detector]
pixels = 256
wavelength_poly_nm = [420.0, 1.176470588]

[stream]
status_interval_s = 0.2

[scan]
title = "foreign client"
shots_per_point = 200
sweeps = 2
order = "alternating"
output = "{output}"

[[scan.delays]]
kind = "list"
delays_ps = [-3.0, 0.5]

[[scan.delays]]
kind = "linear"
start_ps = 1.0
stop_ps = 2.0
step_ps = 0.5
"""

# ------------------------------------------------------------------ what the document says (sections 3-6)
ENVELOPE = {"v", "seq", "scan_id", "kind", "time", "arrays"}
REPLY_ENVELOPE = {"v", "ok", "id", "arrays"}
ERROR_REPLY = {"v", "ok", "id", "error", "state", "arrays"}
STATES = {"idle", "moving", "preparing", "acquiring", "paused", "stopping"}
ERROR_CODES = {"bad_request", "unknown_command", "bad_argument", "illegal_state", "config_error",
               "instrument_error", "storage_error", "internal_error"}
COMMANDS = ["status", "start", "pause", "resume", "abort", "snapshot", "move", "shutdown"]
STATUS = {"state", "scan_id", "output", "sweep", "sweeps", "point", "points", "points_done", "points_total",
          "delay_ps", "shots_per_s", "rejected_fraction", "excess_noise_median", "eta_s", "last_error",
          "last_scan_state", "last_scan_id", "version", "protocol", "bench", "data_endpoint", "control_endpoint", "dropped_events",
          "fault", "retries"}
FIELDS = {
    "status": STATUS,
    "block": {"sweep", "index", "delay_ps", "shots_done", "shots_target", "pairs"},
    "point": {"sweep", "index", "position_in_sweep", "delay_ps", "points_done", "points_total", "pairs",
              "rejected_pairs", "gaps", "shots", "eta_s", "shots_per_s", "phase_breaks", "unpaired_shots", "retries",
              "restarts"},
    "sweep": {"sweep", "sweeps"},
    "log": {"level", "message"},
    ("scan", "started"): {"event", "path", "n_points", "sweeps", "shots_per_point", "estimated_duration_s"},
    ("scan", "complete"): {"event", "path", "reason", "points_done", "safe_problems"},
    ("scan", "aborted"): {"event", "path", "reason", "points_done", "safe_problems"},
}
# array name -> (dtype, shape in symbols: p pixels, n delay points, s sweeps)
ARRAYS: dict[Any, dict[str, tuple[str, tuple[str, ...]]]] = {
    "status": {}, "log": {}, ("scan", "complete"): {}, ("scan", "aborted"): {},
    ("scan", "started"): {"delay_ps": ("<f8", ("n",)), "wavelength_nm": ("<f8", ("p",))},
    "block": {"delta_od": ("<f8", ("p",)), "delta_od_error": ("<f8", ("p",))},
    "point": {name: ("<f8", ("p",)) for name in ("delta_od", "delta_od_error", "noise_floor", "mean_counts_pump_on",
                                                  "mean_counts_pump_off", "combined_delta_od",
                                                  "combined_delta_od_error", "combined_noise_floor")}
             | {"masked": ("<i8", ("p",))},
    "sweep": {"delta_od": ("<f8", ("n", "p")), "delta_od_error": ("<f8", ("n", "p")), "pairs": ("<i8", ("n",)),
              "delay_ps": ("<f8", ("n",)), "wavelength_nm": ("<f8", ("p",))},
    "snapshot": {"delta_od": ("<f8", ("n", "p")), "delta_od_errors": ("<f8", ("n", "p")), "delay_ps": ("<f8", ("n",)),
                 "wavelength_nm": ("<f8", ("p",)), "completed": ("|b1", ("s", "n"))},
}
SIZES = {"p": PIXELS, "n": len(GRID_PS), "s": SWEEPS}


# ------------------------------------------------------------------ the codec, from section 2.2
def decode_arrays(specs: Any, frames: list[bytes]) -> dict[str, np.ndarray]:
    assert isinstance(specs, list) and len(specs) == len(frames), (specs, [len(f) for f in frames])
    out = {}
    for spec, frame in zip(specs, frames):
        assert set(spec) == {"name", "dtype", "shape"}, spec
        dtype = np.dtype(spec["dtype"])
        assert spec["dtype"][0] in "<|" and dtype.kind in "biuf", spec   # the daemon sends little-endian numbers
        shape = tuple(spec["shape"])
        assert all(isinstance(d, int) and d >= 0 for d in shape), spec
        assert len(frame) == int(np.prod(shape, dtype=np.int64)) * dtype.itemsize, (spec, len(frame))
        out[spec["name"]] = np.frombuffer(frame, dtype=dtype).reshape(shape)
    return out


def check_arrays(key: Any, arrays: dict[str, np.ndarray]) -> None:
    expected = ARRAYS[key]
    assert set(arrays) == set(expected), f"{key}: arrays {sorted(arrays)}, documented {sorted(expected)}"
    for name, (dtype, dims) in expected.items():
        a = arrays[name]
        assert a.dtype.str == dtype and a.shape == tuple(SIZES[d] for d in dims), (key, name, a.dtype.str, a.shape)


@dataclass
class Message:
    topic: str
    header: dict[str, Any]
    arrays: dict[str, np.ndarray]


@dataclass
class Stream:
    """SUB socket on the data stream, all topics; checks every message against sections 3 and 4."""

    sock: zmq.Socket
    last_seq: int | None = None
    lost: int = 0
    seen: list[Message] = field(default_factory=list)

    def next(self, timeout_s: float) -> Message | None:
        if not self.sock.poll(int(timeout_s * 1000), zmq.POLLIN):
            return None
        frames = self.sock.recv_multipart()
        assert len(frames) >= 2
        topic = frames[0].decode("ascii")
        header = json.loads(frames[1])
        assert isinstance(header, dict) and header["v"] == 1 and header["kind"] == topic, header
        seq = header["seq"]
        assert isinstance(seq, int) and seq >= 0
        if self.last_seq is not None:
            assert seq > self.last_seq, f"seq went from {self.last_seq} to {seq} without a restart"
            self.lost += seq - self.last_seq - 1       # section 10.1: a jump counts lost messages
        self.last_seq = seq
        assert header["scan_id"] is None or isinstance(header["scan_id"], str)
        assert isinstance(header["time"], float) and abs(header["time"] - time.time()) < 60
        arrays = decode_arrays(header["arrays"], frames[2:])
        key: Any = (topic, header.get("event")) if topic == "scan" else topic
        if key in FIELDS:   # unknown topics are allowed by section 9; the daemon of this test sends none
            documented = ENVELOPE | FIELDS[key]
            assert set(header) == documented, (f"{key}: undocumented {sorted(set(header) - documented)}, "
                                               f"missing {sorted(documented - set(header))}")
            check_arrays(key, arrays)
        else:
            pytest.fail(f"a topic or scan event the document does not list: {key}")
        msg = Message(topic, header, arrays)
        self.seen.append(msg)
        return msg


class Control:
    """DEALER socket on the control endpoint (section 5): one frame out, [header, arrays...] back."""

    def __init__(self, sock: zmq.Socket) -> None:
        self.sock = sock
        self.ids = itertools.count(100)

    def raw(self, frames: list[bytes],
            timeout_s: float = REPLY_TIMEOUT_S) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        self.sock.send_multipart(frames)
        assert self.sock.poll(int(timeout_s * 1000), zmq.POLLIN), f"no reply within {timeout_s} s to {frames!r:.200}"
        reply = self.sock.recv_multipart()
        header = json.loads(reply[0])
        assert header["v"] == 1 and isinstance(header["ok"], bool), header
        arrays = decode_arrays(header["arrays"], reply[1:])
        if not header["ok"]:
            assert set(header) == ERROR_REPLY, header
            assert set(header["error"]) == {"code", "message"} and header["error"]["message"], header
            assert header["error"]["code"] in ERROR_CODES and header["state"] in STATES and arrays == {}, header
        return header, arrays

    def request(self, cmd: str, **args: Any) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        request_id = next(self.ids)
        header, arrays = self.raw([json.dumps({"cmd": cmd, "id": request_id, **args}).encode()])
        assert header["id"] == request_id, header   # one request in flight: the reply is ours
        return header, arrays

    def ok(self, cmd: str, reply_fields: set[str], **args: Any) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        header, arrays = self.request(cmd, **args)
        assert header["ok"] is True, header
        documented = REPLY_ENVELOPE | reply_fields
        assert set(header) == documented, (cmd, sorted(set(header) ^ documented))
        return header, arrays

    def status(self) -> dict[str, Any]:
        return self.ok("status", STATUS)[0]


# ------------------------------------------------------------------ the daemon process and the sockets
@dataclass
class DaemonProcess:
    proc: subprocess.Popen
    lines: queue.Queue[str]
    data: str
    control: str
    config: Path
    output: Path
    stderr: Path

    def stderr_tail(self) -> str:
        return self.stderr.read_text(errors="replace")[-3000:] if self.stderr.exists() else ""


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[DaemonProcess]:
    output = tmp_path / "foreign.h5"
    config = tmp_path / "bench.toml"
    config.write_text(CONFIG.format(output=output))
    stderr_path = tmp_path / "daemon-stderr.txt"
    lines: queue.Queue[str] = queue.Queue()
    with open(stderr_path, "w") as err:
        proc = subprocess.Popen(
            [sys.executable, "-m", "shotpair.daemon.cli", "serve", str(config), "--fast",
             "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"],
            stdout=subprocess.PIPE, stderr=err, stdin=subprocess.DEVNULL, cwd=tmp_path, text=True,
            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    try:
        def read_stdout() -> None:
            for line in proc.stdout:   # ends when the process closes its stdout
                lines.put(line.rstrip("\n"))

        threading.Thread(target=read_stdout, name="daemon-stdout", daemon=True).start()
        try:
            first = lines.get(timeout=START_TIMEOUT_S)
        except queue.Empty:
            pytest.fail(f"the daemon printed nothing within {START_TIMEOUT_S} s; stderr:\n"
                        f"{stderr_path.read_text(errors='replace')[-3000:]}")
        # section 1: the first line carries the real endpoints
        m = re.fullmatch(r"serving bench '(.*)': data (\S+), control (\S+)", first)
        assert m, first
        assert m.group(1) == "foreign client bench"
        data, control = m.group(2), m.group(3)
        assert data.startswith("tcp://127.0.0.1:") and control.startswith("tcp://127.0.0.1:"), first
        yield DaemonProcess(proc, lines, data, control, config, output, stderr_path)
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(timeout=10)
        if proc.stdout is not None:
            proc.stdout.close()


@pytest.fixture
def ctx() -> Iterator[zmq.Context]:
    context = zmq.Context()
    try:
        yield context
    finally:
        context.destroy(linger=0)   # closes any socket left open, without waiting


@pytest.fixture
def control(ctx: zmq.Context, daemon: DaemonProcess) -> Iterator[Control]:
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    try:
        sock.connect(daemon.control)
        yield Control(sock)
    finally:
        sock.close(linger=0)


@pytest.fixture
def stream(ctx: zmq.Context, daemon: DaemonProcess) -> Iterator[Stream]:
    sock = ctx.socket(zmq.SUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, 100_000)
    sock.setsockopt(zmq.SUBSCRIBE, b"")
    try:
        sock.connect(daemon.data)
        yield Stream(sock)
    finally:
        sock.close(linger=0)


# ------------------------------------------------------------------ tests
def test_a_whole_scan_as_a_foreign_client_sees_it(daemon, control, stream):
    st = control.status()
    assert st["state"] == "idle" and st["protocol"] == 1 and st["bench"] == "foreign client bench"
    assert (st["data_endpoint"], st["control_endpoint"]) == (daemon.data, daemon.control)
    assert st["scan_id"] is None and st["points_done"] == 0 and st["last_scan_state"] is None

    # Slow joiner (section 10.3): the stream is live once a first message arrives; while idle that is
    # the status heartbeat (every status_interval_s = 0.2 s here), and it keeps coming.
    idle = [stream.next(5.0), stream.next(5.0)]
    assert all(m is not None and m.topic == "status" and m.header["state"] == "idle" for m in idle), idle
    assert idle[1].header["seq"] > idle[0].header["seq"]

    scan_table = tomllib.loads(daemon.config.read_text())["scan"]
    started_reply, _ = control.ok("start", {"scan_id", "output", "n_points", "sweeps", "estimated_duration_s"},
                                  scan=scan_table)
    scan_id = started_reply["scan_id"]
    assert isinstance(scan_id, str) and scan_id
    assert started_reply["output"] == str(daemon.output)
    assert (started_reply["n_points"], started_reply["sweeps"]) == (len(GRID_PS), SWEEPS)
    assert started_reply["estimated_duration_s"] > 0

    # Follow the stream until our scan's end message; never wait on it alone (section 10.4).
    end = None
    deadline = time.monotonic() + SCAN_TIMEOUT_S
    while end is None and time.monotonic() < deadline:
        msg = stream.next(2.0)
        if msg is None:
            if control.status()["state"] == "idle":
                break   # start left idle before replying: idle now means ended, the end message was lost
            continue
        if msg.topic == "scan" and msg.header["scan_id"] == scan_id and msg.header["event"] != "started":
            end = msg
    assert end is not None, f"no end message within {SCAN_TIMEOUT_S} s (lost {stream.lost}); stderr:\n" \
                            f"{daemon.stderr_tail()}"
    ours = [m for m in stream.seen if m.header["scan_id"] == scan_id]

    # scan started, then complete
    started = [m for m in ours if m.topic == "scan" and m.header["event"] == "started"]
    assert len(started) == 1 or stream.lost, started
    if started:
        h, a = started[0].header, started[0].arrays
        assert (h["path"], h["n_points"], h["sweeps"], h["shots_per_point"]) == (str(daemon.output), 5, 2, 200)
        np.testing.assert_array_equal(a["delay_ps"], GRID_PS)
        np.testing.assert_allclose(a["wavelength_nm"], 420.0 + 1.176470588 * np.arange(PIXELS))
    assert end.header["event"] == "complete", end.header
    assert (end.header["reason"], end.header["points_done"], end.header["safe_problems"]) == ("", 10, [])
    assert end.header["path"] == str(daemon.output) and daemon.output.exists()

    # points: every (sweep, index) once, in the alternating order, each already in the file
    points = [m for m in ours if m.topic == "point"]
    final = control.status()
    complete_stream = stream.lost == 0 and final["dropped_events"] == 0
    if complete_stream:
        assert [p.header["points_done"] for p in points] == list(range(1, 11))
        assert sorted((p.header["sweep"], p.header["index"]) for p in points) == \
            [(s, i) for s in range(SWEEPS) for i in range(len(GRID_PS))]
    assert points, "no point message at all"
    for p in points:
        h, a = p.header, p.arrays
        pos = h["position_in_sweep"]
        assert h["index"] == (pos if h["sweep"] == 0 else len(GRID_PS) - 1 - pos)   # alternating order
        assert h["delay_ps"] == GRID_PS[h["index"]] and h["points_total"] == 10 and h["shots"] == 200
        assert 0 < h["pairs"] and h["pairs"] + h["rejected_pairs"] <= h["shots"] // 2 and h["gaps"] >= 0
        assert np.isfinite(a["delta_od"]).mean() > 0.9 and np.all(a["masked"] >= 0)
        finite = np.isfinite(a["noise_floor"])
        assert np.all(a["noise_floor"][finite] > 0) and np.all(a["delta_od_error"][finite] > 0)
        assert np.nanmin(a["mean_counts_pump_off"]) > 0
        if h["sweep"] == 0:   # one sweep so far: merged equals this sweep's own
            np.testing.assert_array_equal(a["combined_delta_od"], a["delta_od"])

    sweeps = [m for m in ours if m.topic == "sweep"]
    if complete_stream:
        assert [s.header["sweep"] for s in sweeps] == [0, 1] and all(s.header["sweeps"] == 2 for s in sweeps)
        pairs = np.zeros(len(GRID_PS), dtype=np.int64)
        for p in points:
            pairs[p.header["index"]] += p.header["pairs"]
        np.testing.assert_array_equal(sweeps[-1].arrays["pairs"], pairs)

    statuses = [m.header for m in stream.seen if m.topic == "status"]
    assert {s["state"] for s in statuses} <= STATES
    assert any(s["state"] == "acquiring" and s["scan_id"] == scan_id for s in statuses) or stream.lost

    # the final status (section 4.1): 1-based sweep and point, outcome, nothing left
    assert (final["state"], final["scan_id"], final["last_scan_state"], final["last_error"]) == \
        ("idle", scan_id, "complete", None)
    assert (final["points_done"], final["points_total"], final["sweep"], final["sweeps"], final["point"],
            final["points"], final["eta_s"]) == (10, 10, 2, 2, 5, 5, 0)
    assert final["output"] == str(daemon.output) and final["delay_ps"] == GRID_PS[0]   # alternating: ends at 0

    # snapshot (section 6): the final map, equal to what the last messages said
    snap, arrays = control.ok("snapshot", {"scan_id", "state", "empty"})
    assert (snap["scan_id"], snap["state"], snap["empty"]) == (scan_id, "idle", False)
    check_arrays("snapshot", arrays)
    np.testing.assert_array_equal(arrays["delay_ps"], GRID_PS)
    np.testing.assert_allclose(arrays["wavelength_nm"], 420.0 + 1.176470588 * np.arange(PIXELS))
    assert arrays["completed"].all()
    for p in points:
        if p.header["sweep"] == SWEEPS - 1:
            i = p.header["index"]
            np.testing.assert_array_equal(arrays["delta_od"][i], p.arrays["combined_delta_od"])
            np.testing.assert_array_equal(arrays["delta_od_errors"][i], p.arrays["combined_delta_od_error"])
    if complete_stream:
        np.testing.assert_array_equal(sweeps[-1].arrays["delta_od"], arrays["delta_od"])
        np.testing.assert_array_equal(sweeps[-1].arrays["delta_od_error"], arrays["delta_od_errors"])

    # an alignment move while idle (section 6): reply, then a log line and a status back at idle
    moved, _ = control.ok("move", {"delay_ps", "position_mm", "state"}, delay_ps=1.0)
    assert moved["delay_ps"] == 1.0 and moved["state"] == "moving" and moved["position_mm"] > 0
    log = None
    deadline = time.monotonic() + 10.0
    while log is None and time.monotonic() < deadline:
        msg = stream.next(1.0)
        if msg is not None and msg.topic == "log":
            log = msg
    assert log is not None and log.header["scan_id"] is None, log
    assert log.header["level"] == "info" and log.header["message"].startswith("moved to 1.0 ps"), log.header
    assert control.status()["state"] == "idle"


MALFORMED = [
    # (frames sent, error code, id echoed) -- section 5.2 and 7
    ([b"not json"], "bad_request", None),
    ([b"[1, 2]"], "bad_request", None),
    ([b'{"id": 5}'], "bad_request", 5),                                       # missing cmd
    ([b'{"cmd": 5, "id": 6}'], "bad_request", 6),
    ([b'{"cmd": "status", "id": 7}', b"{}"], "bad_request", None),           # two frames
    ([b"", b'{"cmd": "status", "id": 8}'], "bad_request", None),             # what a REQ socket would send
    ([b'{"cmd": "frobnicate", "id": "x"}'], "unknown_command", "x"),
    ([b'{"cmd": "start", "id": 9}'], "bad_argument", 9),                      # neither scan nor path
    ([b'{"cmd": "start", "id": 10, "scan": {"shots_per_point": 200}}'], "config_error", 10),
    ([b'{"cmd": "start", "id": 11, "path": "no-such-file.toml"}'], "config_error", 11),
    ([b'{"cmd": "move", "id": 12, "delay_ps": "soon"}'], "bad_argument", 12),
    ([b'{"cmd": "move", "id": 13}'], "bad_argument", 13),
    ([b'{"cmd": "move", "id": 14, "delay_ps": 1e9}'], "bad_argument", 14),   # outside the stage travel
    ([b'{"cmd": "pause", "id": 15}'], "illegal_state", 15),
    ([b'{"cmd": "resume", "id": 16}'], "illegal_state", 16),
    ([b'{"cmd": "abort", "id": 17}'], "illegal_state", 17),
]


def test_malformed_requests_get_the_documented_errors_and_shutdown_ends_the_process(daemon, control):
    for frames, code, echoed in MALFORMED:
        reply, _ = control.raw(frames)
        assert (reply["ok"], reply["error"]["code"], reply["id"], reply["state"]) == (False, code, echoed, "idle"), \
            (frames, reply)
        if code == "unknown_command":
            assert all(c in reply["error"]["message"] for c in COMMANDS), reply
        if code == "illegal_state":
            assert "allowed now: move, start" in reply["error"]["message"], reply
        assert control.status()["state"] == "idle"   # the daemon still answers

    reply, _ = control.ok("shutdown", {"state", "stopping"})
    assert reply["stopping"] is True and reply["state"] == "idle"
    try:
        code = daemon.proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        pytest.fail(f"the daemon did not exit within 15 s of shutdown; stderr:\n{daemon.stderr_tail()}")
    assert code == 0, daemon.stderr_tail()
    lines = []
    while True:
        try:
            lines.append(daemon.lines.get(timeout=5.0))
        except queue.Empty:
            break
        if lines[-1] == "daemon stopped; bench left safe":
            break
    assert lines and lines[-1] == "daemon stopped; bench left safe", lines
    # nothing answers any more (section 10.5: no answer within the timeout means the daemon is gone)
    control.sock.send_multipart([b'{"cmd": "status"}'])
    assert not control.sock.poll(300, zmq.POLLIN)


# ------------------------------------------------------------------ this file keeps to the document
def test_this_client_imports_nothing_of_shotpair():
    tree = ast.parse(Path(__file__).read_text(encoding="utf-8"))
    modules = [alias.name for node in ast.walk(tree) if isinstance(node, ast.Import) for alias in node.names]
    modules += [node.module or "" for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)]
    assert modules and not [m for m in modules if m.split(".")[0] in ("shotpair", "daemon", "drivers", "simulators")]
    assert {m.split(".")[0] for m in modules} <= {"__future__", "ast", "collections", "itertools", "json", "os",
                                                    "queue", "re", "subprocess", "sys", "threading", "time",
                                                    "tomllib", "dataclasses", "pathlib", "typing", "numpy", "pytest",
                                                    "zmq"}


def test_every_name_this_client_relies_on_is_in_the_document():
    doc = DOC.read_text(encoding="utf-8")
    names = set(ENVELOPE | REPLY_ENVELOPE | ERROR_REPLY | STATES | ERROR_CODES | set(COMMANDS))
    for key, fields in FIELDS.items():
        names |= fields | ({key[1]} if isinstance(key, tuple) else {key})
    for arrays in ARRAYS.values():
        names |= set(arrays)
    missing = sorted(n for n in names if f"`{n}`" not in doc)
    assert not missing, f"used here but not in docs/protocol.md: {missing}"
    for arrays in ARRAYS.values():
        for dtype, _ in arrays.values():
            assert f"`{dtype}`" in doc.replace("\\|", "|"), dtype
