"""Tests of `shotpair monitor`: the state kept from snapshot and stream messages, the text rendering, and the
whole command against a real daemon (`shotpair serve --fast`) over tcp on 127.0.0.1.

Messages for the unit tests go through the real codec (encode_data → decode_data, encode_reply →
decode_reply). Nothing sleeps to synchronise: the daemon's first line, the monitor's ``ready`` event and
thread joins are waited on with timeouts.
"""

from __future__ import annotations

import argparse
import io
import re
import selectors
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

import numpy as np
import pytest

from daemon_helpers import Served
from shotpair.daemon import monitor, protocol
from shotpair.daemon.client import ControlClient
from shotpair.daemon.monitor import MonitorState, sparkline, text_spectrum
from shotpair.daemon.point_result import PointResult
from shotpair.drivers.errors import ShotpairError

SCAN_ID = "20260101-000000-abcdef"
DELAYS_PS = np.array([-2.0, 0.5, 10.0])
WAVELENGTHS_NM = np.array([450.0, 500.0, 550.0, 600.0, 650.0])


def data_msg(topic: str, seq: int, fields: dict[str, Any] | None = None,
             arrays: dict[str, np.ndarray] | None = None, scan_id: str | None = SCAN_ID) -> protocol.Message:
    return protocol.decode_data(protocol.encode_data(topic, seq, scan_id, 1.0e9, fields, arrays))


def started(seq: int = 0, sweeps: int = 2, scan_id: str = SCAN_ID) -> protocol.Message:
    return data_msg("scan", seq, {"event": "started", "path": "/data/x.h5", "n_points": DELAYS_PS.size,
                                  "sweeps": sweeps, "shots_per_point": 200, "estimated_duration_s": 12.0},
                    {"delay_ps": DELAYS_PS, "wavelength_nm": WAVELENGTHS_NM}, scan_id=scan_id)


def point(seq: int, sweep: int, index: int, combined: np.ndarray, *, floor: float | np.ndarray = 1e-4,
          pairs: int = 100,
          masked: np.ndarray | None = None, rejected: int = 0, position: int | None = None,
          scan_id: str = SCAN_ID) -> protocol.Message:
    p = WAVELENGTHS_NM.size
    arrays = {"delta_od": combined + 1e-5, "delta_od_error": np.full(p, 2e-4), "noise_floor": np.broadcast_to(floor, (p,)).astype(float),
              "mean_counts_pump_on": np.full(p, 2e4), "mean_counts_pump_off": np.full(p, 2e4),
              "masked": np.zeros(p, dtype=np.int64) if masked is None else masked,
              "combined_delta_od": combined, "combined_delta_od_error": np.full(p, 1.5e-4)}
    fields = {"sweep": sweep, "index": index, "position_in_sweep": index if position is None else position,
              "delay_ps": float(DELAYS_PS[index]), "points_done": sweep * DELAYS_PS.size + index + 1,
              "points_total": 2 * DELAYS_PS.size, "pairs": pairs, "rejected_pairs": rejected, "gaps": 0,
              "shots": 2 * (pairs + rejected), "eta_s": 42.0, "shots_per_s": 998.0}
    return data_msg("point", seq, fields, arrays, scan_id=scan_id)


def snapshot_reply(delta_od: np.ndarray, completed: np.ndarray, state: str = "acquiring",
                   scan_id: str | None = SCAN_ID) -> protocol.Message:
    arrays = {"delta_od": delta_od, "delta_od_errors": np.full_like(delta_od, 3e-4), "delay_ps": DELAYS_PS,
              "wavelength_nm": WAVELENGTHS_NM, "completed": completed}
    return protocol.decode_reply(protocol.encode_reply(7, arrays, scan_id=scan_id, state=state, empty=False))


def spectrum(scale: float) -> np.ndarray:
    return scale * np.array([-2e-3, -1e-3, 0.0, 1e-3, 2e-3])


