"""The daemon across processes over tcp on 127.0.0.1: a real-time simulated scan is paused, resumed and
aborted by a client; malformed requests get error replies and the daemon keeps running; a stalled
subscriber loses messages (and sees the gap) without slowing the acquisition; shutdown exits 0."""

import time
import tomllib

import h5py
import numpy as np
import pytest

from daemon_helpers import PIXELS, Served, write_bench, write_scan
from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.drivers.errors import DaemonError, DaemonUnavailable

WAIT_S = 60.0


@pytest.fixture
def served(tmp_path):
    s = Served(write_bench(tmp_path), fast=False)
    yield s
    s.stop()


def scan_table(path):
    with open(path, "rb") as fh:
        return tomllib.load(fh)["scan"]


def wait_for(sub, predicate, timeout_s=WAIT_S):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        msg = sub.receive(0.5)
        if msg is not None and predicate(msg):
            return msg
    raise AssertionError("message not seen in time")


def test_pause_resume_abort_over_tcp(served, tmp_path):
    with ControlClient(served.control, timeout_s=10) as c, Subscriber(served.data) as sub:
        assert c.status()["state"] == "idle"
        with pytest.raises(DaemonError) as info:
            c.pause()
        assert info.value.code == "illegal_state" and "allowed now" in str(info.value)
        reply = c.start(scan=scan_table(write_scan(tmp_path, "live", shots=500, sweeps=2)))
        scan_id = reply["scan_id"]
        with pytest.raises(DaemonError) as info:
            c.start(scan=scan_table(write_scan(tmp_path, "second")))
        assert info.value.code == "illegal_state"
        point = wait_for(sub, lambda m: m.topic == "point")
        assert point["scan_id"] == scan_id and point.arrays["delta_od"].shape == (PIXELS,)
        c.pause()
        wait_for(sub, lambda m: m.topic == "status" and m["state"] == "paused")
        assert c.status_record().state == "paused"
        c.resume()
        wait_for(sub, lambda m: m.topic == "status" and m["state"] == "acquiring")
        wait_for(sub, lambda m: m.topic == "point")
        snap = c.snapshot()
        assert snap.arrays["delta_od"].shape == (9, PIXELS) and snap.arrays["completed"].shape == (2, 9)
        assert np.isfinite(snap.arrays["delta_od"]).any()
        c.abort(reason="sample degraded")
        end = wait_for(sub, lambda m: m.topic == "scan" and m["event"] != "started")
        assert end["event"] == "aborted" and end["reason"] == "sample degraded"
        assert served.proc.poll() is None  # the daemon keeps running
        st = c.status()
        assert st["state"] == "idle" and st["last_scan_state"] == "aborted"
        with h5py.File(end["path"], "r") as f:
            assert f["entry/state"][()].decode() == "aborted"
            assert f["entry/sweeps/completed"][()].sum() >= 2
        c.shutdown()
    assert served.proc.wait(timeout=WAIT_S) == 0


def test_bad_requests_get_errors_and_the_daemon_lives(served, tmp_path):
    with ControlClient(served.control, timeout_s=10) as c:
        for cmd, args, code in [("warp", {}, "unknown_command"), ("move", {"delay_ps": "far"}, "bad_argument"),
                                ("move", {"delay_ps": 1e9}, "bad_argument"), ("start", {}, "bad_argument"),
                                ("start", {"scan": {"shots_per_point": -1}}, "config_error")]:
            with pytest.raises(DaemonError) as info:
                c.request(cmd, **args)
            assert info.value.code == code, (cmd, args, info.value)
        # a scan whose delays the stage cannot reach: refused before anything moves
        bad = scan_table(write_scan(tmp_path, "far"))
        bad["delays"][0]["stop_ps"] = 1e6
        with pytest.raises(DaemonError) as info:
            c.start(scan=bad)
        assert info.value.code == "config_error" and "scan.delays[0]" in str(info.value)
        assert c.status()["state"] == "idle"
        reply = c.move(2.0)
        assert reply["position_mm"] == pytest.approx(10.0 + 2.0 / 13.3463, abs=1e-3)
        c.shutdown()
    assert served.proc.wait(timeout=WAIT_S) == 0


def test_stalled_subscriber_loses_messages_not_time(served, tmp_path):
    with ControlClient(served.control, timeout_s=10) as c, Subscriber(served.data) as watcher:
        durations: list[float] = []
        seqs: list[int] = []
        stalled = None
        c.move(0.0)  # homes the stage first, so that neither scan below pays for homing
        wait_for(watcher, lambda m: m.topic == "log" and m["message"].startswith("moved to"))
        try:
            for name in ("alone", "stalled"):
                if name == "stalled":
                    # connected with the smallest buffers, and never read while the scan runs
                    stalled = Subscriber(served.data, receive_hwm=1, receive_buffer_bytes=4096)
                c.start(scan=scan_table(write_scan(tmp_path, name, shots=300, step=0.2)))
                start = wait_for(watcher, lambda m: m.topic == "scan" and m["event"] == "started")
                end = wait_for(watcher, lambda m: m.topic == "scan" and m["event"] != "started")
                assert end["event"] == "complete"
                durations.append(end["time"] - start["time"])
                seqs.append(end["seq"])
            # the stalled subscriber now reads on until it sees a message published after the scan: the stream
            # went on past it, and the gap shows in seq
            for _ in range(5000):
                msg = stalled.receive(WAIT_S)
                assert msg is not None
                if msg["seq"] > seqs[1]:
                    break
            assert stalled.lost > 0
        finally:
            if stalled is not None:
                stalled.close()
        # real time at 1 kHz: the same scan takes the same time whether or not a client is stuck
        assert durations[1] == pytest.approx(durations[0], rel=0.25), durations
        c.shutdown()
    assert served.proc.wait(timeout=WAIT_S) == 0


def test_no_daemon_is_a_clear_error(tmp_path):
    with ControlClient("tcp://127.0.0.1:9", timeout_s=0.5) as c:
        with pytest.raises(DaemonUnavailable, match="no shotpair daemon answered within 0.5 s"):
            c.status()
