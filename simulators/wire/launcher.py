"""Start a whole simulated bench on wires, from a bench file, and write the bench file that reaches it.

What it is for: ``shotpair simulate`` and end-to-end tests of the real drivers. :class:`WireBench` builds
ONE VirtualBench from the ``[bench]`` and ``[simulation]`` sections, serves the spectrometer and the
delay generator as SCPI devices on 127.0.0.1 sockets, and the stage, chopper and shutter either as the
made-up serial controller on pseudo-terminals (when simulators/wire/serial_controller.py and
pty_server.py are importable) or as SCPI devices too (``all_scpi=True`` or no serial modules). It then
writes a bench file whose instruments use the real drivers (``scpi``, ``template``) at those addresses,
with every calibration key of the original and a copy of its ``[simulation]`` (and ``[stream]``)
section. :func:`dumps_toml` is the small TOML writer that needs (tomllib reads only).

What it must not do: listen beyond 127.0.0.1, start anything in its constructor (only :meth:`start`
does), leave a server running after :meth:`stop` or a failed start, or change the user's bench file.
"""

from __future__ import annotations

import datetime
import logging
import math
import os
import re
import threading
import tomllib
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Any, Mapping

from shotpair.daemon.bench import calibration_for
from shotpair.daemon.config import LoadedConfig
from shotpair.drivers.errors import ConfigError, StorageError, TransportError
from shotpair.simulators.bench import VirtualBench
from shotpair.simulators.settings import SimulationSettings

from .devices import DEFAULT_LATENCY_S, DEVICE_NAMES, BenchDevice, make_devices
from .tcp_server import ScpiTcpServer

__all__ = ["SERIAL_KINDS", "Endpoint", "WireBench", "dumps_toml"]

#: Instruments served as the made-up serial controller when its modules are there.
SERIAL_KINDS = ("delay_axis", "chopper", "shutter")
#: Instruments reached through VISA (pyvisa-py) rather than a plain socket.
_VISA_KINDS = ("detector", "delay_generator")

log = logging.getLogger(__name__)


def _serial_modules() -> tuple[ModuleType, ModuleType] | None:
    """The serial controller and pty server modules, or None when they cannot be used here."""
    try:
        from . import pty_server, serial_controller
    except ImportError as exc:
        log.info("serial controller simulator not available (%s): serving everything over SCPI", exc)
        return None
    needed = [(serial_controller, "make_controller"), (serial_controller, "bench_options"), (pty_server, "PtyServer")]
    missing = [f"{m.__name__}.{a}" for m, a in needed if not hasattr(m, a)]
    if missing or os.name != "posix":
        log.warning("serial controller simulator unusable (%s): serving everything over SCPI",
                    ", ".join(missing) or "not a POSIX system")
        return None
    return serial_controller, pty_server


@dataclass(frozen=True)
class Endpoint:
    """Where one simulated instrument is served: its name, the driver to use and the transport address."""

    name: str
    driver: str
    address: str