# ---------------------------------------------------------------------------------------------- state keeping
def test_points_fill_the_map_row_by_row_and_progress_counts_from_one() -> None:
    st = MonitorState()
    st.apply(started())
    assert st.has_map and not st.finished
    assert np.isnan(st.delta_od).all()
    st.apply(point(1, 0, 1, spectrum(1.0), pairs=99, rejected=1))
    assert np.array_equal(st.delta_od[1], spectrum(1.0))
    assert np.isnan(st.delta_od[[0, 2]]).all()
    assert np.array_equal(st.delta_od_error[1], np.full(5, 1.5e-4))
    assert st.completed.tolist() == [[False, True, False], [False, False, False]]
    p = st.progress
    assert (p.sweep, p.point, p.points_done, p.points_total) == (1, 2, 2, 6)
    assert p.rejected_fraction == pytest.approx(0.01)
    assert (p.delay_ps, p.eta_s, p.shots_per_s) == (0.5, 42.0, 998.0)
    # a second sweep's point replaces the row with the new all-sweeps average
    st.apply(point(2, 1, 1, spectrum(0.5)))
    assert np.array_equal(st.delta_od[1], spectrum(0.5))
    assert st.completed[:, 1].tolist() == [True, True]
    assert not st.needs_snapshot


def test_scan_end_finishes_and_a_new_scan_starts_a_fresh_map() -> None:
    st = MonitorState()
    st.apply(started())
    st.apply(point(1, 0, 0, spectrum(1.0)))
    st.apply(data_msg("scan", 2, {"event": "aborted", "reason": "user", "points_done": 1, "path": "x",
                                  "safe_problems": []}))
    assert st.finished and st.end_state == "aborted" and st.end_reason == "user"
    st.apply(started(3, scan_id="20260101-000001-000000"))
    assert not st.finished and st.scan_id == "20260101-000001-000000"
    assert np.isnan(st.delta_od).all()


def test_the_same_point_twice_changes_nothing() -> None:
    st = MonitorState()
    st.apply(started())
    msg = point(1, 0, 2, spectrum(1.0), floor=2e-4, pairs=50)
    st.apply(msg)
    once = (st.delta_od.copy(), st.noise_floor().copy(), st.completed.copy())
    st.apply(msg)
    assert np.array_equal(st.delta_od, once[0], equal_nan=True)
    assert np.array_equal(st.noise_floor(), once[1], equal_nan=True)
    assert np.array_equal(st.completed, once[2])


def _result(rng: np.random.Generator, pairs: int, masked: np.ndarray) -> PointResult:
    px = masked.size
    count = pairs - masked
    return PointResult(count=count, mean=rng.normal(0, 1e-3, px), m2=rng.uniform(1e-6, 2e-6, px) * count,
                       sigma2_sum=rng.uniform(0.5e-6, 2e-6, px) * count, counts_on_sum=np.zeros(px),
                       counts_off_sum=np.zeros(px), saturated=masked, nonpositive=np.zeros(px, dtype=np.int64),
                       shots=2 * pairs, pairs=pairs)


def test_floor_of_the_average_equals_the_merged_result_floor() -> None:
    # Reference: PointResult.combine (the engine's own merge of two sweeps of one point), whose floor is
    # sqrt(Σσ²)/count over all pairs; the monitor only sees each sweep's floor, pairs and masked counts.
    rng = np.random.default_rng(11)
    m1 = np.array([0, 3, 0, 10, 0], dtype=np.int64)
    m2 = np.array([5, 0, 0, 0, 1], dtype=np.int64)
    r1, r2 = _result(rng, 80, m1), _result(rng, 120, m2)
    merged = PointResult.combine([r1, r2])
    st = MonitorState()
    st.apply(started())
    for seq, (sweep, r) in enumerate([(0, r1), (1, r2)], start=1):
        st.apply(point(seq, sweep, 0, merged.delta_od, pairs=r.pairs, masked=r.masked, floor=r.floor))
    np.testing.assert_allclose(st.noise_floor()[0], merged.floor, rtol=1e-12)
    assert not np.allclose(st.noise_floor()[0], r2.floor)  # not just the last sweep's floor
    assert np.isnan(st.noise_floor()[1:]).all()


