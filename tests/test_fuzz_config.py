"""Fuzzing the configuration path: whatever the file, ``load_config`` gives a configuration or one
ConfigError, and ``shotpair check --offline`` (in-process, ``main([...])``) exits 0 or 2 with one line of
error and no traceback. Nothing moves: spy drivers record every instrument call, and the simulated
bench's stage and shutter are read after each command.

Inputs: every file in configs/ mutated as a document (keys deleted, renamed, added; values replaced by
other types, out-of-range and huge numbers, NaN and infinity, unicode text, dates, misplaced tables),
mutated as text (lines dropped or doubled, bytes inserted, truncated, other encodings), random
documents over the config's own key names, and random bytes. A file that ``check`` refuses is also
refused by ``shotpair run`` before any instrument is connected.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import math
import os
import re
import tomllib
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shotpair.daemon import cli
from shotpair.daemon.cli import main
from shotpair.daemon.config import load_config, parse_config
from shotpair.daemon.plan import MAX_SWEEP_VALUES, make_plan
from shotpair.drivers import registry
from shotpair.drivers.base import Chopper, DelayAxis, DelayGenerator, Detector, Shutter
from shotpair.drivers.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]
CONFIGS = sorted((REPO / "configs").glob("*.toml"))

# --------------------------------------------------------------------------------------- spy drivers

#: Every instrument call a spy saw, as "kind.method". Check and a refused run must leave it empty.
SPY_CALLS: list[str] = []


def _record(kind: str, method: str, result: Any = None) -> Any:
    def call(self: Any, *args: Any, **kwargs: Any) -> Any:
        SPY_CALLS.append(f"{kind}.{method}")
        return result

    return call


def _spy(kind: str, base: type, returns: dict[str, Any]) -> type:
    """A driver class for ``kind`` whose every abstract method (and ``state``) records its call."""
    namespace: dict[str, Any] = {}
    for method in sorted(base.__abstractmethods__) + ["state"]:
        fn = _record(kind, method, returns.get(method))
        is_property = isinstance(getattr(base, method, None), property)
        namespace[method] = property(fn) if is_property else fn
    return type(f"Spy{base.__name__}", (base,), namespace)


_SPIES = {
    "delay_axis": _spy("delay_axis", DelayAxis, {"travel_mm": (0.0, 150.0), "position_mm": 10.0}),
    "chopper": _spy("chopper", Chopper, {"frequency_hz": 500.0, "phase_deg": 0.0}),
    "shutter": _spy("shutter", Shutter, {"is_open": False}),
    "detector": _spy("detector", Detector, {"pixels": 1024}),
    "delay_generator": _spy("delay_generator", DelayGenerator, {"range_ps": (0.0, 1e10)}),
}


@pytest.fixture(scope="module", autouse=True)
def spy_drivers() -> Iterator[None]:
    for kind, cls in _SPIES.items():
        registry.register(kind, "spy", lambda name, options, context, cls=cls: cls(name))
    yield
    for kind in _SPIES:
        registry._registered.pop((kind, "spy"), None)


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A folder to write fuzzed files in and to run from (relative outputs point here, never into the repo)."""
    folder = tmp_path_factory.mktemp("fuzz-config")
    old = Path.cwd()
    os.chdir(folder)
    try:
        yield folder
    finally:
        os.chdir(old)


class _BenchWatch:
    """Wraps cli.build_bench: remembers every simulated bench built, with its stage target at birth."""

    def __init__(self) -> None:
        self.built: list[tuple[Any, float]] = []
        self._real = cli.build_bench

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        bench = self._real(*args, **kwargs)
        if bench.simulation is not None:
            self.built.append((bench.simulation, bench.simulation.stage.target_mm()))
        return bench

    def assert_nothing_moved(self) -> None:
        for sim, target_mm in self.built:
            assert sim.stage.target_mm() == target_mm, "the simulated stage was sent somewhere"
            assert not sim.stage._homing, "the simulated stage was homed"
            assert not sim.shutter_open, "the simulated shutter was opened"
            sim.close()
        self.built.clear()


