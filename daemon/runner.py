"""The acquisition loop: one worker thread that owns the instruments and the engine.

It talks to the rest only through bounded queues: commands in (abort, pause, resume), events out. The
loop never waits for whoever reads the events: progress events that find the queue full are dropped
and counted (the end-of-scan event is always delivered). Persist before publish: a point is flushed
and fsync'ed to HDF5 before its event is put on the queue. A resumed scan (ScanJob.resume, built by
daemon/resume.py) starts from the points committed in its file and skips them. Every exit path leaves
the bench safe (shutter closed, axis stopped) and the file marked complete or aborted with the reason.
Instrument faults during the acquisition are retried within a budget and then pause the scan until a
resume finds the instrument answering (daemon/faults.py, docs/protocol.md 8.1); a point in doubt is
measured again from its start.
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
from typing import Callable, TypeVar

import numpy as np

from shotpair.drivers.base import ShotBlock
from shotpair.drivers.errors import InstrumentError, InstrumentReplyError, LimitError, ShotpairError, TransportError

from . import engine
from .bench import Bench
from .config import LoadedConfig, ScanSettings
from .delay_drive import DelayDrive, Readback
from .events import (BlockProgress, Event, InstrumentFault, LogEvent, MoveDone, PointSaved, ScanEnded, ScanStarted,
                     StateChanged, SweepDone)
from .faults import PROBE_SHOTS, Fault, RetryBudget, fault_source, is_retryable, probe, reconnect
from .plan import ScanPlan
from .states import RunState, RunStateMachine
from .store import ScanStore, check_free_space, estimate_file_bytes

__all__ = ["ScanJob", "Runner", "new_scan_id"]

log = logging.getLogger(__name__)
_T = TypeVar("_T")

_TRUTH_NOTE = ("Simulation truth, not a measurement: the simulated sample's noise-free ΔOD at the planned delays "
               "(no scatter, emission or detector effects). Compare the measured delta_od with it.")


def new_scan_id() -> str:
    return _dt.datetime.now().strftime("%Y%m%d-%H%M%S-") + uuid.uuid4().hex[:6]


@dataclass(frozen=True)
class ScanJob:
    """A validated scan ready to run.

    With ``resume`` the scan continues in ``output``, an existing file of it (daemon/resume.py checked it
    and built this job from what it holds): its committed points are kept and skipped, the rest measured.
    """

    config: LoadedConfig
    scan: ScanSettings
    plan: ScanPlan
    output: Path
    scan_id: str
    resume: bool = False


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


class _RestartPoint(Exception):
    """The point being measured cannot be trusted as it is (a pause, a lost connection, the chopper's lock
    lost, a fault pause): discard what it has and measure it again from its move."""


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
        #: Instrument faults: the retry budget of the present scan, the fault it is paused on (None when it
        #: is not), and the instruments whose connection must be opened again before they are used.
        self.retry_budget = RetryBudget(0, 1.0)
        self.fault: Fault | None = None
        self._reconnect: set[str] = set()
        self._store: ScanStore | None = None
        #: Where a resumed scan starts: committed points [s, n] and the running merge per grid point.
        self._start: tuple[np.ndarray, list[engine.PointResult | None]] | None = None

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

    def _poll_commands(self, scan_id: str, wait_s: float = 0.0) -> bool:
        """Handle pending commands; blocks while paused, and otherwise waits up to ``wait_s`` s for them.

        Returns True if a pause happened. Raises _Abort. A resume after a fault pause first tries the
        faulted instrument again (:meth:`_ready_to_resume`); while it still fails the scan stays paused.
        """
        paused = False
        paused_at = time.monotonic()
        deadline = paused_at + wait_s
        while True:
            try:
                if self.state is RunState.PAUSED:
                    cmd, reason = self._commands.get(timeout=0.1)
                else:
                    left = deadline - time.monotonic()
                    cmd, reason = self._commands.get(timeout=left) if left > 0 else self._commands.get_nowait()
            except queue.Empty:
                if self.state is RunState.PAUSED:
                    continue
                return paused
            if cmd == "abort":
                raise _Abort(reason if self.fault is None else f"{reason} (while paused by a fault: {self.fault.error})")
            if cmd == "pause" and self.machine.can("pause"):
                self.bench.shutter.close()
                self._step("pause", scan_id)
                paused = True
                paused_at = time.monotonic()
            elif cmd == "resume" and self.machine.can("resume"):
                if not self._ready_to_resume(scan_id):
                    continue
                self._step("resume", scan_id)
                self.paused_s += time.monotonic() - paused_at
                return paused

    # --------------------------------------------------------------- instrument faults (worker thread)
    def _guarded(self, scan_id: str, name: str, fn: Callable[[], _T], *, restart_after_reconnect: bool = False) -> _T:
        """``fn()``, with instrument faults retried within the budget (see daemon/faults.py).

        ``name`` is the instrument ``fn`` addresses (used when an error names none of the bench's). A lost
        connection is opened again before the next try, and so is one that failed twice in a row (the
        driver's own resynchronisation did not help: a garbled binary block can leave a stream of garbage);
        with ``restart_after_reconnect`` the point is then measured again from its start (_RestartPoint).
        Past the budget the scan pauses until a resume finds the instrument answering, and the point starts
        again. Errors that are not retried propagate.
        """
        failures = 0
        while True:
            try:
                for pending in sorted(self._reconnect):
                    reconnect(self.bench, pending)
                    self._reconnect.discard(pending)
                return fn()
            except InstrumentError as exc:
                if not is_retryable(exc):
                    raise
                source = fault_source(exc, self.bench, name)
                failures += 1
                reopen = isinstance(exc, TransportError) or failures >= 2
                if reopen:
                    self._reconnect.add(source)
                self._on_fault(scan_id, source, exc)
                if reopen and restart_after_reconnect:
                    raise _RestartPoint() from None

    def _on_fault(self, scan_id: str, name: str, exc: InstrumentError) -> None:
        """Count a fault: within the budget wait ``retry_delay_s`` and return (the caller tries again); past
        it pause the scan (shutter closed) until a resume that finds ``name`` answering, then _RestartPoint."""
        budget, text = self.retry_budget, str(exc)
        if budget.take():
            message = (f"{text}; retrying ({budget.in_window()} of {budget.attempts} retries within "
                       f"{budget.window_s:g} s)")
            self._file_log(f"retry: {message}")
            self._emit(LogEvent(scan_id, "warning", message))
            self._emit(InstrumentFault(scan_id, name, text, "retry", budget.total, time.time()))
            if self._poll_commands(scan_id, wait_s=self.bench.settings.retry_delay_s):
                raise _RestartPoint() from None  # paused while waiting: the point starts again anyway
            return
        self.fault = Fault(name, text, time.time())
        self._close_shutter_quietly(scan_id)
        self._file_log(f"paused by a fault: {text} ({budget.attempts} retries within {budget.window_s:g} s did not "
                       "help)")
        # the log first, then the fault, then the state: a client sees the reason before the paused status
        self._emit(LogEvent(scan_id, "error", f"scan paused: {text}; {budget.attempts} retries within "
                            f"{budget.window_s:g} s did not help. Resume tries {name} again; abort ends the scan"),
                   must=True)
        self._emit(InstrumentFault(scan_id, name, text, "paused", budget.total, self.fault.time_s), must=True)
        self._step("fault", scan_id)
        self._poll_commands(scan_id)  # blocks until resumed with the instrument answering; raises _Abort
        raise _RestartPoint() from None

    def _ready_to_resume(self, scan_id: str) -> bool:
        """Before a resume: reconnect and probe the faulted instrument (if any), then open the shutter.

        On an instrument error the scan stays paused with it as the fault (shutter closed); returns False.
        """
        fault = self.fault
        try:
            if fault is not None:
                self._reconnect.add(fault.instrument)
            for pending in sorted(self._reconnect):  # the faulted one, and any other left disconnected
                reconnect(self.bench, pending)
                self._reconnect.discard(pending)
            if fault is not None:
                probe(self.bench, fault.instrument, block_timeout_s=self._block_timeout_s(PROBE_SHOTS))
            self.bench.shutter.open()
        except InstrumentError as exc:
            source = fault_source(exc, self.bench, fault.instrument if fault is not None else "shutter")
            if isinstance(exc, TransportError):
                self._reconnect.add(source)
            self.fault = Fault(source, str(exc), time.time())
            self._close_shutter_quietly(scan_id)
            self._file_log(f"still failing after resume: {exc}")
            self._emit(LogEvent(scan_id, "error", f"still paused: {exc}"), must=True)
            self._emit(InstrumentFault(scan_id, source, str(exc), "still_failing", self.retry_budget.total,
                                       self.fault.time_s), must=True)
            return False
        if fault is not None:
            self.fault = None
            self.retry_budget.reset()
            self._file_log(f"{fault.instrument} answers again: resuming")
            self._emit(LogEvent(scan_id, "info", f"{fault.instrument} answers again: resuming; the interrupted "
                                "point is measured again"), must=True)
            self._emit(InstrumentFault(scan_id, fault.instrument, "", "cleared", self.retry_budget.total, time.time()),
                       must=True)
        return True

    def _close_shutter_quietly(self, scan_id: str) -> None:
        try:
            self.bench.shutter.close()
        except Exception as exc:  # noqa: BLE001 - a failing shutter must not hide the fault being reported
            self._file_log(f"could not close the shutter: {exc}")
            self._emit(LogEvent(scan_id, "error", f"could not close the shutter: {exc}"), must=True)

    def _file_log(self, message: str) -> None:
        if self._store is not None and self._store.is_open:
            self._store.log(message)

    def _check_lock(self, scan_id: str, when: str) -> None:
        """With ``require_lock``: a chopper that is not locked is a fault (retried, then a pause), and the
        point is measured again from its start (_RestartPoint)."""
        chopper = self.bench.chopper
        if not self.bench.settings.chopper.require_lock or self._guarded(scan_id, "chopper", chopper.is_locked):
            return
        self._on_fault(scan_id, "chopper", InstrumentError(f"lost its lock to the laser ({when})", instrument="chopper"))
        raise _RestartPoint()

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
                problems = problems + store.finish(state, reason)
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
        """Lay out the file (after a free-space check), or open the one a resume continues. Moves nothing."""
        b, plan = self.bench, job.plan
        self._start = None
        if job.resume:
            return self._reopen_store(job)
        model = b.truth()
        settings = {"bench": b.settings.model_dump_json()}
        if model is not None and getattr(model, "settings", None) is not None:
            settings["simulation"] = model.settings.model_dump_json()
        needed = estimate_file_bytes(plan.n_points, b.settings.detector.pixels, plan.sweeps,
                                     has_reference=b.settings.detector.has_reference,
                                     text_bytes=len(job.config.text) + sum(len(t) for t in settings.values()))
        warning = check_free_space(job.output, needed)
        truth = model.truth_delta_od(plan.delays_ps) if plan.delays_ps.size and model is not None else None
        store = ScanStore.create(
            job.output, scan_id=job.scan_id, title=job.scan.title, delays_ps=plan.delays_ps,
            wavelengths_nm=b.settings.detector.wavelengths_nm(), sweeps=plan.sweeps, orders=plan.orders,
            config_text=job.config.text, instruments=b.identities(), axis_kind=self._drive.kind,
            extra={"bench_name": b.settings.name}, truth=truth, truth_note=_TRUTH_NOTE,
            has_reference=b.settings.detector.has_reference, settings_json=settings)
        if warning:
            store.log(f"warning: {warning}")
            self._emit(LogEvent(job.scan_id, "warning", warning), must=True)
        return store

    def _reopen_store(self, job: ScanJob) -> ScanStore:
        """Open a resumed scan's file, start its new run segment and rewrite the running average over sweeps
        from the committed points (a crash may have left it one point ahead of the ``completed`` flags)."""
        store = ScanStore.open_existing(job.output)
        try:
            completed, combined = store.committed()
            done = int(completed.sum())
            segment = store.next_segment(completed)
            store.begin_segment(segment, done)
            for index, merged in enumerate(combined):
                if merged is not None:
                    store.write_combined(index, merged, sync=False)
            store.log(f"resumed (run segment {segment}): {done} of {completed.size} points were in the file")
        except BaseException as exc:
            store.finish("aborted", f"the resume could not start: {exc}")
            raise
        self._start = (completed, combined)
        return store

    def _starting_point(self, plan: ScanPlan) -> tuple[np.ndarray, list[engine.PointResult | None]]:
        """(committed points [s, n], running merge per grid point) to start from: empty for a new scan."""
        if self._start is not None:
            return self._start
        return np.zeros((plan.sweeps, plan.n_points), dtype=bool), [None] * plan.n_points

    def _prepare(self, job: ScanJob, store: ScanStore) -> engine.DarkFrame:
        b, s = self.bench, self.bench.settings
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
        # A resumed scan starts from the points already in its file (merged as the first run would have).
        completed, combined_at = self._starting_point(plan)
        done, t0, shots_total = int(completed.sum()), time.monotonic(), 0
        done_before = done
        self.paused_s = 0.0
        self.retry_budget = RetryBudget.from_settings(s)
        self.fault, self._reconnect, self._store = None, set(), store
        for sweep, order in enumerate(plan.orders):
            for k, index in enumerate(order):
                if completed[sweep, index]:
                    continue  # committed before a resume
                self._poll_commands(job.scan_id)
                retries_before, restarts = self.retry_budget.total, 0
                while True:
                    try:
                        readback, result, got = self._measure_point(job, sweep, int(index), dark, settings)
                        break
                    except _RestartPoint:
                        restarts += 1  # never store a half-measured point: measure it again from its start
                previous = combined_at[index]
                combined = result if previous is None else engine.PointResult.combine([previous, result])
                combined_at[index] = combined
                retries = self.retry_budget.total - retries_before
                store.write_point(sweep, int(index), result, combined, position_mm=readback.position_mm,
                                  delay_readback_ps=readback.delay_ps, generator_ps=readback.generator_ps,
                                  measured_at_s=time.time(), retries=retries, restarts=restarts)
                done += 1
                shots_total += got
                elapsed = time.monotonic() - t0 - self.paused_s
                eta = elapsed / (done - done_before) * (plan.total_points - done)
                self._emit(PointSaved(job.scan_id, sweep, k, int(index), float(plan.delays_ps[index]), result, combined,
                                      done, plan.total_points, elapsed, eta, shots_total / max(elapsed, 1e-9),
                                      retries=retries, restarts=restarts))
            self._emit(_sweep_event(job.scan_id, sweep, plan.sweeps, combined_at, b.settings.detector.pixels))
        return done

    def _measure_point(self, job: ScanJob, sweep: int, index: int, dark: engine.DarkFrame,
                       settings: engine.EngineSettings) -> tuple[Readback, engine.PointResult, int]:
        """Go to grid point ``index`` and read its shots: (read-back, result, shots read).

        Raises _RestartPoint when the measurement must begin again: a pause inside the point, a lost
        detector connection, the chopper's lock lost at its start or during it, or a fault pause. A
        detector block that timed out or came garbled is read again (it never reached the engine; the
        blocks before it were complete and stay).
        """
        b, plan, scan_id = self.bench, job.plan, job.scan_id
        axis = "delay_generator" if plan.axis == "generator" else "delay_axis"
        readback = self._guarded(scan_id, axis, lambda: self._drive.go(index))
        self._check_lock(scan_id, "at the start of the point")
        acc = engine.PointAccumulator(dark, settings)
        got = 0
        last_live = time.monotonic()
        while got < plan.shots_per_point:
            if self._poll_commands(scan_id):
                raise _RestartPoint()  # paused inside the point: measure it again from the start, never half-done
            n = min(b.settings.detector.block_shots, plan.shots_per_point - got)
            block = self._guarded(scan_id, "detector", lambda: self._read_block(n), restart_after_reconnect=True)
            acc.add(block)
            got += block.n_shots
            now = time.monotonic()
            if now - last_live >= self.block_interval_s and got < plan.shots_per_point:
                last_live = now
                self._emit(BlockProgress(scan_id, sweep, index, float(plan.delays_ps[index]), got,
                                         plan.shots_per_point, acc.result()))
        self._check_lock(scan_id, "during the point")
        return readback, acc.result(), got

    def _read_block(self, n_shots: int) -> ShotBlock:
        """One detector block of ``n_shots``; InstrumentReplyError for an empty one (it is retried)."""
        block = self.bench.detector.acquire(n_shots, timeout_s=self._block_timeout_s(n_shots))
        if block.n_shots == 0:
            raise InstrumentReplyError("delivered an empty block", instrument="detector")
        return block