def test_floor_is_unknown_where_a_sweep_of_that_point_was_not_seen() -> None:
    st = MonitorState()
    st.apply(started())
    completed = np.array([[True, True, False], [False, False, False]])
    st.apply_snapshot(snapshot_reply(np.vstack([spectrum(1), spectrum(2), np.full(5, np.nan)]), completed))
    # delay 0's first sweep happened before the monitor joined: its second sweep alone would understate the floor
    st.apply(point(1, 1, 0, spectrum(1.5), floor=1e-4))
    st.apply(point(2, 0, 2, spectrum(3.0), floor=1e-4))
    floor = st.noise_floor()
    assert np.isnan(floor[0]).all() and np.isnan(floor[1]).all()
    np.testing.assert_allclose(floor[2], 1e-4)


def test_late_join_snapshot_fills_the_map_and_idle_means_finished() -> None:
    dod = np.vstack([spectrum(1), np.full(5, np.nan), spectrum(3)])
    completed = np.array([[True, True, True], [True, False, True]])
    st = MonitorState()
    st.apply_status({"state": "acquiring", "scan_id": SCAN_ID, "sweep": 2, "point": 2, "points": 3, "sweeps": 2,
                     "points_done": 5, "points_total": 6, "eta_s": 3.0})
    assert st.needs_snapshot  # a scan it has no map of
    st.apply_snapshot(snapshot_reply(dod, completed))
    assert not st.needs_snapshot and not st.finished
    assert np.array_equal(st.delta_od, dod, equal_nan=True)
    assert np.array_equal(st.delays_ps, DELAYS_PS) and np.array_equal(st.wavelengths_nm, WAVELENGTHS_NM)
    st.apply(point(9, 1, 1, spectrum(2)))  # the map copy is writable
    assert np.array_equal(st.delta_od[1], spectrum(2))
    idle = MonitorState()
    idle.apply_status({"state": "idle", "scan_id": SCAN_ID, "last_scan_state": "complete"})
    idle.apply_snapshot(snapshot_reply(dod, completed, state="idle"))
    assert idle.finished and idle.end_state == "complete"
    data = idle.scan_data()
    assert data is not None and data.delta_od.shape == (3, 5)


def test_what_cannot_be_placed_asks_for_a_snapshot() -> None:
    st = MonitorState()
    st.apply(started())
    before = st.delta_od.copy()
    st.apply(point(1, 0, 0, spectrum(1.0), scan_id="20260101-000009-999999"))  # another scan's point
    assert st.needs_snapshot
    assert np.array_equal(st.delta_od, before, equal_nan=True)
    st.needs_snapshot = False
    st.apply(data_msg("scan", 2, {"event": "complete", "reason": "", "points_done": 6, "path": "x",
                                  "safe_problems": []}, scan_id="20260101-000009-999999"))
    assert st.needs_snapshot and not st.finished  # the end of another scan does not end this map
    st.needs_snapshot = False
    st.apply_status({"state": "acquiring", "scan_id": "20260101-000010-000000"})  # its start was missed
    assert st.needs_snapshot


def test_sweep_message_heals_a_lost_point() -> None:
    st = MonitorState()
    st.apply(started())
    st.apply(point(1, 0, 0, spectrum(1.0)))
    # point 1 of sweep 0 was lost; the sweep message carries the average at every delay
    avg = np.vstack([spectrum(1.0), spectrum(2.0), spectrum(3.0)])
    st.apply(data_msg("sweep", 4, {"sweep": 0, "sweeps": 2},
                      {"delta_od": avg, "delta_od_error": np.full((3, 5), 1e-4), "pairs": np.full(3, 100),
                       "delay_ps": DELAYS_PS, "wavelength_nm": WAVELENGTHS_NM}))
    assert np.array_equal(st.delta_od, avg)
    assert st.completed[0].all() and not st.completed[1].any()


