"""Validated settings of the simulated bench: the ``[simulation]`` section of a shotpair config.

Every default is part of the demo scenario (the invented "sensitiser PS-1" in a 2 mm cuvette, pumped at
400 nm, probed 420-720 nm), so an empty ``[simulation]`` section gives a working bench. Field
descriptions are the user documentation of these keys. This module validates and documents; it must not
compute physics beyond the consistency checks of the kinetic scheme, and it must not touch instruments.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = [
    "GROUND_STATE",
    "Band",
    "Species",
    "Step",
    "SampleSettings",
    "LaserSettings",
    "ProbeSettings",
    "ArtefactSettings",
    "DetectorSettings",
    "StageSettings",
    "ChopperSettings",
    "NoiseSwitches",
    "SimulationSettings",
]

#: Name that a kinetic step uses for "back to the ground state"; no species may take it.
GROUND_STATE = "ground"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Band(_Strict):
    """One Gaussian absorption band of a species (or of the ground state), in OD."""

    centre_nm: float = Field(gt=0.0, description="Centre wavelength of the band, in nm.")
    width_nm: float = Field(gt=0.0, description="Full width at half maximum of the band, in nm.")
    amplitude_od: float = Field(
        description=(
            "Peak absorbance of the band, in OD, when every molecule of the sample is in this state. "
            "Positive for absorption; negative for stimulated emission of an excited species."
        )
    )


class Species(_Strict):
    """A transient species of the sample: its name and its absorption spectrum built from bands."""

    name: str = Field(min_length=1, description=f"Name used by the kinetic steps; must not be {GROUND_STATE!r}.")
    bands: list[Band] = Field(
        default_factory=list,
        description="Bands of this species: excited-state absorption (positive) and stimulated emission (negative).",
    )


class Step(_Strict):
    """A first-order step from one species to another (or back to the ground state)."""

    from_species: str = Field(description="Species that decays.")
    to_species: str = Field(
        default=GROUND_STATE, description=f"Species it becomes; {GROUND_STATE!r} for the ground state."
    )
    rate_per_ps: float | None = Field(default=None, gt=0.0, description="Rate constant, in 1/ps.")
    lifetime_ps: float | None = Field(
        default=None, gt=0.0, description="Or the inverse of the rate constant, in ps (give one of the two)."
    )

    @model_validator(mode="after")
    def _one_of_rate_or_lifetime(self) -> "Step":
        if (self.rate_per_ps is None) == (self.lifetime_ps is None):
            raise ValueError("give exactly one of rate_per_ps or lifetime_ps")
        if self.from_species == self.to_species:
            raise ValueError("a step must lead to a different species")
        return self

    @property
    def rate(self) -> float:
        """The rate constant in 1/ps, whichever way it was given."""
        return self.rate_per_ps if self.rate_per_ps is not None else 1.0 / float(self.lifetime_ps)  # type: ignore[arg-type]


def _demo_species() -> list[Species]:
    return [
        Species(
            name="S1_hot",
            bands=[
                Band(centre_nm=660.0, width_nm=120.0, amplitude_od=0.30),
                Band(centre_nm=565.0, width_nm=70.0, amplitude_od=-0.15),
            ],
        ),
        Species(
            name="S1",
            bands=[
                Band(centre_nm=630.0, width_nm=70.0, amplitude_od=0.40),
                Band(centre_nm=540.0, width_nm=45.0, amplitude_od=-0.30),
            ],
        ),
        Species(name="T1", bands=[Band(centre_nm=580.0, width_nm=60.0, amplitude_od=0.45)]),
    ]


def _demo_steps() -> list[Step]:
    return [
        Step(from_species="S1_hot", to_species="S1", lifetime_ps=0.8),
        Step(from_species="S1", to_species="T1", lifetime_ps=450.0),
        Step(from_species="T1", to_species=GROUND_STATE, lifetime_ps=2.0e6),
    ]


def _demo_ground_bands() -> list[Band]:
    return [
        Band(centre_nm=470.0, width_nm=45.0, amplitude_od=0.40),
        Band(centre_nm=400.0, width_nm=40.0, amplitude_od=0.25),
    ]


class SampleSettings(_Strict):
    """The sample: its ground-state absorption, transient species, kinetics, response and chirp.

    The noise-free signal is ``ΔOD(t, λ) = excitation_fraction · Σ_s P_s(t) · (A_s(λ) − A_ground(λ))``,
    with P_s the population of species s relative to the molecules the pump excited, convolved with the
    Gaussian instrument response, and t the delay corrected for the probe chirp at λ.
    """

    name: str = Field(default="sensitiser PS-1", description="Free text naming the sample, stored with the data.")
    path_length_mm: float = Field(default=2.0, gt=0.0, description="Cuvette path length, in mm (stored only).")
    pump_wavelength_nm: float = Field(default=400.0, gt=0.0, description="Pump wavelength, in nm (centre of the pump scatter).")
    excitation_fraction: float = Field(
        default=0.04, gt=0.0, le=1.0,
        description="Fraction of the molecules in the probed volume that one pump pulse excites.",
    )
    ground_state_bands: list[Band] = Field(
        default_factory=_demo_ground_bands,
        description="Absorption bands of the ground state, in OD; their loss on excitation is the bleach.",
    )
    species: list[Species] = Field(default_factory=_demo_species, min_length=1, description="Transient species.")
    steps: list[Step] = Field(default_factory=_demo_steps, description="First-order steps between species.")
    pumped: dict[str, float] = Field(
        default_factory=lambda: {"S1_hot": 1.0},
        description="Species the pump creates and the fraction of excited molecules put into each (sum 1).",
    )
    irf_fwhm_fs: float = Field(
        default=120.0, gt=0.0, le=1.0e6, description="Full width at half maximum of the Gaussian instrument response, in fs."
    )
    fused_silica_mm: float = Field(
        default=3.0, ge=0.0, le=1000.0,
        description="Thickness of fused silica whose group delay chirps the probe before the sample, in mm.",
    )
    chirp_reference_nm: float = Field(
        default=570.0, ge=210.0, le=3710.0,
        description="Probe wavelength whose time zero is that of the delay-line calibration, in nm.",
    )
    time_zero_offset_ps: float = Field(
        default=0.0,
        description=(
            "True time zero of the reference wavelength on the calibrated delay axis, in ps "
            "(0 when the bench calibration is exact)."
        ),
    )

    @model_validator(mode="after")
    def _consistent_scheme(self) -> "SampleSettings":
        names = [s.name for s in self.species]
        if len(set(names)) != len(names):
            raise ValueError(f"species names must be unique, got {names}")
        if GROUND_STATE in names:
            raise ValueError(f"{GROUND_STATE!r} is reserved for the ground state")
        known = set(names) | {GROUND_STATE}
        for step in self.steps:
            for end in (step.from_species, step.to_species):
                if end not in known:
                    raise ValueError(f"step names unknown species {end!r}; species: {', '.join(names)}")
            if step.from_species == GROUND_STATE:
                raise ValueError("the ground state is repopulated by steps, it cannot decay")
        if not self.pumped:
            raise ValueError("pumped must name at least one species")
        for key, fraction in self.pumped.items():
            if key not in names:
                raise ValueError(f"pumped names unknown species {key!r}; species: {', '.join(names)}")
            if not 0.0 <= fraction <= 1.0:
                raise ValueError(f"pumped fraction of {key!r} must lie in [0, 1], got {fraction}")
        if abs(sum(self.pumped.values()) - 1.0) > 1e-9:
            raise ValueError(f"pumped fractions must sum to 1, got {sum(self.pumped.values())}")
        # The scheme must be solvable as a sum of exponentials; import here to keep the module order simple.
        from shotpair.drivers.errors import ConfigError

        from .kinetics import KineticScheme

        try:
            KineticScheme(names, [(s.from_species, s.to_species, s.rate) for s in self.steps])
        except ConfigError as exc:
            raise ValueError(exc.message) from None
        return self


class LaserSettings(_Strict):
    """Intensity behaviour of the amplified laser (shared by pump and probe)."""

    fluctuation_rms: float = Field(
        default=0.01, ge=0.0, le=0.5,
        description="Relative shot-to-shot rms of the probe intensity, common to all pixels and to the reference.",
    )
    pump_fluctuation_rms: float = Field(
        default=0.02, ge=0.0, le=0.5, description="Relative shot-to-shot rms of the pump energy (scales the ΔOD)."
    )
    drift_rms: float = Field(default=0.005, ge=0.0, le=0.5, description="Relative rms of the slow intensity drift.")
    drift_timescale_s: float = Field(default=30.0, gt=0.0, description="Typical period of the slow drift, in s.")
    misfire_probability: float = Field(
        default=1e-3, ge=0.0, le=1.0, description="Probability that a shot misfires (both beams near zero)."
    )
    misfire_level: float = Field(
        default=0.02, ge=0.0, le=1.0, description="Intensity of a misfired shot relative to a normal one."
    )


class ProbeSettings(_Strict):
    """The white-light probe as the sample detector sees it without pump."""

    peak_e: float = Field(
        default=1.5e5, ge=0.0, le=1e8, description="Photoelectrons per pixel at the peak of the probe spectrum."
    )
    centre_nm: float = Field(default=560.0, gt=0.0, description="Centre of the smooth white-light hump, in nm.")
    width_nm: float = Field(default=350.0, gt=0.0, description="Full width at half maximum of the hump, in nm.")
    floor_fraction: float = Field(
        default=0.05, ge=0.0, le=1.0, description="Flat part of the spectrum relative to the peak (far wings)."
    )
    chopped: bool = Field(
        default=False,
        description=(
            "Chop the probe at a quarter of the repetition rate as well (four-state mode: probe_on flags); "
            "probe-off shots carry only pump scatter and emission."
        ),
    )


class ArtefactSettings(_Strict):
    """Light that reaches the detector on pumped shots besides the probe."""

    scatter_peak_e: float = Field(
        default=3.0e4, ge=0.0, description="Pump scatter at the pump wavelength, in photoelectrons per pixel per shot."
    )
    scatter_width_nm: float = Field(default=15.0, gt=0.0, description="FWHM of the pump scatter line, in nm.")
    emission_peak_e: float = Field(
        default=1.5e3, ge=0.0, description="Sample emission at its peak, in photoelectrons per pixel per pumped shot."
    )
    emission_centre_nm: float = Field(default=560.0, gt=0.0, description="Peak of the sample emission, in nm.")
    emission_width_nm: float = Field(default=60.0, gt=0.0, description="FWHM of the sample emission, in nm.")


class DetectorSettings(_Strict):
    """Detector behaviour beyond the bench calibration (gain, read noise, dark level come from the bench)."""

    dark_pattern_rms_counts: float = Field(
        default=5.0, ge=0.0, description="Rms of the fixed per-pixel dark offset pattern about the mean dark level, in counts."
    )
    dropped_frame_probability: float = Field(
        default=1e-4, ge=0.0, le=0.5, description="Probability that a frame is lost on its way to the computer."
    )
    reference_peak_e: float = Field(
        default=1.0e5, ge=0.0, le=1e8, description="Photoelectrons per pixel at the probe peak on the reference detector."
    )
    photon_statistics: Literal["gaussian", "poisson"] = Field(
        default="gaussian",
        description=(
            "'poisson': exact Poisson draws of the photoelectrons (about 6x slower). 'gaussian': the normal limit "
            "N + sqrt(N)·z, same mean and variance, skewness 1/sqrt(N) neglected (0.3 % at 1e5 e-)."
        ),
    )
    generator_threads: int = Field(
        default=2, ge=1, le=16,
        description="Threads that draw the detector noise (capped at the CPU count); 1 keeps the simulator in one thread.",
    )


class StageSettings(_Strict):
    """Mechanics of the simulated delay stage (its travel comes from the bench calibration)."""

    velocity_mm_per_s: float = Field(default=50.0, gt=0.0, le=1e4, description="Speed of a move, in mm/s.")
    settle_s: float = Field(default=0.05, ge=0.0, le=60.0, description="Settling time after each move, in s.")
    needs_homing: bool = Field(default=True, description="Whether the stage refuses moves until it has been homed.")
    start_mm: float | None = Field(
        default=None, description="Position at power-up, in mm; the middle of the travel when not given."
    )


class ChopperSettings(_Strict):
    """Faults of the simulated chopper."""

    phase_slip_probability: float = Field(
        default=1e-5, ge=0.0, le=0.5,
        description="Probability per shot that the blade slips by one shot (two equal pump flags in a row).",
    )


class NoiseSwitches(_Strict):
    """Switch each noise and fault source on or off, to test every effect alone against theory."""

    photon_noise: bool = Field(default=True, description="Photoelectron shot noise of probe, reference, scatter, emission.")
    read_noise: bool = Field(default=True, description="Detector read noise (bench read_noise_e).")
    dark_pattern: bool = Field(default=True, description="Fixed per-pixel dark offset pattern.")
    laser_fluctuation: bool = Field(default=True, description="Shot-to-shot probe intensity fluctuation.")
    pump_fluctuation: bool = Field(default=True, description="Shot-to-shot pump energy fluctuation.")
    drift: bool = Field(default=True, description="Slow intensity drift of the laser.")
    misfires: bool = Field(default=True, description="Rare near-zero shots.")
    dropped_frames: bool = Field(default=True, description="Frames lost on the way (gaps in frame_id).")
    phase_slips: bool = Field(default=True, description="Chopper slips by one shot.")
    scatter: bool = Field(default=True, description="Pump scatter on pumped shots.")
    emission: bool = Field(default=True, description="Sample emission on pumped shots.")

    @classmethod
    def none(cls) -> "NoiseSwitches":
        """All sources off: the detector then returns the noise-free signal, rounded to counts."""
        return cls(**{name: False for name in cls.model_fields})


class SimulationSettings(_Strict):
    """The ``[simulation]`` section: the physics of the simulated bench."""

    seed: int | None = Field(default=None, description="Seed of the random numbers; none gives a fresh bench each run.")
    sample: SampleSettings = Field(default_factory=SampleSettings)
    laser: LaserSettings = Field(default_factory=LaserSettings)
    probe: ProbeSettings = Field(default_factory=ProbeSettings)
    artefacts: ArtefactSettings = Field(default_factory=ArtefactSettings)
    detector: DetectorSettings = Field(default_factory=DetectorSettings)
    stage: StageSettings = Field(default_factory=StageSettings)
    chopper: ChopperSettings = Field(default_factory=ChopperSettings)
    noise: NoiseSwitches = Field(default_factory=NoiseSwitches)

    @field_validator("seed")
    @classmethod
    def _seed_non_negative(cls, value: int | None) -> int | None:
        if value is not None and value < 0:
            raise ValueError("seed must be a non-negative integer")
        return value
