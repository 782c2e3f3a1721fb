"""`shotpair simulate` and the WireBench behind it: the written bench file loads, keeps the original
calibration, drives the real drivers, and the command stops cleanly on SIGINT/SIGTERM.

References: tomllib (the standard library's TOML reader) judges the TOML writer; daemon.config.load_config
judges the written file; the real ``scpi`` and ``template`` drivers judge the served wires. Every
blocking call has a timeout; the subprocess is waited for by reading its stdout, never by sleeping.
"""

from __future__ import annotations

import argparse
import math
import queue
import signal
import socket
import subprocess
import sys
import threading
import tomllib
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shotpair.daemon.bench import build_bench
from shotpair.daemon.config import load_config
from shotpair.daemon.simulate_cmd import add_simulate_command, main
from shotpair.drivers.errors import LimitError
from shotpair.simulators.wire.launcher import WireBench, dumps_toml

START_TIMEOUT_S = 60.0
STOP_TIMEOUT_S = 20.0

BENCH = """
# a small bench for the wire tests
[bench]
name = "wire test bench"
repetition_rate_hz = 2000.0
dark_shots = 100

[bench.delay_axis]
driver = "sim"
passes = 2
time_zero_mm = 12.5
travel_mm = [0.0, 100.0]

[bench.chopper]
driver = "sim"
phase_deg = 0.0

[bench.shutter]
driver = "sim"

[bench.detector]
driver = "sim"
pixels = 64
gain_e_per_count = 3.5
read_noise_e = 10.0
wavelength_poly_nm = [420.0, 4.6875]
block_shots = 200

[bench.delay_generator]
driver = "sim"
time_zero_ps = 5000.0
range_ps = [0.0, 1.0e9]

[stream]
status_interval_s = 0.5

[simulation]
seed = 17

[simulation.stage]
velocity_mm_per_s = 200.0
settle_s = 0.01

[[simulation.sample.species]]
name = "A"
bands = [{ centre_nm = 500.0, width_nm = 40.0, amplitude_od = 0.2 }]

[[simulation.sample.steps]]
from_species = "A"
lifetime_ps = 100.0

[simulation.sample.pumped]
A = 1.0
"""


def _ask(port: int, message: bytes, timeout_s: float = 5.0) -> bytes:
    """Send one message on a fresh connection and read one reply line (every read has a timeout)."""
    with socket.create_connection(("127.0.0.1", port), timeout=timeout_s) as s:
        s.settimeout(timeout_s)
        s.sendall(message)
        reply = b""
        while not reply.endswith(b"\n"):
            chunk = s.recv(4096)
            assert chunk, f"connection closed after {reply!r}"
            reply += chunk
        return reply


@pytest.fixture
def bench_file(tmp_path: Path) -> Path:
    path = tmp_path / "bench.toml"
    path.write_text(BENCH)
    return path


@pytest.fixture
def wire_bench(bench_file: Path) -> Iterator[WireBench]:
    made: list[WireBench] = []

    def factory(**kw: object) -> WireBench:
        wb = WireBench(load_config(bench_file), realtime=False, **kw).start()  # type: ignore[arg-type]
        made.append(wb)
        return wb

    yield factory  # type: ignore[misc]
    for wb in made:
        wb.stop()


# --------------------------------------------------------------------------------------------------
# The written bench file
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("all_scpi", [True, False])
def test_written_config_loads_and_keeps_the_calibration(wire_bench, bench_file: Path, tmp_path: Path,
                                                        all_scpi: bool) -> None:
    wb = wire_bench(all_scpi=all_scpi)
    out = wb.write_config(tmp_path / "wire.toml")
    loaded = load_config(out)  # the project's own reader accepts it
    original = tomllib.loads(BENCH)
    written = tomllib.loads(out.read_text())
    # Every key of the original bench section is there with its value, except driver and options.
    for name, section in original["bench"].items():
        if isinstance(section, dict):
            kept = {k: v for k, v in written["bench"][name].items() if k not in ("driver", "options")}
            assert kept == {k: v for k, v in section.items() if k != "driver"}, name
        else:
            assert written["bench"][name] == section
    assert written["simulation"] == original["simulation"]
    assert written["stream"] == original["stream"]
    assert "scan" not in written
    drivers = {name: getattr(loaded.bench, name).driver for name in
               ("delay_axis", "chopper", "shutter", "detector", "delay_generator")}
    serial = "scpi" if all_scpi else "template"
    assert drivers == {"delay_axis": serial, "chopper": serial, "shutter": serial, "detector": "scpi",
                       "delay_generator": "scpi"}
    assert loaded.bench.detector.options["address"].startswith("visa://TCPIP0::127.0.0.1::")
    assert loaded.bench.detector.options["address"].endswith("::SOCKET")
    stage_address = loaded.bench.delay_axis.options["address"]
    assert stage_address.startswith("tcp://127.0.0.1:" if all_scpi else "serial:///dev/")
    assert loaded.config.simulation is not None and loaded.config.simulation.seed == 17


