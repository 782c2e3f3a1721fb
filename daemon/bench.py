"""Assemble the bench: create each instrument from the bench settings, connect them, and leave them safe.

The simulated bench (one VirtualBench shared by every `sim` driver) is built here when any instrument
uses it. Connecting checks that each instrument answers; nothing moves until ``prepare`` is called by
the runner after the whole configuration has been validated.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

from shotpair.drivers import registry
from shotpair.drivers.base import Chopper, DelayAxis, DelayGenerator, Detector, Instrument, Shutter
from shotpair.drivers.errors import ConfigError, InstrumentError, ShotpairError

from .config import BenchSettings
from shotpair.simulators.settings import SimulationSettings

__all__ = ["Bench", "build_bench", "calibration_for"]

log = logging.getLogger(__name__)


@dataclass
class Bench:
    """The connected instruments of one bench, plus the virtual bench when simulated."""

    settings: BenchSettings
    delay_axis: DelayAxis
    chopper: Chopper
    shutter: Shutter
    detector: Detector
    simulation: Any = None
    delay_generator: DelayGenerator | None = None
    #: The simulated bench's model when only its noise-free truth is wanted: instruments served by the wire
    #: simulators (`shotpair simulate`) are real drivers, but the file still gets the truth beside the data.
    truth_model: Any = None
    connected: list[Instrument] = field(default_factory=list)

    def instruments(self) -> dict[str, Instrument]:
        out: dict[str, Instrument] = {"delay_axis": self.delay_axis, "chopper": self.chopper,
                                      "shutter": self.shutter, "detector": self.detector}
        if self.delay_generator is not None:
            out["delay_generator"] = self.delay_generator
        return out

    def truth(self) -> Any:
        """The virtual bench whose ``truth_delta_od`` goes into the file, or None on a real bench."""
        return self.simulation if self.simulation is not None else self.truth_model

    def connect(self) -> None:
        """Connect every instrument; on failure disconnect those already connected and re-raise."""
        for name, inst in self.instruments().items():
            try:
                inst.connect()
            except ShotpairError:
                self.disconnect()
                raise
            except OSError as exc:
                self.disconnect()
                raise InstrumentError(f"cannot connect ({exc})", instrument=name) from None
            except Exception:
                self.disconnect()
                raise
            self.connected.append(inst)
        if self.detector.pixels != self.settings.detector.pixels:
            self.disconnect()
            raise ConfigError("the detector reports a different number of pixels", key_path="bench.detector.pixels",
                              value=self.settings.detector.pixels, allowed=str(self.detector.pixels))

    def identities(self) -> dict[str, dict[str, Any]]:
        out: dict[str, dict[str, Any]] = {}
        for name, inst in self.instruments().items():
            entry: dict[str, Any] = {"driver": self.settings.instrument_sections()[name].driver}
            try:
                entry["identity"] = inst.identity()
                entry["state"] = inst.state()
            except ShotpairError as exc:
                entry["identity"] = f"unavailable: {exc}"
            out[name] = entry
        return out

    def make_safe(self) -> list[str]:
        """Close the shutter and stop the axis, whatever happened before. Returns the problems met.

        Never raises: it runs on every exit path, including after instrument errors.
        """
        problems: list[str] = []
        for action, fn in (("close the shutter", self.shutter.close), ("stop the delay axis", self.delay_axis.stop)):
            try:
                fn()
            except Exception as exc:  # noqa: BLE001 - leaving the bench safe must try everything
                problems.append(f"could not {action}: {exc}")
                log.error("could not %s: %s", action, exc)
        return problems

    def disconnect(self) -> None:
        for inst in reversed(self.connected):
            try:
                inst.disconnect()
            except Exception as exc:  # noqa: BLE001
                log.warning("%s: error on disconnect: %s", inst.name, exc)
        self.connected.clear()


def calibration_for(settings: BenchSettings) -> Any:
    """The simulated bench's :class:`~shotpair.simulators.bench.BenchCalibration` from a validated bench
    section (pixels, wavelengths, detector constants, delay line, travel, delay generator)."""
    from shotpair.simulators.bench import BenchCalibration

    det = settings.detector
    generator: dict[str, Any] = {}
    if settings.delay_generator is not None:
        generator = {"generator_time_zero_ps": settings.delay_generator.time_zero_ps,
                     "generator_range_ps": tuple(settings.delay_generator.range_ps)}
    return BenchCalibration(
        pixels=det.pixels,
        wavelengths_nm=det.wavelengths_nm(),
        repetition_rate_hz=settings.repetition_rate_hz,
        gain_e_per_count=det.gain_e_per_count,
        read_noise_e=det.read_noise_e,
        dark_counts=det.dark_counts if det.dark_counts is not None else 500.0,
        saturation_counts=det.saturation_counts,
        has_reference=det.has_reference,
        delay_line=settings.delay_axis.delay_line(),
        travel_mm=settings.delay_axis.travel_mm,
        **generator,
    )


def build_bench(settings: BenchSettings, simulation: SimulationSettings | None = None, *, realtime: bool = True,
                seed: int | None = None, config_path: str | None = None) -> Bench:
    """Create (not connect) the instruments named in the bench settings.

    With simulated drivers the virtual bench is built from ``simulation`` (defaults when None). A bench of
    real drivers with a ``simulation`` section (what `shotpair simulate` writes) gets the model only to
    store its noise-free truth. Raises ConfigError for an unknown driver or bad driver options, naming
    ``config_path`` when given.
    """
    virtual = truth_model = None
    if settings.uses_simulator() or simulation is not None:
        from shotpair.simulators.bench import VirtualBench

        sim = simulation or SimulationSettings()
        if seed is not None and sim.seed is None:
            sim = sim.model_copy(update={"seed": seed})
        calibration = calibration_for(settings)
        model = VirtualBench(sim, calibration, realtime=realtime)
        if settings.uses_simulator():
            virtual = model
        else:
            truth_model = model
    context = registry.DriverContext(bench_settings=settings, simulation=virtual)
    made: dict[str, Any] = {}
    for kind, section in settings.instrument_sections().items():
        try:
            made[kind] = registry.create(kind, section.driver, kind, section.options, context)
        except ConfigError as exc:
            if exc.file is None and config_path is not None:
                raise ConfigError(exc.message, file=config_path, key_path=exc.key_path, value=exc.value,
                                  allowed=exc.allowed) from None
            raise
    return Bench(settings, made["delay_axis"], made["chopper"], made["shutter"], made["detector"], virtual,
                 made.get("delay_generator"), truth_model)
