"""The simulated bench and its instruments: interface contract, mechanics, and each noise source alone.

Statistics are checked against theory named beside each check (Poisson photon counting, variance of a
rounded value, binomial counts of rare events, sampling distribution of a variance); delays against
scipy.constants.c; ΔOD against the IUPAC absorbance definition.
"""

from __future__ import annotations

import dataclasses
import math
import time
import tomllib
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
import pytest
import scipy.constants
import scipy.stats
from pydantic import ValidationError

from shotpair.drivers.base import Chopper, DelayAxis, Detector, Shutter
from shotpair.drivers.errors import ConfigError, InstrumentTimeout, LimitError, ShotpairError, StateError
from shotpair.drivers.registry import DriverContext, create
from shotpair.simulators.bench import BenchCalibration, VirtualBench
from shotpair.simulators.clock import VirtualClock
from shotpair.simulators.sample import SampleModel
from shotpair.simulators.settings import NoiseSwitches, SimulationSettings

QUANTISATION_VAR = 1.0 / 12.0  # variance of rounding to whole counts (uniform error on [-1/2, 1/2])


def _calibration(pixels: int = 256, **changes: Any) -> BenchCalibration:
    return dataclasses.replace(BenchCalibration.demo(pixels=pixels), **changes)


@pytest.fixture
def make_bench() -> Iterator[Callable[..., VirtualBench]]:
    """Build benches with chosen noise switches (default: all off) and close them afterwards."""
    made: list[VirtualBench] = []

    def factory(*, on: tuple[str, ...] = (), calibration: BenchCalibration | None = None, seed: int = 7,
                shutter_open: bool = True, **sections: Any) -> VirtualBench:
        noise = NoiseSwitches.none().model_copy(update={name: True for name in on})
        settings = SimulationSettings(seed=seed, noise=noise, **sections)
        bench = VirtualBench(settings, calibration or _calibration())
        bench.shutter_open = shutter_open
        made.append(bench)
        return bench

    yield factory
    for bench in made:
        bench.close()


def _instruments(bench: VirtualBench) -> dict[str, Any]:
    ctx = DriverContext(simulation=bench)
    out = {kind: create(kind, "sim", kind, {}, ctx) for kind in ("delay_axis", "chopper", "shutter", "detector")}
    for inst in out.values():
        inst.connect()
    return out


# --------------------------------------------------------------------------------------------------
# Contract
# --------------------------------------------------------------------------------------------------


def test_sim_instruments_implement_their_interfaces(make_bench: Callable[..., VirtualBench]) -> None:
    inst = _instruments(make_bench())
    for kind, abc_ in (("delay_axis", DelayAxis), ("chopper", Chopper), ("shutter", Shutter), ("detector", Detector)):
        assert isinstance(inst[kind], abc_)
        assert inst[kind].identity().startswith("shotpair simulator, ")
        assert isinstance(inst[kind].state(), dict)
    assert inst["detector"].pixels == 256 and inst["detector"].has_reference is False


def test_sim_drivers_reject_options_and_need_a_bench(make_bench: Callable[..., VirtualBench]) -> None:
    ctx = DriverContext(simulation=make_bench())
    with pytest.raises(ConfigError) as err:
        create("delay_axis", "sim", "stage", {"port": "/dev/null"}, ctx)
    assert err.value.key_path == "bench.stage.options.port"
    with pytest.raises(ConfigError) as err:
        create("detector", "sim", "camera", {}, DriverContext())
    assert err.value.key_path == "bench.camera.driver"


def test_disconnected_instruments_refuse_but_stop_and_close_are_safe(make_bench: Callable[..., VirtualBench]) -> None:
    ctx = DriverContext(simulation=make_bench())
    axis = create("delay_axis", "sim", "delay_axis", {}, ctx)
    shutter = create("shutter", "sim", "shutter", {}, ctx)
    with pytest.raises(StateError):
        axis.move_to_mm(1.0)
    axis.stop()
    shutter.close()
    shutter.disconnect()


# --------------------------------------------------------------------------------------------------
# Stage, chopper, clock
# --------------------------------------------------------------------------------------------------


def test_stage_limits_raise_and_do_not_move(make_bench: Callable[..., VirtualBench]) -> None:
    axis = _instruments(make_bench())["delay_axis"]
    axis.home(timeout_s=60.0)
    before = axis.position_mm()
    for bad in (-0.001, 250.001, math.nan, math.inf):
        with pytest.raises(LimitError) as err:
            axis.move_to_mm(bad)
        assert (err.value.low, err.value.high) == (0.0, 250.0)
        assert isinstance(err.value, ShotpairError) and err.value.instrument == "delay_axis"
    assert axis.position_mm() == before and not axis.is_moving()