@pytest.fixture(scope="module")
def bench_watch() -> Iterator[_BenchWatch]:
    watch = _BenchWatch()
    cli.build_bench = watch
    try:
        yield watch
    finally:
        cli.build_bench = watch._real


# --------------------------------------------------------------------------------------- TOML writer

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_string(text: str) -> str:
    # TOML 1.0, "Basic strings": escape ", \ and every control character (U+0000-U+001F, U+007F).
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def toml_value(value: Any) -> str:
    """A value as TOML inline syntax (TOML 1.0: inline tables and arrays may nest)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"  # TOML 1.0, "Float": nan, inf, +inf, -inf are valid
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (dt.datetime, dt.date, dt.time)):
        return value.isoformat()  # TOML 1.0 offset/local date-times, local dates and local times
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    raise TypeError(f"no TOML for {value!r}")


def toml_document(doc: dict[str, Any]) -> str:
    """A whole document: one ``key = inline value`` line per top-level key."""
    return "".join(f"{_toml_key(k)} = {toml_value(v)}\n" for k, v in doc.items())


def test_toml_writer_round_trips_the_shipped_configs():
    # The writer must be exact, or the mutations below would test the writer instead of the config.
    for path in CONFIGS:
        doc = tomllib.loads(path.read_text())
        assert tomllib.loads(toml_document(doc)) == doc, path


# --------------------------------------------------------------------------------------- mutations


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out: list[tuple[Any, ...]] = []
    items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else ()
    for key, child in items:
        out.append((*prefix, key))
        out.extend(_paths(child, (*prefix, key)))
    return out


def _parent(doc: Any, path: tuple[Any, ...]) -> Any:
    for key in path[:-1]:
        doc = doc[key]
    return doc


_EDGE_NUMBERS = st.sampled_from([0, -1, 1, 2, 2**31, 2**63 - 1, 2**63, -(2**63), 10**30, -(10**30), 10**400,
                                 0.0, -0.0, 1e-300, 5e-324, 1e308, -1e308, 1e15, math.nan, math.inf, -math.inf])
_NUMBERS = st.one_of(_EDGE_NUMBERS, st.integers(), st.floats(allow_nan=True, allow_infinity=True))
_TEXT = st.one_of(st.text(max_size=12), st.sampled_from(["", " ", "sim", "spy", "\u0394OD", "~nobody/x.h5",
                                                         "/", "a" * 300 + ".h5", "x/" * 80 + "y.h5", "rot13",
                                                         "utf-16", "a\x00b", "(?P<x>", "{position_mm:q}"]))
_SCALARS = st.one_of(_NUMBERS, _TEXT, st.booleans(),
                     st.datetimes(timezones=st.sampled_from([None, dt.timezone.utc])), st.dates(), st.times())
_VALUES = st.recursive(_SCALARS, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                         st.dictionaries(st.text(max_size=6), inner, max_size=3)),
                       max_leaves=8)
_NEW_KEYS = st.one_of(st.text(max_size=10), st.sampled_from(["driver", "options", "kind", "delays", "bench",
                                                             "scan", "simulation", "stream", "linear", "passes",
                                                             "encoding", "write_terminator", "address"]))


@st.composite
def mutated_document(draw: st.DrawFn, doc: dict[str, Any]) -> dict[str, Any]:
    """Up to four edits of a parsed config: delete, replace, rename, add, or nest a key."""
    doc = tomllib.loads(toml_document(doc))  # a deep copy
    if draw(st.booleans()):
        for path in _paths(doc):
            if path[-1] == "driver":
                _parent(doc, path)[path[-1]] = "spy"  # instruments that would tell if anything moved
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["delete", "replace", "same_type", "same_type", "same_type", "rename", "add",
                                   "wrap", "scale"]))
        paths = _paths(doc)
        if op in ("same_type", "scale"):  # aim at the numbers and texts themselves
            paths = [p for p in paths if isinstance(_parent(doc, p)[p[-1]], (int, float, str))]
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = _parent(doc, path)
        key = path[-1]
        old = parent[key]
        if op == "delete":
            del parent[key]
        elif op == "replace":
            parent[key] = draw(_VALUES)
        elif op == "same_type":  # the likeliest slips: a number for a number, a text for a text
            if isinstance(old, (int, float)) and not isinstance(old, bool):
                parent[key] = draw(st.one_of(st.sampled_from([math.nan, math.inf, -math.inf]), _EDGE_NUMBERS,
                                             _NUMBERS))
            elif isinstance(old, str):
                parent[key] = draw(_TEXT)
            else:
                parent[key] = draw(_VALUES)
        elif op == "rename" and isinstance(parent, dict):
            parent[draw(_NEW_KEYS)] = parent.pop(key)
        elif op == "add" and isinstance(parent, dict):
            parent[draw(_NEW_KEYS)] = draw(_VALUES)
        elif op == "wrap":
            parent[key] = draw(st.sampled_from([[parent[key]], {"value": parent[key]}]))
        elif op == "scale" and isinstance(old, (int, float)) and not isinstance(old, bool):
            parent[key] = old * draw(st.sampled_from([-1, 0, 10**6, 10**300, 1e-9]))
    return doc


@st.composite
def mutated_text(draw: st.DrawFn, text: str) -> bytes:
    """Line and byte edits of a config file's text, and other encodings of it."""
    lines = text.splitlines(keepends=True)
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, max(len(lines) - 1, 0)))
        op = draw(st.sampled_from(["drop", "double", "insert", "cut"]))
        if op == "drop" and lines:
            del lines[i]
        elif op == "double" and lines:
            lines.insert(i, lines[i])
        elif op == "insert":
            lines.insert(i, draw(st.text(max_size=20)) + "\n")
        elif op == "cut" and lines:
            lines[i] = lines[i][: draw(st.integers(0, len(lines[i])))]
    data = "".join(lines).encode("utf-8")
    kind = draw(st.sampled_from(["utf-8", "bytes", "truncate", "bom", "utf-16", "latin-1"]))
    if kind == "bytes":
        at = draw(st.integers(0, len(data)))
        data = data[:at] + draw(st.binary(min_size=1, max_size=8)) + data[at:]
    elif kind == "truncate":
        data = data[: draw(st.integers(0, len(data)))]
    elif kind == "bom":
        data = b"\xef\xbb\xbf" + data
    elif kind == "utf-16":
        data = "".join(lines).encode("utf-16")
    elif kind == "latin-1":
        data = ("".join(lines) + "# caf\u00e9\n").encode("latin-1", errors="replace")
    return data


