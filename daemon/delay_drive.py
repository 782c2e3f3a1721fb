"""Go to a delay point with whichever axis the scan uses: the delay stage or the delay generator.

The runner asks for grid point ``index`` and gets back what the file records for it (stage read-back in mm,
generator read-back in ps, and the delay those correspond to). With the generator, the stage first waits
at time zero so the generator's delay is the whole delay. This module moves instruments only when the
runner calls it, and only to positions the plan has already checked.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

from shotpair.drivers.errors import ConfigError

from .bench import Bench
from .plan import ScanPlan

__all__ = ["AXIS_KINDS", "Readback", "DelayDrive"]

#: What the output file's ``delay_axis_kind`` says for each scan axis.
AXIS_KINDS = {"stage": "optical delay line", "generator": "electronic delay generator"}


@dataclass(frozen=True)
class Readback:
    """Where the delay axis ended up for one point."""

    position_mm: float
    generator_ps: float
    delay_ps: float


class DelayDrive:
    """Moves the scan's delay axis through the plan's points."""

    def __init__(self, bench: Bench, plan: ScanPlan) -> None:
        self.bench = bench
        self.plan = plan
        if plan.axis == "generator" and bench.delay_generator is None:
            raise ConfigError("the scan asks for the delay generator but the bench has none", key_path="scan.axis",
                              value=plan.axis)
        self._settle = threading.Event()  # never set: waiting on it is the generator's settling time

    @property
    def kind(self) -> str:
        return AXIS_KINDS[self.plan.axis]

    def prepare(self) -> None:
        """Home the stage when configured; for a generator scan, park the stage at time zero."""
        b, s = self.bench, self.bench.settings.delay_axis
        if s.home_before_scan and not b.delay_axis.is_homed:
            b.delay_axis.home(timeout_s=s.settle_timeout_s)
        if self.plan.axis == "generator":
            b.delay_axis.move_to_mm(s.time_zero_mm)
            self._parked_mm = b.delay_axis.wait_settled(timeout_s=s.settle_timeout_s)

    def go(self, index: int) -> Readback:
        """Set grid point ``index`` and wait until the axis is there; returns the read-back."""
        b, s = self.bench, self.bench.settings
        line = s.delay_axis.delay_line()
        if self.plan.axis == "stage":
            b.delay_axis.move_to_mm(float(self.plan.positions_mm[index]))
            readback = b.delay_axis.wait_settled(timeout_s=s.delay_axis.settle_timeout_s)
            return Readback(readback, float("nan"), float(line.delay_ps(readback)))
        gen, gs = b.delay_generator, s.delay_generator
        assert gen is not None and gs is not None and self.plan.generator_settings_ps is not None
        gen.set_delay_ps(float(self.plan.generator_settings_ps[index]))
        if gs.settle_s > 0:
            self._settle.wait(gs.settle_s)
        setting = gen.delay_ps()
        stage_ps = float(line.delay_ps(self._parked_mm))
        return Readback(self._parked_mm, setting, stage_ps + setting - gs.time_zero_ps)