def test_stage_must_be_homed_first(make_bench: Callable[..., VirtualBench]) -> None:
    axis = _instruments(make_bench())["delay_axis"]
    assert not axis.is_homed
    with pytest.raises(StateError):
        axis.move_to_mm(20.0)
    axis.home(timeout_s=60.0)
    assert axis.is_homed and axis.position_mm() == 0.0


def test_move_takes_distance_over_velocity_plus_settling(make_bench: Callable[..., VirtualBench]) -> None:
    # [derived] constant-speed move: t = d / v, then the settling time.
    bench = make_bench(stage={"velocity_mm_per_s": 40.0, "settle_s": 0.25, "needs_homing": False, "start_mm": 20.0})
    axis = _instruments(bench)["delay_axis"]
    t0 = bench.now_s()
    axis.move_to_mm(120.0)
    bench.clock.advance(1.0)
    assert axis.position_mm() == pytest.approx(60.0)  # 40 mm/s for 1 s, half-way
    assert axis.wait_settled(timeout_s=10.0) == 120.0
    assert bench.now_s() - t0 == pytest.approx(100.0 / 40.0 + 0.25, abs=1e-9)


def test_wait_settled_times_out_and_polling_ends(make_bench: Callable[..., VirtualBench]) -> None:
    bench = make_bench(stage={"velocity_mm_per_s": 10.0, "needs_homing": False, "start_mm": 0.0})
    axis = _instruments(bench)["delay_axis"]
    axis.move_to_mm(100.0)  # 10 s
    t0 = bench.now_s()
    with pytest.raises(InstrumentTimeout) as err:
        axis.wait_settled(timeout_s=0.5)
    assert err.value.timeout_s == 0.5 and bench.now_s() - t0 == pytest.approx(0.5)
    polls = 0
    while axis.is_moving():  # every query costs virtual time, so this ends in fast mode
        polls += 1
        assert polls < 20_000
    assert axis.position_mm() == 100.0


def test_delay_follows_the_delay_line(make_bench: Callable[..., VirtualBench]) -> None:
    # [published] c = 299 792 458 m/s (scipy.constants.c); double pass: delay = 2 (x − x0) / c.
    bench = make_bench(stage={"needs_homing": False})
    axis = _instruments(bench)["delay_axis"]
    axis.move_to_mm(85.0)
    axis.wait_settled(timeout_s=10.0)
    expected_ps = 2 * (85.0 - 10.0) * 1e-3 / scipy.constants.c * 1e12
    assert bench.delay_ps() == pytest.approx(expected_ps, rel=1e-12)
    assert bench.generate_shots(4).meta["delay_ps"] == pytest.approx(expected_ps, rel=1e-12)


def test_pump_flags_alternate_and_phase_selects_which(make_bench: Callable[..., VirtualBench]) -> None:
    bench = make_bench()
    inst = _instruments(bench)
    assert inst["chopper"].is_locked() and inst["chopper"].frequency_hz() == 500.0
    block = inst["detector"].acquire(1000, timeout_s=5.0)
    np.testing.assert_array_equal(block.pump_on, block.frame_id % 2 == 0)
    inst["chopper"].set_phase_deg(180.0)
    block = inst["detector"].acquire(1000, timeout_s=5.0)
    np.testing.assert_array_equal(block.pump_on, block.frame_id % 2 == 1)
    # Unlocked at a quarter of the repetition rate: two pumped shots, two unpumped.
    inst["chopper"].set_phase_deg(0.0)
    inst["chopper"].set_frequency_hz(250.0)
    assert not inst["chopper"].is_locked()
    flags = inst["detector"].acquire(400, timeout_s=5.0).pump_on
    assert flags.sum() == 200 and np.all(flags[:-4] == flags[4:]) and not np.all(flags[:-1] != flags[1:])
    with pytest.raises(LimitError):
        inst["chopper"].set_frequency_hz(1e6)


def test_phase_slips_break_the_alternation(make_bench: Callable[..., VirtualBench]) -> None:
    # Each slip gives two equal flags in a row: the count is binomial(n, p) (mean np, sd sqrt(np(1−p))).
    n, p = 20_000, 0.005
    bench = make_bench(on=("phase_slips",), chopper={"phase_slip_probability": p})
    flags = bench.generate_shots(n).pump_on
    repeats = int(np.sum(flags[1:] == flags[:-1]))
    assert abs(repeats - n * p) < 5 * math.sqrt(n * p * (1 - p))
    quiet = make_bench(chopper={"phase_slip_probability": p}).generate_shots(n).pump_on
    assert np.all(quiet[1:] != quiet[:-1])