_KEYS = st.sampled_from(["bench", "scan", "simulation", "stream", "delay_axis", "detector", "chopper", "shutter",
                         "delay_generator", "driver", "options", "pixels", "travel_mm", "passes", "time_zero_mm",
                         "wavelength_poly_nm", "shots_per_point", "sweeps", "delays", "kind", "start_ps", "stop_ps",
                         "step_ps", "points", "delays_ps", "output", "order", "axis", "seed", "sample", "noise"])
_DOCUMENTS = st.recursive(st.dictionaries(_KEYS, _VALUES, max_size=4),
                          lambda inner: st.dictionaries(_KEYS, st.one_of(_VALUES, inner, st.lists(inner, max_size=2)),
                                                        max_size=4), max_leaves=16)

# --------------------------------------------------------------------------------------- the invariant


def _run_cli(args: list[str]) -> tuple[int, str]:
    err = io.StringIO()
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
        code = main(args)
    return code, err.getvalue()


def _numbers(node: Any) -> Iterator[float]:
    if isinstance(node, dict):
        for value in node.values():
            yield from _numbers(value)
    elif isinstance(node, (list, tuple)):
        for value in node:
            yield from _numbers(value)
    elif isinstance(node, float):
        yield node


def accepted_is_sane(path: Path, bench: Path | None) -> None:
    """What check accepts holds only finite numbers, and its plan has finite delays, positions, duration."""
    cfg = load_config(path)
    bench_cfg = load_config(bench) if bench is not None else cfg
    for loaded in (cfg, bench_cfg):
        assert all(math.isfinite(x) for x in _numbers(loaded.config.model_dump())), loaded.config
    if cfg.config.scan is not None:
        plan = make_plan(cfg.require_scan(), bench_cfg.bench, cfg.path)
        assert np.isfinite(plan.delays_ps).all() and np.isfinite(plan.positions_mm).all()
        assert plan.n_points * plan.sweeps * bench_cfg.bench.detector.pixels <= MAX_SWEEP_VALUES
        assert math.isfinite(plan.estimated_duration_s()), plan


