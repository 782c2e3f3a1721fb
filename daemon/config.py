"""Read and validate shotpair configuration files (TOML) into typed settings.

A file holds a bench section (which driver for each instrument, and calibrations), a scan section
(delay grid, shots, sweeps, order, output) and, for the simulated bench, a simulation section; one file
may hold all three. Every problem a user can make is turned into one ConfigError that names the file,
the key path, the bad value and what is allowed. This module never touches an instrument.
"""

from __future__ import annotations

import difflib
import math
import os
import stat
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal, NoReturn, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from shotpair.drivers.delay_line import DelayLine, air_group_index
from shotpair.drivers.errors import ConfigError
from shotpair.simulators.settings import SimulationSettings

__all__ = [
    "DelayAxisSettings",
    "ChopperSettings",
    "ShutterSettings",
    "DetectorSettings",
    "DelayGeneratorSettings",
    "BenchSettings",
    "LinearSegment",
    "LogSegment",
    "ListSegment",
    "ScanSettings",
    "StreamSettings",
    "StreamAuthSettings",
    "ShotpairConfig",
    "LoadedConfig",
    "load_config",
    "parse_config",
]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)  # NaN is no setting


class DelayAxisSettings(_Strict):
    """The delay-line stage and its calibration."""

    driver: str = Field("sim", description="Driver name (`sim` for the simulated bench).")
    options: dict[str, Any] = Field(default_factory=dict, description="Driver-specific settings.")
    passes: int = Field(4, ge=1, le=16, description="Optical path change per unit stage travel (2: single retroreflector, 4: double pass).")
    time_zero_mm: float = Field(10.0, description="Stage position where pump and probe overlap, mm.")
    travel_mm: tuple[float, float] = Field((0.0, 150.0), description="Lowest and highest position the stage may be sent to, mm.")
    delayed_beam: Literal["probe", "pump"] = Field("probe", description="Which beam runs over the stage.")
    medium: Literal["air", "vacuum"] = Field("air", description="Medium of the delay line (air: Ciddor 1996 group index).")
    centre_wavelength_nm: float = Field(800.0, gt=200.0, lt=2000.0, description="Wavelength of the beam on the stage, for the air group index, nm.")
    home_before_scan: bool = Field(True, description="Home the stage at the start of a scan when it does not know its position.")
    velocity_mm_per_s: float = Field(50.0, ge=1e-3, le=1e4, description="Typical speed, used only to estimate scan durations, mm/s.")
    settle_timeout_s: float = Field(30.0, gt=0.0, description="Longest wait for a move to finish and settle, s.")

    @field_validator("travel_mm")
    @classmethod
    def _ordered(cls, v: tuple[float, float]) -> tuple[float, float]:
        if not v[0] < v[1]:
            raise ValueError("travel_mm must be [low, high] with low < high")
        return v

    @model_validator(mode="after")
    def _zero_inside(self) -> "DelayAxisSettings":
        lo, hi = self.travel_mm
        if not lo <= self.time_zero_mm <= hi:
            raise ValueError(f"time_zero_mm = {self.time_zero_mm} lies outside travel_mm [{lo}, {hi}]")
        return self

    def delay_line(self) -> DelayLine:
        n_g = air_group_index(self.centre_wavelength_nm) if self.medium == "air" else 1.0
        return DelayLine(self.passes, self.time_zero_mm, self.delayed_beam, n_g)


class ChopperSettings(_Strict):
    """The pump chopper, locked to the laser."""

    driver: str = "sim"
    options: dict[str, Any] = Field(default_factory=dict)
    frequency_hz: float | None = Field(None, gt=0.0, description="Blade frequency, Hz; default half the repetition rate.")
    phase_deg: float = Field(0.0, ge=-360.0, le=360.0, description="Blade phase relative to the laser trigger, degrees.")
    require_lock: bool = Field(True, description="Refuse to acquire while the chopper is not locked.")


class ShutterSettings(_Strict):
    """The beam shutter (closed blocks the laser; used to measure the dark)."""

    driver: str = "sim"
    options: dict[str, Any] = Field(default_factory=dict)