def test_block_messages_show_the_point_being_measured() -> None:
    st = MonitorState()
    st.apply(started())
    st.apply(data_msg("block", 1, {"sweep": 0, "index": 2, "delay_ps": 10.0, "shots_done": 100, "shots_target": 200,
                                   "pairs": 50}, {"delta_od": spectrum(4), "delta_od_error": np.full(5, 1e-3)}))
    dod, label = st.current_spectrum()
    assert np.array_equal(dod, spectrum(4)) and "100/200 shots" in label and "10 ps" in label
    st.apply(point(2, 0, 2, spectrum(1)))
    dod, label = st.current_spectrum()
    assert np.array_equal(dod, spectrum(1) + 1e-5) and label.startswith("last point 10 ps")


# ---------------------------------------------------------------------------------------------- text rendering
def test_sparkline_levels_bins_and_gaps() -> None:
    assert sparkline(np.arange(8.0)) == "▁▂▃▄▅▆▇█"
    assert sparkline(-np.arange(8.0)) == "█▇▆▅▄▃▂▁"
    # 120 values into 60 columns: pairs are averaged, so a ramp stays a ramp of 60 columns
    line = sparkline(np.linspace(0.0, 1.0, 120), 60)
    assert len(line) == 60 and line[0] == "▁" and line[-1] == "█"
    assert list(line) == sorted(line)
    assert sparkline(np.array([0.0, np.nan, 1.0])) == "▁ █"
    assert sparkline(np.full(4, 3.0)) == "▄▄▄▄"
    assert sparkline(np.full(5, np.nan)) == "     "
    assert sparkline(np.zeros(0)) == ""
    assert len(sparkline(np.arange(10.0), 60)) == 10  # never more columns than values


def test_text_spectrum_reports_extremes_in_mod_and_where() -> None:
    wl = np.linspace(400.0, 700.0, 301)
    dod = -2e-3 * np.exp(-((wl - 450.0) / 10.0) ** 2) + 1e-3 * np.exp(-((wl - 650.0) / 20.0) ** 2)
    spark, info = text_spectrum(dod, wl, 60)
    assert spark.startswith("ΔOD ") and len(spark) == 4 + 60
    assert "400–700 nm" in info
    m = re.search(r"min (\S+) mOD at (\d+) nm", info)
    assert m and float(m.group(1)) == pytest.approx(-1.75, abs=0.3) and abs(int(m.group(2)) - 450) <= 5
    m = re.search(r"max (\S+) mOD at (\d+) nm", info)
    assert m and float(m.group(1)) == pytest.approx(0.95, abs=0.1) and abs(int(m.group(2)) - 650) <= 5
    assert "zero ≈" in info
    assert text_spectrum(np.full(4, np.nan))[1].strip() == "no ΔOD yet"


def test_progress_bar_clips() -> None:
    assert monitor.progress_bar(0.5, 10) == "[#####-----]"
    assert monitor.progress_bar(2.0, 4) == "[####]"
    assert monitor.progress_bar(float("nan"), 4) == "[----]"


def _busy_state() -> MonitorState:
    st = MonitorState()
    st.apply_status({"state": "acquiring", "scan_id": SCAN_ID, "bench": "test bench"})
    st.apply(started())
    st.apply(point(1, 0, 0, spectrum(1.0), floor=1e-4, pairs=99, rejected=1))
    st.lost = 3
    return st


def test_block_shows_progress_rates_noise_spectrum_and_losses() -> None:
    text = "\n".join(monitor.render_block(_busy_state(), where="tcp://127.0.0.1:1"))
    assert "bench 'test bench'" in text and "state acquiring" in text
    assert "sweep 1/2" in text and "point 1/3" in text and "1/6 (16.7 %)" in text and "ETA 0:42" in text
    assert "delay -2 ps" in text and "998 shots/s" in text and "rejected 1.00 %" in text
    assert "noise/floor 2.00" in text and "shot-noise floor 0.1 mOD" in text
    assert "ΔOD ▁" in text and "min -1.99 mOD at 450 nm" in text
    assert "lost 3" in text


