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

from .auth import ClientKeys, add_client_key_options, client_keys_from_args
from .client import DEFAULT_CONTROL, ControlClient, Subscriber
from .figures import ScanData, load_pyplot, parse_numbers, scan_figure
from .monitor_state import MonitorState, Progress
from .monitor_view import TerminalView, progress_bar, render_block, render_line, sparkline, text_spectrum
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

#: Never ask for a snapshot more often than this (it can be megabytes), s.
SNAPSHOT_MIN_INTERVAL_S = 1.0
#: How often a live window is redrawn at most, s (drawing the 2×2 figure takes a good fraction of that).
PLOT_INTERVAL_S = 1.0
#: Longest wait on the data socket per turn of the loop, s (keeps Ctrl-C, windows and deadlines responsive).
POLL_S = 0.1
#: Control requests during streaming never wait longer than this, whatever --timeout says, s.
CONTROL_TIMEOUT_CAP_S = 10.0
_FILE_BACKENDS = ("agg", "cairo", "pdf", "pgf", "ps", "svg", "template")


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
           clock: Callable[[], float] = time.monotonic, keys: ClientKeys | None = None) -> FollowResult:
    """Fill ``state`` from a daemon until the scan ends (``until_finished``), ``deadline_s`` (a ``clock``
    time) passes, ``stop`` is set, or ``on_tick`` returns True.

    Order: ``status`` (which also names the data endpoint), then subscribe, then ``snapshot``; once the
    first stream message proves the subscription live, one more snapshot closes the window in which
    messages could pass unseen (PUB/SUB's slow join). ``ready`` is set then. When the stream is silent for
    ``timeout_s`` (at most CONTROL_TIMEOUT_CAP_S) the daemon is asked for ``status``; if that goes unanswered, DaemonUnavailable is raised
    when ``until_finished``, else ``on_message`` is told how long the daemon has been silent and the
    monitor keeps waiting for it. ``keys``: CURVE keys for an authenticating daemon (both sockets).
    """
    import zmq

    control_timeout_s = min(timeout_s, CONTROL_TIMEOUT_CAP_S)
    ctx = zmq.Context()
    try:
        with ControlClient(control_endpoint, timeout_s=timeout_s, context=ctx, keys=keys) as control:
            state.apply_status(control.status())
            control.timeout_s = control_timeout_s
            endpoint = data_endpoint or data_endpoint_for(state.status.get("data_endpoint"), control_endpoint)
            with Subscriber(endpoint, context=ctx, keys=keys) as sub:
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
                ready: threading.Event | None = None, delays_ps: Sequence[float] | None = None,
                wavelengths_nm: Sequence[float] | None = None, keys: ClientKeys | None = None) -> int:
    """The whole `shotpair monitor` command; returns the exit code (0 also after Ctrl-C)."""
    out = out or sys.stdout
    err = err or sys.stderr
    if timeout_s <= 0 or not np.isfinite(timeout_s):
        print(f"shotpair: error: --timeout must be a positive number of seconds, got {timeout_s}", file=err)
        return EXIT_USAGE
    try:
        if once:
            with ControlClient(control, timeout_s=timeout_s, keys=keys) as client:
                print(describe_status(client.status()), file=out)
            return EXIT_OK
        state = MonitorState(tuple(delays_ps) if delays_ps else None,
                             tuple(wavelengths_nm) if wavelengths_nm else None)
        if save_png:
            return _save_png_mode(state, control, data, save_png, timeout_s, out, stop, ready, keys)
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
                   on_tick=on_tick, stop=stop, ready=ready, keys=keys)
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
                   stop: threading.Event | None, ready: threading.Event | None,
                   keys: ClientKeys | None = None) -> int:
    deadline = time.monotonic() + timeout_s
    failure: DaemonError | None = None
    try:
        result = follow(state, control, data, timeout_s=timeout_s, until_finished=True, deadline_s=deadline,
                        stop=stop, ready=ready, keys=keys)
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
    try:
        keys = client_keys_from_args(args)
    except ShotpairError as exc:  # missing or unreadable key files: a usage mistake
        print(f"shotpair: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    return run_monitor(control=args.control, data=args.data, once=args.once, plot=args.plot,
                       save_png=args.save_png, timeout_s=args.timeout,
                       delays_ps=parse_numbers(args.delays, "--delays"),
                       wavelengths_nm=parse_numbers(args.wavelengths, "--wavelengths"), keys=keys)


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
    p.add_argument("--delays", metavar="PS,PS,...", help="delays (ps) for the spectra panel of the figure")
    p.add_argument("--wavelengths", metavar="NM,NM,...", help="wavelengths (nm) for the kinetics panel")
    add_client_key_options(p)  # a read-only client is enough: the monitor asks only status and snapshot
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
