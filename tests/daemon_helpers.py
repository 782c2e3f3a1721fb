"""Start a `shotpair serve` subprocess on free 127.0.0.1 ports and stop it again (shared by daemon tests)."""

from __future__ import annotations

import queue
import re
import subprocess
import sys
import threading
from pathlib import Path

from shotpair.daemon.client import ControlClient
from shotpair.drivers.errors import ShotpairError

SERVE_TIMEOUT_S = 60.0
PIXELS = 2048

BENCH = """
[bench]
name = "test bench"
dark_shots = 200

[bench.detector]
pixels = 2048
wavelength_poly_nm = [420.0, 0.146556]
block_shots = 100

[stream]
status_interval_s = 0.2
send_high_water_mark = 10
send_buffer_bytes = 65536

[simulation]
seed = 5
"""

SCAN = """
[scan]
title = "daemon test"
shots_per_point = {shots}
sweeps = {sweeps}
output = "{output}"

[[scan.delays]]
kind = "linear"
start_ps = -1.0
stop_ps = 1.0
step_ps = {step}
"""


class Served:
    """A running daemon: its process, endpoints and the rest of its stdout."""

    def __init__(self, config: Path, fast: bool) -> None:
        args = [sys.executable, "-m", "shotpair.daemon.cli", "serve", str(config), "--data", "tcp://127.0.0.1:*",
                "--control", "tcp://127.0.0.1:*"] + (["--fast"] if fast else [])
        self.proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                     cwd=config.parent)
        self.lines: queue.Queue[str] = queue.Queue()
        threading.Thread(target=self._pump, daemon=True).start()
        try:
            first = self.lines.get(timeout=SERVE_TIMEOUT_S)
        except queue.Empty:
            self.proc.kill()
            raise AssertionError("the daemon did not start: " + self.proc.stderr.read()) from None
        m = re.search(r"data (\S+), control (\S+)", first)
        assert m, first
        self.data, self.control = m.group(1), m.group(2)

    def _pump(self) -> None:
        for line in self.proc.stdout:  # type: ignore[union-attr]
            self.lines.put(line)

    def stop(self) -> None:
        """Ask the daemon to shut down (it leaves the bench safe); kill it if it does not go in time."""
        if self.proc.poll() is None:
            try:
                with ControlClient(self.control, timeout_s=3.0) as c:
                    c.shutdown()
                self.proc.wait(timeout=15)
            except (ShotpairError, subprocess.TimeoutExpired):
                self.proc.kill()
                self.proc.wait(timeout=SERVE_TIMEOUT_S)
        for pipe in (self.proc.stdout, self.proc.stderr):
            if pipe is not None:
                pipe.close()


def write_bench(tmp_path: Path) -> Path:
    p = tmp_path / "bench.toml"
    p.write_text(BENCH)
    return p


def write_scan(tmp_path: Path, name: str, shots: int = 200, sweeps: int = 1, step: float = 0.25) -> Path:
    p = tmp_path / f"{name}.toml"
    p.write_text(SCAN.format(shots=shots, sweeps=sweeps, step=step, output=str(tmp_path / f"{name}.h5")))
    return p