def test_terminal_view_redraws_in_place_on_a_tty_and_prints_lines_elsewhere() -> None:
    st = _busy_state()
    tty = io.StringIO()
    view = monitor.TerminalView(tty, tty=True)
    view.show(st, None)
    view.show(st, data_msg("status", 5, {"state": "acquiring"}))
    assert tty.getvalue().count("\x1b[H") == 3  # clear once, then home per redraw
    assert tty.getvalue().count("state acquiring") == 2
    pipe = io.StringIO()
    view = monitor.TerminalView(pipe, tty=False)
    view.show(st, None)
    for seq in range(3):
        msg = point(10 + seq, 0, seq, spectrum(1.0))
        st.apply(msg)
        view.show(st, msg)
        view.show(st, data_msg("status", 20 + seq, {"state": "acquiring"}))  # heartbeats print nothing
    lines = pipe.getvalue().splitlines()
    assert "\x1b" not in pipe.getvalue()
    assert len([ln for ln in lines if ln.startswith("sweep 1/2 point")]) == 3
    assert len(lines) == 4 and lines[-1].endswith("lost 3")


def test_data_endpoint_from_status() -> None:
    assert monitor.data_endpoint_for("tcp://127.0.0.1:5561", "tcp://127.0.0.1:5562") == "tcp://127.0.0.1:5561"
    assert monitor.data_endpoint_for("tcp://0.0.0.0:5561", "tcp://10.1.2.3:5562") == "tcp://10.1.2.3:5561"
    assert monitor.data_endpoint_for("ipc:///tmp/x", "tcp://127.0.0.1:5562") == "ipc:///tmp/x"
    with pytest.raises(ShotpairError):
        monitor.data_endpoint_for(None, "tcp://127.0.0.1:5562")


def test_plot_without_a_display_says_to_save_a_png() -> None:
    import matplotlib.pyplot as plt

    class FileOnly:  # pyplot as it is on a computer without a display
        def __getattr__(self, name: str) -> Any:
            return getattr(plt, name)

        def get_backend(self) -> str:
            return "agg"

    with pytest.raises(ShotpairError, match="--save-png"):
        monitor.LiveWindow(FileOnly())


def test_live_window_redraws_when_the_map_changes() -> None:
    import matplotlib.pyplot as plt

    class Screen:  # Agg pyplot that claims a display, so the window logic runs headless
        def __getattr__(self, name: str) -> Any:
            return getattr(plt, name)

        def get_backend(self) -> str:
            return "tkagg"

        def show(self, block: bool = True) -> None:
            pass

    window = monitor.LiveWindow(Screen(), interval_s=0.0)
    try:
        st = MonitorState()
        assert not window.update(st, 0.0)  # nothing to draw before a scan is known
        st.apply(started())
        st.apply(point(1, 0, 1, spectrum(1.0)))
        assert window.update(st, 100.0)
        rows, cols, depth = window.image.get_array().shape
        assert depth == 4 and rows > 100 and cols > 100
        assert not window.update(st, 200.0)  # unchanged map: no redraw
        window.pump()
        assert not window.closed
    finally:
        plt.close(window.fig)
    assert window.closed


def test_command_line_options() -> None:
    parser = argparse.ArgumentParser()
    monitor.add_monitor_command(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["monitor", "--control", "tcp://127.0.0.1:1", "--save-png", "x.png", "--timeout", "2"])
    assert (args.control, args.data, args.save_png, args.timeout, args.once, args.plot) == (
        "tcp://127.0.0.1:1", None, "x.png", 2.0, False, False)
    assert args.func is not None
    with pytest.raises(SystemExit):
        parser.parse_args(["monitor", "--once", "--plot"])


# ---------------------------------------------------------------------------------------------- against a daemon
BENCH = """
[bench]
name = "monitor test bench"
dark_shots = 200

[bench.detector]
pixels = 256
wavelength_poly_nm = [420.0, 1.176470588]   # 420-720 nm

[stream]
status_interval_s = 0.2

[simulation]
seed = 5
"""


