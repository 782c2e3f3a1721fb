"""`shotpair monitor`: watch a running daemon live, in the terminal, in a plot window, or as one PNG.

For: a person (or a script on another computer) who wants to see where a scan is and what it measures
without touching it. The view is kept from the daemon's ``snapshot`` and its data stream by
:class:`MonitorState`, a small class without sockets; the rest of this module moves messages into it and
draws it. Must not: send any request that changes the daemon's state (only ``status`` and ``snapshot``
are asked), touch instruments or scan files, or draw figures itself (daemon/figures.py draws; this
module only hands it arrays). A slow monitor loses messages (the daemon never waits for it): losses
are counted from gaps in ``seq`` and healed by asking for a fresh snapshot.
"""

from __future__ import annotations

import argparse
import sys
import threading
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO
from urllib.parse import urlsplit

import numpy as np

from shotpair.drivers.errors import DaemonError, DaemonUnavailable, ProtocolError, ShotpairError, StorageError

from .client import DEFAULT_CONTROL, ControlClient, Subscriber
from .figures import ScanData, load_pyplot, scan_figure
from .progress import format_duration
from .protocol import Message
from .remote import describe_status

__all__ = [
    "EXIT_FAILED",
    "EXIT_OK",
    "EXIT_USAGE",
    "FollowResult",
    "LiveWindow",
    "MonitorState",
    "Progress",
    "TerminalView",
    "add_monitor_command",
    "data_endpoint_for",
    "follow",
    "main",
    "progress_bar",
    "render_block",
    "render_line",
    "render_rgba",
    "run_monitor",
    "sparkline",
    "text_spectrum",
    "write_png",
]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2

#: Eight levels of the text spectrum, lowest first; a column without data is a space.
SPARK_LEVELS = "▁▂▃▄▅▆▇█"
SPECTRUM_WIDTH_COLUMNS = 60
#: Never ask for a snapshot more often than this (it can be megabytes), s.
SNAPSHOT_MIN_INTERVAL_S = 1.0
#: How often a live window is redrawn at most, s (drawing the 2×2 figure takes a good fraction of that).
PLOT_INTERVAL_S = 1.0
#: Longest wait on the data socket per turn of the loop, s (keeps Ctrl-C, windows and deadlines responsive).
POLL_S = 0.1
#: Control requests during streaming never wait longer than this, whatever --timeout says, s.
CONTROL_TIMEOUT_CAP_S = 10.0
_ACTIVE_STATES = ("preparing", "acquiring", "paused", "stopping")
_FILE_BACKENDS = ("agg", "cairo", "pdf", "pgf", "ps", "svg", "template")


# ---------------------------------------------------------------------------------------------- text rendering
def _column_means(values: np.ndarray, width_columns: int) -> np.ndarray:
    """Mean of the finite values in each of ``width_columns`` equal runs of ``values``; NaN where none."""
    v = np.asarray(values, dtype=np.float64).ravel()
    n = v.size
    width = max(1, min(int(width_columns), n))
    starts = (np.arange(width) * n) // width
    finite = np.isfinite(v)
    sums = np.add.reduceat(np.where(finite, v, 0.0), starts)
    counts = np.add.reduceat(finite.astype(np.int64), starts)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)