def test_virtual_clock_fast_and_realtime() -> None:
    fast = VirtualClock(realtime=False)
    fast.advance(2.5)
    fast.advance(0.5)
    assert fast.now_s() == 3.0
    with pytest.raises(ValueError):
        fast.advance(-1.0)
    paced = VirtualClock(realtime=True)
    wall0 = time.monotonic()
    paced.advance(0.05)
    assert time.monotonic() - wall0 >= 0.049 and paced.now_s() >= 0.05


def test_reading_shots_takes_their_time(make_bench: Callable[..., VirtualBench]) -> None:
    bench = make_bench()
    bench.generate_shots(1500)
    assert bench.now_s() == pytest.approx(1.5)  # 1500 shots at 1 kHz
    det = _instruments(bench)["detector"]
    with pytest.raises(InstrumentTimeout):
        det.acquire(5000, timeout_s=1.0)


# --------------------------------------------------------------------------------------------------
# Detector and noise sources, one at a time
# --------------------------------------------------------------------------------------------------


def test_shutter_closed_gives_only_dark_and_read_noise(make_bench: Callable[..., VirtualBench]) -> None:
    # Every source on, shutter closed: per-pixel variance = (σ_read/g)² + 1/12 (rounding); the per-pixel
    # means scatter by the dark pattern rms about the mean dark level.
    everything = tuple(NoiseSwitches.model_fields)
    bench = make_bench(on=everything, shutter_open=False, detector={"dropped_frame_probability": 0.0})
    counts = bench.generate_shots(3000).counts.astype(float)
    mean, var = counts.mean(axis=0), counts.var(axis=0, ddof=1)
    assert var.mean() / ((50.0 / 4.0) ** 2 + QUANTISATION_VAR) == pytest.approx(1.0, abs=0.01)
    assert mean.mean() == pytest.approx(1000.0, abs=5 * 5.0 / math.sqrt(256))
    assert mean.std(ddof=1) == pytest.approx(5.0, rel=0.25)


@pytest.mark.parametrize("statistics", ["gaussian", "poisson"])
def test_photon_noise_alone_is_poisson(make_bench: Callable[..., VirtualBench], statistics: str) -> None:
    # [published] Poisson counting: var(N) = N e⁻, so var(counts) = N/g² + 1/12 with N = g·(mean − dark).
    # The per-pixel sample variance of M values has relative sd sqrt(2/(M−1)) (normal sampling theory).
    bench = make_bench(on=("photon_noise",), detector={"photon_statistics": statistics})
    block = bench.generate_shots(4000)
    off = block.counts[~block.pump_on].astype(float)
    mean, var = off.mean(axis=0), off.var(axis=0, ddof=1)
    expected = (mean - 1000.0) / 4.0 + QUANTISATION_VAR
    ratio = var / expected
    assert ratio.mean() == pytest.approx(1.0, abs=0.006)
    assert ratio.std(ddof=1) == pytest.approx(math.sqrt(2 / (len(off) - 1)), rel=0.2)


def test_poisson_mode_gives_the_poisson_distribution(make_bench: Callable[..., VirtualBench]) -> None:
    # Reference library: scipy.stats.poisson pmf, chi-square goodness of fit (scipy.stats.chisquare).
    cal = _calibration(pixels=8, gain_e_per_count=1.0, read_noise_e=0.0, dark_counts=100.0)
    bench = make_bench(on=("photon_noise",), calibration=cal, detector={"photon_statistics": "poisson"},
                       probe={"peak_e": 20.0, "floor_fraction": 1.0})
    block = bench.generate_shots(20_000)
    n_e = (block.counts[~block.pump_on].astype(int) - 100).ravel()
    values = np.arange(8, 34)
    observed = np.array([np.sum(n_e == v) for v in values] + [np.sum((n_e < 8) | (n_e > 33))])
    pmf = scipy.stats.poisson.pmf(values, 20.0)
    expected = np.append(pmf, 1 - pmf.sum()) * n_e.size
    assert scipy.stats.chisquare(observed, expected).pvalue > 1e-4