def check_file(workdir: Path, watch: _BenchWatch, data: bytes, bench: Path | None = None) -> int:
    """Write ``data`` to a file and hold it to the invariant; returns check's exit code."""
    path = workdir / "fuzzed.toml"
    path.write_bytes(data)
    SPY_CALLS.clear()
    try:
        load_config(path)
        loaded = True
    except ConfigError as exc:
        loaded = False
        assert str(exc).startswith(str(path)) or "problems in the configuration" in str(exc), str(exc)
    extra = ["--bench", str(bench)] if bench is not None else []
    code, err = _run_cli(["check", str(path), "--offline", *extra])
    assert code in (0, 2), (code, err)
    assert "Traceback" not in err
    assert SPY_CALLS == [], SPY_CALLS  # --offline contacts no instrument, not even to connect
    watch.assert_nothing_moved()
    if not loaded:
        assert code == 2
    if code == 0:
        accepted_is_sane(path, bench)
    if code == 2:
        # One error message (numpy may warn before it, e.g. of an overflow in the simulator's set-up).
        assert err.count("shotpair: error: ") == 1 and str(path) in err, err
        # What check refuses, run refuses too, before connecting (let alone moving) anything.
        run_code, run_err = _run_cli(["run", str(path), "--fast", "--data", "tcp://127.0.0.1:*",
                                      "--control", "tcp://127.0.0.1:*", *extra])
        assert run_code == 2 and "Traceback" not in run_err, (run_code, run_err)
        assert SPY_CALLS == [], SPY_CALLS
        watch.assert_nothing_moved()
    return code


def _base(path: Path) -> tuple[dict[str, Any], Path | None]:
    doc = tomllib.loads(path.read_text())
    return doc, (REPO / "configs" / "bench-sim.toml" if "bench" not in doc else None)


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_shipped_config_passes_the_invariant_unchanged(workdir, bench_watch, path):
    _, bench = _base(path)
    assert check_file(workdir, bench_watch, path.read_bytes(), bench) == 0


@settings(max_examples=80, deadline=None)
@given(path=st.sampled_from(CONFIGS), data=st.data())
def test_mutated_documents(workdir, bench_watch, path, data):
    doc, bench = _base(path)
    mutated = data.draw(mutated_document(doc))
    check_file(workdir, bench_watch, toml_document(mutated).encode("utf-8"), bench)


@settings(max_examples=40, deadline=None)
@given(path=st.sampled_from(CONFIGS), data=st.data())
def test_mutated_text(workdir, bench_watch, path, data):
    _, bench = _base(path)
    check_file(workdir, bench_watch, data.draw(mutated_text(path.read_text())), bench)


@settings(max_examples=30, deadline=None)
@given(_DOCUMENTS)
def test_random_documents(workdir, bench_watch, doc):
    check_file(workdir, bench_watch, toml_document(doc).encode("utf-8"))


@settings(max_examples=25, deadline=None)
@given(st.binary(max_size=200))
def test_random_bytes(workdir, bench_watch, data):
    assert check_file(workdir, bench_watch, data) in (0, 2)