class DetectorSettings(_Strict):
    """The spectrometer's line camera and its calibration."""

    driver: str = "sim"
    options: dict[str, Any] = Field(default_factory=dict)
    pixels: int = Field(1024, ge=2, le=16384, description="Pixels per spectrum.")
    gain_e_per_count: float = Field(4.0, gt=0.0, description="Photoelectrons per count.")
    read_noise_e: float = Field(12.0, ge=0.0, description="Read noise, photoelectrons rms.")
    dark_counts: float | None = Field(None, ge=0.0, le=65535.0, description="Fixed dark level in counts; omit to measure the dark through the closed shutter at scan start.")
    saturation_counts: int = Field(65535, ge=1, le=65535, description="Raw count at or above which a pixel is treated as saturated.")
    wavelength_poly_nm: list[float] = Field([420.0, 0.29325513], min_length=1, max_length=6, description="Pixel to wavelength polynomial c0 + c1 p + c2 p^2 ..., nm (p = pixel index from 0).")
    has_reference: bool = Field(False, description="A reference detector reads the probe before the sample.")
    block_shots: int = Field(500, ge=2, le=100000, description="Shots read from the detector per block.")

    def wavelengths_nm(self) -> np.ndarray:
        p = np.arange(self.pixels, dtype=np.float64)
        return np.polynomial.polynomial.polyval(p, np.asarray(self.wavelength_poly_nm, dtype=np.float64))

    @model_validator(mode="after")
    def _monotonic(self) -> "DetectorSettings":
        with np.errstate(all="ignore"):  # huge coefficients overflow: refused below, without a warning
            w = self.wavelengths_nm()
            d = np.diff(w)
        if not (np.all(np.isfinite(w)) and np.all(w > 0) and (np.all(d > 0) or np.all(d < 0))):
            raise ValueError(f"wavelength_poly_nm gives wavelengths {w[0]:.6g}..{w[-1]:.6g} nm that are not positive "
                             "and strictly monotonic over the pixels")
        return self


class DelayGeneratorSettings(_Strict):
    """A digital delay generator that delays the pump trigger: the electronic delay axis (ns to ms)."""

    driver: str = "sim"
    options: dict[str, Any] = Field(default_factory=dict)
    time_zero_ps: float = Field(0.0, description="Generator setting at which pump and probe coincide (cables and "
                                "trigger offsets included), ps.")
    range_ps: tuple[float, float] = Field((0.0, 1.0e10), description="Lowest and highest setting the generator "
                                          "may be sent to, ps (the narrower of this and the generator's own range "
                                          "is used).")
    settle_s: float = Field(0.0, ge=0.0, le=60.0, description="Time to wait after a new setting before "
                            "acquiring (trigger electronics settling), s.")

    @field_validator("range_ps")
    @classmethod
    def _ordered(cls, v: tuple[float, float]) -> tuple[float, float]:
        if not (math.isfinite(v[0]) and math.isfinite(v[1]) and v[0] < v[1]):
            raise ValueError("range_ps must be [low, high] with low < high")
        return v

    def delay_range_ps(self) -> tuple[float, float]:
        """Pump-probe delays the generator can give (its range minus time zero), ps."""
        return self.range_ps[0] - self.time_zero_ps, self.range_ps[1] - self.time_zero_ps


class BenchSettings(_Strict):
    """Everything about the bench: which instruments, how they are calibrated."""

    name: str = Field("bench", description="A name for this bench, stored in output files.")
    repetition_rate_hz: float = Field(1000.0, ge=0.1, le=200_000.0, description="Laser repetition rate, Hz.")
    delay_axis: DelayAxisSettings = Field(default_factory=DelayAxisSettings)
    chopper: ChopperSettings = Field(default_factory=ChopperSettings)
    shutter: ShutterSettings = Field(default_factory=ShutterSettings)
    detector: DetectorSettings = Field(default_factory=DetectorSettings)
    delay_generator: DelayGeneratorSettings | None = Field(None, description="An electronic delay axis; scans "
                                                           "choose it with scan.axis = \"generator\".")
    dark_shots: int = Field(1000, ge=2, le=10_000_000, description="Shots averaged for the dark at scan start.")
    retry_attempts: int = Field(3, ge=0, le=1000, description="Instrument faults during a scan (no reply in "
                                "time, an unusable reply, a lost connection) retried within any retry_window_s "
                                "before the scan pauses; 0 pauses at the first.")
    retry_window_s: float = Field(600.0, gt=0.0, le=1.0e6, description="Length of the sliding window that "
                                  "retry_attempts counts retries in, s.")
    retry_delay_s: float = Field(1.0, ge=0.0, le=600.0, description="Wait before each retry (a lost connection "
                                 "is then opened again), s.")

    def instrument_sections(self) -> dict[str, Any]:
        """The instrument sections present in this bench, by kind (the delay generator only when configured)."""
        out: dict[str, Any] = {k: getattr(self, k) for k in ("delay_axis", "chopper", "shutter", "detector")}
        if self.delay_generator is not None:
            out["delay_generator"] = self.delay_generator
        return out

    def uses_simulator(self) -> bool:
        return any(section.driver == "sim" for section in self.instrument_sections().values())