def test_dropped_frames_leave_gaps(make_bench: Callable[..., VirtualBench]) -> None:
    n, p = 20_000, 0.01
    bench = make_bench(on=("dropped_frames",), detector={"dropped_frame_probability": p})
    block = bench.generate_shots(n)
    steps = np.diff(block.frame_id)
    assert np.all(steps >= 1) and np.any(steps > 1)
    dropped = n - block.n_shots
    assert dropped == int(np.sum(steps - 1)) + int(block.frame_id[0]) + (n - 1 - int(block.frame_id[-1]))
    assert abs(dropped - n * p) < 5 * math.sqrt(n * p * (1 - p))  # binomial count
    np.testing.assert_array_equal(block.pump_on, block.frame_id % 2 == 0)  # flags stay with their frames
    full = make_bench(detector={"dropped_frame_probability": p}).generate_shots(n)
    assert full.n_shots == n and np.all(np.diff(full.frame_id) == 1)


def test_misfires_present_when_on_and_absent_when_off(make_bench: Callable[..., VirtualBench]) -> None:
    n, p = 20_000, 0.005
    bench = make_bench(on=("misfires",), laser={"misfire_probability": p}, calibration=_calibration(pixels=32))
    block = bench.generate_shots(n)
    signal = (block.counts.astype(float) - 1000.0).sum(axis=1)
    low = signal < 0.1 * np.median(signal)
    assert abs(low.sum() - n * p) < 5 * math.sqrt(n * p * (1 - p))  # binomial count
    np.testing.assert_array_equal(low, block.meta["sim_misfire"])
    quiet = make_bench(laser={"misfire_probability": p}, calibration=_calibration(pixels=32)).generate_shots(n)
    signal = (quiet.counts.astype(float) - 1000.0).sum(axis=1)
    assert np.all(signal > 0.5 * np.median(signal)) and not quiet.meta["sim_misfire"].any()


def test_saturation_clips_at_full_scale(make_bench: Callable[..., VirtualBench]) -> None:
    bright = {"peak_e": 1.0e6}  # 250 000 counts at gain 4: far beyond 16 bits
    counts = make_bench(on=("photon_noise", "read_noise"), probe=bright).generate_shots(50).counts
    assert counts.dtype == np.uint16 and counts.max() == 65535 and np.mean(counts == 65535) > 0.5
    capped = make_bench(probe=bright, calibration=_calibration(saturation_counts=60_000)).generate_shots(50).counts
    assert capped.max() == 60_000


def test_laser_fluctuation_is_common_to_sample_and_reference(make_bench: Callable[..., VirtualBench]) -> None:
    # With 1 % laser noise, sample and reference totals move together; their ratio keeps only the photon
    # noise of the two sums: rel. sd = sqrt(1/N_s + 1/N_r) (Poisson), while each alone shows the 1 %.
    cal = _calibration(pixels=128, has_reference=True)
    bench = make_bench(on=("laser_fluctuation", "photon_noise"), calibration=cal)
    block = bench.generate_shots(4000)
    off = ~block.pump_on
    s = (block.counts[off].astype(float) - 1000.0).sum(axis=1)
    r = (block.reference[off].astype(float) - 1000.0).sum(axis=1)
    assert np.corrcoef(s, r)[0, 1] > 0.99
    assert np.std(s) / np.mean(s) == pytest.approx(0.01, rel=0.1)
    n_s, n_r = 4.0 * s.mean(), 4.0 * r.mean()  # photoelectrons = gain × counts
    assert np.std(s / r) / np.mean(s / r) == pytest.approx(math.sqrt(1 / n_s + 1 / n_r), rel=0.15)


def test_four_state_probe_chopping(make_bench: Callable[..., VirtualBench]) -> None:
    # Probe chopped at a quarter of the repetition rate: all four (pump, probe) states appear; a pumped
    # probe-off shot carries only scatter + emission (Gaussian lines set in the settings), an unpumped
    # probe-off shot only the dark level.
    bench = make_bench(on=("scatter", "emission"), probe={"chopped": True})
    block = bench.generate_shots(400)
    states = set(zip(block.pump_on.tolist(), block.probe_on.tolist()))
    assert states == {(True, True), (True, False), (False, True), (False, False)}
    lam = 420.0
    g = lambda c, w: math.exp(-4 * math.log(2) * ((lam - c) / w) ** 2)  # noqa: E731
    expected_counts = 1000.0 + (3.0e4 * g(400.0, 15.0) + 1.5e3 * g(560.0, 60.0)) / 4.0
    pumped_dark = block.counts[block.pump_on & ~block.probe_on][:, 0]
    assert np.all(np.abs(pumped_dark - expected_counts) <= 0.51)
    assert np.all(block.counts[~block.pump_on & ~block.probe_on] == 1000)