# --------------------------------------------------------------------------------------- found by fuzzing


DEMO = (REPO / "configs" / "demo.toml").read_text()


@pytest.mark.parametrize("edit, key", [
    # NaN start or stop of a linear segment crashed the grid (int(nan)); NaN in a list reached the plan
    (("start_ps = -1.0", "start_ps = nan"), "scan.delays[1].start_ps"),
    (("delays_ps = [-5.0, -3.0]", "delays_ps = [-5.0, nan]"), "scan.delays[0].delays_ps[1]"),
    # infinity was accepted for travel, gain, read noise, velocity, timeouts and most simulation numbers
    (("travel_mm = [0.0, 150.0]", "travel_mm = [0.0, inf]"), "bench.delay_axis.travel_mm[1]"),
    (("gain_e_per_count = 4.0", "gain_e_per_count = inf"), "bench.detector.gain_e_per_count"),
    (("seed = 7\n\n[simulation.probe]", "seed = 7\n\n[simulation.sample]\ntime_zero_offset_ps = -inf\n\n"
      "[simulation.probe]"), "simulation.sample.time_zero_offset_ps"),
    # a float literal too large for a double is infinity (TOML 1.0 floats are IEEE 754 binary64)
    (("read_noise_e = 12.0", "read_noise_e = 1e400"), "bench.detector.read_noise_e"),
])
def test_non_finite_numbers_are_refused_by_key(tmp_path, capsys, edit, key):
    path = tmp_path / "c.toml"
    path.write_text(DEMO.replace(*edit).replace('"shotpair-demo.h5"', f'"{tmp_path / "x.h5"}"'))
    assert main(["check", str(path), "--offline"]) == 2
    err = capsys.readouterr().err
    assert f"{key}: not a finite number" in err and "Traceback" not in err, err
    assert err.count("\n") == 1, err  # one problem, said once (not again by the checks it upsets)


def test_nesting_too_deep_for_the_toml_parser_is_a_config_error(tmp_path):
    # tomllib recurses per nested array: 5000 levels raised RecursionError through load_config.
    path = tmp_path / "deep.toml"
    path.write_text("a = " + "[" * 5000 + "]" * 5000 + "\n")
    with pytest.raises(ConfigError, match="nested too deeply"):
        load_config(path)


@pytest.mark.parametrize("output, reason", [("a" * 300 + ".h5", "File name too long"),
                                            ("/tmp/" + "b" * 300 + "/x.h5", "File name too long")])
def test_output_name_too_long_is_a_config_error(output, reason):
    # Path.exists() lets ENAMETOOLONG through (Python 3.11 ignores only ENOENT, ENOTDIR, EBADF, ELOOP).
    with pytest.raises(ConfigError) as info:
        parse_config({"scan": {"shots_per_point": 10, "output": output,
                               "delays": [{"kind": "list", "delays_ps": [0.0]}]}}, "f.toml")
    text = str(info.value)
    assert "scan.output" in text and reason in text and len(text) < 400, text


def test_lone_surrogate_in_a_json_scan_is_refused():
    # JSON may carry "\ud800" (RFC 8259 section 8.2 calls such strings unpredictable); no file can hold it.
    with pytest.raises(ConfigError, match=r"scan.title: text that is not valid Unicode"):
        parse_config({"scan": {"shots_per_point": 10, "title": "\ud800", "output": "/tmp/x.h5",
                               "delays": [{"kind": "list", "delays_ps": [0.0]}]}}, "<start request>")


def test_huge_integer_value_is_shown_without_crashing():
    # Python refuses str() of ints over 4300 digits (ValueError): the message must not need it.
    with pytest.raises(ConfigError) as info:
        parse_config({"bench": {"detector": {"pixels": 10**5000}}}, "f.toml")
    assert "bench.detector.pixels" in str(info.value) and "too large to show" in str(info.value)