@pytest.mark.parametrize("all_scpi", [True, False])
def test_written_config_drives_the_real_drivers(wire_bench, tmp_path: Path, all_scpi: bool) -> None:
    wb = wire_bench(all_scpi=all_scpi)
    loaded = load_config(wb.write_config(tmp_path / "wire.toml"))
    bench = build_bench(loaded.bench, loaded.config.simulation, realtime=False, config_path=loaded.path)
    bench.connect()
    try:
        axis = bench.delay_axis
        axis.home(timeout_s=10.0)
        axis.move_to_mm(40.0)
        assert axis.wait_settled(timeout_s=10.0) == pytest.approx(40.0, abs=1e-3)
        assert wb.bench.position_mm() == pytest.approx(40.0, abs=1e-3)  # the one shared virtual bench moved
        with pytest.raises(LimitError):
            axis.move_to_mm(100.5)
        bench.shutter.open()
        assert wb.bench.shutter_open is True
        assert bench.chopper.is_locked() and bench.chopper.frequency_hz() == pytest.approx(1000.0)
        bench.delay_generator.set_delay_ps(2.0e6)
        assert wb.bench.generator_setting_ps == pytest.approx(2.0e6, rel=1e-12)
        block = bench.detector.acquire(300, timeout_s=10.0)
        assert block.pixels == 64 and 290 <= block.n_shots <= 300
        assert int(block.pump_on.sum()) in range(block.n_shots // 2 - 5, block.n_shots // 2 + 6)
    finally:
        bench.make_safe()
        bench.disconnect()
    assert wb.bench.shutter_open is False


def test_inject_by_name_and_unknown_names(wire_bench) -> None:
    wb = wire_bench(all_scpi=True)
    wb.inject("detector", "garbled", 2)
    assert wb.devices["detector"].faults.counts()["garbled"] == 2
    with pytest.raises(ValueError):
        wb.inject("laser", "no_reply")
    with pytest.raises(ValueError):
        wb.inject("chopper", "explode")
    wb.set_latency("shutter", 0.02)
    assert _ask(wb.servers["shutter"].port, b"SIM:LAT?\n") == b"0.02\n"


# --------------------------------------------------------------------------------------------------
# The TOML writer, judged by tomllib
# --------------------------------------------------------------------------------------------------


def test_toml_writer_escapes_and_nests() -> None:
    doc = {
        "title": 'a "quoted" \\ back\\slash\r\n\ttab \x01 \x7f é µs',
        "pattern": r"AT (?P<position_mm>[-+0-9.eE]+)\s*",
        "numbers": [1, -2, 3.5, 1e-300, 2.5e16, True],
        "weird key.with dots": {"x y": 1},
        "a": {"b": {"c": {"d": "deep"}}, "list": [{"name": "S1", "bands": [{"amp": -0.3}]}]},
        "empty": {},
        "none_left_out": None,
    }
    text = dumps_toml(doc, comment="first line\nsecond line")
    assert text.startswith("# first line\n# second line\n")
    back = tomllib.loads(text)
    expected = {k: v for k, v in doc.items() if v is not None}
    assert back == expected
    special = tomllib.loads(dumps_toml({"x": math.inf, "y": -math.inf, "z": math.nan}))
    assert special["x"] == math.inf and special["y"] == -math.inf and math.isnan(special["z"])
    with pytest.raises(TypeError):
        dumps_toml({"x": object()})


_keys = st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=8)
_scalars = (st.integers(-2**63, 2**63 - 1) | st.floats(allow_nan=False) | st.booleans()
            | st.text(st.characters(blacklist_categories=("Cs",)), max_size=20))
_values = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=4)
                       | st.dictionaries(_keys, inner, max_size=4), max_leaves=20)


