"""Shared fixtures: small scan configurations on the simulated bench."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

SMALL_SCAN = """
[bench]
dark_shots = 500

[bench.detector]
pixels = 256
wavelength_poly_nm = [420.0, 1.176470588]   # 420-720 nm
{detector_extra}

[scan]
shots_per_point = {shots}
sweeps = 2
output = "{output}"

[[scan.delays]]
kind = "list"
delays_ps = [-6.0, -4.0]

[[scan.delays]]
kind = "linear"
start_ps = -1.0
stop_ps = 2.0
step_ps = 0.25

[[scan.delays]]
kind = "log"
start_ps = 3.0
stop_ps = 1500.0
points = 8

[simulation]
seed = {seed}

[simulation.probe]
chopped = {chopped}

[simulation.noise]
{noise}
"""


@pytest.fixture
def small_scan(tmp_path: Path):
    """Write a small scan config; returns a function(**options) -> path of the TOML file."""

    def make(*, noise: str = "", detector_extra: str = "", chopped: bool = False, shots: int = 400, seed: int = 3,
             name: str = "scan") -> Path:
        text = SMALL_SCAN.format(noise=textwrap.dedent(noise), detector_extra=detector_extra,
                                 chopped=str(chopped).lower(), shots=shots, seed=seed,
                                 output=str(tmp_path / f"{name}.h5"))
        path = tmp_path / f"{name}.toml"
        path.write_text(text)
        return path

    return make


# Property tests explore new examples on every local run; CI (.ci/run sets SHOTPAIR_CI=1) uses a fixed
# seed per test, so a submission's result does not depend on the draw. Hypothesis documents both
# settings (`derandomize`, `print_blob`).
import os as _os

from hypothesis import settings as _hyp_settings

_hyp_settings.register_profile("ci", derandomize=True, print_blob=True)
if _os.environ.get("SHOTPAIR_CI"):
    _hyp_settings.load_profile("ci")