class LinearSegment(_Strict):
    """Evenly spaced delays from start to stop inclusive."""

    kind: Literal["linear"]
    start_ps: float
    stop_ps: float
    step_ps: float = Field(gt=0.0)

    @model_validator(mode="after")
    def _enough(self) -> "LinearSegment":
        if self.stop_ps < self.start_ps:
            raise ValueError("stop_ps must not be below start_ps")
        if (self.stop_ps - self.start_ps) / self.step_ps > 1_000_000:
            raise ValueError("more than a million points in one segment")
        return self

    def delays_ps(self) -> np.ndarray:
        n = int(math.floor((self.stop_ps - self.start_ps) / self.step_ps + 1e-9)) + 1
        return self.start_ps + self.step_ps * np.arange(n)


class LogSegment(_Strict):
    """Logarithmically spaced delays from start to stop inclusive (both positive)."""

    kind: Literal["log"]
    start_ps: float = Field(gt=0.0)
    stop_ps: float = Field(gt=0.0)
    points: int = Field(ge=2, le=100_000)

    @model_validator(mode="after")
    def _ordered(self) -> "LogSegment":
        if self.stop_ps <= self.start_ps:
            raise ValueError("stop_ps must be above start_ps")
        return self

    def delays_ps(self) -> np.ndarray:
        return np.geomspace(self.start_ps, self.stop_ps, self.points)


class ListSegment(_Strict):
    """Delays given one by one."""

    kind: Literal["list"]
    delays_ps: list[float] = Field(min_length=1)

    def delays_ps_array(self) -> np.ndarray:
        return np.asarray(self.delays_ps, dtype=np.float64)


Segment = Annotated[Union[LinearSegment, LogSegment, ListSegment], Field(discriminator="kind")]


class ScanSettings(_Strict):
    """One scan: which delays, how many shots, in what order, where the data go."""

    title: str = Field("scan", description="A short title stored in the output file.")
    delays: list[Segment] = Field(min_length=1, description="Delay grid: linear, log and list segments, merged.")
    shots_per_point: int = Field(ge=2, le=100_000_000, description="Laser shots per delay point and sweep.")
    sweeps: int = Field(1, ge=1, le=100_000, description="Passes over the whole delay grid.")
    axis: Literal["stage", "generator"] = Field("stage", description="What sets the delay: the delay stage, or the "
                                                "bench's delay generator (the stage then waits at time zero).")
    order: Literal["ascending", "descending", "alternating", "shuffled"] = Field("alternating")
    seed: int | None = Field(None, ge=0, description="Seed of the shuffled order (and of the simulator when it has none).")
    output: str = Field("shotpair-scan.h5", description="Output HDF5 file; relative paths start at the working folder. An existing file is never overwritten: a number is added.")
    reject_threshold_mad: float = Field(6.0, gt=0.0, description="Shots further than this many robust standard deviations from the block median are rejected with their pair.")

    @field_validator("output")
    @classmethod
    def _nonempty(cls, v: str) -> str:
        if not v.strip():
            raise ValueError("output must be a file path")
        return v


class StreamAuthSettings(_Strict):
    """CURVE authentication of the stream and control sockets (daemon/auth.py, docs/protocol.md 1.1)."""

    enabled: bool | None = Field(None, description="true: only clients with listed keys connect; false: anyone "
                                 "who reaches the ports (refused unless both endpoints are loopback); omitted: on "
                                 "when keys_dir is given or an endpoint is reachable from other computers.")
    keys_dir: str | None = Field(None, description="Folder written by `shotpair keys DIR` (the daemon's key pair, "
                                 "clients/control/*.key, clients/read-only/*.key); relative to this file's folder.")


