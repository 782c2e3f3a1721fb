"""Third-party drivers plug in through the entry-point group ``shotpair.drivers``.

The example package in examples/plugin/ is built and installed for real with pip into a temporary
folder (once per module), so importlib.metadata finds its dist-info and its entry point
``shutter.relay``. In-process tests put that folder on sys.path only inside a fixture that restores it
and forgets the imported module; the `shotpair check` tests run in subprocesses with PYTHONPATH. The
relay box is played by a thread, on the far end of an in-process pipe or (for `check`) behind a TCP port
on 127.0.0.1; it ends by itself after at most LIFETIME_S, and nothing sleeps to synchronise.
"""

from __future__ import annotations

import importlib
import importlib.metadata
import importlib.util
import os
import select
import shutil
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from types import ModuleType

import pytest
from shotpair.drivers import registry, transports
from shotpair.drivers.base import Shutter
from shotpair.drivers.errors import ConfigError, InstrumentReplyError, InstrumentTimeout, StateError, TransportError
from shotpair.drivers.transports import Address, LoopTransport, ReadTimeout, Transport, pipe_pair
from shotpair.drivers.wire_trace import TracedTransport

PLUGIN_SOURCE = Path(__file__).resolve().parents[1] / "examples" / "plugin"
DIST = "shotpair-example-shutter"
MODULE = "shotpair_example_shutter"
PIP_TIMEOUT_S = 180.0  # a build with isolation downloads setuptools
CLI_TIMEOUT_S = 60.0
LIFETIME_S = 30.0
POLL_S = 0.02
IDENTITY = b"relay box, 4 channels, serial 0042, firmware 1.3\n"

BENCH_WITH_RELAY = """
[bench]
name = "bench with a relay shutter"

[bench.detector]
pixels = 64
wavelength_poly_nm = [420.0, 4.0]

[bench.shutter]
driver = "relay"
options = {{ {options} }}

[scan]
shots_per_point = 100
output = "{output}"

[[scan.delays]]
kind = "list"
delays_ps = [-1.0, 0.0, 1.0]
"""


# -- installing the plugin -----------------------------------------------------------------------------


def _can_build_offline() -> bool:
    """Whether this interpreter can build a setuptools wheel without fetching anything.

    setuptools 70.1 and later carry the ``bdist_wheel`` command; older ones (the 65.5 a Python 3.11 venv
    starts with) need the ``wheel`` package beside them. Otherwise pip must build in an isolated
    environment, which downloads setuptools from the package index.
    """
    try:
        version = importlib.metadata.version("setuptools")
    except importlib.metadata.PackageNotFoundError:
        return False
    major_minor = tuple(int(part) for part in version.split(".")[:2] if part.isdigit())
    return major_minor >= (70, 1) or importlib.util.find_spec("wheel") is not None


