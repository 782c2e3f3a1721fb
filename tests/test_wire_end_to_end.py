"""Whole scans through the real drivers (pyserial on pseudo-terminals, pyvisa-py on 127.0.0.1 sockets)
against the wire simulators, compared with the noise-free truth and with the same scan in-process.

Checks (reduced chi-square as in test_scan_end_to_end.py: 1 within about sqrt(2/k) for k values; any
statistics text):
- over the wire the measured ΔOD agrees with the stored truth as well as in-process does;
- the wire scan and the in-process scan agree with each other within their combined errors;
- the file records each instrument's identity as the instrument gave it;
- on every exit path (an instrument that disconnects mid-scan, an abort) the simulated shutter is closed
  and the stage has stopped, read from the simulated bench itself, not from the driver.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from shotpair.daemon.bench import build_bench
from shotpair.daemon.cli import main
from shotpair.daemon.config import load_config
from shotpair.daemon.events import PointSaved, ScanEnded
from shotpair.daemon.plan import make_plan
from shotpair.daemon.runner import Runner, ScanJob, new_scan_id
from shotpair.drivers.errors import LimitError
from shotpair.simulators.wire.launcher import WireBench

TIMEOUT_S = 60.0
PURE = """
laser_fluctuation = false
pump_fluctuation = false
drift = false
scatter = false
emission = false
"""


def read(path):
    with h5py.File(path, "r") as f:
        e = f["entry"]
        out = {k: e["delta_od"][k][()] for k in ("delta_od", "delta_od_errors")}
        out["truth"] = e["simulation_truth/delta_od"][()]
        out["state"] = e["state"][()].decode()
        out["reason"] = e["state_reason"][()].decode()
        out["instruments"] = {name: {k: (v[()].decode() if isinstance(v[()], bytes) else v[()])
                                     for k, v in grp.items() if isinstance(v, h5py.Dataset)}
                              for name, grp in e["instrument"].items() if isinstance(grp, h5py.Group)}
    return out


def chi2(a, b, ea, eb=0.0):
    z = (a - b) / np.sqrt(ea**2 + eb**2)
    return float(np.mean(z**2)), z.size


@pytest.fixture(params=["serial+visa", "all-scpi"])
def wire(request, small_scan, tmp_path):
    """A running wire bench for a small pure-noise scan; yields (scan config path, bench file, WireBench)."""
    scan = small_scan(noise=PURE, name="wire")
    wb = WireBench(load_config(scan), realtime=False, all_scpi=request.param == "all-scpi")
    with wb:
        bench_file = wb.write_config(tmp_path / "wire-bench.toml")
        yield scan, bench_file, wb


def test_wire_scan_agrees_with_truth_and_with_in_process(wire, tmp_path, small_scan):
    scan, bench_file, wb = wire
    assert main(["run", str(scan), "--bench", str(bench_file), "-o", str(tmp_path / "over-wire.h5")]) == 0
    w = read(tmp_path / "over-wire.h5")
    assert w["state"] == "complete", w["reason"]
    value, k = chi2(w["delta_od"], w["truth"], w["delta_od_errors"])
    assert abs(value - 1.0) < 5 * np.sqrt(2.0 / k), value
    assert w["truth"].min() < -5e-3  # a real signal, not a pass on noise alone

    # Another seed: with the same one the two runs share part of their noise and agree better than chance.
    local = small_scan(noise=PURE, name="local", seed=4)
    assert main(["run", str(local), "--fast", "-o", str(tmp_path / "in-process.h5")]) == 0
    p = read(tmp_path / "in-process.h5")
    value_p, _ = chi2(p["delta_od"], p["truth"], p["delta_od_errors"])
    np.testing.assert_allclose(w["truth"], p["truth"], rtol=1e-12, atol=1e-15)  # the same model on both paths
    both, k = chi2(w["delta_od"], p["delta_od"], w["delta_od_errors"], p["delta_od_errors"])
    assert abs(both - 1.0) < 5 * np.sqrt(2.0 / k), both
    assert abs(value - value_p) < 5 * np.sqrt(2.0 / k)

    ids = w["instruments"]
    assert "shotpair simulator, detector" in ids["detector"]["identity"]
    for name in ("delay_axis", "chopper", "shutter"):
        assert ids[name]["driver"] in ("scpi", "template"), ids[name]
        assert ids[name]["identity"] and "unavailable" not in ids[name]["identity"]


def _start_runner(scan, bench_file, output):
    cfg, bench_cfg = load_config(scan), load_config(bench_file)
    plan = make_plan(cfg.require_scan(), bench_cfg.bench)
    bench = build_bench(bench_cfg.bench, bench_cfg.config.simulation)
    bench.connect()
    runner = Runner(bench)
    runner.start(ScanJob(cfg, cfg.require_scan(), plan, output, new_scan_id()))
    return runner, bench


def _until(runner, predicate):
    while True:
        ev = runner.events.get(timeout=TIMEOUT_S)
        if predicate(ev):
            return ev


def _assert_bench_safe(wb):
    vb = wb.bench
    assert not vb.shutter_open
    assert not vb.stage.is_moving(vb.now_s())


@pytest.mark.parametrize("exit_path", ["scan ends", "detector disconnects", "abort"])
def test_every_exit_leaves_the_simulated_bench_safe(wire, tmp_path, exit_path):
    scan, bench_file, wb = wire
    runner, bench = _start_runner(scan, bench_file, tmp_path / "safe.h5")
    try:
        _until(runner, lambda ev: isinstance(ev, PointSaved))
        assert wb.bench.shutter_open  # mid-scan: open, so the check below can fail
        if exit_path == "abort":
            runner.abort("test abort")
        elif exit_path == "detector disconnects":
            wb.inject("detector", "disconnect", 1)
        end = _until(runner, lambda ev: isinstance(ev, ScanEnded))
    finally:
        runner.close()
        bench.disconnect()
    # A lost detector connection is opened again and the point measured again (test_faults.py has the rest).
    expected_state = "aborted" if exit_path == "abort" else "complete"
    assert end.state == expected_state, end.reason
    if exit_path == "abort":
        assert end.reason == "test abort"
    _assert_bench_safe(wb)
    with h5py.File(tmp_path / "safe.h5", "r") as f:
        assert f["entry/state"][()].decode() == expected_state
        assert f["entry/sweeps/completed"][()].sum() >= 1  # what was measured is kept
        if exit_path == "detector disconnects":
            assert f["entry/diagnostics/retries"][()].sum() == 1 and f["entry/diagnostics/restarts"][()].sum() == 1
            assert (f["entry/diagnostics/shots"][()] == f["entry/diagnostics/shots"][0, 0]).all()


def test_move_outside_controller_limits_is_refused_before_any_byte(small_scan, tmp_path):
    """The controller's own limits narrow the bench file's travel; a move outside them never reaches it."""
    scan = small_scan(noise=PURE, name="limits")
    with WireBench(load_config(scan), realtime=False, all_scpi=True) as wb:
        bench_cfg = load_config(wb.write_config(tmp_path / "b.toml"))
        bench = build_bench(bench_cfg.bench, None)
        bench.connect()
        try:
            axis = bench.delay_axis
            low, high = axis.travel_mm
            file_low, file_high = bench_cfg.bench.delay_axis.travel_mm
            assert file_low <= low < high <= file_high
            axis.home(timeout_s=30.0)
            before = wb.bench.stage.target_mm()
            with pytest.raises(LimitError):
                axis.move_to_mm(high + 1.0)
            assert wb.bench.stage.target_mm() == before
        finally:
            bench.disconnect()


def test_generator_scan_over_the_wire(tmp_path):
    """The electronic delay axis through the scpi delay-generator driver (pyvisa-py) against the simulator."""
    from test_generator_scan import CONFIG, TIME_ZERO_PS

    scan = tmp_path / "gen.toml"
    scan.write_text(CONFIG.format(t0=TIME_ZERO_PS, output=tmp_path / "gen.h5"))
    with WireBench(load_config(scan), realtime=False) as wb:
        bench_file = wb.write_config(tmp_path / "gen-bench.toml")
        assert main(["run", str(scan), "--bench", str(bench_file)]) == 0
        assert wb.bench.generator_setting_ps == pytest.approx(TIME_ZERO_PS + 8.0e6)  # the last point, ascending
    with h5py.File(tmp_path / "gen.h5", "r") as f:
        e = f["entry"]
        assert e["delay_axis_kind"][()].decode() == "electronic delay generator"
        delays = e["delta_od/delay"][()]
        np.testing.assert_allclose(e["diagnostics/generator_setting"][()][0], delays + TIME_ZERO_PS, rtol=1e-12)
        dod, err, truth = (e["delta_od/delta_od"][()], e["delta_od/delta_od_errors"][()],
                           e["simulation_truth/delta_od"][()])
    value, k = chi2(dod, truth, err)
    assert abs(value - 1.0) < 5 * np.sqrt(2.0 / k), value
