"""What a monitor knows about a daemon: progress, the ΔOD map so far, the live point, lost messages.

Kept from the daemon's ``status``/``snapshot`` replies and its stream messages, with no sockets, so it is
unit-testable. Must not send requests or draw.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from shotpair.drivers.errors import ProtocolError

from .figures import ScanData
from .protocol import Message

__all__ = ["MonitorState", "Progress"]


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

    def __init__(self, spectra_delays_ps: tuple[float, ...] | None = None,
                 kinetics_wavelengths_nm: tuple[float, ...] | None = None) -> None:
        self.spectra_delays_ps = spectra_delays_ps
        self.kinetics_wavelengths_nm = kinetics_wavelengths_nm
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
                        floor if floor is not None and np.isfinite(floor).any() else None, title,
                        self.spectra_delays_ps, self.kinetics_wavelengths_nm)

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
