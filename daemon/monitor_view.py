"""Text views of a monitored daemon: sparkline spectra, progress bars, the terminal block and log lines.

Formatting only: reads a MonitorState, never sockets, files or instruments.
"""

from __future__ import annotations

from typing import TextIO

import numpy as np

from .monitor_state import MonitorState
from .progress import format_duration
from .protocol import Message

__all__ = ["SPARK_LEVELS", "SPECTRUM_WIDTH_COLUMNS", "sparkline", "text_spectrum", "progress_bar", "render_block",
           "render_line", "TerminalView"]

#: Eight levels of the text spectrum, lowest first; a column without data is a space.
SPARK_LEVELS = "▁▂▃▄▅▆▇█"
SPECTRUM_WIDTH_COLUMNS = 60


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