class WireBench:
    """One virtual bench served on wires.

    Parameters
    ----------
    loaded:
        The validated configuration holding the bench (and optionally simulation and stream) sections.
    realtime:
        Pace the virtual clock to the wall clock (False: as fast as the CPU allows, ``--fast``).
    all_scpi:
        Serve the stage, chopper and shutter as SCPI devices too, not as the serial controller.
    latency_s:
        Per-message latency of every device, in s; None: :data:`DEFAULT_LATENCY_S` in real-time mode, 0
        in fast mode.
    seed:
        Seed of the simulation when its section gives none.

    Raises
    ------
    ConfigError
        If the bench section does not make a valid simulated bench (a bad calibration) or the latency is
        not a number of seconds in [0, 10].
    """

    def __init__(self, loaded: LoadedConfig, *, realtime: bool = True, all_scpi: bool = False,
                 latency_s: float | None = None, seed: int | None = None) -> None:
        if latency_s is not None and not (math.isfinite(latency_s) and 0.0 <= latency_s <= 10.0):
            raise ConfigError("latency must be a number of seconds in [0, 10]", file=loaded.path, key_path="latency",
                              value=latency_s)
        self.loaded = loaded
        self.realtime = realtime
        self.all_scpi = all_scpi
        simulation = loaded.simulation
        if seed is not None and simulation.seed is None:
            simulation = simulation.model_copy(update={"seed": seed})
        try:
            calibration = calibration_for(loaded.bench)
        except ConfigError as exc:
            raise ConfigError(exc.message, file=loaded.path, key_path=f"bench ({exc.key_path})", value=exc.value,
                              allowed=exc.allowed) from None
        self.settings: SimulationSettings = simulation
        self.calibration = calibration
        self.bench: VirtualBench | None = None
        self.lock = threading.Lock()
        if latency_s is not None:
            self.latency_s: dict[str, float] = {name: float(latency_s) for name in DEVICE_NAMES}
        else:
            self.latency_s = {name: (DEFAULT_LATENCY_S[name] if realtime else 0.0) for name in DEVICE_NAMES}
        self.devices: dict[str, BenchDevice] = {}
        self.servers: dict[str, ScpiTcpServer] = {}
        self.controllers: dict[str, Any] = {}
        self.pty_servers: dict[str, Any] = {}
        self.endpoints: dict[str, Endpoint] = {}
        self._serial_options: dict[str, dict[str, Any]] = {}
        self._started = False

    # -- life cycle ----------------------------------------------------------------------------------
    def start(self) -> "WireBench":
        """Build the virtual bench and start every server. Returns self.

        Raises
        ------
        TransportError
            If a socket or pseudo-terminal cannot be opened (everything started is stopped again).
        """
        if self._started:
            raise RuntimeError("the wire bench is already started")
        self._started = True
        try:
            self._start()
        except BaseException:
            self.stop()
            raise
        return self

    def _start(self) -> None:
        self.bench = VirtualBench(self.settings, self.calibration, realtime=self.realtime)
        serial = None if self.all_scpi else _serial_modules()
        scpi_names = DEVICE_NAMES if serial is None else tuple(n for n in DEVICE_NAMES if n not in SERIAL_KINDS)
        self.devices = make_devices(self.bench, names=scpi_names, lock=self.lock, latency_s=self.latency_s)
        for name in DEVICE_NAMES:
            if name in self.devices:
                server = ScpiTcpServer(self.devices[name])
                self.servers[name] = server
                server.start()
                address = server.visa_address if name in _VISA_KINDS else server.address
                self.endpoints[name] = Endpoint(name, "scpi", address)
            else:
                assert serial is not None
                controller_module, pty_module = serial
                controller = controller_module.make_controller(name, self.bench, lock=self.lock,
                                                               latency_s=self.latency_s[name])
                pty = pty_module.PtyServer(controller, name=name)
                self.controllers[name] = controller
                self.pty_servers[name] = pty
                try:
                    path = pty.start()
                except OSError as exc:
                    raise TransportError(f"cannot open a pseudo-terminal: {exc}", instrument=name) from None
                options = controller_module.bench_options(name, path)
                if not self.realtime:
                    # Fast mode: virtual time moves one command cost per status query, so a driver that
                    # paused between polls would wait on the wall clock for a move that is virtual.
                    options["poll_interval_s"] = 0.0
                self._serial_options[name] = options
                self.endpoints[name] = Endpoint(name, "template", f"serial://{path}")

    def stop(self) -> None:
        """Stop every server (joining its threads) and release the bench; safe to call twice."""
        for server in self.servers.values():
            server.request_stop()
        for server in self.servers.values():
            server.stop()
        for name, pty in list(self.pty_servers.items()):
            try:
                pty.stop()
            except RuntimeError as exc:
                log.warning("%s: %s", name, exc)
        if self.bench is not None:
            self.bench.close()

    def __enter__(self) -> "WireBench":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- faults and latency --------------------------------------------------------------------------
    def inject(self, name: str, fault: str, count: int = 1) -> None:
        """Arm a fault of instrument ``name`` for its next ``count`` replies.

        SCPI devices know ``no_reply``, ``garbled`` and ``disconnect``; the serial controller its own
        (see serial_controller.py). Raises ValueError for an unknown instrument or fault.
        """
        if name in self.devices:
            self.devices[name].faults.arm(fault, count)
        elif name in self.controllers:
            self.controllers[name].inject(fault, count)
        else:
            raise ValueError(f"no served instrument {name!r}; served: {', '.join(self.endpoints) or 'none'}")

    def set_latency(self, name: str, latency_s: float) -> None:
        """Set the per-message latency of instrument ``name``, in s. Raises ValueError."""
        if name in self.devices:
            self.devices[name].set_latency_s(latency_s)
        elif name in self.controllers:
            if not (math.isfinite(latency_s) and latency_s >= 0):
                raise ValueError(f"latency must be >= 0 s, got {latency_s!r}")
            self.controllers[name].latency_s = float(latency_s)
        else:
            raise ValueError(f"no served instrument {name!r}; served: {', '.join(self.endpoints) or 'none'}")

    # -- the bench file ------------------------------------------------------------------------------
    def _options(self, name: str) -> dict[str, Any]:
        if name in self._serial_options:
            return dict(self._serial_options[name])
        options: dict[str, Any] = {"address": self.endpoints[name].address}
        if name == "delay_axis" and self.realtime:
            # A pending *OPC? holds every later command on its connection, as on real instruments: poll
            # the moving state instead, so a stop is carried out at once.
            options["poll_interval_s"] = 0.01
        return options

    def config_document(self) -> dict[str, Any]:
        """The bench file as a TOML-ready dict: the original sections with drivers and addresses replaced."""
        if not self.endpoints:
            raise RuntimeError("start the wire bench first: the addresses are not known yet")
        loaded = self.loaded
        raw: dict[str, Any] = tomllib.loads(loaded.text) if loaded.text.strip() else {}
        bench = raw.get("bench")
        if bench is None:
            bench = loaded.bench.model_dump(mode="json", exclude_none=True) if loaded.config.bench else {}
        bench = dict(bench)
        kinds = [n for n in DEVICE_NAMES if n != "delay_generator" or loaded.bench.delay_generator is not None]
        for name in kinds:
            section = dict(bench.get(name, {}))
            section["driver"] = self.endpoints[name].driver
            section["options"] = self._options(name)
            bench[name] = section
        doc: dict[str, Any] = {"bench": bench}
        for key, model in (("stream", loaded.config.stream), ("simulation", loaded.config.simulation)):
            if key in raw:
                doc[key] = raw[key]
            elif model is not None:
                doc[key] = model.model_dump(mode="json", exclude_none=True)
        return doc

    def config_text(self) -> str:
        """The bench file's text (TOML)."""
        header = (f"Bench file written by `shotpair simulate` from {self.loaded.path}.\n"
                  "The addresses are those of the running simulators: valid only while it runs.")
        return dumps_toml(self.config_document(), comment=header)

    def write_config(self, path: str | os.PathLike[str]) -> Path:
        """Write :meth:`config_text` to ``path`` (replaced atomically). Raises StorageError."""
        target = Path(path)
        tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
        try:
            tmp.write_text(self.config_text(), encoding="utf-8")
            os.replace(tmp, target)
        except OSError as exc:
            try:
                tmp.unlink()
            except OSError:
                pass
            raise StorageError(f"cannot write the bench file ({exc.strerror or exc})", path=str(target)) from None
        return target

    def describe(self) -> list[str]:
        """One line per served instrument: name, driver, address."""
        return [f"{e.name:<16} {e.driver:<9} {e.address}" for e in self.endpoints.values()]


