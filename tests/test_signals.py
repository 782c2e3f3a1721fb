"""Signals and unexpected errors during `shotpair run`, checked against the simulated bench's own state.

The scan runs in a subprocess (`shotpair run --fast`) through the real drivers against wire simulators
served by this test process (WireBench: the spectrometer over pyvisa-py, stage, chopper and shutter as
the serial controller on pseudo-terminals), so after the subprocess has gone the test reads the shutter
and the stage from the simulated bench itself. Each exit must leave the shutter closed, the stage
stopped, the file marked aborted with the reason, and a non-zero exit status.
"""

from __future__ import annotations

import os
import queue
import re
import signal
import subprocess
import sys
import threading
from pathlib import Path
from typing import Iterator

import h5py
import pytest
from conftest import SMALL_SCAN

from shotpair.daemon.config import load_config
from shotpair.simulators.wire.launcher import WireBench, dumps_toml

TIMEOUT_S = 60.0
PROGRESS = re.compile(r"^sweep \d+ point \d+ \[")
#: A registered detector driver that wraps the scpi one and raises a plain RuntimeError (a bug, not an
#: instrument error) on its AT-th read; the CLI is then run in the same process.
BROKEN_DRIVER = """
import sys
from shotpair.drivers import registry
from shotpair.drivers.scpi_devices import make_detector

AT = int(sys.argv[1])

def broken(name, options, context):
    det = make_detector(name, options, context)
    real, calls = det.acquire, [0]
    def acquire(n_shots, timeout_s):
        calls[0] += 1
        if calls[0] == AT:
            raise RuntimeError("a bug in a driver (simulated)")
        return real(n_shots, timeout_s)
    det.acquire = acquire
    return det

registry.register("detector", "broken-scpi", broken)
from shotpair.daemon.cli import main
sys.exit(main(sys.argv[2:]))
"""


@pytest.fixture
def wire_scan(tmp_path: Path) -> Iterator[tuple[Path, WireBench]]:
    """(scan file, running WireBench): 23 delays x 50 sweeps x 400 shots, far longer than the tests wait."""
    text = SMALL_SCAN.format(noise="dropped_frames = false", detector_extra="", chopped="false", shots=400, seed=3,
                             output=str(tmp_path / "long.h5")).replace("sweeps = 2\n", "sweeps = 50\n")
    scan = tmp_path / "long.toml"
    scan.write_text(text)
    with WireBench(load_config(scan), realtime=False) as wb:
        yield scan, wb


class Run:
    """A `shotpair run` subprocess whose stderr lines are collected by a thread (the test waits on them)."""

    def __init__(self, args: list[str], cwd: Path) -> None:
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        self.proc = subprocess.Popen([sys.executable, *args], cwd=cwd, env=env, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, text=True)
        self.lines: queue.Queue[str | None] = queue.Queue()
        self.seen: list[str] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stderr is not None
        for line in self.proc.stderr:
            self.lines.put(line.rstrip("\n"))
        self.lines.put(None)

    def wait_line(self, pattern: re.Pattern[str]) -> str:
        while True:
            line = self.lines.get(timeout=TIMEOUT_S)
            assert line is not None, "shotpair exited first:\n" + "\n".join(self.seen)
            self.seen.append(line)
            if pattern.search(line):
                return line

    def finish(self) -> tuple[int, str]:
        rc = self.proc.wait(timeout=TIMEOUT_S)
        self._reader.join(TIMEOUT_S)
        while (line := self.lines.get_nowait()) is not None:
            self.seen.append(line)
        return rc, "\n".join(self.seen)

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(TIMEOUT_S)


def run_args(scan: Path, bench: Path, output: Path) -> list[str]:
    return ["run", str(scan), "--bench", str(bench), "--fast", "-o", str(output),
            "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"]


def assert_bench_safe(wb: WireBench) -> None:
    vb = wb.bench
    assert vb is not None
    assert vb.shutter_open is False
    assert not vb.stage.is_moving(vb.now_s())


def file_state(path: Path) -> tuple[str, str, int, int]:
    with h5py.File(path, "r") as f:
        e = f["entry"]
        done = e["sweeps/completed"][()]
        return e["state"][()].decode(), e["state_reason"][()].decode(), int(done.sum()), int(done.size)


@pytest.mark.parametrize("signum, reason", [(signal.SIGINT, "interrupted by the user (Ctrl-C)"),
                                            (signal.SIGTERM, "stopped by SIGTERM")], ids=["SIGINT", "SIGTERM"])
def test_a_signal_mid_scan_stops_safely(wire_scan, tmp_path, signum, reason):
    scan, wb = wire_scan
    bench = wb.write_config(tmp_path / "wire-bench.toml")
    output = tmp_path / "signalled.h5"
    run = Run(["-m", "shotpair.daemon.cli", *run_args(scan, bench, output)], tmp_path)
    try:
        run.wait_line(PROGRESS)  # a point is saved: the scan is under way
        assert wb.bench is not None and wb.bench.shutter_open  # open now, so the checks below can fail
        run.proc.send_signal(signum)
        rc, stderr = run.finish()
    finally:
        run.kill()
    assert rc == 130, stderr
    assert "interrupted: stopping safely" in stderr and f"scan aborted ({reason})" in stderr
    assert "Traceback" not in stderr
    assert_bench_safe(wb)
    state, why, done, total = file_state(output)
    assert (state, why) == ("aborted", reason)
    assert 1 <= done < total  # what was measured is kept, the rest was not pretended


def test_an_unexpected_error_in_the_runner_stops_safely_and_is_reported(wire_scan, tmp_path):
    scan, wb = wire_scan
    doc = wb.config_document()
    doc["bench"]["detector"]["driver"] = "broken-scpi"
    bench = tmp_path / "broken-bench.toml"
    bench.write_text(dumps_toml(doc))
    output = tmp_path / "bug.h5"
    script = tmp_path / "run_broken.py"
    script.write_text(BROKEN_DRIVER)
    # read 1 is the dark, reads 2-4 points 1-3: the bug strikes in point 4 with the shutter open
    run = Run([str(script), "5", *run_args(scan, bench, output)], tmp_path)
    try:
        rc, stderr = run.finish()
    finally:
        run.kill()
    assert rc == 1, stderr
    reason = "internal error: RuntimeError: a bug in a driver (simulated)"
    assert f"error: {reason}" in stderr and f"scan aborted ({reason})" in stderr
    assert_bench_safe(wb)
    assert file_state(output) == ("aborted", reason, 3, 23 * 50)
