"""The acquisition loop: pause/resume re-measures the interrupted point, abort and instrument errors leave
the bench safe (shutter closed, stage stopped) and the file marked aborted with the reason."""

import queue
import threading
from pathlib import Path

import h5py
import pytest

from shotpair.daemon.bench import build_bench
from shotpair.daemon.config import load_config
from shotpair.daemon.events import ScanEnded, StateChanged
from shotpair.daemon.plan import make_plan
from shotpair.daemon.runner import Runner, ScanJob, new_scan_id
from shotpair.drivers import registry
from shotpair.drivers.errors import InstrumentError
from shotpair.simulators.instruments import make_detector

TIMEOUT_S = 60.0


def start(cfg_path: Path, driver: str = "sim"):
    cfg = load_config(cfg_path)
    bench_settings = cfg.bench
    if driver != "sim":
        det = bench_settings.detector.model_copy(update={"driver": driver})
        bench_settings = bench_settings.model_copy(update={"detector": det})
    plan = make_plan(cfg.require_scan(), bench_settings)
    bench = build_bench(bench_settings, cfg.config.simulation, realtime=False)
    bench.connect()
    runner = Runner(bench)
    job = ScanJob(cfg, cfg.require_scan(), plan, cfg_path.with_suffix(".h5"), new_scan_id())
    runner.start(job)
    return runner, bench, job


class Gate:
    """A simulated detector that stops before its n-th read until the test lets it go (no race with
    a fast simulated scan that could otherwise finish before the test acts)."""

    def __init__(self, at_read: int) -> None:
        self.at_read = at_read
        self.reads = 0
        self.reached = threading.Event()
        self.release = threading.Event()

    def factory(self, name, options, context):
        det = make_detector(name, options, context)
        real = det.acquire

        def acquire(n_shots, timeout_s):
            self.reads += 1
            if self.reads == self.at_read:
                self.reached.set()
                assert self.release.wait(TIMEOUT_S)
            return real(n_shots, timeout_s)

        det.acquire = acquire
        return det


def events_until(runner, predicate):
    seen = []
    while True:
        ev = runner.events.get(timeout=TIMEOUT_S)
        seen.append(ev)
        if predicate(ev):
            return seen


def is_end(ev):
    return isinstance(ev, ScanEnded)


def test_pause_resume_and_complete(small_scan):
    # Reads of 500 shots: the dark is read 1, point k is reads 2k and 2k + 1. Pausing during read 4 pauses
    # in the middle of point 2, which must then be measured again from its start.
    gate = Gate(at_read=4)
    registry.register("detector", "gate-pause", gate.factory)
    runner, bench, job = start(small_scan(shots=1000, name="pause", noise="dropped_frames = false"),
                               driver="gate-pause")
    assert gate.reached.wait(TIMEOUT_S)
    runner.pause()
    gate.release.set()
    events_until(runner, lambda e: isinstance(e, StateChanged) and e.state == "paused")
    assert bench.simulation.shutter_open is False  # paused: shutter closed
    runner.resume()
    seen = events_until(runner, is_end)
    assert seen[-1].state == "complete"
    assert any(isinstance(e, StateChanged) and e.state == "acquiring" for e in seen)
    with h5py.File(job.output, "r") as f:
        assert f["entry/sweeps/completed"][()].all()
        shots = f["entry/diagnostics/shots"][()]
    # every point holds exactly its own shots: the one interrupted by the pause is not stored half-done
    assert (shots == 1000).all()
    # the dark, two reads per point and sweep, and the two reads of point 2 again after the pause
    # (the read that was under way when the pause came counted towards the discarded attempt)
    points = shots.size
    assert gate.reads == 1 + 2 * points + 1
    assert runner.join(TIMEOUT_S)
    bench.disconnect()


def test_abort_leaves_bench_safe_and_file_marked(small_scan):
    gate = Gate(at_read=6)
    registry.register("detector", "gate-abort", gate.factory)
    runner, bench, job = start(small_scan(shots=200, name="abort"), driver="gate-abort")
    assert gate.reached.wait(TIMEOUT_S)
    runner.abort("sample degraded")
    gate.release.set()
    end = events_until(runner, is_end)[-1]
    assert end.state == "aborted" and end.reason == "sample degraded" and end.safe_problems == []
    assert bench.simulation.shutter_open is False
    assert not bench.delay_axis.is_moving()
    with h5py.File(job.output, "r") as f:
        assert f["entry/state"][()].decode() == "aborted"
        assert f["entry/state_reason"][()].decode() == "sample degraded"
        assert 1 <= f["entry/sweeps/completed"][()].sum() < f["entry/sweeps/completed"].size
    assert runner.join(TIMEOUT_S)
    assert runner.state.value == "idle"
    bench.disconnect()


def test_instrument_error_mid_scan(small_scan):
    # An error that is not worth retrying (a refusal; timeouts, garbled replies and lost connections are
    # retried, see test_faults.py) ends the scan with the bench safe and the file marked aborted.
    calls = {"n": 0}

    def flaky(name, options, context):
        det = make_detector(name, options, context)
        real = det.acquire

        def acquire(n_shots, timeout_s):
            calls["n"] += 1
            if calls["n"] == 4:
                raise InstrumentError("refused the acquisition (trigger input not armed)", instrument=name)
            return real(n_shots, timeout_s)

        det.acquire = acquire
        return det

    registry.register("detector", "flaky", flaky)
    runner, bench, job = start(small_scan(shots=200, name="flaky"), driver="flaky")
    seen = events_until(runner, is_end)
    end = seen[-1]
    assert end.state == "aborted" and "detector" in end.reason and "trigger input" in end.reason
    assert bench.simulation.shutter_open is False
    with h5py.File(job.output, "r") as f:
        assert f["entry/state"][()].decode() == "aborted"
        assert "detector" in f["entry/state_reason"][()].decode()
    with pytest.raises(queue.Empty):
        runner.events.get(timeout=0.05)  # nothing after the end event
    assert runner.join(TIMEOUT_S)
    bench.disconnect()