@settings(max_examples=80, deadline=None)
@given(st.dictionaries(_keys, _values, max_size=6))
def test_toml_writer_round_trips_through_tomllib(doc: dict) -> None:
    assert tomllib.loads(dumps_toml(doc)) == doc


# --------------------------------------------------------------------------------------------------
# The command
# --------------------------------------------------------------------------------------------------


def test_add_simulate_command_parses_its_options() -> None:
    parser = argparse.ArgumentParser()
    add_simulate_command(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["simulate", "b.toml", "--write-config", "o.toml", "--fast", "--latency-ms", "2.5"])
    assert (args.bench, args.write_config, args.fast, args.all_scpi, args.latency_ms) == \
        ("b.toml", "o.toml", True, False, 2.5)
    assert callable(args.func)


@pytest.mark.parametrize("case", ["missing", "bad_key", "no_bench", "same_file", "latency"])
def test_user_mistakes_give_one_line_and_exit_2(case: str, bench_file: Path, tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    bench, out, extra = str(bench_file), str(tmp_path / "out.toml"), []
    if case == "missing":
        bench = str(tmp_path / "nope.toml")
    elif case == "bad_key":
        bench_file.write_text(BENCH.replace("passes = 2", "pases = 2"))
    elif case == "no_bench":
        bench_file.write_text("[simulation]\nseed = 1\n")
    elif case == "same_file":
        out = bench
    else:
        extra = ["--latency-ms", "-3"]
    code = main(["simulate", bench, "--write-config", out, "--fast", *extra])
    captured = capsys.readouterr()
    assert code == 2
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("shotpair: error: "), captured.err
    assert "Traceback" not in captured.err and captured.out == ""
    assert case == "same_file" or not (tmp_path / "out.toml").exists()
    if case == "same_file":
        assert bench_file.read_text() == BENCH  # the bench file is untouched


class _Process:
    """`shotpair simulate` in a subprocess, its stdout read line by line by a thread."""

    def __init__(self, args: list[str], cwd: Path) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.simulate_cmd", *args], cwd=cwd,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        self.lines: queue.Queue[str | None] = queue.Queue()
        self._reader = threading.Thread(target=self._pump, daemon=True)
        self._reader.start()

    def _pump(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.put(line.rstrip("\n"))
        self.lines.put(None)

    def until_ready(self) -> list[str]:
        seen: list[str] = []
        while True:
            try:
                line = self.lines.get(timeout=START_TIMEOUT_S)
            except queue.Empty:
                raise AssertionError(f"no ready line within {START_TIMEOUT_S} s; saw {seen}") from None
            if line is None:
                raise AssertionError(f"exited before ready: {seen} {self.proc.stderr.read()}")  # type: ignore[union-attr]
            seen.append(line)
            if line.startswith("ready: "):
                return seen

    def rest(self) -> list[str]:
        out: list[str] = []
        while (line := self.lines.get(timeout=STOP_TIMEOUT_S)) is not None:
            out.append(line)
        return out

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(timeout=STOP_TIMEOUT_S)
        self._reader.join(STOP_TIMEOUT_S)
        for pipe in (self.proc.stdout, self.proc.stderr):
            if pipe is not None:
                pipe.close()


@pytest.mark.parametrize("signum, options", [(signal.SIGTERM, []), (signal.SIGINT, ["--all-scpi"])])
def test_simulate_serves_until_a_signal(bench_file: Path, tmp_path: Path, signum: int, options: list[str]) -> None:
    out = tmp_path / "wire.toml"
    p = _Process(["simulate", str(bench_file), "--write-config", str(out), "--fast", *options], tmp_path)
    try:
        lines = p.until_ready()
        assert lines[-1] == f"ready: {out}"
        listed = dict(line.split()[0::2] for line in lines[:-1])  # name -> address
        assert set(listed) == {"delay_axis", "chopper", "shutter", "detector", "delay_generator"}
        loaded = load_config(out)
        assert loaded.bench.detector.options["address"] == listed["detector"]
        port = int(listed["delay_generator"].split("::")[2])
        assert _ask(port, b"DEL:LIM?\n") == b"0.0,0.001\n"  # range_ps [0, 1e9] ps = 0 to 1 ms
        p.proc.send_signal(signum)
        assert p.proc.wait(timeout=STOP_TIMEOUT_S) == 0
        assert p.rest() == ["simulators stopped"]
        stderr = p.proc.stderr.read()  # type: ignore[union-attr]
        assert "Traceback" not in stderr, stderr
    finally:
        p.close()
