"""The virtual bench: one shared physical model and virtual clock behind every simulated instrument.

It holds the state of the stage, chopper, shutter and laser, and turns "read n shots now" into a
:class:`~shotpair.drivers.base.ShotBlock` of raw counts with every noise and fault source of the
``[simulation]`` settings. Delays in ps, wavelengths in nm, positions in mm, time in s. It does not speak
any instrument protocol (instruments.py does) and does no statistics on the shots (the engine does).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from shotpair.drivers.base import ShotBlock
from shotpair.drivers.delay_line import DelayLine
from shotpair.drivers.errors import ConfigError

from .chopper import ChopperModel
from .clock import VirtualClock
from .detector import DetectorModel
from .laser import LaserModel
from .normals import NormalSource
from .sample import SampleModel
from .settings import SimulationSettings
from .stage import StageModel

__all__ = ["BenchCalibration", "VirtualBench"]

_LN10 = math.log(10.0)
_CHUNK_SHOTS = 256  # rows per pass: keeps the float32 scratch arrays in cache
_FOUR_LN2 = 4.0 * math.log(2.0)


@dataclass(frozen=True)
class BenchCalibration:
    """What the bench file says about the (here simulated) hardware.

    Attributes
    ----------
    pixels:
        Pixels per spectrum.
    wavelengths_nm:
        (pixels,) wavelength of each pixel, in nm.
    repetition_rate_hz:
        Laser repetition rate, in Hz.
    gain_e_per_count:
        Detector gain, in photoelectrons per count.
    read_noise_e:
        Rms read noise, in e-.
    dark_counts:
        Mean dark level of the detector, in counts.
    delay_line:
        Stage position ↔ delay calibration.
    travel_mm:
        (low, high) allowed stage positions, in mm.
    saturation_counts:
        Highest count the detector returns (at most 65535).
    has_reference:
        Whether a reference detector (same pixels) reads the probe before the sample.
    generator_time_zero_ps:
        Setting of the delay generator at which its electronic delay adds nothing, in ps.
    generator_range_ps:
        (low, high) settings the simulated delay generator accepts, in ps.
    """

    pixels: int
    wavelengths_nm: np.ndarray
    repetition_rate_hz: float
    gain_e_per_count: float
    read_noise_e: float
    dark_counts: float
    delay_line: DelayLine
    travel_mm: tuple[float, float]
    saturation_counts: int = 65535
    has_reference: bool = False
    generator_time_zero_ps: float = 0.0
    generator_range_ps: tuple[float, float] = (0.0, 1.0e10)

    def __post_init__(self) -> None:
        wl = np.asarray(self.wavelengths_nm, dtype=float)
        object.__setattr__(self, "wavelengths_nm", wl)
        checks = [
            (self.pixels >= 1, "pixels", self.pixels, ">= 1"),
            (wl.shape == (self.pixels,) and bool(np.all(wl > 0)), "wavelengths_nm", wl.shape,
             f"{self.pixels} positive values"),
            (0 < self.repetition_rate_hz <= 1e6, "repetition_rate_hz", self.repetition_rate_hz, "(0, 1e6]"),
            (self.gain_e_per_count > 0, "gain_e_per_count", self.gain_e_per_count, "> 0"),
            (self.read_noise_e >= 0, "read_noise_e", self.read_noise_e, ">= 0"),
            (0 <= self.dark_counts < 65535, "dark_counts", self.dark_counts, "[0, 65535)"),
            (0 < self.saturation_counts <= 65535, "saturation_counts", self.saturation_counts, "(0, 65535]"),
            (self.travel_mm[0] < self.travel_mm[1], "travel_mm", self.travel_mm, "low < high"),
        ]
        for ok, key, value, allowed in checks:
            if not ok:
                raise ConfigError("bad bench calibration for the simulated bench", key_path=key, value=value,
                                  allowed=allowed)

    @classmethod
    def demo(cls, *, pixels: int = 1024, has_reference: bool = False) -> "BenchCalibration":
        """The demo bench: 420-720 nm on ``pixels`` pixels, 1 kHz, a 250 mm double-pass stage (≈1.67 ns)."""
        return cls(
            pixels=pixels,
            wavelengths_nm=np.linspace(420.0, 720.0, pixels),
            repetition_rate_hz=1000.0,
            gain_e_per_count=4.0,
            read_noise_e=50.0,
            dark_counts=1000.0,
            delay_line=DelayLine(passes=2, time_zero_mm=10.0),
            travel_mm=(0.0, 250.0),
            has_reference=has_reference,
        )


def _gauss(wl: np.ndarray, centre_nm: float, fwhm_nm: float) -> np.ndarray:
    return np.exp(-_FOUR_LN2 * ((wl - centre_nm) / fwhm_nm) ** 2)


@dataclass
class _DelayCache:
    delay_ps: float = math.nan
    transmission: np.ndarray = field(default_factory=lambda: np.zeros(0))
    delta_od: np.ndarray = field(default_factory=lambda: np.zeros(0))


class VirtualBench:
    """The shared simulated bench.

    Parameters
    ----------
    settings:
        The validated ``[simulation]`` section.
    calibration:
        The bench calibration (pixels, wavelengths, rates, detector constants, delay line, travel).
    realtime:
        Pace virtual time to the wall clock (live-monitor development) instead of running as fast as
        the CPU allows.

    Notes
    -----
    The laser fires continuously: shot k happens at virtual time k / repetition_rate_hz. The detector
    counts every shot in ``frame_id`` (the laser shot index), so shots not read while the stage moves
    show as jumps between blocks; dropped frames show as gaps inside a block.
    """

    def __init__(self, settings: SimulationSettings, calibration: BenchCalibration, *, realtime: bool = False) -> None:
        self.settings = settings
        self.calibration = calibration
        self.clock = VirtualClock(realtime)
        main_seed, noise_seed = np.random.SeedSequence(settings.seed).spawn(2)
        self.rng = np.random.Generator(np.random.SFC64(main_seed))
        self.normals = NormalSource(noise_seed, settings.detector.generator_threads)
        self.sample = SampleModel(settings.sample)
        sw = settings.noise
        self.laser = LaserModel(settings.laser, sw, self.rng)
        self.stage = StageModel(settings.stage, calibration.travel_mm)
        self.chopper = ChopperModel(settings.chopper, sw, calibration.repetition_rate_hz, self.rng)
        self.shutter_open = False
        self.next_shot = 0
        #: Setting of the delay generator, in ps; the pump-probe delay is the stage's delay plus
        #: (setting - calibration.generator_time_zero_ps). Delays beyond one shot period are not modelled
        #: as overlapping shots: the sample simply sees the longer delay.
        self.generator_setting_ps = calibration.generator_time_zero_ps

        wl = calibration.wavelengths_nm
        self.wavelengths_nm = wl
        p = settings.probe
        shape = p.floor_fraction + (1.0 - p.floor_fraction) * _gauss(wl, p.centre_nm, p.width_nm)
        #: Mean probe photoelectrons per pixel on the sample detector, without pump, at nominal intensity.
        self.probe_e = p.peak_e * shape
        #: Same on the reference detector.
        self.reference_e = settings.detector.reference_peak_e * shape
        a = settings.artefacts
        artefact = np.zeros_like(wl)
        if sw.scatter:
            artefact += a.scatter_peak_e * _gauss(wl, settings.sample.pump_wavelength_nm, a.scatter_width_nm)
        if sw.emission:
            artefact += a.emission_peak_e * _gauss(wl, a.emission_centre_nm, a.emission_width_nm)
        #: Mean photoelectrons per pixel added on pumped shots (pump scatter + sample emission).
        self.artefact_e = artefact

        d = settings.detector
        self.detector = DetectorModel(calibration.gain_e_per_count, calibration.read_noise_e,
                                      self._dark_offsets(), calibration.saturation_counts, sw,
                                      d.photon_statistics, self.rng, self.normals)
        self.reference_detector = DetectorModel(calibration.gain_e_per_count, calibration.read_noise_e,
                                                self._dark_offsets(), calibration.saturation_counts, sw,
                                                d.photon_statistics, self.rng, self.normals)
        self._cache = _DelayCache()

    def _dark_offsets(self) -> np.ndarray:
        cal, d = self.calibration, self.settings.detector
        pattern = np.zeros(cal.pixels)
        if self.settings.noise.dark_pattern and d.dark_pattern_rms_counts > 0:
            pattern = d.dark_pattern_rms_counts * self.rng.standard_normal(cal.pixels)
        return cal.dark_counts + pattern

    def close(self) -> None:
        """Stop the noise helper threads (a later block starts them again); safe to call twice."""
        self.normals.close()

    # -- state ---------------------------------------------------------------------------------------
    def now_s(self) -> float:
        """Present virtual time, in s."""
        return self.clock.now_s()

    def position_mm(self) -> float:
        """Present stage position, in mm."""
        return self.stage.position_mm(self.clock.now_s())

    def electronic_delay_ps(self) -> float:
        """Delay the generator adds to the stage's, in ps (0 at its time-zero setting)."""
        return self.generator_setting_ps - self.calibration.generator_time_zero_ps

    def delay_ps(self) -> float:
        """Present nominal pump-probe delay: the stage's (from the delay-line calibration) plus the generator's, ps."""
        return float(self.calibration.delay_line.delay_ps(self.position_mm())) + self.electronic_delay_ps()

    def shot_at(self, t_s: float) -> int:
        """Index of the first laser shot at or after virtual time ``t_s``."""
        return int(math.ceil(t_s * self.calibration.repetition_rate_hz - 1e-6))

    def truth_delta_od(self, delays_ps: np.ndarray) -> np.ndarray:
        """The noise-free ΔOD of the sample at nominal delays (n,) in ps, shape (n, pixels), in OD.

        This is what an ideal measurement gives at those delays: mean pump energy, no noise, no drift,
        and without pump scatter or sample emission (artefacts a four-state measurement removes). It
        includes the instrument response and the probe chirp, exactly as the detector sees them.
        """
        return self.sample.delta_od(np.atleast_1d(np.asarray(delays_ps, dtype=float)), self.wavelengths_nm)

    def _transmission(self, delay_ps: float) -> tuple[np.ndarray, np.ndarray]:
        c = self._cache
        if c.delay_ps != delay_ps:
            dod = self.truth_delta_od(np.array([delay_ps]))[0]
            c.delay_ps, c.delta_od, c.transmission = delay_ps, dod, 10.0 ** (-dod)
        return c.transmission, c.delta_od

    # -- shots ---------------------------------------------------------------------------------------
    def generate_shots(self, n: int) -> ShotBlock:
        """Read the next ``n`` laser shots at the stage's present delay and advance the clock past them.

        The delay is that at the start of the block (a stage moving during the block is not followed).
        Frames dropped on the way are left out: the block then holds fewer than ``n`` shots and its
        ``frame_id`` skips them. ``meta`` carries the simulation's truth: ``delay_ps``, ``position_mm``,
        ``time_s`` (first shot), ``shutter_open`` and ``sim_misfire`` ((shots,) bool).
        """
        cal, s, sw = self.calibration, self.settings, self.settings.noise
        rep = cal.repetition_rate_hz
        now = self.clock.now_s()
        k0 = max(self.next_shot, self.shot_at(now))
        position = self.stage.position_mm(now)
        delay = float(cal.delay_line.delay_ps(position)) + self.electronic_delay_ps()
        shots = k0 + np.arange(n, dtype=np.int64)

        pump_on = self.chopper.pump_on(shots)
        probe_on = ((shots // 2) % 2 == 0) if s.probe.chopped else None
        t_s = shots / rep
        probe_f, pump_f, misfire = self.laser.factors(t_s)
        if sw.dropped_frames and s.detector.dropped_frame_probability > 0:
            keep = self.rng.random(n) >= s.detector.dropped_frame_probability
            shots, pump_on, probe_f, pump_f, misfire = (a[keep] for a in (shots, pump_on, probe_f, pump_f, misfire))
            if probe_on is not None:
                probe_on = probe_on[keep]
        m = len(shots)
        if not self.shutter_open:
            probe_f = np.zeros(m)
            pump_f = np.zeros(m)
        light = probe_f if probe_on is None else probe_f * probe_on

        counts = np.empty((m, cal.pixels), dtype=np.uint16)
        reference = np.empty((m, cal.pixels), dtype=np.uint16) if cal.has_reference else None
        transmission, dod = self._transmission(delay)
        # Mean photoelectrons of every shot as weights of four spectra (one matrix product per chunk):
        #   f·probe + f·on·(T − 1)·probe − f·on·(p − 1)·ln10·ΔOD·T·probe + on·p·artefact,
        # linear in the pump energy p about p = 1 (T^p ≈ T (1 − (p − 1) ln10 ΔOD)); shots with p far from
        # 1 (misfires) are recomputed exactly below.
        basis = np.vstack([
            self.probe_e,
            self.probe_e * (transmission - 1.0),
            self.probe_e * transmission * _LN10 * dod,
            self.artefact_e,
        ]).astype(np.float32)
        on = pump_on.astype(float)
        coeffs = np.column_stack([light, light * on, -light * on * (pump_f - 1.0), on * pump_f]).astype(np.float32)
        far = np.flatnonzero(pump_on & (np.abs(pump_f - 1.0) > 0.05)) if self.shutter_open else np.zeros(0, int)
        ref_basis = self.reference_e[None, :].astype(np.float32)
        for a in range(0, m, _CHUNK_SHOTS):
            b = min(m, a + _CHUNK_SHOTS)
            self.detector.read_linear(coeffs[a:b], basis, counts[a:b])
            if reference is not None:
                self.reference_detector.read_linear(coeffs[a:b, :1], ref_basis, reference[a:b])
        if far.size:
            exact = light[far, None] * self.probe_e * 10.0 ** (-pump_f[far, None] * dod)
            exact += pump_f[far, None] * self.artefact_e
            counts[far] = self.detector.read_mean(exact, np.empty((far.size, cal.pixels), dtype=np.uint16))

        self.next_shot = k0 + n
        self.clock.advance_to((k0 + n) / rep)
        meta: dict[str, Any] = {
            "delay_ps": delay,
            "position_mm": position,
            "time_s": k0 / rep,
            "shutter_open": self.shutter_open,
            "sim_misfire": misfire,
        }
        return ShotBlock(counts=counts, pump_on=pump_on, frame_id=shots, reference=reference,
                         probe_on=probe_on, meta=meta)
