"""Configuration errors: each bad file gets one clear message naming the file, the key, the value and
what is allowed; the CLI exits non-zero without a traceback and creates no instrument."""

import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from shotpair.daemon.cli import main
from shotpair.daemon.config import load_config
from shotpair.drivers import registry
from shotpair.drivers.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]

GOOD = """
[bench.delay_axis]
passes = 4
time_zero_mm = 10.0
travel_mm = [0.0, 150.0]

[scan]
shots_per_point = 100
output = "{out}"

[[scan.delays]]
kind = "linear"
start_ps = -1.0
stop_ps = 1.0
step_ps = 0.5
"""


def write(tmp_path: Path, text: str, name: str = "c.toml") -> Path:
    p = tmp_path / name
    p.write_text(textwrap.dedent(text).replace("{out}", str(tmp_path / "out.h5")))
    return p


def test_good_file_loads(tmp_path):
    cfg = load_config(write(tmp_path, GOOD))
    assert cfg.require_scan().shots_per_point == 100
    assert cfg.bench.delay_axis.passes == 4


@pytest.mark.parametrize(
    "edit, expected",
    [
        # misspelt key: named, with the close match and the allowed keys
        (("shots_per_point = 100", "shots_per_pt = 100"),
         ["scan.shots_per_pt", "unknown key", "did you mean 'shots_per_point'", "sweeps"]),
        # wrong type
        (("passes = 4", 'passes = "four"'), ["bench.delay_axis.passes", "'four'", "integer"]),
        # negative shots
        (("shots_per_point = 100", "shots_per_point = -5"), ["scan.shots_per_point", "-5", "greater than or equal to 2"]),
        # delay beyond what the stage reaches given passes and time zero
        (("stop_ps = 1.0", "stop_ps = 5000.0"), ["scan.delays[0]", "outside the stage travel", "-133.4", "1868"]),
        # unknown segment kind
        (('kind = "linear"', 'kind = "cubic"'), ["scan.delays[0]", "cubic", "linear", "log", "list"]),
        # time zero outside the travel
        (("time_zero_mm = 10.0", "time_zero_mm = 200.0"), ["bench.delay_axis", "time_zero_mm = 200.0", "outside"]),
    ],
)
def test_bad_values_are_named(tmp_path, capsys, edit, expected):
    p = write(tmp_path, GOOD.replace(*edit))
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert str(p) in err
    for piece in expected:
        assert piece in err, (piece, err)
    assert "Traceback" not in err


def test_missing_file(tmp_path, capsys):
    missing = tmp_path / "nope.toml"
    assert main(["check", str(missing)]) == 2
    err = capsys.readouterr().err
    assert str(missing) in err and "file not found" in err


def test_invalid_toml(tmp_path, capsys):
    p = write(tmp_path, "[scan\nshots = 3\n")
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert str(p) in err and "not valid TOML" in err and "line 1" in err


def test_output_under_a_file_is_refused(tmp_path, capsys):
    # A folder that cannot exist (its parent is a plain file) cannot be written, even by root.
    blocker = tmp_path / "plainfile"
    blocker.write_text("x")
    p = write(tmp_path, GOOD.replace("{out}", str(blocker / "sub" / "x.h5")))
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "scan.output" in err and "not writable" in err


@pytest.mark.parametrize("output, message", [("a\x00b.h5", "NUL"), ("~no-such-user-here/x.h5", "cannot expand")])
def test_impossible_output_paths(output, message):
    from shotpair.daemon.config import parse_config

    with pytest.raises(ConfigError) as info:
        parse_config({"scan": {"shots_per_point": 10, "output": output,
                               "delays": [{"kind": "list", "delays_ps": [0.0]}]}}, "f.toml")
    assert "scan.output" in str(info.value) and message in str(info.value)


def test_several_problems_reported_together(tmp_path):
    p = write(tmp_path, GOOD.replace("passes = 4", "passes = 0").replace("shots_per_point = 100", "shots_per_point = 1"))
    with pytest.raises(ConfigError) as info:
        load_config(p)
    text = str(info.value)
    assert "2 problems" in text and "bench.delay_axis.passes" in text and "scan.shots_per_point" in text


def test_bad_config_creates_no_instrument(tmp_path, capsys):
    # A spy driver records every construction: a config refused at validation must never reach it.
    made = []

    def spy(name, options, context):
        made.append(name)
        raise AssertionError("instrument created from an invalid config")

    registry.register("delay_axis", "spy", spy)
    p = write(tmp_path, GOOD.replace("passes = 4", 'passes = 4\ndriver = "spy"').replace("stop_ps = 1.0", "stop_ps = 9999.0"))
    assert main(["run", str(p), "--fast"]) == 2
    assert made == []
    assert "scan.delays[0]" in capsys.readouterr().err


def test_unknown_driver_is_named(tmp_path, capsys):
    p = write(tmp_path, GOOD.replace("passes = 4", 'passes = 4\ndriver = "warp-drive"'))
    assert main(["run", str(p), "--fast"]) == 2
    err = capsys.readouterr().err
    assert "bench.delay_axis.driver" in err and "warp-drive" in err and "sim" in err


def test_cli_subprocess_prints_no_traceback(tmp_path):
    p = write(tmp_path, GOOD.replace("shots_per_point = 100", "shots_per_point = 'many'"))
    proc = subprocess.run([sys.executable, "-m", "shotpair.daemon.cli", "check", str(p)], capture_output=True,
                          text=True, timeout=60, cwd=tmp_path)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and "scan.shots_per_point" in proc.stderr


def test_shipped_configs_are_valid(capsys):
    for path in sorted((REPO / "configs").glob("*.toml")):
        cfg = load_config(path)
        assert cfg.config.bench is not None or cfg.config.scan is not None, path


# --- fuzz invariant (the h11 habit): whatever the document, only ConfigError, ever -------------------

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from shotpair.daemon.config import parse_config  # noqa: E402

_scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                     st.text(max_size=8))
_values = st.recursive(_scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                         st.dictionaries(st.text(max_size=6), inner, max_size=4)),
                       max_leaves=12)
_keys = st.sampled_from(["bench", "scan", "simulation", "shots_per_point", "delays", "detector", "pixels",
                         "delay_axis", "travel_mm", "kind", "start_ps", "stop_ps", "step_ps", "output", "noise"])
_documents = st.recursive(st.dictionaries(_keys, _values, max_size=4),
                          lambda inner: st.dictionaries(_keys, st.one_of(_values, inner), max_size=4), max_leaves=20)


@settings(max_examples=150, deadline=None)
@given(_documents)
def test_any_document_gives_a_config_or_a_config_error(doc):
    try:
        loaded = parse_config(doc, "fuzz.toml")
    except ConfigError as exc:
        assert str(exc).startswith("fuzz.toml") or "problems in the configuration" in str(exc)
    else:
        assert loaded.bench is not None
