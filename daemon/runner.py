"""The acquisition loop: one worker thread that owns the instruments and the engine.

It talks to the rest only through bounded queues: commands in (abort, pause, resume), events out. The
loop never waits for whoever reads the events: progress events that find the queue full are dropped
and counted (the end-of-scan event is always delivered). Persist before publish: a point is flushed
to HDF5 before its event is put on the queue. Every exit path leaves the bench safe (shutter closed,
axis stopped) and the file marked complete or aborted with the reason.
"""

from __future__ import annotations

import datetime as _dt
import logging
import queue
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from shotpair.drivers.errors import InstrumentError, LimitError, ShotpairError

from . import engine
from .bench import Bench
from .config import LoadedConfig, ScanSettings
from .delay_drive import DelayDrive
from .events import (BlockProgress, Event, LogEvent, MoveDone, PointSaved, ScanEnded, ScanStarted, StateChanged,
                     SweepDone)
from .plan import ScanPlan
from .states import RunState, RunStateMachine
from .store import ScanStore

__all__ = ["ScanJob", "Runner", "new_scan_id"]

log = logging.getLogger(__name__)

_TRUTH_NOTE = ("Simulation truth, not a measurement: the simulated sample's noise-free ΔOD at the planned delays "
               "(no scatter, emission or detector effects). Compare the measured delta_od with it.")


def new_scan_id() -> str:
    return _dt.datetime.now().strftime("%Y%m%d-%H%M%S-") + uuid.uuid4().hex[:6]


@dataclass(frozen=True)
class ScanJob:
    """A validated scan ready to run."""

    config: LoadedConfig
    scan: ScanSettings
    plan: ScanPlan
    output: Path
    scan_id: str


def _sweep_event(scan_id: str, sweep: int, sweeps: int, combined: list["engine.PointResult | None"],
                 pixels: int) -> SweepDone:
    n = len(combined)
    dod = np.full((n, pixels), np.nan)
    err = np.full((n, pixels), np.nan)
    pairs = np.zeros(n, dtype=np.int64)
    for i, r in enumerate(combined):
        if r is not None:
            dod[i], err[i], pairs[i] = r.delta_od, r.delta_od_error, r.pairs
    return SweepDone(scan_id, sweep, sweeps, dod, err, pairs)


class _Abort(Exception):
    def __init__(self, reason: str) -> None:
        self.reason = reason


