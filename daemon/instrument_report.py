"""`shotpair check`'s instrument part: connect each instrument of a bench, report who answers and its state.

Connecting only asks (identity, state, limits); nothing moves, no shutter opens. Every instrument is tried
even when an earlier one fails, so one run shows the whole bench. This module prints nothing itself.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from shotpair.drivers.errors import ShotpairError

from .bench import Bench

__all__ = ["InstrumentReport", "probe_instruments", "format_report"]


@dataclass
class InstrumentReport:
    """What one instrument said when asked."""

    name: str
    driver: str
    identity: str = ""
    state: dict[str, Any] = field(default_factory=dict)
    error: str = ""

    @property
    def ok(self) -> bool:
        return not self.error


def probe_instruments(bench: Bench) -> list[InstrumentReport]:
    """Connect, ask identity and state, disconnect, for every instrument; never raises a ShotpairError."""
    reports: list[InstrumentReport] = []
    sections = bench.settings.instrument_sections()
    for name, inst in bench.instruments().items():
        rep = InstrumentReport(name, sections[name].driver)
        try:
            inst.connect()
            try:
                rep.identity = inst.identity()
                rep.state = dict(inst.state())
                if name == "detector" and inst.pixels != bench.settings.detector.pixels:  # type: ignore[attr-defined]
                    rep.error = (f"reports {inst.pixels} pixels but bench.detector.pixels = "  # type: ignore[attr-defined]
                                 f"{bench.settings.detector.pixels}")
            finally:
                inst.disconnect()
        except ShotpairError as exc:
            rep.error = str(exc)
        except OSError as exc:
            rep.error = f"cannot connect ({exc})"
        reports.append(rep)
    return reports


def _value(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    return str(v)


def format_report(reports: list[InstrumentReport]) -> str:
    """One block per instrument: name, driver, identity or error, then its state as key = value."""
    lines = []
    width = max((len(r.name) for r in reports), default=0)
    for r in reports:
        head = f"{r.name:<{width}}  [{r.driver}]  "
        if r.ok:
            lines.append(head + r.identity)
            if r.state:
                lines.append(" " * (width + 2) + "  " + ", ".join(f"{k} = {_value(v)}" for k, v in r.state.items()))
        else:
            lines.append(head + f"NOT READY: {r.error}")
    return "\n".join(lines)