# -- a small TOML writer ------------------------------------------------------------------------------

_BARE_KEY_RE = re.compile(r"[A-Za-z0-9_-]+")
_ESCAPES = {"\\": "\\\\", '"': '\\"', "\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r"}


def _string(text: str) -> str:
    out = []
    for c in text:
        if c in _ESCAPES:
            out.append(_ESCAPES[c])
        elif ord(c) < 0x20 or ord(c) == 0x7F:
            out.append(f"\\u{ord(c):04X}")
        else:
            out.append(c)
    return '"' + "".join(out) + '"'


def _key(key: object) -> str:
    if not isinstance(key, str):
        raise TypeError(f"TOML keys are strings, got {key!r}")
    return key if _BARE_KEY_RE.fullmatch(key) else _string(key)


def _value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, (datetime.datetime, datetime.date, datetime.time)):
        return value.isoformat()
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_value(v) for v in value if v is not None) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{_key(k)} = {_value(v)}" for k, v in value.items() if v is not None) + "}"
    raise TypeError(f"cannot write a {type(value).__name__} to TOML: {value!r}")


def dumps_toml(document: Mapping[str, Any], *, comment: str = "") -> str:
    """Write a dict as TOML text that :func:`tomllib.loads` reads back equal.

    Nested dicts become ``[tables]`` (lists of dicts: inline tables), None values are left out (TOML has
    no null), tuples are written as arrays. ``comment`` lines go first, each prefixed with ``#``.

    Raises
    ------
    TypeError
        For a value TOML cannot hold or a non-string key.
    """
    lines = [f"# {line}".rstrip() for line in comment.splitlines()]
    if lines:
        lines.append("")

    def table(path: list[str], data: Mapping[str, Any]) -> None:
        scalars = [(k, v) for k, v in data.items() if v is not None and not isinstance(v, Mapping)]
        tables = [(k, v) for k, v in data.items() if isinstance(v, Mapping)]
        if path and (scalars or not tables):
            lines.append("[" + ".".join(_key(p) for p in path) + "]")
        for k, v in scalars:
            lines.append(f"{_key(k)} = {_value(v)}")
        if path and (scalars or not tables):
            lines.append("")
        for k, v in tables:
            table(path + [k], v)

    table([], document)
    while lines and not lines[-1]:
        lines.pop()
    return "\n".join(lines) + "\n"