def scan_table(tmp_path: Path, name: str) -> dict[str, Any]:
    return {"title": "monitor test", "shots_per_point": 200, "sweeps": 2, "seed": 5,
            "output": str(tmp_path / f"{name}.h5"),
            "delays": [{"kind": "list", "delays_ps": [-5.0, 0.3, 1.0, 3.0, 10.0, 100.0, 1000.0]}]}


def read_line(stream: IO[str], timeout_s: float) -> str:
    """One line from a child's pipe, waiting at most ``timeout_s``."""
    with selectors.DefaultSelector() as sel:
        sel.register(stream, selectors.EVENT_READ)
        if not sel.select(timeout_s):
            raise AssertionError(f"no line within {timeout_s} s")
    return stream.readline()


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[Served]:
    cfg = tmp_path / "bench.toml"
    cfg.write_text(BENCH)
    served = Served(cfg, fast=True)
    try:
        yield served
    finally:
        served.stop()


def colour_fractions(png: Path) -> tuple[float, float, float, float]:
    """Fractions of red and of blue pixels inside the ΔOD map panel, and their mean column (0…1)."""
    from matplotlib.image import imread

    img = imread(str(png))[..., :3]
    h, w = img.shape[:2]
    # the map's plotting area lies inside the top-left panel, left of its colour bar
    region = img[int(0.08 * h):int(0.42 * h), int(0.08 * w):int(0.38 * w)]
    r, b = region[..., 0], region[..., 2]
    red, blue = (r - b) > 0.3, (b - r) > 0.3
    cols = np.arange(region.shape[1])[None, :] * np.ones(region.shape[:2])
    return (float(red.mean()), float(blue.mean()), float(cols[red].mean() / region.shape[1]) if red.any() else -1.0,
            float(cols[blue].mean() / region.shape[1]) if blue.any() else -1.0)


def _run_in_thread(**kwargs: Any) -> tuple[threading.Thread, dict[str, Any], threading.Event]:
    ready = threading.Event()
    result: dict[str, Any] = {}

    def target() -> None:
        result["rc"] = monitor.run_monitor(ready=ready, **kwargs)

    t = threading.Thread(target=target, daemon=True)
    t.start()
    return t, result, ready


def test_save_png_follows_a_scan_to_its_end(daemon: Served, tmp_path: Path) -> None:
    png, out, err = tmp_path / "live.png", io.StringIO(), io.StringIO()
    thread, result, ready = _run_in_thread(control=daemon.control, save_png=str(png), timeout_s=60.0, out=out,
                                           err=err)
    assert ready.wait(30.0), "the monitor never saw the data stream"
    assert thread.is_alive() and not png.exists()  # nothing measured yet: it waits for a scan
    with ControlClient(daemon.control, timeout_s=5.0) as c:
        c.start(scan=scan_table(tmp_path, "live"))
    thread.join(60.0)
    assert not thread.is_alive()
    assert result["rc"] == 0, err.getvalue()
    assert re.search(r"wrote .*live\.png: scan \S+ complete; 0 message\(s\) lost", out.getvalue()), out.getvalue()
    red, blue, red_x, blue_x = colour_fractions(png)
    assert red > 0.02 and blue > 0.02, (red, blue)
    assert blue_x < red_x  # the bleach (blue) lies at shorter wavelengths than the induced absorption (red)

    # a monitor joining after the scan ended draws the same finished map from the snapshot alone, at once
    late, out2 = tmp_path / "late.png", io.StringIO()
    assert monitor.run_monitor(control=daemon.control, save_png=str(late), timeout_s=10.0, out=out2) == 0
    assert "complete" in out2.getvalue()
    red2, blue2, _, _ = colour_fractions(late)
    assert red2 > 0.02 and blue2 > 0.02


