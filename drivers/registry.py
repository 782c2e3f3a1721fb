"""Find the driver class for an instrument by kind and driver name.

Built-in drivers are listed here as dotted paths and imported only when used; third-party packages add
their own through the ``shotpair.drivers`` entry-point group (name ``<kind>.<driver>``, value
``module:factory``). A factory is called as ``factory(name, options, context)`` and returns an
:class:`~shotpair.drivers.base.Instrument` of the right kind. No instrument is touched here.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from importlib.metadata import entry_points
from typing import Any, Callable, Mapping

from .base import Chopper, DelayAxis, DelayGenerator, Detector, Instrument, Shutter
from .errors import ConfigError

__all__ = ["KINDS", "DriverContext", "available", "create", "register"]

#: Instrument kinds and the interface each driver of that kind must implement.
KINDS: dict[str, type[Instrument]] = {
    "delay_axis": DelayAxis,
    "chopper": Chopper,
    "shutter": Shutter,
    "detector": Detector,
    "delay_generator": DelayGenerator,
}

ENTRY_POINT_GROUP = "shotpair.drivers"

Factory = Callable[[str, Mapping[str, Any], "DriverContext"], Instrument]

_BUILTIN: dict[tuple[str, str], str] = {
    ("delay_axis", "sim"): "shotpair.simulators.instruments:make_delay_axis",
    ("chopper", "sim"): "shotpair.simulators.instruments:make_chopper",
    ("shutter", "sim"): "shotpair.simulators.instruments:make_shutter",
    ("detector", "sim"): "shotpair.simulators.instruments:make_detector",
    ("delay_generator", "sim"): "shotpair.simulators.instruments:make_delay_generator",
    # Real drivers: SCPI instruments (any transport, usually VISA) and ASCII serial controllers
    # described by command templates in the bench file.
    ("delay_axis", "scpi"): "shotpair.drivers.scpi_devices:make_delay_axis",
    ("chopper", "scpi"): "shotpair.drivers.scpi_devices:make_chopper",
    ("shutter", "scpi"): "shotpair.drivers.scpi_devices:make_shutter",
    ("detector", "scpi"): "shotpair.drivers.scpi_devices:make_detector",
    ("delay_generator", "scpi"): "shotpair.drivers.scpi_devices:make_delay_generator",
    ("delay_axis", "template"): "shotpair.drivers.template_devices:make_delay_axis",
    ("chopper", "template"): "shotpair.drivers.template_devices:make_chopper",
    ("shutter", "template"): "shotpair.drivers.template_devices:make_shutter",
}

_registered: dict[tuple[str, str], Factory] = {}


@dataclass
class DriverContext:
    """What a driver factory may need beyond its own options.

    ``bench_settings`` is the validated bench section (calibrations); ``simulation`` is the shared
    virtual bench when simulated drivers are in use, else None.
    """

    bench_settings: Any = None
    simulation: Any = None


def register(kind: str, driver: str, factory: Factory) -> None:
    """Register a driver factory under a kind and name (used by tests and by plugins at import)."""
    if kind not in KINDS:
        raise ValueError(f"unknown instrument kind {kind!r}; kinds: {', '.join(KINDS)}")
    _registered[(kind, driver)] = factory


def _plugin_paths() -> dict[tuple[str, str], str]:
    found: dict[tuple[str, str], str] = {}
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        kind, _, driver = ep.name.partition(".")
        if kind in KINDS and driver:
            found[(kind, driver)] = ep.value
    return found


def available(kind: str) -> list[str]:
    """Names of the drivers known for a kind (built-in, registered and plugins)."""
    keys = set(_BUILTIN) | set(_registered) | set(_plugin_paths())
    return sorted(d for k, d in keys if k == kind)


def _load(path: str) -> Factory:
    module, _, attr = path.partition(":")
    return getattr(importlib.import_module(module), attr)


def create(kind: str, driver: str, name: str, options: Mapping[str, Any], context: DriverContext) -> Instrument:
    """Build (but do not connect) the instrument ``name`` of ``kind`` with driver ``driver``.

    Raises ConfigError when no such driver exists or the driver does not implement the kind's interface.
    """
    key = (kind, driver)
    factory = _registered.get(key)
    if factory is None:
        path = _BUILTIN.get(key) or _plugin_paths().get(key)
        if path is None:
            raise ConfigError("unknown driver", key_path=f"bench.{name}.driver", value=driver,
                              allowed=", ".join(available(kind)) or "none")
        factory = _load(path)
    instrument = factory(name, options, context)
    if not isinstance(instrument, KINDS[kind]):
        raise ConfigError(f"driver does not implement {KINDS[kind].__name__}", key_path=f"bench.{name}.driver",
                          value=driver)
    return instrument