def sparkline(values: np.ndarray, width_columns: int = SPECTRUM_WIDTH_COLUMNS) -> str:
    """A one-line picture of ``values``: binned to at most ``width_columns`` columns, lowest value ▁, highest █.

    Columns without a finite value are spaces; a constant (finite) signal is drawn at mid height.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if v.size == 0:
        return ""
    cols = _column_means(v, width_columns)
    finite = np.isfinite(cols)
    if not finite.any():
        return " " * cols.size
    lo, hi = float(cols[finite].min()), float(cols[finite].max())
    top = len(SPARK_LEVELS) - 1
    if hi > lo:
        levels = np.rint((np.where(finite, cols, lo) - lo) / (hi - lo) * top).astype(int)
    else:
        levels = np.full(cols.size, top // 2)
    return "".join(SPARK_LEVELS[k] if ok else " " for k, ok in zip(levels, finite))


def _signed(value_mod: float) -> str:
    return f"{value_mod:+.3g}"


def text_spectrum(delta_od: np.ndarray, wavelengths_nm: np.ndarray | None = None,
                  width_columns: int = SPECTRUM_WIDTH_COLUMNS) -> list[str]:
    """Two lines: a sparkline of ΔOD vs wavelength, then the range, the minimum and maximum in mOD and where.

    The extremes are of the per-column means shown, so they match the picture (single noisy pixels are
    averaged with their neighbours, as the eye does).
    """
    dod = np.asarray(delta_od, dtype=np.float64).ravel()
    line = "ΔOD " + sparkline(dod, width_columns)
    cols = _column_means(dod, width_columns)
    finite = np.isfinite(cols)
    if not finite.any():
        return [line, "    no ΔOD yet"]
    wl = None
    if wavelengths_nm is not None and np.asarray(wavelengths_nm).size == dod.size:
        wl = _column_means(np.asarray(wavelengths_nm, dtype=np.float64), width_columns)
    i_min = int(np.nanargmin(cols))
    i_max = int(np.nanargmax(cols))

    def at(i: int) -> str:
        return f" at {wl[i]:.0f} nm" if wl is not None else ""

    lo, hi = float(cols[i_min]) * 1e3, float(cols[i_max]) * 1e3
    parts = []
    if wavelengths_nm is not None and np.asarray(wavelengths_nm).size:
        w = np.asarray(wavelengths_nm, dtype=np.float64)
        parts.append(f"{np.nanmin(w):.0f}–{np.nanmax(w):.0f} nm")
    parts.append(f"min {_signed(lo)} mOD{at(i_min)}")
    parts.append(f"max {_signed(hi)} mOD{at(i_max)}")
    if lo < 0.0 < hi:
        top = len(SPARK_LEVELS) - 1
        parts.append(f"zero ≈ {SPARK_LEVELS[round(-lo / (hi - lo) * top)]}")
    return [line, "    " + ", ".join(parts)]


def progress_bar(fraction: float, width_columns: int = 20) -> str:
    """``[#####-----]`` for a fraction in [0, 1] (clipped; NaN draws an empty bar)."""
    f = float(fraction) if np.isfinite(fraction) else 0.0
    filled = round(min(max(f, 0.0), 1.0) * width_columns)
    return "[" + "#" * filled + "-" * (width_columns - filled) + "]"


# ---------------------------------------------------------------------------------------------- state keeping
@dataclass
class Progress:
    """Where the scan is, 1-based as a person counts (the stream's point messages count sweeps from 0)."""

    state: str = "?"
    sweep: int | None = None
    sweeps: int | None = None
    point: int | None = None
    points: int | None = None
    points_done: int = 0
    points_total: int = 0
    delay_ps: float | None = None
    shots_per_s: float | None = None
    rejected_fraction: float | None = None
    eta_s: float | None = None
    excess_noise_median: float | None = None


def _finite_median(values: np.ndarray) -> float | None:
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    return float(np.median(v)) if v.size else None


class MonitorState:
    """The present state of a daemon as a monitor sees it, assembled from ``status``, ``snapshot`` and stream
    messages (decoded :class:`~shotpair.daemon.protocol.Message` objects). No sockets, no clock of its own.

    The ΔOD map [delay, wavelength] holds the all-sweeps average of every point measured so far (the
    snapshot's ``delta_od`` and the point messages' ``combined_delta_od``); applying the same message twice
    changes nothing. The shot-noise floor of the average is rebuilt from the per-sweep floors in the point
    messages (σ²-sums add); at delays where some sweep's point message was not seen (before the monitor
    joined, or lost) the floor is unknown (NaN) rather than wrong.

    Flags for the code that owns the sockets: :attr:`needs_snapshot` (the stream showed something this
    state cannot place: a new scan whose start was missed, a point of another scan, lost messages) and
    :attr:`finished` (the scan the map belongs to has ended).
    """

    def __init__(self) -> None:
        self.status: dict[str, Any] = {}
        self.progress = Progress()
        self.scan_id: str | None = None
        self.delays_ps = np.zeros(0)
        self.wavelengths_nm = np.zeros(0)
        self.delta_od: np.ndarray | None = None
        self.delta_od_error: np.ndarray | None = None
        self.completed: np.ndarray | None = None
        self.ended = False
        self.end_state: str | None = None
        self.end_reason: str = ""
        self.needs_snapshot = False
        self.last_point: dict[str, Any] | None = None
        self.last_point_arrays: dict[str, np.ndarray] = {}
        self.live: dict[str, Any] | None = None
        self.live_delta_od: np.ndarray | None = None
        self.last_log: str | None = None
        self.messages = 0
        self.lost = 0
        self.bad = 0
        self.last_message_s: float | None = None
        self.revision = 0  # +1 whenever the map changes (for redraw throttling)
        self._sigma2_sum: np.ndarray | None = None
        self._pairs_counted: np.ndarray | None = None
        self._floor_sweeps: np.ndarray | None = None
        self._floor_seen: set[tuple[int, int]] = set()

    # ------------------------------------------------------------------ map management
    def _new_map(self, scan_id: str | None, delays_ps: np.ndarray, wavelengths_nm: np.ndarray, sweeps: int) -> None:
        n, p = int(np.asarray(delays_ps).size), int(np.asarray(wavelengths_nm).size)
        self.scan_id = scan_id
        self.delays_ps = np.array(delays_ps, dtype=np.float64)
        self.wavelengths_nm = np.array(wavelengths_nm, dtype=np.float64)
        self.delta_od = np.full((n, p), np.nan)
        self.delta_od_error = np.full((n, p), np.nan)
        self.completed = np.zeros((max(int(sweeps), 1), n), dtype=bool)
        self._sigma2_sum = np.zeros((n, p))
        self._pairs_counted = np.zeros((n, p), dtype=np.int64)
        self._floor_sweeps = np.zeros(n, dtype=np.int64)
        self._floor_seen = set()
        self.ended = False
        self.end_state = None
        self.end_reason = ""
        self.last_point = None
        self.last_point_arrays = {}
        self.live = None
        self.live_delta_od = None
        self.revision += 1

    @property
    def has_map(self) -> bool:
        return self.delta_od is not None and self.delta_od.size > 0

    @property
    def finished(self) -> bool:
        """True once the scan the map belongs to has ended (complete or aborted)."""
        return self.has_map and self.ended

    def noise_floor(self) -> np.ndarray | None:
        """Shot-noise floor of the all-sweeps average [delay, wavelength] (OD); NaN where unknown."""
        if self._sigma2_sum is None or self.completed is None or self._pairs_counted is None:
            return None
        assert self._floor_sweeps is not None
        consistent = self._floor_sweeps == self.completed.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            floor = np.sqrt(self._sigma2_sum) / self._pairs_counted
        floor[(self._pairs_counted < 2) | ~consistent[:, None]] = np.nan
        return floor

    def scan_data(self, title: str | None = None) -> ScanData | None:
        """The arrays for daemon/figures.py's scan_figure, or None before any scan is known."""
        if not self.has_map:
            return None
        assert self.delta_od is not None and self.delta_od_error is not None
        floor = self.noise_floor()
        if title is None:
            p = self.progress
            title = f"scan {self.scan_id}: {p.points_done}/{p.points_total} points"
            title += f", {self.end_state}" if self.ended and self.end_state else f", {p.state}"
        return ScanData(self.delays_ps, self.wavelengths_nm, self.delta_od.copy(), self.delta_od_error.copy(),
                        floor if floor is not None and np.isfinite(floor).any() else None, title)

    # ------------------------------------------------------------------ inputs
    def apply_status(self, status: dict[str, Any]) -> None:
        """A ``status`` reply or stream message (same fields)."""
        st = {k: v for k, v in status.items() if k not in ("arrays", "v", "ok", "id", "seq", "kind", "time")}
        self.status.update(st)
        p = self.progress
        p.state = str(st.get("state", p.state))
        for key in ("sweeps", "points", "points_done", "points_total", "delay_ps", "shots_per_s",
                    "rejected_fraction", "eta_s", "excess_noise_median"):
            if key in st and (st[key] is not None or key in ("delay_ps", "eta_s")):
                setattr(p, key, st[key])
        if st.get("sweep") is not None:
            p.sweep = int(st["sweep"])
        if st.get("point") is not None:
            p.point = int(st["point"])
        scan_id = st.get("scan_id")
        if scan_id is not None and scan_id != self.scan_id:
            self.needs_snapshot = True  # a scan this state has not seen start (or no map yet)
        elif scan_id is not None and p.state == "idle" and st.get("last_scan_state") and self.has_map \
                and not self.ended:
            self.ended = True
            self.end_state = str(st["last_scan_state"])
            self.end_reason = str(st.get("last_error") or "")

    def apply_snapshot(self, reply: Message) -> None:
        """A ``snapshot`` reply: the whole map of the present (or last) scan."""
        h = reply.header
        if h.get("state"):
            self.progress.state = str(h["state"])
        if h.get("empty", not reply.arrays):
            return
        a = reply.arrays
        try:
            dod, err = a["delta_od"], a["delta_od_errors"]
            delays, wl, completed = a["delay_ps"], a["wavelength_nm"], a["completed"]
        except KeyError as exc:
            raise ProtocolError(f"snapshot reply lacks the array {exc.args[0]!r}") from None
        if dod.shape != (delays.size, wl.size) or err.shape != dod.shape or completed.ndim != 2 \
                or completed.shape[1] != delays.size:
            raise ProtocolError(f"snapshot arrays do not fit together: delta_od {dod.shape}, delay_ps "
                                f"{delays.shape}, wavelength_nm {wl.shape}, completed {completed.shape}")
        scan_id = h.get("scan_id")
        same = (scan_id == self.scan_id and self.delta_od is not None and self.delta_od.shape == dod.shape
                and self.completed is not None and self.completed.shape == completed.shape)
        if not same:
            self._new_map(scan_id, delays, wl, completed.shape[0])
        assert self.delta_od is not None and self.delta_od_error is not None
        self.delta_od[...] = dod
        self.delta_od_error[...] = err
        self.completed = np.array(completed, dtype=bool)
        if h.get("state") == "idle" and not self.ended:  # the daemon keeps the last scan's map when idle
            self.ended = True
            self.end_state = self.status.get("last_scan_state") or "ended"
        self.needs_snapshot = False
        self.revision += 1

    def apply(self, msg: Message, now_s: float | None = None) -> None:
        """One data-stream message (any topic; unknown topics are counted and ignored)."""
        self.messages += 1
        self.last_message_s = now_s
        handler = getattr(self, f"_on_{msg.topic}", None)
        if handler is not None:
            handler(msg)

    def _on_status(self, msg: Message) -> None:
        self.apply_status(msg.header)

    def _on_scan(self, msg: Message) -> None:
        h = msg.header
        if h.get("event") == "started":
            delays = msg.arrays.get("delay_ps")
            wl = msg.arrays.get("wavelength_nm")
            if delays is None or wl is None:
                self.needs_snapshot = True
                return
            self._new_map(h.get("scan_id"), delays, wl, int(h.get("sweeps") or 1))
            self.progress = Progress(state=self.progress.state, sweeps=h.get("sweeps"), points=h.get("n_points"),
                                     points_total=int(h.get("n_points") or 0) * int(h.get("sweeps") or 1),
                                     eta_s=h.get("estimated_duration_s"))
            self.status["output"] = h.get("path")
            return
        if h.get("scan_id") != self.scan_id or not self.has_map:
            self.needs_snapshot = True  # the end of a scan whose start this state never saw
            return
        self.ended = True
        self.end_state = str(h.get("event"))
        self.end_reason = str(h.get("reason") or "")
        self.progress.eta_s = 0.0

    def _on_point(self, msg: Message) -> None:
        h, a = msg.header, msg.arrays
        self.last_point = {k: v for k, v in h.items() if k != "arrays"}
        self.last_point_arrays = dict(a)
        self.live = None
        self.live_delta_od = None
        p = self.progress
        p.sweep = int(h["sweep"]) + 1
        p.point = int(h.get("position_in_sweep", 0)) + 1
        p.points_done = int(h.get("points_done", p.points_done))
        p.points_total = int(h.get("points_total", p.points_total))
        p.delay_ps = h.get("delay_ps")
        p.eta_s = h.get("eta_s")
        p.shots_per_s = h.get("shots_per_s")
        pairs, rejected = int(h.get("pairs", 0)), int(h.get("rejected_pairs", 0))
        p.rejected_fraction = rejected / (pairs + rejected) if pairs + rejected else 0.0
        if p.state in ("idle", "?", "preparing"):
            p.state = "acquiring"
        sweep, index = int(h["sweep"]), int(h["index"])
        if (h.get("scan_id") != self.scan_id or not self.has_map or self.completed is None
                or not (0 <= index < self.completed.shape[1]) or not (0 <= sweep < self.completed.shape[0])):
            self.needs_snapshot = True
            return
        assert self.delta_od is not None and self.delta_od_error is not None
        combined = a.get("combined_delta_od")
        combined_error = a.get("combined_delta_od_error")
        if combined is None or combined_error is None or combined.shape != self.delta_od[index].shape:
            self.needs_snapshot = True
            return
        self.delta_od[index] = combined
        self.delta_od_error[index] = combined_error
        self.completed[sweep, index] = True
        floor, masked = a.get("noise_floor"), a.get("masked")
        if floor is not None and masked is not None and (sweep, index) not in self._floor_seen:
            assert self._sigma2_sum is not None and self._pairs_counted is not None and self._floor_sweeps is not None
            self._floor_seen.add((sweep, index))
            counted = np.maximum(pairs - np.asarray(masked, dtype=np.int64), 0)
            ok = np.isfinite(floor)
            self._sigma2_sum[index] += np.where(ok, np.asarray(floor) ** 2 * counted.astype(np.float64) ** 2, 0.0)
            self._pairs_counted[index] += np.where(ok, counted, 0)
            self._floor_sweeps[index] += 1
        self.revision += 1

    def _on_block(self, msg: Message) -> None:
        self.live = {k: v for k, v in msg.header.items() if k != "arrays"}
        self.live_delta_od = msg.arrays.get("delta_od")
        if msg.header.get("delay_ps") is not None:
            self.progress.delay_ps = msg.header["delay_ps"]

    def _on_sweep(self, msg: Message) -> None:
        # the average over all finished sweeps, at every delay: heals points lost on the way
        a = msg.arrays
        dod, err = a.get("delta_od"), a.get("delta_od_error")
        if msg.header.get("scan_id") != self.scan_id or not self.has_map or dod is None or err is None:
            self.needs_snapshot = True
            return
        assert self.delta_od is not None and self.delta_od_error is not None and self.completed is not None
        if dod.shape != self.delta_od.shape:
            self.needs_snapshot = True
            return
        done = np.isfinite(dod).any(axis=1)
        self.delta_od[done] = dod[done]
        self.delta_od_error[done] = err[done]
        sweep = int(msg.header.get("sweep", -1))
        if 0 <= sweep < self.completed.shape[0]:
            self.completed[: sweep + 1, done] = True
        self.revision += 1

    def _on_log(self, msg: Message) -> None:
        self.last_log = f"{msg.header.get('level', 'info')}: {msg.header.get('message', '')}"

    # ------------------------------------------------------------------ derived, for the views
    def current_spectrum(self) -> tuple[np.ndarray | None, str]:
        """ΔOD of the point being measured (live partial average) or of the last finished point, and a label."""
        if self.live_delta_od is not None and self.live is not None:
            lv = self.live
            return self.live_delta_od, (f"measuring {lv.get('delay_ps', float('nan')):.4g} ps: "
                                        f"{lv.get('shots_done', 0)}/{lv.get('shots_target', 0)} shots")
        if self.last_point_arrays.get("delta_od") is not None and self.last_point is not None:
            lp = self.last_point
            return self.last_point_arrays["delta_od"], (f"last point {lp.get('delay_ps', float('nan')):.4g} ps, "
                                                        f"sweep {int(lp.get('sweep', 0)) + 1}")
        return None, ""

    def point_noise(self) -> tuple[float | None, float | None, float | None]:
        """Medians over pixels of the last point's standard error and shot-noise floor (OD), and of their ratio."""
        a = self.last_point_arrays
        err, floor = a.get("delta_od_error"), a.get("noise_floor")
        if err is None or floor is None:
            return None, None, self.progress.excess_noise_median
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.asarray(err, dtype=np.float64) / np.asarray(floor, dtype=np.float64)
        return _finite_median(err), _finite_median(floor), _finite_median(ratio)


# ---------------------------------------------------------------------------------------------- views
def _fmt(value: float | None, spec: str, unit: str = "") -> str:
    return "?" if value is None or not np.isfinite(value) else f"{value:{spec}}{unit}"


def render_block(state: MonitorState, *, where: str = "", now_s: float | None = None,
                 width_columns: int = SPECTRUM_WIDTH_COLUMNS, silent_s: float | None = None) -> list[str]:
    """The terminal view: a few lines a person reads at a glance."""
    p = state.progress
    bench = state.status.get("bench")
    head = "shotpair monitor" + (f" · bench {bench!r}" if bench else "") + (f" · {where}" if where else "")
    lines = [head, f"state {p.state}" + (f" · scan {state.scan_id}" if state.scan_id else "")
             + (f" · {state.end_state}" if state.ended and state.end_state else "")]
    if p.points_total:
        sweeps = p.sweeps or 1
        sweep = p.sweep or (1 if p.points_done < p.points_total else sweeps)
        points = p.points or max(p.points_total // sweeps, 1)
        point = p.point or 0
        in_sweep = point / points if point else 0.0
        done_sweeps = (sweep - 1) + in_sweep if p.points_done < p.points_total else sweeps
        lines.append(f"sweep {sweep}/{sweeps} {progress_bar(done_sweeps / sweeps, 12)}  "
                     f"point {point}/{points} {progress_bar(in_sweep, 20)}  "
                     f"{p.points_done}/{p.points_total} ({100.0 * p.points_done / p.points_total:.1f} %)  "
                     f"ETA {format_duration(p.eta_s) if p.eta_s is not None else '?'}")
    elif not state.has_map:
        lines.append("no scan yet")
    err, floor, ratio = state.point_noise()
    lines.append(f"delay {_fmt(p.delay_ps, '.4g', ' ps')}  ·  {_fmt(p.shots_per_s, '.0f', ' shots/s')}  ·  "
                 f"rejected {_fmt(None if p.rejected_fraction is None else 100 * p.rejected_fraction, '.2f', ' %')}")
    noise = f"noise/floor {_fmt(ratio, '.2f')} (median)"
    if err is not None and floor is not None:
        noise += f"  ·  noise {err * 1e3:.3g} mOD, shot-noise floor {floor * 1e3:.3g} mOD"
    lines.append(noise)
    spectrum, label = state.current_spectrum()
    if spectrum is not None:
        lines.append(label)
        wl = state.wavelengths_nm if state.wavelengths_nm.size == np.asarray(spectrum).size else None
        lines.extend(text_spectrum(spectrum, wl, width_columns))
    tail = f"messages {state.messages}, lost {state.lost}" + (f", malformed {state.bad}" if state.bad else "")
    if silent_s is not None:
        tail += f"  ·  NO ANSWER from the daemon for {silent_s:.0f} s"
    lines.append(tail)
    if state.last_log:
        lines.append(state.last_log)
    return lines


def render_line(state: MonitorState) -> str:
    """One line per finished point, for logs and pipes."""
    p = state.progress
    _, _, ratio = state.point_noise()
    spectrum, _ = state.current_spectrum()
    line = (f"sweep {p.sweep or '?'}/{p.sweeps or '?'} point {p.point or '?'}/{p.points or '?'} "
            f"({p.points_done}/{p.points_total}) delay {_fmt(p.delay_ps, '.4g', ' ps')} "
            f"{_fmt(p.shots_per_s, '.0f', ' shots/s')} "
            f"rejected {_fmt(None if p.rejected_fraction is None else 100 * p.rejected_fraction, '.2f', ' %')} "
            f"noise/floor {_fmt(ratio, '.2f')} ETA {format_duration(p.eta_s) if p.eta_s is not None else '?'}")
    if spectrum is not None and np.isfinite(spectrum).any():
        line += f" ΔOD {np.nanmin(spectrum) * 1e3:+.3g}…{np.nanmax(spectrum) * 1e3:+.3g} mOD"
    return line + f" lost {state.lost}"


class TerminalView:
    """Redraws the block in place on a terminal (ANSI cursor-home, clear); prints a line per point elsewhere."""

    def __init__(self, stream: TextIO, *, where: str = "", tty: bool | None = None) -> None:
        self.stream = stream
        self.where = where
        self.tty = bool(getattr(stream, "isatty", lambda: False)()) if tty is None else tty
        self._started = False
        self._last_state: str | None = None
        self._last_log: str | None = None
        self._last_end: tuple[str | None, bool] = (None, False)

    def _width(self) -> int:
        import shutil

        return max(10, min(SPECTRUM_WIDTH_COLUMNS, shutil.get_terminal_size((80, 24)).columns - 6))

    def show(self, state: MonitorState, msg: Message | None = None, *, silent_s: float | None = None) -> None:
        """Called after every message (and on silence); decides what to print."""
        if self.tty:
            if msg is not None and msg.topic not in ("status", "point", "block", "scan", "sweep"):
                return
            if not self._started:
                self.stream.write("\x1b[H\x1b[2J")
                self._started = True
            lines = render_block(state, where=self.where, width_columns=self._width(), silent_s=silent_s)
            self.stream.write("\x1b[H" + "".join(line + "\x1b[K\n" for line in lines) + "\x1b[J")
            self.stream.flush()
            return
        out: list[str] = []
        if not self._started:
            self._started = True
            out.append(" · ".join(render_block(state, where=self.where)[:2]))
        if state.progress.state != self._last_state:
            if self._last_state is not None:
                out.append(f"state {state.progress.state}")
            self._last_state = state.progress.state
        if msg is not None and msg.topic == "scan" and msg.get("event") == "started":
            out.append(f"scan {msg.get('scan_id')} started: {msg.get('sweeps')} sweep(s) x {msg.get('n_points')} "
                       f"points, about {format_duration(float(msg.get('estimated_duration_s') or 0.0))}")
        if msg is not None and msg.topic == "point":
            out.append(render_line(state))
        if (state.scan_id, state.ended) != self._last_end and state.ended:
            out.append(f"scan {state.scan_id} {state.end_state}" + (f": {state.end_reason}" if state.end_reason else ""))
        self._last_end = (state.scan_id, state.ended)
        if state.last_log != self._last_log and state.last_log:
            out.append(state.last_log)
        self._last_log = state.last_log
        if silent_s is not None:
            out.append(f"no answer from the daemon for {silent_s:.0f} s")
        if out:
            self.stream.write("".join(line + "\n" for line in out))
            self.stream.flush()

    def finish(self) -> None:
        self.stream.flush()


# ---------------------------------------------------------------------------------------------- figures
def _figure(data: ScanData) -> Any:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=RuntimeWarning)  # all-NaN columns of a partial map
        warnings.filterwarnings("ignore", message="No artists with labels")  # no kinetics yet: empty legend
        return scan_figure(data)


def render_rgba(data: ScanData, dpi: float = 100.0) -> np.ndarray:
    """The scan figure (daemon/figures.py) drawn off-screen, as an RGBA uint8 image [rows, columns, 4]."""
    plt = load_pyplot()
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = _figure(data)
    plt.close(fig)  # never let a GUI show it: it is only drawn into pixels here
    canvas = FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    canvas.draw()
    return np.asarray(canvas.buffer_rgba()).copy()


def write_png(data: ScanData, path: str | Path, dpi: float = 110.0) -> Path:
    """Write the scan figure to a PNG without a display. Raises StorageError if the file cannot be written."""
    import matplotlib

    if "matplotlib.pyplot" not in sys.modules:
        matplotlib.use("Agg")
    plt = load_pyplot()
    target = Path(path)
    fig = _figure(data)
    try:
        fig.savefig(target, dpi=dpi)
    except OSError as exc:
        raise StorageError(f"cannot write the image ({exc.strerror})", path=str(target)) from None
    finally:
        plt.close(fig)
    return target


class LiveWindow:
    """One window showing the scan figure, redrawn (at most every ``interval_s``) as the map grows.

    The figure is daemon/figures.py's, drawn off-screen and shown as an image, so the window and
    ``--save-png`` always show the same thing. Redraws are spaced by at least ``interval_s`` and by twice
    the time the last one took. Raises ShotpairError when there is no display.
    """

    def __init__(self, plt: Any | None = None, interval_s: float = PLOT_INTERVAL_S) -> None:
        self.plt = plt or load_pyplot()
        backend = str(self.plt.get_backend()).lower()
        if backend in _FILE_BACKENDS or "inline" in backend:
            raise ShotpairError(f"--plot needs a display (matplotlib backend is {backend!r}); "
                                "use --save-png PATH to write the figure to a file instead")
        self.interval_s = interval_s
        self.fig = self.plt.figure("shotpair monitor", figsize=(12, 8.5))
        self.ax = self.fig.add_axes((0.0, 0.0, 1.0, 1.0))
        self.ax.set_axis_off()
        self.image: Any = None
        self._revision = -1
        self._next_s = -float("inf")
        self.plt.show(block=False)

    @property
    def closed(self) -> bool:
        return not self.plt.fignum_exists(self.fig.number)

    def update(self, state: MonitorState, now_s: float) -> bool:
        """Redraw if the map changed and the last redraw is ``interval_s`` old; True if it redrew."""
        if state.revision == self._revision or now_s < self._next_s:
            return False
        data = state.scan_data()
        if data is None:
            return False
        t0 = time.perf_counter()
        rgba = render_rgba(data, dpi=self.fig.dpi)
        if self.image is None:
            self.image = self.ax.imshow(rgba, interpolation="antialiased")
        else:
            self.image.set_data(rgba)
        self.fig.canvas.draw_idle()
        self._revision = state.revision
        # drawing the figure can take a second on a slow computer: leave the window that long at least twice
        self._next_s = now_s + max(self.interval_s, 2.0 * (time.perf_counter() - t0))
        return True

    def pump(self) -> None:
        """Let the window's GUI handle its events (non-blocking)."""
        self.fig.canvas.flush_events()


# ---------------------------------------------------------------------------------------------- sockets
def data_endpoint_for(advertised: str | None, control_endpoint: str) -> str:
    """Where to subscribe: the daemon's advertised data endpoint, with a wildcard host (it bound all
    interfaces) replaced by the host the control endpoint reached."""
    if not advertised:
        raise DaemonError("the daemon's status names no data endpoint; pass --data", endpoint=control_endpoint)
    if not advertised.startswith("tcp://"):
        return advertised
    adv, ctl = urlsplit(advertised), urlsplit(control_endpoint)
    if adv.hostname in ("0.0.0.0", "::", "*") or advertised.startswith("tcp://*:"):
        host = ctl.hostname or "127.0.0.1"
        host = f"[{host}]" if ":" in host else host
        port = advertised.rsplit(":", 1)[1]
        return f"tcp://{host}:{port}"
    return advertised


@dataclass
class FollowResult:
    """How :func:`follow` ended: ``finished`` (the scan ended), ``deadline``, ``stopped`` or ``closed``."""

    reason: str
    data_endpoint: str


def follow(state: MonitorState, control_endpoint: str, data_endpoint: str | None = None, *, timeout_s: float = 5.0,
           until_finished: bool = False, deadline_s: float | None = None,
           on_message: Callable[[MonitorState, Message | None, float | None], None] | None = None,
           on_tick: Callable[[MonitorState, float], bool] | None = None,
           stop: threading.Event | None = None, ready: threading.Event | None = None,
           clock: Callable[[], float] = time.monotonic) -> FollowResult:
    """Fill ``state`` from a daemon until the scan ends (``until_finished``), ``deadline_s`` (a ``clock``
    time) passes, ``stop`` is set, or ``on_tick`` returns True.

    Order: ``status`` (which also names the data endpoint), then subscribe, then ``snapshot``; once the
    first stream message proves the subscription live, one more snapshot closes the window in which
    messages could pass unseen (PUB/SUB's slow join). ``ready`` is set then. When the stream is silent for
    ``timeout_s`` (at most CONTROL_TIMEOUT_CAP_S) the daemon is asked for ``status``; if that goes unanswered, DaemonUnavailable is raised
    when ``until_finished``, else ``on_message`` is told how long the daemon has been silent and the
    monitor keeps waiting for it.
    """
    import zmq

    control_timeout_s = min(timeout_s, CONTROL_TIMEOUT_CAP_S)
    ctx = zmq.Context()
    try:
        with ControlClient(control_endpoint, timeout_s=timeout_s, context=ctx) as control:
            state.apply_status(control.status())
            control.timeout_s = control_timeout_s
            endpoint = data_endpoint or data_endpoint_for(state.status.get("data_endpoint"), control_endpoint)
            with Subscriber(endpoint, context=ctx) as sub:
                state.apply_snapshot(control.snapshot())
                if on_message:
                    on_message(state, None, None)
                live = False
                last_heard_s = last_snapshot_s = clock()
                silent_since_s: float | None = None

                def ask(cmd: str) -> bool:
                    """One request during streaming; False (after telling the view) if it went unanswered."""
                    nonlocal last_heard_s, last_snapshot_s, silent_since_s
                    try:
                        if cmd == "snapshot":
                            state.apply_snapshot(control.snapshot())
                            last_snapshot_s = clock()
                        else:
                            state.apply_status(control.status())
                    except DaemonUnavailable:
                        if until_finished:
                            raise
                        silent_since_s = last_heard_s if silent_since_s is None else silent_since_s
                        last_heard_s = clock()
                        if on_message:
                            on_message(state, None, last_heard_s - silent_since_s)
                        return False
                    last_heard_s, silent_since_s = clock(), None
                    return True

                while True:
                    now = clock()
                    if stop is not None and stop.is_set():
                        return FollowResult("stopped", endpoint)
                    if until_finished and state.finished:
                        return FollowResult("finished", endpoint)
                    if deadline_s is not None and now >= deadline_s:
                        return FollowResult("deadline", endpoint)
                    wait_s = POLL_S if deadline_s is None else max(0.0, min(POLL_S, deadline_s - now))
                    try:
                        msg = sub.receive(wait_s)
                    except ProtocolError:
                        state.bad += 1
                        msg = None
                    now = clock()
                    if msg is not None:
                        last_heard_s, silent_since_s = now, None
                        lost_before = state.lost
                        state.lost = sub.lost
                        state.apply(msg, now)
                        if state.lost > lost_before:
                            state.needs_snapshot = True
                        if not live and ask("snapshot"):
                            live = True
                            if ready is not None:
                                ready.set()
                        if state.finished and until_finished:
                            ask("snapshot")  # the final map, whatever was lost on the way
                        if on_message:
                            on_message(state, msg, None)
                    if state.needs_snapshot and now - last_snapshot_s >= SNAPSHOT_MIN_INTERVAL_S:
                        ask("snapshot")
                    if clock() - last_heard_s >= control_timeout_s:
                        ask("status")
                    if on_tick is not None and on_tick(state, now):
                        return FollowResult("closed", endpoint)
    finally:
        ctx.destroy(linger=0)


# ---------------------------------------------------------------------------------------------- the command
def run_monitor(*, control: str = DEFAULT_CONTROL, data: str | None = None, once: bool = False, plot: bool = False,
                save_png: str | None = None, timeout_s: float = 5.0, out: TextIO | None = None,
                err: TextIO | None = None, stop: threading.Event | None = None,
                ready: threading.Event | None = None) -> int:
    """The whole `shotpair monitor` command; returns the exit code (0 also after Ctrl-C)."""
    out = out or sys.stdout
    err = err or sys.stderr
    if timeout_s <= 0 or not np.isfinite(timeout_s):
        print(f"shotpair: error: --timeout must be a positive number of seconds, got {timeout_s}", file=err)
        return EXIT_USAGE
    try:
        if once:
            with ControlClient(control, timeout_s=timeout_s) as client:
                print(describe_status(client.status()), file=out)
            return EXIT_OK
        state = MonitorState()
        if save_png:
            return _save_png_mode(state, control, data, save_png, timeout_s, out, stop, ready)
        view = TerminalView(out, where=control)
        window = LiveWindow() if plot else None

        def on_tick(st: MonitorState, now_s: float) -> bool:
            if window is None:
                return False
            window.update(st, now_s)
            window.pump()
            return window.closed

        try:
            follow(state, control, data, timeout_s=timeout_s,
                   on_message=lambda st, msg, silent: view.show(st, msg, silent_s=silent),
                   on_tick=on_tick, stop=stop, ready=ready)
        finally:
            view.finish()
        return EXIT_OK
    except KeyboardInterrupt:
        print(file=out)
        return EXIT_OK
    except ShotpairError as exc:
        print(f"shotpair: error: {exc}", file=err)
        return EXIT_FAILED


def _save_png_mode(state: MonitorState, control: str, data: str | None, path: str, timeout_s: float, out: TextIO,
                   stop: threading.Event | None, ready: threading.Event | None) -> int:
    deadline = time.monotonic() + timeout_s
    failure: DaemonError | None = None
    try:
        result = follow(state, control, data, timeout_s=timeout_s, until_finished=True, deadline_s=deadline,
                        stop=stop, ready=ready)
        reason = result.reason
    except DaemonUnavailable as exc:
        if not state.has_map:
            raise
        failure, reason = exc, "lost the daemon"
    data_set = state.scan_data()
    if data_set is None:
        raise DaemonError(f"nothing to draw: no scan on the daemon yet (waited {timeout_s:g} s)", code="empty",
                          endpoint=control)
    target = write_png(data_set, path)
    p = state.progress
    note = (f"scan {state.scan_id} {state.end_state}" if state.finished else
            f"scan {state.scan_id} still {p.state} ({reason}), {p.points_done}/{p.points_total} points")
    print(f"wrote {target}: {note}; {state.lost} message(s) lost", file=out)
    if failure is not None:
        raise failure
    return EXIT_OK


def _cmd_monitor(args: argparse.Namespace) -> int:
    return run_monitor(control=args.control, data=args.data, once=args.once, plot=args.plot,
                       save_png=args.save_png, timeout_s=args.timeout)


def add_monitor_command(sub: Any) -> argparse.ArgumentParser:
    """Add ``monitor`` to an argparse sub-parser set; its ``func(args)`` returns the exit code."""
    p = sub.add_parser("monitor", help="watch a running daemon live: progress, ΔOD of the current point, noise, "
                                       "losses (read-only)")
    p.add_argument("--control", metavar="ENDPOINT", default=DEFAULT_CONTROL,
                   help=f"the daemon's control endpoint (default {DEFAULT_CONTROL})")
    p.add_argument("--data", metavar="ENDPOINT",
                   help="the daemon's data stream (default: the one its status names)")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--once", action="store_true", help="print the daemon's status once and exit")
    mode.add_argument("--plot", action="store_true",
                      help="also open a window with the ΔOD map, spectra, kinetics and noise, updated live")
    mode.add_argument("--save-png", metavar="PATH",
                      help="write that figure to PATH (no display needed) once the scan ends or --timeout passes")
    p.add_argument("--timeout", type=float, default=5.0, metavar="S",
                   help="seconds to wait for the daemon to answer (default 5); with --save-png also the longest "
                        "wait for the scan to end before the figure is written with what has arrived")
    p.set_defaults(func=_cmd_monitor)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m shotpair.daemon.monitor ...``: the same command without the rest of the CLI."""
    parser = argparse.ArgumentParser(prog="shotpair")
    add_monitor_command(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(["monitor", *(sys.argv[1:] if argv is None else argv)])
    return int(args.func(args))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
