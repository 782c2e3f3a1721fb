"""`shotpair check`: validates, plans, then asks every instrument who it is and how it is, moving nothing.

A driver that cannot connect is reported as NOT READY with its error while the others are still asked;
the exit code is then 1 (instrument problem), 2 stays for configuration mistakes. A shutter closed and a
stage that has not moved after the check are read from the simulated bench itself.
"""

from __future__ import annotations

import pytest

from shotpair.daemon.bench import build_bench
from shotpair.daemon.cli import main
from shotpair.daemon.config import load_config
from shotpair.daemon.instrument_report import probe_instruments
from shotpair.drivers import registry
from shotpair.drivers.base import Shutter
from shotpair.drivers.errors import TransportError


class _Unreachable(Shutter):
    """A shutter whose port does not answer."""

    def connect(self) -> None:
        raise TransportError("cannot open serial:///dev/nothing-here (No such file or directory)", instrument=self.name)

    def disconnect(self) -> None:
        pass

    def identity(self) -> str:
        return "never"

    def open(self) -> None:
        raise AssertionError("check must not open the shutter")

    def close(self) -> None:
        pass

    def is_open(self) -> bool:
        return False


@pytest.fixture
def unreachable_driver():
    registry.register("shutter", "test-unreachable", lambda name, options, context: _Unreachable(name))
    yield "test-unreachable"
    registry._registered.pop(("shutter", "test-unreachable"), None)


def test_check_reports_every_instrument(small_scan, capsys):
    path = small_scan()
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    for name in ("delay_axis", "chopper", "shutter", "detector"):
        assert f"\n{name}" in out
    assert "pixels = 256" in out and "locked = True" in out
    assert "every instrument answers" in out


def test_check_moves_nothing(small_scan):
    cfg = load_config(small_scan())
    bench = build_bench(cfg.bench, cfg.config.simulation, realtime=False)
    before = bench.simulation.stage.target_mm()
    reports = probe_instruments(bench)
    assert all(r.ok for r in reports), reports
    assert bench.simulation.stage.target_mm() == before
    assert not bench.simulation.shutter_open


def test_unreachable_instrument_is_named_and_the_rest_still_asked(small_scan, unreachable_driver, capsys):
    path = small_scan()
    text = path.read_text().replace("[scan]", f'[bench.shutter]\ndriver = "{unreachable_driver}"\n\n[scan]')
    path.write_text(text)
    assert main(["check", str(path)]) == 1
    captured = capsys.readouterr()
    assert "shutter" in captured.out and "NOT READY" in captured.out and "/dev/nothing-here" in captured.out
    assert "shotpair simulator, detector" in captured.out  # the others were asked all the same
    assert "shutter did not answer" in captured.err
    assert "Traceback" not in captured.err


def test_offline_check_does_not_connect(small_scan, unreachable_driver, capsys):
    path = small_scan()
    path.write_text(path.read_text().replace("[scan]", f'[bench.shutter]\ndriver = "{unreachable_driver}"\n\n[scan]'))
    assert main(["check", str(path), "--offline"]) == 0
    assert "not contacted" in capsys.readouterr().out


def test_bad_driver_option_names_file_and_key(small_scan, capsys):
    path = small_scan()
    path.write_text(path.read_text().replace("[scan]", '[bench.chopper]\noptions = { speed = 3 }\n\n[scan]'))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert str(path) in err and "bench.chopper.options.speed" in err