@pytest.fixture(scope="module")
def plugin_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The folder the example plugin was installed into by ``pip install --target`` (built from a copy, so
    the build leaves nothing in the source tree)."""
    work = tmp_path_factory.mktemp("plugin")
    source = work / "source"
    shutil.copytree(PLUGIN_SOURCE, source, ignore=shutil.ignore_patterns("build", "*.egg-info", "__pycache__"))
    target = work / "site"
    command = [sys.executable, "-m", "pip", "install", "--no-deps", "--target", str(target), "--quiet",
               "--disable-pip-version-check", "--no-input"]
    if _can_build_offline():
        command += ["--no-build-isolation", "--no-index"]
    proc = subprocess.run(command + [str(source)], capture_output=True, text=True, timeout=PIP_TIMEOUT_S,
                          cwd=work)
    assert proc.returncode == 0, f"pip failed:\n{proc.stdout}\n{proc.stderr}"
    assert (target / f"{MODULE}.py").is_file()
    return target


@pytest.fixture
def installed(plugin_dir: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Path]:
    """The plugin folder on sys.path for one test; afterwards sys.path is restored and the module forgotten.

    registry.available/create ask importlib.metadata afresh on every call, so nothing else caches it.
    """
    monkeypatch.syspath_prepend(str(plugin_dir))  # also invalidates the import caches
    yield plugin_dir
    sys.modules.pop(MODULE, None)
    importlib.invalidate_caches()


@pytest.fixture
def plugin(installed: Path) -> ModuleType:
    """The installed plugin module (imported from the install folder, not from examples/)."""
    module = importlib.import_module(MODULE)
    assert Path(module.__file__).parent == installed
    return module


# -- the relay box, on the far end of a pipe or behind a TCP port on 127.0.0.1 -----------------------


class RelayBox:
    """Plays the relay box of the example's docstring: answers each command line, records every line.

    ``hold``: set it to an Event before a command and the reply to that command waits until the Event is
    set (a box that answers too late); ``late_sent`` is set once that late reply has been written.
    Subclasses move the bytes; :meth:`handle` is the box.
    """

    def __init__(self) -> None:
        self.received: list[bytes] = []
        self.sent: list[bytes] = []
        self.relays = {ch: False for ch in range(1, 5)}
        self.hold: threading.Event | None = None
        self.late_sent = threading.Event()
        self._held: threading.Event | None = None
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="relay-box", daemon=True)

    def answer(self, line: bytes) -> bytes:
        words = line.decode("ascii").split()
        if words == ["ID?"]:
            return IDENTITY
        if len(words) == 2 and words[0] == "RELAY" and words[1].endswith("?"):
            ch = int(words[1][:-1])
            return b"ON\n" if self.relays[ch] else b"OFF\n"
        if len(words) == 3 and words[0] == "RELAY" and words[2] in ("ON", "OFF"):
            ch = int(words[1])
            if ch not in self.relays:
                return b"ERR no such channel\n"
            self.relays[ch] = words[2] == "ON"
            return b"DONE\n"
        return b"ERR unknown command\n"

    def handle(self, line: bytes, write: Callable[[bytes], None]) -> None:
        self.received.append(line)
        reply = self.answer(line)
        hold, self.hold = self.hold, None
        if hold is not None:
            self._held = hold
            hold.wait(LIFETIME_S)
        write(reply)
        self.sent.append(reply)
        if hold is not None:
            self.late_sent.set()

    def _run(self) -> None:
        raise NotImplementedError

    def close(self) -> None:
        self.stop.set()
        if self._held is not None:
            self._held.set()  # a test that failed before releasing a late reply must not wait LIFETIME_S
        self.thread.join(timeout=LIFETIME_S)
        assert not self.thread.is_alive()


class PipeRelayBox(RelayBox):
    """The box on the far end of a pipe_pair."""

    def __init__(self, end: LoopTransport) -> None:
        super().__init__()
        self.end = end
        self.thread.start()

    def _run(self) -> None:
        deadline = time.monotonic() + LIFETIME_S
        while not self.stop.is_set() and time.monotonic() < deadline:
            try:
                line = self.end.read_until(b"\n", POLL_S)
            except ReadTimeout:
                continue
            except TransportError:
                return  # the driver closed its end
            self.handle(line, self.end.write)

    def close(self) -> None:
        super().close()
        self.end.close()


class TcpRelayBox(RelayBox):
    """The box behind a TCP port on 127.0.0.1 chosen by the system, one client at a time."""

    def __init__(self) -> None:
        super().__init__()
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.address = f"tcp://127.0.0.1:{self.listener.getsockname()[1]}"
        self.connections = 0
        self.thread.start()

    def _run(self) -> None:
        deadline = time.monotonic() + LIFETIME_S
        with self.listener:
            while not self.stop.is_set() and time.monotonic() < deadline:
                if not select.select([self.listener], [], [], POLL_S)[0]:
                    continue
                conn, _ = self.listener.accept()
                self.connections += 1
                with conn:
                    self._serve(conn, deadline)

    def _serve(self, conn: socket.socket, deadline: float) -> None:
        buffer = b""
        while not self.stop.is_set() and time.monotonic() < deadline:
            if not select.select([conn], [], [], POLL_S)[0]:
                continue
            chunk = conn.recv(4096)
            if not chunk:
                return  # the client disconnected
            buffer += chunk
            while b"\n" in buffer:
                line, buffer = buffer.split(b"\n", 1)
                self.handle(line + b"\n", conn.sendall)


@pytest.fixture
def box_address(monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[str, PipeRelayBox]]:
    """An address (scheme ``testpipe``, registered for this test only) whose transport is the driver end of
    a pipe_pair, and the relay box on the other end."""
    driver_end, box_end = pipe_pair(name="shutter", peer_name="relay box")
    box = PipeRelayBox(box_end)

    def factory(address: Address, name: str, options: object) -> Transport:
        address.reject_query()
        return driver_end

    monkeypatch.setitem(transports.SCHEMES, "testpipe", (factory, "testpipe://"))
    try:
        yield "testpipe://", box
    finally:
        driver_end.close()
        box.close()


@pytest.fixture
def tcp_box() -> Iterator[TcpRelayBox]:
    box = TcpRelayBox()
    try:
        yield box
    finally:
        box.close()


def _make(options: dict[str, object]) -> Shutter:
    instrument = registry.create("shutter", "relay", "shutter", options, registry.DriverContext())
    assert isinstance(instrument, Shutter)
    return instrument


# -- discovery -----------------------------------------------------------------------------------------


def test_without_the_install_folder_relay_is_unknown() -> None:
    # The control for the tests below: nothing but the installed dist-info provides "relay".
    assert MODULE not in sys.modules
    assert "relay" not in registry.available("shutter")
    with pytest.raises(ConfigError) as info:
        _make({"address": "loop://"})
    assert info.value.key_path == "bench.shutter.driver"
    assert info.value.value == "relay"


def test_the_entry_point_comes_from_the_installed_dist_info(installed: Path) -> None:
    found = [ep for ep in importlib.metadata.entry_points(group="shotpair.drivers") if ep.name == "shutter.relay"]
    assert len(found) == 1
    (ep,) = found
    assert ep.value == f"{MODULE}:make_shutter"
    assert ep.dist is not None and ep.dist.name == DIST
    assert Path(ep.dist.locate_file("")).resolve() == installed.resolve()
    assert importlib.metadata.version(DIST) == "0.1.0"


def test_available_lists_relay_beside_the_builtins(installed: Path) -> None:
    names = registry.available("shutter")
    assert "relay" in names and "sim" in names
    for other in ("delay_axis", "chopper", "detector", "delay_generator"):
        assert "relay" not in registry.available(other)


def test_create_builds_an_unconnected_shutter_from_the_plugin(installed: Path) -> None:
    shutter = _make({"address": "loop://", "channel": 3})
    assert type(shutter).__name__ == "RelayShutter"
    assert Path(sys.modules[type(shutter).__module__].__file__).parent == installed
    assert shutter.name == "shutter"
    assert shutter.channel == 3  # type: ignore[attr-defined]
    assert isinstance(shutter.transport, LoopTransport)  # type: ignore[attr-defined]
    assert not shutter.transport.is_open  # type: ignore[attr-defined]
    with pytest.raises(StateError):
        shutter.is_open()
    with pytest.raises(StateError):
        shutter.identity()
    traced = _make({"address": "loop://", "trace": True})
    assert isinstance(traced.transport, TracedTransport)  # type: ignore[attr-defined]


# -- the codec: exact bytes ----------------------------------------------------------------------------


@pytest.mark.parametrize(("channel", "on", "expected"), [
    (1, True, b"RELAY 1 ON\n"),
    (1, False, b"RELAY 1 OFF\n"),
    (4, True, b"RELAY 4 ON\n"),
])
def test_encode_switch(plugin: ModuleType, channel: int, on: bool, expected: bytes) -> None:
    assert plugin.encode_switch(channel, on) == expected


def test_encode_query_and_parse_reply(plugin: ModuleType) -> None:
    assert plugin.encode_query(2) == b"RELAY 2?\n"
    assert plugin.parse_reply(b"DONE\n", instrument="shutter") == "DONE"
    assert plugin.parse_reply(b" ON \n", instrument="shutter") == "ON"
    with pytest.raises(InstrumentReplyError, match="refused: no such channel") as info:
        plugin.parse_reply(b"ERR no such channel\n", instrument="shutter")
    assert info.value.instrument == "shutter"
    for garbage in (b"\xff\n", b"DO\x00NE\n"):
        with pytest.raises(InstrumentReplyError):
            plugin.parse_reply(garbage, instrument="shutter")


# -- end to end over a pipe ----------------------------------------------------------------------------


def test_open_close_is_open_exact_bytes(installed: Path, box_address: tuple[str, PipeRelayBox]) -> None:
    address, box = box_address
    shutter = _make({"address": address, "channel": 2})
    shutter.connect()
    assert shutter.identity() == "relay box, 4 channels, serial 0042, firmware 1.3 (channel 2)"
    assert shutter.is_open() is False
    shutter.open()
    assert box.relays == {1: False, 2: True, 3: False, 4: False}
    assert shutter.is_open() is True
    assert shutter.state() == {"channel": 2, "open": True}
    shutter.close()
    assert box.relays[2] is False
    assert shutter.is_open() is False
    assert box.received == [b"ID?\n", b"RELAY 2?\n", b"RELAY 2 ON\n", b"RELAY 2?\n", b"RELAY 2?\n",
                            b"RELAY 2 OFF\n", b"RELAY 2?\n"]
    assert box.sent == [IDENTITY, b"OFF\n", b"DONE\n", b"ON\n", b"ON\n", b"DONE\n", b"OFF\n"]
    shutter.disconnect()
    shutter.disconnect()  # twice is harmless
    with pytest.raises(StateError):
        shutter.close()  # never pretends the beam is blocked when it cannot tell the box


def test_a_refusal_is_an_instrument_reply_error(installed: Path, box_address: tuple[str, PipeRelayBox]) -> None:
    address, box = box_address
    shutter = _make({"address": address})
    shutter.connect()
    box.relays.pop(1)  # the box now has no channel 1
    with pytest.raises(InstrumentReplyError, match="no such channel") as info:
        shutter.open()
    assert info.value.instrument == "shutter"


def test_a_late_reply_is_discarded_not_taken_for_the_next(installed: Path,
                                                           box_address: tuple[str, PipeRelayBox]) -> None:
    address, box = box_address
    shutter = _make({"address": address, "timeout_s": 0.2})
    shutter.connect()
    late = threading.Event()
    box.hold = late
    with pytest.raises(InstrumentTimeout) as info:
        shutter.open()
    assert info.value.timeout_s == 0.2 and info.value.instrument == "shutter"
    late.set()
    assert box.late_sent.wait(LIFETIME_S)  # the box's late DONE is now on its way
    assert shutter.is_open() is True  # answered by "ON", not by the stale "DONE"
    assert box.received[-2:] == [b"RELAY 1 ON\n", b"RELAY 1?\n"]


def test_connect_rejects_something_that_is_not_a_relay_box(installed: Path,
                                                           box_address: tuple[str, PipeRelayBox]) -> None:
    address, box = box_address
    box.answer = lambda line: b"some other device\n"  # type: ignore[method-assign]
    shutter = _make({"address": address})
    with pytest.raises(InstrumentReplyError, match="not a relay box"):
        shutter.connect()
    assert not shutter.transport.is_open  # type: ignore[attr-defined]


# -- options -------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("options", "key", "message"), [
    ({}, "address", "required option is missing"),
    ({"address": "loop://", "channel": 0}, "channel", "greater than or equal to 1"),
    ({"address": "loop://", "channel": 5}, "channel", "less than or equal to 4"),
    ({"address": "loop://", "chanel": 2}, "chanel", "did you mean 'channel'"),
    ({"address": "loop://", "timeout_s": -1.0}, "timeout_s", "greater than 0"),
    ({"address": "loop://", "trace": "yes please"}, "trace", "valid boolean"),
    ({"address": "ftp://relaybox"}, "address", "unknown transport scheme"),
    ({"address": "tcp://127.0.0.1"}, "address", "host:port"),
])
def test_bad_option_names_its_key_path(installed: Path, options: dict[str, object], key: str, message: str) -> None:
    with pytest.raises(ConfigError) as info:
        _make(options)
    assert info.value.key_path == f"bench.shutter.options.{key}"
    assert message in str(info.value)


# -- from the command line: `shotpair check` builds the bench through the registry and asks each instrument


def _check(config: Path, pythonpath: Path | None) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    if pythonpath is not None:
        env["PYTHONPATH"] = str(pythonpath)
    return subprocess.run([sys.executable, "-m", "shotpair.daemon.cli", "check", str(config)], capture_output=True,
                          text=True, timeout=CLI_TIMEOUT_S, cwd=config.parent, env=env)


def test_check_asks_the_relay_box_and_opens_nothing(plugin_dir: Path, tcp_box: TcpRelayBox, tmp_path: Path) -> None:
    config = tmp_path / "relay-bench.toml"
    config.write_text(BENCH_WITH_RELAY.format(options=f'address = "{tcp_box.address}", channel = 2',
                                              output=tmp_path / "out.h5"))
    proc = _check(config, plugin_dir)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    lines = proc.stdout.splitlines()
    assert "shutter=relay" in proc.stdout and "delay_axis=sim" in proc.stdout
    at = next(i for i, line in enumerate(lines) if line.startswith("shutter "))
    assert lines[at].split() == ["shutter", "[relay]", *"relay box, 4 channels, serial 0042, firmware 1.3".split(),
                                 "(channel", "2)"]
    assert lines[at + 1].strip() == "channel = 2, open = False"
    assert lines[-1] == "configuration is valid; every instrument answers"
    assert tcp_box.connections == 1
    assert tcp_box.received == [b"ID?\n", b"RELAY 2?\n"]  # asked, never switched
    assert tcp_box.relays == {1: False, 2: False, 3: False, 4: False}


def test_check_names_a_bad_relay_option_with_file_and_key(plugin_dir: Path, tmp_path: Path) -> None:
    config = tmp_path / "relay-bench.toml"
    config.write_text(BENCH_WITH_RELAY.format(options='address = "tcp://127.0.0.1:9", channel = 7',
                                              output=tmp_path / "out.h5"))
    proc = _check(config, plugin_dir)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert f"{config}: bench.shutter.options.channel: Input should be less than or equal to 4 (got 7)" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_check_without_the_plugin_installed_calls_relay_unknown(tmp_path: Path) -> None:
    config = tmp_path / "relay-bench.toml"
    config.write_text(BENCH_WITH_RELAY.format(options='address = "tcp://127.0.0.1:9"', output=tmp_path / "out.h5"))
    proc = _check(config, None)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert f"{config}: bench.shutter.driver: unknown driver (got 'relay'); allowed: " in proc.stderr
    assert "Traceback" not in proc.stderr