class Runner:
    """Runs scans (and alignment moves while idle) on a connected bench in one worker thread.

    ``block_interval_s`` is the shortest time between two BlockProgress events of the live partial average.
    """

    def __init__(self, bench: Bench, *, event_queue_size: int = 1000, block_interval_s: float = 0.1) -> None:
        self.bench = bench
        self.machine = RunStateMachine()
        self.events: queue.Queue[Event] = queue.Queue(maxsize=event_queue_size)
        self.block_interval_s = block_interval_s
        self._commands: queue.Queue[tuple[str, str]] = queue.Queue(maxsize=100)
        self._jobs: queue.Queue[tuple[str, object]] = queue.Queue()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self._done = threading.Condition(self._lock)
        self._working = False
        #: Time spent paused in the present scan, s (left out of its shots/s and ETA).
        self.paused_s = 0.0
        self.dropped_events = 0

    # --------------------------------------------------------------- public, any thread
    @property
    def state(self) -> RunState:
        return self.machine.state

    def _ensure_worker(self) -> None:
        if self._thread is None or not self._thread.is_alive():
            self._thread = threading.Thread(target=self._work, name="shotpair-runner", daemon=True)
            self._thread.start()

    def start(self, job: ScanJob) -> None:
        """Start a scan in the worker thread. Raises StateError unless idle."""
        with self._lock:
            self.machine.step("start")
            self._working = True
        self._ensure_worker()
        self._jobs.put(("scan", job))

    def move(self, delay_ps: float) -> float:
        """Start an alignment move to ``delay_ps`` while idle; returns the target position in mm.

        Raises StateError unless idle, LimitError if the delay lies outside the stage travel.
        """
        s = self.bench.settings.delay_axis
        line = s.delay_line()
        position = float(line.position_mm(float(delay_ps)))
        lo, hi = s.travel_mm
        if not lo <= position <= hi:
            low_ps, high_ps = line.delay_range_ps(s.travel_mm)
            raise LimitError("delay outside the stage travel", instrument="delay_axis", value=float(delay_ps),
                             low=low_ps, high=high_ps)
        with self._lock:
            self.machine.step("move")
            self._working = True
        self._ensure_worker()
        self._jobs.put(("move", float(delay_ps)))
        return position

    def close(self, timeout_s: float = 30.0) -> bool:
        """Abort what runs, stop the worker thread and wait for it; True if it stopped in time."""
        if self._thread is None:
            return True
        self.abort("the daemon is shutting down")
        self._jobs.put(("stop", None))
        self._thread.join(timeout_s)
        return not self._thread.is_alive()

    def abort(self, reason: str = "aborted by user") -> None:
        """Ask the running scan to stop; it stops at the next block and marks the file aborted."""
        self._commands.put(("abort", reason))

    def pause(self) -> None:
        self._commands.put(("pause", ""))

    def resume(self) -> None:
        self._commands.put(("resume", ""))

    def join(self, timeout_s: float | None = None) -> bool:
        """Wait until the worker has finished its scan or move; True if it has (or had nothing to do)."""
        with self._done:
            return self._done.wait_for(lambda: not self._working, timeout=timeout_s)

    # --------------------------------------------------------------- worker thread
    def _emit(self, event: Event, *, must: bool = False) -> None:
        if must:
            self.events.put(event)
            return
        try:
            self.events.put_nowait(event)
        except queue.Full:
            self.dropped_events += 1

    def _step(self, action: str, scan_id: str) -> None:
        with self._lock:
            state = self.machine.step(action)
        self._emit(StateChanged(scan_id, state.value))

    def _poll_commands(self, scan_id: str) -> bool:
        """Handle pending commands; blocks while paused. Returns True if a pause happened. Raises _Abort."""
        paused = False
        paused_at = time.monotonic()
        while True:
            try:
                cmd, reason = self._commands.get(timeout=0.1) if self.state is RunState.PAUSED else self._commands.get_nowait()
            except queue.Empty:
                if self.state is RunState.PAUSED:
                    continue
                return paused
            if cmd == "abort":
                raise _Abort(reason)
            if cmd == "pause" and self.machine.can("pause"):
                self.bench.shutter.close()
                self._step("pause", scan_id)
                paused = True
                paused_at = time.monotonic()
            elif cmd == "resume" and self.machine.can("resume"):
                self.bench.shutter.open()
                self._step("resume", scan_id)
                self.paused_s += time.monotonic() - paused_at
                return paused

    def _work(self) -> None:
        while True:
            kind, item = self._jobs.get()
            if kind == "stop":
                return
            try:
                if kind == "scan":
                    self._run(item)  # type: ignore[arg-type]
                elif kind == "move":
                    self._move(float(item))  # type: ignore[arg-type]
            finally:
                with self._done:
                    self._working = False
                    self._done.notify_all()

    def _move(self, delay_ps: float) -> None:
        b = self.bench
        s = b.settings.delay_axis
        line = s.delay_line()
        error, readback = "", float("nan")
        try:
            if s.home_before_scan and not b.delay_axis.is_homed:
                b.delay_axis.home(timeout_s=s.settle_timeout_s)
            b.delay_axis.move_to_mm(float(line.position_mm(delay_ps)))
            readback = b.delay_axis.wait_settled(timeout_s=s.settle_timeout_s)
        except ShotpairError as exc:
            error = str(exc)
            b.make_safe()
        finally:
            with self._lock:
                if self.machine.can("moved"):
                    self.machine.step("moved")
        self._emit(MoveDone("", delay_ps, readback, error), must=True)
        self._emit(StateChanged("", self.state.value))

    def _run(self, job: ScanJob) -> None:
        store: ScanStore | None = None
        state, reason, done = "aborted", "", 0
        problems: list[str] = []
        try:
            self._drive = DelayDrive(self.bench, job.plan)
            store = self._create_store(job)
            self._emit(ScanStarted(job.scan_id, str(store.path), job.plan.n_points, job.plan.sweeps,
                                   job.plan.shots_per_point, job.plan.estimated_duration_s()), must=True)
            dark = self._prepare(job, store)
            self._step("ready", job.scan_id)
            done = self._acquire(job, store, dark)
            self._step("finish", job.scan_id)
            state = "complete"
        except _Abort as exc:
            reason = exc.reason
            self._step_quietly("abort", job.scan_id)
        except ShotpairError as exc:
            reason = f"error: {exc}"
            self._step_quietly("fail", job.scan_id)
            self._emit(LogEvent(job.scan_id, "error", str(exc)), must=True)
        except Exception as exc:  # noqa: BLE001 - a bug must still leave the bench safe and the file closed
            log.exception("unexpected error in the acquisition loop")
            reason = f"internal error: {type(exc).__name__}: {exc}"
            self._step_quietly("fail", job.scan_id)
            self._emit(LogEvent(job.scan_id, "error", reason), must=True)
        finally:
            problems = self.bench.make_safe()
            if store is not None:
                for p in problems:
                    store.log(p)
                store.finish(state, reason)
            path = str(store.path) if store is not None else str(job.output)
            with self._lock:
                # Commands that came too late for this scan (an abort as it ended) must not touch the next one.
                while True:
                    try:
                        self._commands.get_nowait()
                    except queue.Empty:
                        break
                if self.machine.can("stopped"):
                    self.machine.step("stopped")
            self._emit(ScanEnded(job.scan_id, state, reason, path, done, problems), must=True)

    def _step_quietly(self, action: str, scan_id: str) -> None:
        with self._lock:
            if self.machine.can(action):
                self.machine.step(action)
        self._emit(StateChanged(scan_id, self.state.value))

    def _create_store(self, job: ScanJob) -> ScanStore:
        b = self.bench
        return ScanStore.create(
            job.output, scan_id=job.scan_id, title=job.scan.title, delays_ps=job.plan.delays_ps,
            wavelengths_nm=b.settings.detector.wavelengths_nm(), sweeps=job.plan.sweeps, orders=job.plan.orders,
            config_text=job.config.text, instruments=b.identities(), axis_kind=self._drive.kind,
            extra={"bench_name": b.settings.name})

    def _prepare(self, job: ScanJob, store: ScanStore) -> engine.DarkFrame:
        b, s = self.bench, self.bench.settings
        model = b.truth()
        if job.plan.delays_ps.size and model is not None:
            store.write_truth(model.truth_delta_od(job.plan.delays_ps), _TRUTH_NOTE)
        self._drive.prepare()
        freq = s.chopper.frequency_hz or s.repetition_rate_hz / 2.0
        b.chopper.set_frequency_hz(freq)
        b.chopper.set_phase_deg(s.chopper.phase_deg)
        if s.chopper.require_lock and not b.chopper.is_locked():
            raise InstrumentError("not locked to the laser (set require_lock = false to acquire anyway)",
                                  instrument="chopper")
        det = s.detector
        if det.dark_counts is not None:
            dark = engine.DarkFrame.from_counts(np.full(det.pixels, det.dark_counts))
            store.write_dark(dark.counts, 0, measured=False)
        else:
            b.shutter.close()
            dark_acc = engine.DarkAccumulator()
            remaining = job.plan.dark_shots
            while remaining > 0:
                self._poll_commands(job.scan_id)
                block = b.detector.acquire(min(det.block_shots, remaining), timeout_s=self._block_timeout_s(det.block_shots))
                dark_acc.add(block)
                remaining -= block.n_shots
            dark = dark_acc.frame()
            store.write_dark(dark.counts, dark.shots, dark.reference, measured=True)
        b.shutter.open()
        return dark

    def _block_timeout_s(self, shots: int) -> float:
        return 5.0 + 3.0 * shots / self.bench.settings.repetition_rate_hz

    def _acquire(self, job: ScanJob, store: ScanStore, dark: engine.DarkFrame) -> int:
        b, s, plan = self.bench, self.bench.settings, job.plan
        settings = engine.EngineSettings(
            gain_e_per_count=s.detector.gain_e_per_count, read_noise_e=s.detector.read_noise_e,
            saturation_counts=s.detector.saturation_counts, reject_threshold_mad=job.scan.reject_threshold_mad,
            use_reference=s.detector.has_reference)
        # One running merge per grid point (not every sweep's result): memory stays at one result per point.
        combined_at: list[engine.PointResult | None] = [None] * plan.n_points
        done, t0, shots_total = 0, time.monotonic(), 0
        self.paused_s = 0.0
        for sweep, order in enumerate(plan.orders):
            for k, index in enumerate(order):
                self._poll_commands(job.scan_id)
                readback = self._drive.go(int(index))
                acc = engine.PointAccumulator(dark, settings)
                got = 0
                last_live = time.monotonic()
                while got < plan.shots_per_point:
                    if self._poll_commands(job.scan_id):
                        # Paused inside the point: measure it again from the start, never half-done.
                        acc, got = engine.PointAccumulator(dark, settings), 0
                    n = min(s.detector.block_shots, plan.shots_per_point - got)
                    block = b.detector.acquire(n, timeout_s=self._block_timeout_s(n))
                    acc.add(block)
                    got += block.n_shots
                    if block.n_shots == 0:
                        raise InstrumentError("delivered an empty block", instrument="detector")
                    now = time.monotonic()
                    if now - last_live >= self.block_interval_s and got < plan.shots_per_point:
                        last_live = now
                        self._emit(BlockProgress(job.scan_id, sweep, int(index), float(plan.delays_ps[index]), got,
                                                 plan.shots_per_point, acc.result()))
                result = acc.result()
                previous = combined_at[index]
                combined = result if previous is None else engine.PointResult.combine([previous, result])
                combined_at[index] = combined
                store.write_point(sweep, int(index), result, combined, position_mm=readback.position_mm,
                                  delay_readback_ps=readback.delay_ps, generator_ps=readback.generator_ps,
                                  measured_at_s=time.time())
                done += 1
                shots_total += got
                elapsed = time.monotonic() - t0 - self.paused_s
                eta = elapsed / done * (plan.total_points - done)
                self._emit(PointSaved(job.scan_id, sweep, k, int(index), float(plan.delays_ps[index]), result, combined,
                                      done, plan.total_points, elapsed, eta, shots_total / max(elapsed, 1e-9)))
            self._emit(_sweep_event(job.scan_id, sweep, plan.sweeps, combined_at, b.settings.detector.pixels))
        return done