def test_pump_fluctuation_scales_the_delta_od(make_bench: Callable[..., VirtualBench]) -> None:
    # Beer-Lambert in the linear regime: the excited population, hence ΔOD, is proportional to the pump
    # energy, so a relative pump rms r gives a per-shot ΔOD rms of r·|ΔOD| about the mean ΔOD.
    r = 0.05
    bench = make_bench(on=("pump_fluctuation",), laser={"pump_fluctuation_rms": r}, probe={"peak_e": 2.4e5},
                       stage={"needs_homing": False})
    axis = _instruments(bench)["delay_axis"]
    axis.move_to_mm(float(bench.calibration.delay_line.position_mm(3.0)))
    axis.wait_settled(timeout_s=10.0)
    block = bench.generate_shots(4000)
    signal = block.counts.astype(float) - 1000.0
    per_shot = -np.log10(signal[block.pump_on] / signal[~block.pump_on].mean(axis=0))
    truth = bench.truth_delta_od(np.array([bench.delay_ps()]))[0]
    px = int(np.argmax(np.abs(truth)))
    assert np.std(per_shot[:, px], ddof=1) == pytest.approx(r * abs(truth[px]), rel=0.1)
    assert per_shot[:, px].mean() == pytest.approx(truth[px], abs=5 * r * abs(truth[px]) / math.sqrt(2000))


def test_drift_has_the_set_rms_and_is_slow(make_bench: Callable[..., VirtualBench]) -> None:
    bench = make_bench(on=("drift",), laser={"drift_rms": 0.004, "drift_timescale_s": 20.0})
    t = np.arange(0.0, 20_000.0, 0.5)
    d = bench.laser.drift(t)
    assert np.sqrt(np.mean(d**2)) == pytest.approx(0.004, rel=0.05)
    assert np.max(np.abs(np.diff(bench.laser.drift(np.arange(0.0, 10.0, 1e-3))))) < 1e-5


# --------------------------------------------------------------------------------------------------
# Truth
# --------------------------------------------------------------------------------------------------


def test_truth_delta_od_is_the_sample_and_what_clean_shots_measure(make_bench: Callable[..., VirtualBench]) -> None:
    # ΔOD = −log10(I_on / I_off) (IUPAC absorbance). With every noise source off, the shots must give the
    # truth to within rounding: 0.5 count in ≥ 12 000 counts is < 4e-5 OD.
    bench = make_bench(probe={"peak_e": 2.4e5}, stage={"needs_homing": False})
    axis = _instruments(bench)["delay_axis"]
    axis.move_to_mm(float(bench.calibration.delay_line.position_mm(1.0)))
    axis.wait_settled(timeout_s=10.0)
    block = bench.generate_shots(20)
    signal = block.counts.astype(float) - 1000.0
    measured = -np.log10(signal[block.pump_on].mean(axis=0) / signal[~block.pump_on].mean(axis=0))
    truth = bench.truth_delta_od(np.array([bench.delay_ps()]))[0]
    np.testing.assert_allclose(measured, truth, atol=5e-5)
    assert np.abs(truth).max() > 5e-3
    delays = np.array([-1.0, 0.2, 3.0, 800.0])
    np.testing.assert_array_equal(bench.truth_delta_od(delays),
                                  SampleModel(bench.settings.sample).delta_od(delays, bench.wavelengths_nm))


# --------------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------------


def test_settings_from_toml_and_their_checks() -> None:
    doc = tomllib.loads(
        """
        [simulation]
        seed = 3
        [simulation.laser]
        misfire_probability = 0.0
        [simulation.sample]
        irf_fwhm_fs = 80.0
        pumped = { S1 = 1.0 }
        [[simulation.sample.species]]
        name = "S1"
        bands = [{ centre_nm = 600.0, width_nm = 50.0, amplitude_od = 0.3 }]
        [[simulation.sample.steps]]
        from_species = "S1"
        lifetime_ps = 100.0
        """
    )
    s = SimulationSettings.model_validate(doc["simulation"])
    assert s.seed == 3 and s.sample.steps[0].rate == pytest.approx(0.01) and s.sample.steps[0].to_species == "ground"
    bad = [
        {"laser": {"fluctuation_rms": -0.1}},
        {"laser": {"colour": "red"}},
        {"sample": {"pumped": {"nobody": 1.0}}},
        {"sample": {"steps": [{"from_species": "S1", "rate_per_ps": 1.0, "lifetime_ps": 1.0}]}},
        {"detector": {"dropped_frame_probability": 0.9}},
        {"stage": {"velocity_mm_per_s": 0.0}},
    ]
    for section in bad:
        with pytest.raises(ValidationError):
            SimulationSettings.model_validate(section)