class StreamSettings(_Strict):
    """Where the daemon publishes data and listens for control, and how often it reports."""

    data_endpoint: str = Field("tcp://127.0.0.1:5561", description="ZeroMQ endpoint the data stream (PUB) binds; "
                               "127.0.0.1 keeps it on this computer, tcp://*:PORT opens it to the network.")
    control_endpoint: str = Field("tcp://127.0.0.1:5562", description="ZeroMQ endpoint the control socket (ROUTER) binds.")
    status_interval_s: float = Field(1.0, ge=0.05, le=60.0, description="Seconds between status heartbeats.")
    block_interval_s: float = Field(0.1, ge=0.1, le=60.0, description="Shortest time between live partial averages, s.")
    send_high_water_mark: int = Field(1000, ge=1, le=1_000_000, description="Messages queued per subscriber before "
                                      "the newest are dropped (a slow client loses messages, never the scan's time).")
    send_buffer_bytes: int | None = Field(None, ge=4096, le=64 * 2**20, description="Kernel send buffer per "
                                          "subscriber connection, bytes; omit to let the system size it (up to a "
                                          "few MB are then held for a stuck client before messages are dropped).")
    max_request_bytes: int = Field(1 << 20, ge=1024, le=64 * 2**20, description="Longest control request read, "
                                   "bytes (1 MiB); a longer one is answered bad_request unparsed, and a frame over "
                                   "4 times this makes the daemon drop the connection without reading it.")
    auth: StreamAuthSettings = Field(default_factory=StreamAuthSettings, description="Who may connect "
                                     "([stream.auth]); required for endpoints other computers can reach.")

    @field_validator("data_endpoint", "control_endpoint")
    @classmethod
    def _endpoint(cls, v: str) -> str:
        if not (v.startswith("tcp://") or v.startswith("ipc://") or v.startswith("inproc://")):
            raise ValueError("an endpoint looks like tcp://127.0.0.1:5561 (or ipc://PATH)")
        return v


class ShotpairConfig(_Strict):
    """A whole configuration file."""

    bench: BenchSettings | None = None
    stream: StreamSettings | None = None
    scan: ScanSettings | None = None
    simulation: SimulationSettings | None = None


class LoadedConfig:
    """A validated configuration with its origin (for messages) and its text (for the output file)."""

    def __init__(self, config: ShotpairConfig, path: str, text: str) -> None:
        self.config = config
        self.path = path
        self.text = text

    @property
    def bench(self) -> BenchSettings:
        return self.config.bench or BenchSettings()

    @property
    def stream(self) -> StreamSettings:
        return self.config.stream or StreamSettings()

    @property
    def simulation(self) -> SimulationSettings:
        return self.config.simulation or SimulationSettings()

    def require_scan(self) -> ScanSettings:
        if self.config.scan is None:
            raise ConfigError("no [scan] section: this file describes no scan", file=self.path, key_path="scan")
        return self.config.scan


def _key_path(loc: tuple[Any, ...], *, tags: bool = True) -> str:
    """``bench.detector.pixels`` / ``scan.delays[1].start_ps`` from a location; ``tags``: the location
    comes from pydantic, whose union-member tag right after a list index is not a key the user wrote."""
    parts: list[str] = []
    previous: Any = None
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
        elif tags and item in ("linear", "log", "list") and isinstance(previous, int):
            pass
        else:
            key = str(item)
            parts.append(("." if parts else "") + (key if len(key) <= 80 else key[:80] + "..."))
        previous = item
    return "".join(parts)


