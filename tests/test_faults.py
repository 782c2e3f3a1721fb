"""Instrument faults during long scans: bounded retries, fault pauses and resume, chopper lock loss, and
phase breaks (two equal pump flags in a row) that are counted and never paired across.

Faults are injected by wrapping the simulated instruments (registered under test driver names), so each
test says exactly which call fails and how. The chi-square checks follow test_scan_end_to_end.py: the
reduced chi-square of measured against stored truth is 1 within about sqrt(2/k) for k values (a
chi-square variable with k degrees of freedom has mean k and variance 2k; any statistics text).
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shotpair.daemon import engine
from shotpair.daemon.bench import build_bench
from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.daemon.config import StreamSettings, load_config
from shotpair.daemon.events import InstrumentFault, LogEvent, PointSaved, ScanEnded
from shotpair.daemon.faults import RetryBudget, is_retryable
from shotpair.daemon.pairing import pair_shots
from shotpair.daemon.plan import make_plan
from shotpair.daemon.runner import Runner, ScanJob, new_scan_id
from shotpair.daemon.server import Daemon
from shotpair.drivers import registry
from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import (InstrumentReplyError, InstrumentTimeout, LimitError, StateError,
                                     TransportError)
from shotpair.simulators import instruments as sim

TIMEOUT_S = 60.0
PURE = """
laser_fluctuation = false
pump_fluctuation = false
drift = false
scatter = false
emission = false
"""
UNLOCKED = object()  # an action: is_locked() answers False for this call


class Script:
    """A simulated instrument whose calls of some methods fail on purpose.

    ``actions[method]`` maps a call number (1-based, per method) to an exception to raise, or to UNLOCKED;
    ``failing[method] = (k, exc)`` raises ``exc`` on every call from the k-th on. Calls of
    ``connect``/``disconnect`` are counted (a reconnect is one of each).
    """

    def __init__(self, make: Callable[..., Any], actions: dict[str, dict[int, Any]] | None = None,
                 failing: dict[str, tuple[int, BaseException]] | None = None) -> None:
        self.make = make
        self.actions = actions or {}
        self.failing = failing or {}
        self.calls: dict[str, int] = {}
        self.connects = 0
        self.disconnects = 0

    def factory(self, name: str, options: Any, context: Any) -> Any:
        inst = self.make(name, options, context)
        for method in set(self.actions) | set(self.failing):
            setattr(inst, method, self._wrap(method, getattr(inst, method)))
        real_connect, real_disconnect = inst.connect, inst.disconnect

        def connect() -> None:
            self.connects += 1
            real_connect()

        def disconnect() -> None:
            self.disconnects += 1
            real_disconnect()

        inst.connect, inst.disconnect = connect, disconnect
        return inst

    def _wrap(self, method: str, real: Callable[..., Any]) -> Callable[..., Any]:
        def call(*args: Any, **kwargs: Any) -> Any:
            k = self.calls[method] = self.calls.get(method, 0) + 1
            if method in self.failing and k >= self.failing[method][0]:
                raise self.failing[method][1]
            action = self.actions.get(method, {}).get(k)
            if isinstance(action, BaseException):
                raise action
            if action is UNLOCKED:
                return False
            return real(*args, **kwargs)

        return call


_names = iter(range(1_000_000))


def use(kind: str, script: Script) -> str:
    """Register ``script`` as a driver of ``kind`` under a fresh name; returns the name."""
    name = f"faulty-{kind}-{next(_names)}"
    registry.register(kind, name, script.factory)
    return name


def make_job(cfg_path: Path, *, drivers: dict[str, str] | None = None, **bench: Any):
    """(bench settings, job) for the scan in ``cfg_path`` with some drivers and [bench] keys replaced."""
    cfg = load_config(cfg_path)
    update: dict[str, Any] = {"retry_delay_s": 0.0, **bench}
    for kind, driver in (drivers or {}).items():
        update[kind] = getattr(cfg.bench, kind).model_copy(update={"driver": driver})
    settings = cfg.bench.model_copy(update=update)
    plan = make_plan(cfg.require_scan(), settings)
    return cfg, settings, ScanJob(cfg, cfg.require_scan(), plan, cfg_path.with_suffix(".h5"), new_scan_id())


@pytest.fixture
def runner_for():
    """start(cfg_path, drivers=..., **bench) -> (runner, bench, job); closes and disconnects afterwards."""
    made: list[tuple[Runner, Any]] = []

    def start(cfg_path: Path, **kwargs: Any):
        cfg, settings, job = make_job(cfg_path, **kwargs)
        bench = build_bench(settings, cfg.config.simulation, realtime=False)
        bench.connect()
        runner = Runner(bench)
        made.append((runner, bench))
        runner.start(job)
        return runner, bench, job

    yield start
    for runner, bench in made:
        assert runner.close(TIMEOUT_S)
        bench.disconnect()


def events_until(runner: Runner, predicate: Callable[[Any], bool]) -> list[Any]:
    seen = []
    while True:
        ev = runner.events.get(timeout=TIMEOUT_S)
        seen.append(ev)
        if predicate(ev):
            return seen


def is_end(ev: Any) -> bool:
    return isinstance(ev, ScanEnded)


def read(path: Path) -> dict[str, Any]:
    with h5py.File(path, "r") as f:
        e = f["entry"]
        out = {k: e["delta_od"][k][()] for k in ("delta_od", "delta_od_errors")}
        out["truth"] = e["simulation_truth/delta_od"][()]
        for k in ("shots", "retries", "restarts", "phase_breaks", "gaps", "pairs", "unpaired_shots", "order"):
            out[k] = e["diagnostics"][k][()]
        out["completed"] = e["sweeps/completed"][()]
        out["state"] = e["state"][()].decode()
        out["reason"] = e["state_reason"][()].decode()
        out["log"] = [line.decode() for line in e["log"][()]] if "log" in e else []
    return out


def chi2_ok(d: dict[str, Any]) -> float:
    z = (d["delta_od"] - d["truth"]) / d["delta_od_errors"]
    value, k = float(np.mean(z**2)), z.size
    assert abs(value - 1.0) < 5 * np.sqrt(2.0 / k), value
    assert d["truth"].min() < -5e-3  # a real signal, not a pass on noise alone
    return value


# ---------------------------------------------------------------------------------------- retry budget

def test_retry_budget_counts_a_sliding_window():
    now = [0.0]
    budget = RetryBudget(2, 10.0, clock=lambda: now[0])
    assert budget.take()
    now[0] = 5.0
    assert budget.take()
    assert not budget.take()            # third within 10 s: spent
    now[0] = 9.9
    assert not budget.take()
    now[0] = 10.0                       # the first retry has left the window
    assert budget.take() and not budget.take()
    assert budget.total == 3 and budget.in_window() == 2
    budget.reset()
    assert budget.in_window() == 0 and budget.take() and budget.total == 4
    assert not RetryBudget(0, 1.0).take()
    with pytest.raises(ValueError):
        RetryBudget(-1, 1.0)
    with pytest.raises(ValueError):
        RetryBudget(1, 0.0)


def test_which_errors_are_retried():
    assert is_retryable(InstrumentTimeout("late", instrument="detector", timeout_s=1.0))
    assert is_retryable(InstrumentReplyError("garbled", instrument="detector"))
    assert is_retryable(TransportError("closed", instrument="chopper"))
    assert not is_retryable(LimitError("refused", instrument="delay_axis", value=1.0, low=0.0, high=0.5))
    assert not is_retryable(StateError("connect first", state="disconnected", action="move"))
    assert not is_retryable(RuntimeError("a bug"))


# ---------------------------------------------------------------------------------------- retries

def test_faults_within_the_budget_are_retried_and_the_scan_agrees_with_truth(small_scan, runner_for):
    det = Script(sim.make_detector, {"acquire": {
        4: InstrumentTimeout("no shots within the timeout", instrument="detector", timeout_s=5.0),
        9: InstrumentReplyError("garbled block (no '#')", instrument="detector"),
        14: TransportError("connection reset by the instrument", instrument="detector")}})
    axis = Script(sim.make_delay_axis, {"move_to_mm": {
        6: InstrumentTimeout("no reply to MOVE", instrument="delay_axis", timeout_s=2.0)}})
    chopper = Script(sim.make_chopper, {"is_locked": {
        8: TransportError("port closed", instrument="chopper")}})
    runner, bench, job = runner_for(
        small_scan(noise=PURE + "dropped_frames = false", name="retried"),
        drivers={"detector": use("detector", det), "delay_axis": use("delay_axis", axis),
                 "chopper": use("chopper", chopper)},
        retry_attempts=5)
    seen = events_until(runner, is_end)
    assert seen[-1].state == "complete", seen[-1].reason
    faults = [e for e in seen if isinstance(e, InstrumentFault)]
    # detector read 4 is point 3's; lock check 8 opens point 4; move 6 is point 6's; reads 9 and 14: points 7, 11
    assert [(f.instrument, f.action) for f in faults] == [
        ("detector", "retry"), ("chopper", "retry"), ("delay_axis", "retry"), ("detector", "retry"),
        ("detector", "retry")]
    assert [f.retries for f in faults] == [1, 2, 3, 4, 5]
    warnings = [e.message for e in seen if isinstance(e, LogEvent) and e.level == "warning"]
    assert len(warnings) == 5 and "detector: garbled block" in warnings[3] and "delay_axis: no reply" in warnings[2]
    assert "retrying (1 of 5 retries within 600 s)" in warnings[0]
    # a lost connection is opened again (one disconnect + connect beyond the bench's first connect)
    assert (det.connects, det.disconnects) == (2, 1) and (chopper.connects, chopper.disconnects) == (2, 1)
    assert (axis.connects, axis.disconnects) == (1, 0)

    d = read(job.output)
    assert d["state"] == "complete" and d["completed"].all()
    assert int(d["retries"].sum()) == 5
    # only the lost detector connection discards the point's shots; a late or garbled block is read again
    assert int(d["restarts"].sum()) == 1
    assert (d["shots"] == 400).all()  # never half a point, never a point and a half
    assert sum("retry:" in line for line in d["log"]) == 5
    saved = [e for e in seen if isinstance(e, PointSaved)]
    assert sum(e.retries for e in saved) == 5 and sum(e.restarts for e in saved) == 1
    chi2_ok(d)
    # reads: the dark (500 shots), one per point (400 shots), and the 3 that failed
    assert det.calls["acquire"] == 1 + d["shots"].size + 3


# ---------------------------------------------------------------------------------------- fault pause

@pytest.fixture
def daemon_for():
    """serve(cfg_path, drivers=..., **bench) -> (daemon, job): a Daemon on 127.0.0.1 free ports serving in
    a thread, the scan not yet started; stopped, joined and disconnected afterwards."""
    made: list[tuple[Daemon, threading.Thread, Any]] = []

    def serve(cfg_path: Path, **kwargs: Any):
        cfg, settings, job = make_job(cfg_path, **kwargs)
        bench = build_bench(settings, cfg.config.simulation, realtime=False)
        bench.connect()
        daemon = Daemon(bench, cfg, StreamSettings(status_interval_s=0.2))
        daemon.bind("tcp://127.0.0.1:*", "tcp://127.0.0.1:*")
        thread = threading.Thread(target=daemon.serve, name="test-daemon", daemon=True)
        made.append((daemon, thread, bench))
        thread.start()
        return daemon, job

    yield serve
    for daemon, thread, bench in made:
        daemon.request_stop()
        thread.join(TIMEOUT_S)
        assert not thread.is_alive()
        daemon.close()
        bench.disconnect()


def wait_message(sub: Subscriber, predicate: Callable[[Any], bool], seen: list[Any] | None = None) -> Any:
    while True:
        msg = sub.receive(TIMEOUT_S)
        assert msg is not None, "no message from the daemon in time"
        if seen is not None:
            seen.append(msg)
        if predicate(msg):
            return msg


def paused_on_fault(msg: Any) -> bool:
    return msg.topic == "status" and msg["state"] == "paused" and msg["fault"] is not None


@pytest.fixture
def clients(daemon_for):
    """serve(...) -> (daemon, job, control, subscriber), the subscriber already receiving."""
    opened: list[Any] = []

    def serve(cfg_path: Path, **kwargs: Any):
        daemon, job = daemon_for(cfg_path, **kwargs)
        control = ControlClient(daemon.control_endpoint, timeout_s=10.0)
        sub = Subscriber(daemon.data_endpoint)
        opened.extend([control, sub])
        wait_message(sub, lambda m: m.topic == "status")  # slow joiner: the stream reaches us now
        return daemon, job, control, sub

    yield serve
    for c in opened:
        c.close()


def test_past_the_budget_the_scan_pauses_and_resume_continues(small_scan, clients):
    timeout = InstrumentTimeout("no shots within 5 s", instrument="detector", timeout_s=5.0)
    det = Script(sim.make_detector, {"acquire": {k: timeout for k in (6, 7, 8)}})
    daemon, job, control, sub = clients(small_scan(noise=PURE + "dropped_frames = false", name="paused"),
                                        drivers={"detector": use("detector", det)}, retry_attempts=2)
    daemon.start_job(job)
    seen: list[Any] = []
    msg = wait_message(sub, paused_on_fault, seen)
    assert msg["fault"]["instrument"] == "detector" and "no shots within 5 s" in msg["fault"]["error"]
    assert msg["retries"] == 2
    status = control.status()
    assert status["state"] == "paused" and status["fault"]["instrument"] == "detector"
    assert daemon.bench.simulation.shutter_open is False  # paused: shutter closed
    logs = [(m["level"], m["message"]) for m in seen if m.topic == "log"]
    assert [level for level, _ in logs] == ["warning", "warning", "error"], logs
    assert "scan paused: detector: no shots within 5 s" in logs[-1][1]
    assert det.calls["acquire"] == 8  # the dark, points 1-4, and three tries of point 5

    control.resume()
    after: list[Any] = []
    end = wait_message(sub, lambda m: m.topic == "scan" and m.get("event") in ("complete", "aborted"), after)
    assert end["event"] == "complete", end["reason"]
    assert control.status()["fault"] is None
    assert ("info", "detector answers again: resuming; the interrupted point is measured again") in [
        (m["level"], m["message"]) for m in after if m.topic == "log"]
    points = [m for m in seen + after if m.topic == "point"]
    faulted = [m for m in points if m["retries"]]
    # the second failure in a row reopens the connection and starts the point again, the pause once more
    assert len(faulted) == 1 and faulted[0]["retries"] == 2 and faulted[0]["restarts"] == 2
    assert det.connects == 1 + 1 + 1  # the bench's connect, after the second failure, on resume
    d = read(job.output)
    assert d["state"] == "complete" and d["completed"].all() and (d["shots"] == 400).all()
    assert any("paused by a fault: detector: no shots within 5 s" in line for line in d["log"])
    assert any("detector answers again" in line for line in d["log"])
    chi2_ok(d)
    # the probe (2 shots, thrown away) before resuming, then the interrupted point from its start
    assert det.calls["acquire"] == 1 + d["shots"].size + 3 + 1


def test_a_detector_failing_after_resume_stays_paused_and_abort_ends_it(small_scan, clients):
    # from read 6 on (point 5) every read fails: connection refused, also after reconnecting
    det = Script(sim.make_detector, failing={"acquire": (6, TransportError("connection refused", instrument="detector"))})
    daemon, job, control, sub = clients(small_scan(noise=PURE + "dropped_frames = false", name="stuck"),
                                        drivers={"detector": use("detector", det)}, retry_attempts=1)
    daemon.start_job(job)
    msg = wait_message(sub, paused_on_fault)
    first_time = msg["fault"]["time"]
    assert msg["fault"]["instrument"] == "detector" and "connection refused" in msg["fault"]["error"]

    control.resume()
    seen: list[Any] = []
    msg = wait_message(sub, lambda m: m.topic == "log" and m["message"].startswith("still paused"), seen)
    assert "detector: connection refused" in msg["message"]
    status = control.status()
    assert status["state"] == "paused" and status["fault"]["time"] >= first_time
    assert not any(m.topic == "status" and m["state"] == "acquiring" for m in seen)
    assert daemon.bench.simulation.shutter_open is False

    control.abort("detector broken")
    end = wait_message(sub, lambda m: m.topic == "scan" and m.get("event") in ("complete", "aborted"))
    assert end["event"] == "aborted"
    assert end["reason"].startswith("detector broken (while paused by a fault: detector: connection refused")
    assert end["safe_problems"] == []
    assert daemon.bench.simulation.shutter_open is False
    assert not daemon.bench.delay_axis.is_moving()
    d = read(job.output)
    assert d["state"] == "aborted" and d["reason"] == end["reason"]
    assert 1 <= d["completed"].sum() < d["completed"].size
    assert d["completed"].sum() == 4 and (d["shots"][d["completed"]] == 400).all()
    assert det.connects == 1 + 2 and det.calls["acquire"] == 1 + 4 + 2 + 1  # reconnected for the retry and the resume


# ---------------------------------------------------------------------------------------- chopper lock

def test_lock_loss_remeasures_the_point(small_scan, runner_for):
    # is_locked: call 1 is the check before the scan, then each point asks at its start and its end: point 1
    # calls 2, 3; point 2 call 4 (unlocked: measured again, 5, 6); point 3 calls 7, 8 (unlocked: again, 9, 10)
    chopper = Script(sim.make_chopper, {"is_locked": {4: UNLOCKED, 8: UNLOCKED}})
    det = Script(sim.make_detector, {"acquire": {}})
    runner, bench, job = runner_for(small_scan(noise=PURE + "dropped_frames = false", name="lock"),
                                    drivers={"chopper": use("chopper", chopper), "detector": use("detector", det)})
    seen = events_until(runner, is_end)
    assert seen[-1].state == "complete", seen[-1].reason
    d = read(job.output)
    first = d["order"][0]
    # point 2 lost lock at its start (measured once, after the lock came back), point 3 during its shots
    assert d["restarts"][0, first[1]] == 1 and d["restarts"][0, first[2]] == 1
    assert int(d["restarts"].sum()) == 2 and int(d["retries"].sum()) == 2
    assert (d["shots"] == 400).all()
    warnings = [e.message for e in seen if isinstance(e, LogEvent) and e.level == "warning"]
    assert ["at the start of the point" in warnings[0], "during the point" in warnings[1]] == [True, True]
    assert det.calls["acquire"] == 1 + d["shots"].size + 1  # only the lock lost during point 3 costs a read
    chi2_ok(d)


def test_without_require_lock_the_lock_is_not_asked(small_scan, runner_for):
    chopper = Script(sim.make_chopper, {"is_locked": {k: UNLOCKED for k in range(1, 200)}})
    cfg_path = small_scan(noise=PURE, name="nolock")
    cfg_path.write_text(cfg_path.read_text().replace("[bench.detector]", "[bench.chopper]\nrequire_lock = false\n\n"
                                                     "[bench.detector]"))
    runner, bench, job = runner_for(cfg_path, drivers={"chopper": use("chopper", chopper)})
    assert events_until(runner, is_end)[-1].state == "complete"
    assert chopper.calls.get("is_locked", 0) == 0


# ---------------------------------------------------------------------------------------- phase breaks

def reference_pairs(pump: np.ndarray, frame: np.ndarray, probe: np.ndarray | None) -> tuple[list[tuple[int, int]], int]:
    """A plain per-shot loop (the definition, written out) to hold the vectorised pairing to."""
    n = len(pump)
    broken = [frame[i + 1] - frame[i] != 1 or pump[i + 1] == pump[i] for i in range(n - 1)]
    phase = sum(1 for i in range(n - 1) if frame[i + 1] - frame[i] == 1 and pump[i + 1] == pump[i])
    cand = list(range(n)) if probe is None else [i for i in range(n) if probe[i]]
    pairs, k = [], 0
    while k + 1 < len(cand):
        a, b = cand[k], cand[k + 1]
        if pump[a] != pump[b] and not any(broken[a:b]):
            pairs.append((a, b) if pump[a] else (b, a))
            k += 2
        else:
            k += 1
    return pairs, phase


def test_pairing_never_crosses_a_phase_break_and_counts_them():
    # four states (probe on for 2 shots, off for 2); two slips between frames 2-3 and 3-4 put the pump
    # flags back in step, so frames 1 and 4 differ in pump flag, but they lie on both sides of two breaks
    frame = np.arange(1, 10)
    pump = np.array([1, 0, 0, 0, 1, 0, 1, 0, 1], dtype=bool)      # frames 1..9
    probe = np.array([1, 0, 0, 1, 1, 0, 0, 1, 1], dtype=bool)
    p = pair_shots(pump, frame, probe)
    assert p.phase_breaks == 2 and p.gaps == 0
    # without the breaks frames 1 and 4 (indices 0 and 3) would pair, and 5 with 8
    assert list(zip(p.on_index.tolist(), p.off_index.tolist())) == [(4, 3), (8, 7)]
    assert p.unpaired == 1   # frame 1
    assert reference_pairs(pump, frame, probe) == ([(4, 3), (8, 7)], 2)
    # two-state: a slip leaves a shot without partner but pairs the rest in the new phase
    p2 = pair_shots(np.array([1, 0, 1, 1, 0, 1, 0], dtype=bool), np.arange(7))
    assert p2.phase_breaks == 1
    assert list(zip(p2.on_index.tolist(), p2.off_index.tolist())) == [(0, 1), (3, 4), (5, 6)]
    # a gap is a gap, not also a phase break (equal flags across a dropped frame are expected)
    p3 = pair_shots(np.array([1, 0, 0, 1], dtype=bool), np.array([0, 1, 3, 4]))
    assert (p3.gaps, p3.phase_breaks) == (1, 0)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.sampled_from([1, 1, 1, 1, 2, 5]), st.booleans()), min_size=0, max_size=60),
       st.booleans())
def test_pairing_matches_its_definition(shots, four_state):
    pump = np.array([s[0] for s in shots], dtype=bool)
    frame = np.cumsum([s[1] for s in shots]).astype(np.int64) if shots else np.zeros(0, np.int64)
    probe = np.array([s[2] for s in shots], dtype=bool) if four_state else None
    p = pair_shots(pump, frame, probe)
    expected, phase = reference_pairs(pump, frame, probe)
    assert list(zip(p.on_index.tolist(), p.off_index.tolist())) == expected
    assert p.phase_breaks == phase
    assert p.gaps == int(np.count_nonzero(np.diff(frame) != 1))


def test_phase_breaks_are_counted_in_the_point_result():
    rng = np.random.default_rng(5)
    n, px = 400, 16
    pump = (np.arange(n) % 2) == 0
    pump[101:] = ~pump[101:]     # a slip between frames 100 and 101
    pump[250:] = ~pump[250:]     # and one between 249 and 250
    counts = rng.integers(20_000, 20_100, size=(n, px)).astype(np.uint16)
    block = ShotBlock(counts=counts, pump_on=pump, frame_id=np.arange(n, dtype=np.int64))
    acc = engine.PointAccumulator(engine.DarkFrame.from_counts(np.full(px, 500.0)),
                                  engine.EngineSettings(reject_threshold_mad=None))
    acc.add(block)
    acc.add(block)
    r = acc.result()
    assert r.phase_breaks == 4 and r.gaps == 0
    # 0..100 is 101 shots (50 pairs, 1 left), 101..249 is 149 (74, 1 left), 250..399 is 150 (75)
    assert r.pairs == 2 * (50 + 74 + 75) and r.unpaired_shots == 2 * 2
    assert engine.PointResult.combine([r, r]).phase_breaks == 8


def test_phase_slips_on_the_bench_go_to_file_and_stream(small_scan, clients):
    cfg_path = small_scan(noise=PURE, name="slips")
    cfg_path.write_text(cfg_path.read_text() + "\n[simulation.chopper]\nphase_slip_probability = 0.002\n")
    daemon, job, control, sub = clients(cfg_path)
    daemon.start_job(job)
    seen: list[Any] = []
    end = wait_message(sub, lambda m: m.topic == "scan" and m.get("event") in ("complete", "aborted"), seen)
    assert end["event"] == "complete", end["reason"]
    d = read(job.output)
    points = [m for m in seen if m.topic == "point"]
    assert len(points) == d["shots"].size   # none lost on 127.0.0.1 at this rate
    assert sum(m["phase_breaks"] for m in points) == int(d["phase_breaks"].sum())
    assert sum(m["unpaired_shots"] for m in points) == int(d["unpaired_shots"].sum())
    # 46 points x 400 shots at 0.002 per shot: about 37 slips; fewer than 10 has Poisson probability 4.7e-8
    # (scipy.stats.poisson.cdf(9, 36.8))
    assert int(d["phase_breaks"].sum()) >= 10
    for m in points:
        sweep, index = m["sweep"], m["index"]
        assert m["phase_breaks"] == d["phase_breaks"][sweep, index] and m["gaps"] == d["gaps"][sweep, index]
    chi2_ok(d)  # pairs across slips would mix pumped and unpumped shots and bias the ΔOD


# ---------------------------------------------------------------------------------------- over the wire

def test_faults_over_the_wire_are_retried_through_the_real_drivers(small_scan, tmp_path):
    """The scpi drivers against the wire simulators (SCPI on 127.0.0.1, the detector over pyvisa-py): a
    garbled block, a garbled stage reply and a chopper that drops its connection, each once mid-scan."""
    from shotpair.simulators.wire.launcher import WireBench

    scan = small_scan(noise=PURE, name="wire-faults")
    with WireBench(load_config(scan), realtime=False, all_scpi=True) as wb:
        bench_cfg = load_config(wb.write_config(tmp_path / "wire-bench.toml"))
        settings = bench_cfg.bench.model_copy(update={"retry_delay_s": 0.0, "retry_attempts": 6})
        cfg = load_config(scan)
        job = ScanJob(cfg, cfg.require_scan(), make_plan(cfg.require_scan(), settings), tmp_path / "wire-faults.h5",
                      new_scan_id())
        bench = build_bench(settings, bench_cfg.config.simulation)
        bench.connect()
        runner = Runner(bench)
        try:
            runner.start(job)
            events_until(runner, lambda ev: isinstance(ev, PointSaved))
            for name, fault in (("detector", "garbled"), ("delay_axis", "garbled"), ("chopper", "disconnect")):
                wb.inject(name, fault, 1)
            seen = events_until(runner, is_end)
        finally:
            assert runner.close(TIMEOUT_S)
            bench.disconnect()
        assert not wb.bench.shutter_open and not wb.bench.stage.is_moving(wb.bench.now_s())
    assert seen[-1].state == "complete", seen[-1].reason
    retried = [e.instrument for e in seen if isinstance(e, InstrumentFault) and e.action == "retry"]
    assert set(retried) == {"chopper", "delay_axis", "detector"} and len(retried) <= 5
    d = read(job.output)
    assert d["completed"].all() and int(d["retries"].sum()) == len(retried)
    assert (d["shots"] == 400).all()
    chi2_ok(d)