def test_streamed_map_and_floor_equal_the_file(daemon: Served, tmp_path: Path) -> None:
    import h5py

    state, ready, done = MonitorState(), threading.Event(), {}

    def target() -> None:
        done["result"] = monitor.follow(state, daemon.control, timeout_s=5.0, until_finished=True,
                                        deadline_s=time.monotonic() + 60.0, ready=ready)

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    assert ready.wait(30.0)
    with ControlClient(daemon.control, timeout_s=5.0) as c:
        reply = c.start(scan=scan_table(tmp_path, "file"))
    thread.join(60.0)
    assert not thread.is_alive() and done["result"].reason == "finished"
    assert done["result"].data_endpoint == daemon.data  # found from the daemon's status
    assert state.scan_id == reply["scan_id"] and state.end_state == "complete" and state.lost == 0
    assert state.completed.all()
    with h5py.File(reply["output"], "r") as f:
        np.testing.assert_array_equal(state.delta_od, f["entry/delta_od/delta_od"][()])
        np.testing.assert_array_equal(state.delta_od_error, f["entry/delta_od/delta_od_errors"][()])
        np.testing.assert_allclose(state.noise_floor(), f["entry/diagnostics/noise_floor_combined"][()], rtol=1e-9)


def test_once_prints_the_state_and_ctrl_c_ends_the_live_view_cleanly(daemon: Served) -> None:
    out = io.StringIO()
    assert monitor.run_monitor(control=daemon.control, once=True, timeout_s=5.0, out=out) == 0
    assert out.getvalue().startswith("state idle")

    proc = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.monitor", "--control", daemon.control],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
    try:
        first = read_line(proc.stdout, 60.0)
        assert "shotpair monitor" in first and "bench 'monitor test bench'" in first and "state idle" in first
        proc.send_signal(signal.SIGINT)
        _, stderr = proc.communicate(timeout=15.0)
        assert proc.returncode == 0, stderr
        assert "Traceback" not in stderr
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=5)


def test_a_daemon_that_goes_away_is_reported_and_waited_for(daemon: Served) -> None:
    state, ready, silent, stop = MonitorState(), threading.Event(), threading.Event(), threading.Event()
    seen: list[float] = []

    def on_message(st: MonitorState, msg: protocol.Message | None, silent_s: float | None) -> None:
        if silent_s is not None:
            seen.append(silent_s)
            silent.set()

    result: dict[str, Any] = {}
    thread = threading.Thread(target=lambda: result.setdefault("r", monitor.follow(
        state, daemon.control, timeout_s=0.5, on_message=on_message, stop=stop, ready=ready)), daemon=True)
    thread.start()
    try:
        assert ready.wait(30.0)
        daemon.proc.kill()
        daemon.proc.wait(timeout=10)
        assert silent.wait(30.0), "the monitor never noticed the daemon was gone"
        assert thread.is_alive()  # it keeps waiting for the daemon to come back
    finally:
        stop.set()
        thread.join(10.0)
    assert not thread.is_alive() and result["r"].reason == "stopped"
    assert seen[0] >= 0.5


def _dead_endpoint() -> str:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"tcp://127.0.0.1:{port}"


def test_once_against_nothing_fails_fast_with_one_clear_line(tmp_path: Path) -> None:
    endpoint = _dead_endpoint()
    proc = subprocess.run([sys.executable, "-m", "shotpair.daemon.monitor", "--once", "--control", endpoint,
                           "--timeout", "0.3"], capture_output=True, text=True, timeout=60.0,
                          stdin=subprocess.DEVNULL, check=False)
    assert proc.returncode == monitor.EXIT_FAILED
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert endpoint in lines[0] and "no shotpair daemon answered within 0.3 s" in lines[0]
    # in process, without the interpreter's start-up: the wait is the timeout, not more
    err = io.StringIO()
    t0 = time.monotonic()
    png = tmp_path / "never.png"
    assert monitor.run_monitor(control=endpoint, save_png=str(png), timeout_s=0.3, err=err) == 1
    assert time.monotonic() - t0 < 0.3 + 2.0
    assert "no shotpair daemon answered" in err.getvalue() and not png.exists()