def _model_at(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    """The model class that owns the last key of ``loc`` (to list the allowed keys)."""
    model: Any = ShotpairConfig
    for item in loc[:-1]:
        if isinstance(item, int) or model is None:
            continue
        if item in ("linear", "log", "list"):
            model = {"linear": LinearSegment, "log": LogSegment, "list": ListSegment}[item]
            continue
        field = getattr(model, "model_fields", {}).get(item)
        if field is None:
            return None
        ann = field.annotation
        model = _first_model(ann)
    return model if isinstance(model, type) and issubclass(model, BaseModel) else None


def _first_model(ann: Any) -> Any:
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return ann
    for arg in getattr(ann, "__args__", ()) or ():
        found = _first_model(arg)
        if found is not None:
            return found
    return None


def _describe(error: dict[str, Any], path: str) -> str:
    loc = tuple(error.get("loc", ()))
    key = _key_path(loc)
    kind = error.get("type", "")
    if kind == "extra_forbidden":
        model = _model_at(loc)
        allowed = sorted(model.model_fields) if model else []
        hint = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
        msg = "unknown key" + (f" (did you mean {hint[0]!r}?)" if hint else "")
        return ConfigError(msg, file=path, key_path=key, allowed=", ".join(allowed) or None).render()
    if kind == "missing":
        return ConfigError("required key is missing", file=path, key_path=key).render()
    msg = str(error.get("msg", "invalid value"))
    msg = msg.removeprefix("Value error, ")
    return ConfigError(msg, file=path, key_path=key, value=_clipped(error.get("input"))).render()


class _Shown(str):
    """A value's repr, cut to a readable length, that a message shows as it is (no second repr)."""

    def __repr__(self) -> str:
        return str(self)


#: Longest repr of a bad value quoted in a message, and most problems listed for one document.
_MAX_SHOWN_CHARS = 200
_MAX_PROBLEMS = 20


def _clipped(value: Any) -> Any:
    """The value, or its repr cut to :data:`_MAX_SHOWN_CHARS` when that is long (or cannot be made)."""
    if value is None:
        return None
    try:
        text = repr(value)
    except (RecursionError, ValueError):  # nested too deeply, or an int beyond the digit limit of str()
        return _Shown(f"<a {type(value).__name__} too large to show>")
    return value if len(text) <= _MAX_SHOWN_CHARS else _Shown(text[:_MAX_SHOWN_CHARS] + "...")


def _bad_leaves(data: Any) -> list[tuple[tuple[Any, ...], str, Any]]:
    """Values no model may accept, in document order: NaN and infinity (TOML ``nan``/``inf``, a float
    literal too large for a double such as ``1e400``, JSON ``NaN``) and text holding a lone surrogate
    (JSON ``"\\ud800"``: not Unicode, cannot be written to a file or a file name).

    Walks iteratively, so a document nested however deeply cannot exhaust the stack."""
    found: list[tuple[tuple[Any, ...], str, Any]] = []
    stack: list[tuple[tuple[Any, ...], Any]] = [((), data)]
    while stack:
        loc, value = stack.pop()
        if isinstance(value, float) and not math.isfinite(value):
            found.append((loc, "not a finite number (nan and inf are not allowed)", value))
        elif isinstance(value, str):
            try:
                value.encode("utf-8")
            except UnicodeEncodeError:
                found.append((loc, "text that is not valid Unicode (a lone surrogate)", _clipped(value)))
        elif isinstance(value, dict):
            for key in reversed(list(value)):
                try:
                    str(key).encode("utf-8")
                except UnicodeEncodeError:
                    found.append(((*loc, _Shown(repr(key))), "a key that is not valid Unicode", None))
                    continue
                stack.append(((*loc, key), value[key]))
        elif isinstance(value, (list, tuple)):
            stack.extend(((*loc, i), value[i]) for i in reversed(range(len(value))))
    return found


def _nested(a: str, b: str) -> bool:
    """Whether one key path is the other or lies inside it (``scan.delays`` and ``scan.delays[1].stop_ps``)."""
    short, long = sorted((a, b), key=len)
    return long == short or not short or long.startswith(short + ".") or long.startswith(short + "[")


def _raise_problems(lines: list[str], path: str, first_key: str) -> NoReturn:
    if len(lines) > _MAX_PROBLEMS:
        lines = [*lines[:_MAX_PROBLEMS], f"... and {len(lines) - _MAX_PROBLEMS} more"]
    raise ConfigProblems(lines, path, first_key)


def parse_config(data: dict[str, Any], path: str = "<config>", text: str = "") -> LoadedConfig:
    """Validate an already parsed TOML document. Raises ConfigError listing every problem found.

    Besides the models' own rules, NaN and infinity are refused anywhere in the document (no setting
    means anything with them), and so is text that is not valid Unicode.
    """
    leaves = _bad_leaves(data)
    lines = [ConfigError(why, file=path, key_path=_key_path(loc, tags=False), value=value).render()
             for loc, why, value in leaves]
    reported = {_key_path(loc, tags=False) for loc, _, _ in leaves}
    try:
        config = ShotpairConfig.model_validate(data)
    except ValidationError as exc:
        # A NaN also upsets the checks of the tables around it (time zero outside the travel...): say it once.
        errors = [e for e in exc.errors() if not any(_nested(_key_path(tuple(e.get("loc", ()))), key)
                                                     for key in reported)]
        lines += [_describe(e, path) for e in errors]
        first = leaves[0][0] if leaves else tuple(errors[0].get("loc", ())) if errors else ()
        _raise_problems(lines, path, _key_path(first, tags=not leaves))
    if lines:
        _raise_problems(lines, path, _key_path(leaves[0][0], tags=False))
    loaded = LoadedConfig(config, path, text)
    if config.scan is not None:
        check_output(config.scan.output, path)
    if config.stream is not None:  # the endpoints as written; serve/run check again with --data/--control
        from .auth import auth_required

        s = config.stream
        auth_required(s.auth.enabled, s.auth.keys_dir, {"stream.data_endpoint": s.data_endpoint,
                                                        "stream.control_endpoint": s.control_endpoint}, file=path)
    return loaded


class ConfigProblems(ConfigError):
    """Several problems found in one file, reported together as one message."""

    def __init__(self, lines: list[str], file: str, key_path: str) -> None:
        self.lines = lines
        super().__init__("invalid configuration", file=file, key_path=key_path)

    def render(self) -> str:
        if len(self.lines) == 1:
            return self.lines[0]
        return f"{len(self.lines)} problems in the configuration:\n  " + "\n  ".join(self.lines)


def check_output(output: str, config_path: str, key_path: str = "scan.output") -> None:
    """Check that an output file could be created: its nearest existing folder must be writable."""
    if "\x00" in output:
        raise ConfigError("a file name cannot contain a NUL character", file=config_path, key_path=key_path,
                          value=output)
    try:
        target = Path(output).expanduser()
    except RuntimeError as exc:  # "~user" that does not exist
        raise ConfigError(f"cannot expand the path ({exc})", file=config_path, key_path=key_path,
                          value=output) from None
    try:
        if target.exists() and target.is_dir():
            raise ConfigError("output is a folder, not a file", file=config_path, key_path=key_path, value=output,
                              allowed="a path to an .h5 file")
        folder = target.parent if str(target.parent) else Path(".")
        probe = folder
        while not probe.exists():
            if probe.parent == probe:
                break
            probe = probe.parent
        usable = probe.is_dir() and os.access(probe, os.W_OK | os.X_OK)
    except (OSError, ValueError) as exc:  # a name too long for the file system, a lone surrogate...
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise ConfigError(f"not a usable file name ({reason})", file=config_path, key_path=key_path,
                          value=_clipped(output)) from None
    if not usable:
        raise ConfigError(f"output folder {str(probe)!r} is not writable", file=config_path, key_path=key_path,
                          value=output, allowed="a path in a folder you may write to")


#: Largest configuration file read, bytes.
MAX_CONFIG_BYTES = 16 * 2**20


def load_config(path: str | os.PathLike[str]) -> LoadedConfig:
    """Read and validate a TOML configuration file. Raises ConfigError for every user mistake."""
    shown = str(path) if len(str(path)) <= 300 else str(path)[:300] + "..."
    try:
        p = Path(path)
        # Only a regular file, read with a bound: a path sent in a `start` request may name a device or a
        # pipe (/dev/zero never ends, a FIFO blocks the daemon until someone writes to it).
        if p.exists() and not p.is_dir() and not stat.S_ISREG(p.stat().st_mode):
            raise ConfigError("not a regular file", file=shown, allowed="a TOML file")
        with p.open("rb") as f:
            raw = f.read(MAX_CONFIG_BYTES + 1)
    except FileNotFoundError:
        raise ConfigError("file not found", file=shown, allowed="an existing TOML file") from None
    except IsADirectoryError:
        raise ConfigError("is a folder, not a file", file=shown) from None
    except OSError as exc:
        raise ConfigError(f"cannot read the file ({exc.strerror})", file=shown) from None
    except ValueError as exc:  # a NUL character in the name
        raise ConfigError(f"not a usable file name ({exc})", file=shown) from None
    if len(raw) > MAX_CONFIG_BYTES:
        raise ConfigError(f"larger than {MAX_CONFIG_BYTES // 2**20} MiB: not a configuration file", file=shown)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"not UTF-8 text (byte {exc.start})", file=shown) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=shown) from None
    except RecursionError:  # tomllib recurses once per nested array or inline table
        raise ConfigError("not valid TOML here: arrays or inline tables nested too deeply", file=shown) from None
    return parse_config(data, shown, text)
