"""The simulated bench of shotpair: one shared physical model and virtual clock, and simulated instruments.

Lets the whole acquisition chain run without laser time: a transient-absorption sample with kinetics,
instrument response and chirp; a laser with fluctuation, drift and misfires; a detector with photon and
read noise, dark pattern, quantisation, saturation and dropped frames; a stage, chopper and shutter.
Nothing here touches real hardware.
"""

from .bench import BenchCalibration, VirtualBench
from .clock import VirtualClock
from .settings import SimulationSettings

__all__ = ["BenchCalibration", "VirtualBench", "VirtualClock", "SimulationSettings"]