def test_long_bad_values_and_many_problems_are_cut_short():
    doc = {"scan": {"shots_per_point": 10, "output": "/tmp/x.h5",
                    "delays": [{"kind": "list", "delays_ps": ["x" * 10_000] * 500}]}}
    with pytest.raises(ConfigError) as info:
        parse_config(doc, "f.toml")
    text = str(info.value)
    assert "... and 480 more" in text and len(text) < 20_000, len(text)


def test_a_key_named_like_a_segment_kind_keeps_its_path():
    # The union tag pydantic puts after a list index was dropped; a user's key of the same name was too.
    with pytest.raises(ConfigError) as info:
        parse_config({"scan": {"shots_per_point": 10, "output": "/tmp/x.h5",
                               "delays": [{"kind": "linear", "start_ps": 0.0, "stop_ps": 1.0, "step_ps": 0.5,
                                           "linear": 1}]}}, "f.toml")
    assert "scan.delays[0].linear: unknown key" in str(info.value)


def test_scan_too_large_to_hold_is_refused_before_planning():
    # 100000 sweeps of a million points asked for 8e11 bytes of sweep orders (and 1e14 values per array).
    doc = {"scan": {"shots_per_point": 10, "output": "/tmp/x.h5", "sweeps": 100_000,
                    "delays": [{"kind": "linear", "start_ps": 0.0, "stop_ps": 999.999, "step_ps": 0.001}]},
           "bench": {"delay_axis": {"travel_mm": [0.0, 150.0]}}}
    cfg = parse_config(doc, "f.toml")
    with pytest.raises(ConfigError) as info:
        make_plan(cfg.require_scan(), cfg.bench, "f.toml")
    assert "scan.sweeps" in str(info.value) and f"{MAX_SWEEP_VALUES:,}" in str(info.value)


def test_too_many_listed_delays_are_refused_before_merging():
    segment = {"kind": "linear", "start_ps": 0.0, "stop_ps": 99.9999, "step_ps": 0.0001}  # 1e6 delays each
    doc = {"scan": {"shots_per_point": 10, "output": "/tmp/x.h5", "delays": [segment] * 11}}
    cfg = parse_config(doc, "f.toml")
    with pytest.raises(ConfigError, match=r"scan.delays: the delay segments list 11,000,000 delays"):
        make_plan(cfg.require_scan(), cfg.bench, "f.toml")


def test_negative_seed_of_a_shuffled_scan_is_a_config_error():
    # numpy's SeedSequence takes non-negative integers only: seed = -1 raised ValueError in the plan.
    with pytest.raises(ConfigError, match=r"scan.seed: Input should be greater than or equal to 0"):
        parse_config({"scan": {"shots_per_point": 10, "output": "/tmp/x.h5", "order": "shuffled", "seed": -1,
                               "delays": [{"kind": "list", "delays_ps": [0.0, 1.0]}]}}, "f.toml")


def test_a_vanishing_repetition_rate_is_refused(tmp_path):
    """Found by test_mutated_documents: 5e-324 Hz (the smallest double) passed `gt=0` and made the
    estimated duration infinite; rates below 0.1 Hz are refused, and so is any scan that would take
    longer than a year."""
    text = (REPO / "configs" / "demo.toml").read_text()
    bad = tmp_path / "slow.toml"
    bad.write_text(re.sub(r"(?m)^repetition_rate_hz = .*$", "repetition_rate_hz = 5e-324", text))
    with pytest.raises(ConfigError) as info:
        load_config(bad)
    assert "repetition_rate_hz" in str(info.value)
    long = tmp_path / "long.toml"
    long.write_text(re.sub(r"(?m)^repetition_rate_hz = .*$", "repetition_rate_hz = 0.1", text)
                    .replace("shots_per_point = 1000", "shots_per_point = 100000000"))
    cfg = load_config(long)
    with pytest.raises(ConfigError) as info:
        make_plan(cfg.require_scan(), cfg.bench, cfg.path)
    assert "longer than a year" in str(info.value)
