"""Scans on the electronic delay axis: a delay generator sets nanosecond-to-microsecond delays.

Checks: the plan turns delays into generator settings (delay + time_zero_ps) and refuses what the
generator cannot reach before anything moves; the file records which axis set the delay and the
generator read-back; the measured ΔOD agrees with the simulator's noise-free truth (reduced chi-square
within sqrt(2/k) of 1, as in test_scan_end_to_end.py); and the triplet's decay follows the first-order law
ΔOD(t) ∝ exp(-t / τ) (any kinetics text) with the simulated sample's τ = 2 µs.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from shotpair.daemon.cli import main
from shotpair.daemon.config import load_config
from shotpair.daemon.plan import make_plan
from shotpair.drivers.errors import ConfigError

TIME_ZERO_PS = 25_000.0  # a 25 ns trigger offset of the made-up bench
TRIPLET_LIFETIME_PS = 2.0e6  # simulators/settings.py default sample: T1 -> S0 in 2 µs

CONFIG = """
[bench]
dark_shots = 500

[bench.detector]
pixels = 128
wavelength_poly_nm = [420.0, 2.362204724]   # 420-720 nm

[bench.delay_generator]
driver = "sim"
time_zero_ps = {t0}
range_ps = [0.0, 1.0e8]

[scan]
axis = "generator"
shots_per_point = 2000
sweeps = 1
output = "{output}"

[[scan.delays]]
kind = "list"
delays_ps = [-5000.0]

[[scan.delays]]
kind = "log"
start_ps = 1000.0
stop_ps = 8.0e6
points = 7

[simulation]
seed = 11

[simulation.noise]
laser_fluctuation = false
pump_fluctuation = false
drift = false
scatter = false
emission = false
"""


@pytest.fixture
def config(tmp_path):
    path = tmp_path / "gen.toml"
    path.write_text(CONFIG.format(t0=TIME_ZERO_PS, output=tmp_path / "gen.h5"))
    return path


def test_plan_uses_generator_settings(config):
    cfg = load_config(config)
    plan = make_plan(cfg.require_scan(), cfg.bench, cfg.path)
    assert plan.axis == "generator"
    np.testing.assert_allclose(plan.generator_settings_ps, plan.delays_ps + TIME_ZERO_PS)
    # The stage waits at time zero: no stage travel in the estimate.
    assert np.all(plan.positions_mm == cfg.bench.delay_axis.time_zero_mm)
    assert plan.travel_time_s() == 0.0


def test_delay_beyond_generator_range_is_refused(config, tmp_path):
    text = config.read_text().replace("stop_ps = 8.0e6", "stop_ps = 2.0e8")
    bad = tmp_path / "bad.toml"
    bad.write_text(text)
    cfg = load_config(bad)
    with pytest.raises(ConfigError) as info:
        make_plan(cfg.require_scan(), cfg.bench, cfg.path)
    assert info.value.key_path == "scan.delays[1]" and "generator" in str(info.value)


def test_generator_axis_without_generator_is_refused(config, tmp_path):
    text = config.read_text()
    start = text.index("[bench.delay_generator]")
    bad = tmp_path / "nogen.toml"
    bad.write_text(text[:start] + text[text.index("[scan]"):])
    assert main(["check", str(bad), "--offline"]) == 2


def test_generator_scan_matches_truth_and_first_order_decay(config, tmp_path):
    assert main(["run", str(config), "--fast"]) == 0
    with h5py.File(tmp_path / "gen.h5", "r") as f:
        e = f["entry"]
        assert e["delay_axis_kind"][()].decode() == "electronic delay generator"
        delays = e["delta_od/delay"][()]
        dod, err = e["delta_od/delta_od"][()], e["delta_od/delta_od_errors"][()]
        truth = e["simulation_truth/delta_od"][()]
        gen = e["diagnostics/generator_setting"][()][0]
        readback = e["diagnostics/delay_readback"][()][0]
        stage = e["diagnostics/stage_position"][()][0]
        wl = e["delta_od/wavelength"][()]
        assert e["state"][()].decode() == "complete"
    np.testing.assert_allclose(gen, delays + TIME_ZERO_PS)
    np.testing.assert_allclose(readback, delays, atol=1e-6)
    np.testing.assert_allclose(stage, 10.0)  # parked at the default time_zero_mm
    z = (dod - truth) / err
    k = z.size
    assert abs(float(np.mean(z**2)) - 1.0) < 4 * np.sqrt(2.0 / k)
    # First-order decay of the triplet band near 580 nm from 0.4 µs to 8 µs.
    band = np.abs(wl - 580.0) < 15.0
    late = delays >= 3.0e5  # S1 -> T1 (450 ps) long over: only the triplet is left
    t = delays[late]
    signal = dod[late][:, band].mean(axis=1)
    sig_err = np.sqrt((err[late][:, band] ** 2).sum(axis=1)) / band.sum()
    expected_shape = np.exp(-t / TRIPLET_LIFETIME_PS)
    amplitude = np.sum(signal * expected_shape / sig_err**2) / np.sum(expected_shape**2 / sig_err**2)
    chi = (signal - amplitude * expected_shape) / sig_err
    assert amplitude > 10 * sig_err.max()  # the band is really there
    assert late.sum() == 3 and float(np.mean(chi**2)) < 4.0
    # A wrong lifetime (half or double) is clearly rejected by the same data.
    for wrong in (0.5, 2.0):
        shape = np.exp(-t / (wrong * TRIPLET_LIFETIME_PS))
        a = np.sum(signal * shape / sig_err**2) / np.sum(shape**2 / sig_err**2)
        assert float(np.mean(((signal - a * shape) / sig_err) ** 2)) > 10.0
