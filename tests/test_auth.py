"""CURVE authentication (daemon/auth.py, keys_cmd.py): `shotpair keys` writes private secrets and never
overwrites; endpoints other computers can reach are refused without keys before anything is built or
bound; and a `shotpair serve` with [stream.auth] on 127.0.0.1 admits listed clients only: a control
client runs a scan, a read-only one watches it and is answered `forbidden` when it tries to act, an
unknown key or a client without keys receives nothing and gets no answer (and is told why)."""

from __future__ import annotations

import io
import os
import stat
import time
import tomllib
from pathlib import Path

import pytest

from daemon_helpers import BENCH, Served, write_scan
from shotpair.daemon import cli
from shotpair.daemon.auth import (CONTROL, READ_ONLY, check_command, is_loopback, load_client_keys,
                                  load_server_keys, server_keys_for)
from shotpair.daemon.bench import build_bench
from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.daemon.config import BenchSettings, LoadedConfig, ShotpairConfig, StreamSettings, parse_config
from shotpair.daemon.keys_cmd import write_keys
from shotpair.daemon.monitor import run_monitor
from shotpair.daemon.protocol import ERROR_CODES
from shotpair.daemon.server import Daemon
from shotpair.drivers.errors import ConfigError, DaemonError, DaemonUnavailable, ProtocolError

WAIT_S = 30.0
REFUSED_S = 0.5  # how long a refused client waits for an answer that must not come


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


# ---------------------------------------------------------------------------------------------- keys
def test_keys_writes_private_secrets_and_refuses_to_overwrite(tmp_path, capsys):
    folder = tmp_path / "keys"
    assert cli.main(["keys", str(folder), "--client", "ctl", "--read-only", "viewer"]) == 0
    out = capsys.readouterr().out
    assert "daemon.key_secret" in out and "--keys" in out and "--client ctl" in out
    secrets = [folder / "daemon.key_secret", folder / "clients/control/ctl.key_secret",
               folder / "clients/read-only/viewer.key_secret"]
    publics = [p.with_suffix(".key") for p in secrets]
    assert [mode(p) for p in secrets] == [0o600] * 3
    assert [mode(p) for p in publics] == [0o644] * 3
    assert mode(folder) == 0o700 and mode(folder / "clients/control") == 0o700
    assert sorted(p.name for p in folder.iterdir()) == ["clients", "daemon.key", "daemon.key_secret"]  # no scratch
    for secret, public in zip(secrets, publics):
        text = secret.read_text()
        assert "secret-key" in text and "secret-key" not in public.read_text()
        # the public line of the secret file is the public file's key
        assert [ln for ln in text.splitlines() if "public-key" in ln] == \
               [ln for ln in public.read_text().splitlines() if "public-key" in ln]
    before = {p: p.read_bytes() for p in secrets + publics}

    for argv, complaint in ((["keys", str(folder)], "daemon.key_secret: refusing to overwrite"),
                            (["keys", str(folder), "--read-only", "ctl"], "ctl.key: refusing to overwrite"),
                            (["keys", str(folder), "--client", "new", "--client", "new"], "client named twice"),
                            (["keys", str(folder), "--client", "../evil"], "not a client name"),
                            (["keys", str(folder), "--read-only", "daemon"], "not a client name")):
        assert cli.main(argv) == 2, argv
        err = capsys.readouterr().err
        assert complaint in err and "Traceback" not in err, err
    assert {p: p.read_bytes() for p in before} == before
    assert not (folder / "clients/control/new.key").exists()

    # a new client is added with the existing daemon key
    written = write_keys(folder, ["late"], [])
    assert [p.name for p, _ in written] == ["late.key", "late.key_secret"]
    assert (folder / "daemon.key").read_bytes() == before[folder / "daemon.key"]
    keys = load_server_keys(folder)
    assert sorted(keys.clients.values()) == [("ctl", CONTROL), ("late", CONTROL), ("viewer", READ_ONLY)]


def test_key_files_that_are_missing_open_or_wrong_are_clear_errors(tmp_path, capsys):
    folder = tmp_path / "keys"
    write_keys(folder, ["ctl"], [])
    secret = folder / "clients/control/ctl.key_secret"
    assert load_client_keys(keys_dir=str(folder), client="ctl").secret_file == str(secret)
    with pytest.raises(ConfigError, match="no secret key for client 'nobody'"):
        load_client_keys(keys_dir=str(folder), client="nobody")
    with pytest.raises(ConfigError, match="--client"):
        load_client_keys(keys_dir=str(folder))
    with pytest.raises(ConfigError, match="daemon-key"):
        load_client_keys(client_key=str(secret))
    with pytest.raises(ConfigError, match="holds no secret key"):
        load_client_keys(client_key=str(folder / "clients/control/ctl.key"), daemon_key=str(folder / "daemon.key"))
    with pytest.raises(ConfigError) as info:
        load_client_keys(client_key=str(secret), daemon_key=str(tmp_path / "absent.key"))
    assert str(tmp_path / "absent.key") in str(info.value) and "not found" in str(info.value)
    os.chmod(secret, 0o644)
    with pytest.raises(ConfigError, match="readable by other users .*chmod 600"):
        load_client_keys(keys_dir=str(folder), client="ctl")
    os.chmod(secret, 0o600)
    (folder / "daemon.key").write_text("curve\n    public-key = \"short\"\n")
    with pytest.raises(ConfigError, match="malformed key"):
        load_client_keys(keys_dir=str(folder), client="ctl")
    # the CLI: one line naming the path, exit 2, no daemon contacted
    assert cli.main(["status", "--control", "tcp://127.0.0.1:9", "--keys", str(folder), "--client", "nobody"]) == 2
    err = capsys.readouterr().err
    assert "nobody" in err and str(folder) in err and "Traceback" not in err

    empty = tmp_path / "empty"
    write_keys(empty, [], ["viewer"])
    (empty / "clients/read-only/viewer.key").unlink()
    with pytest.raises(ConfigError, match="no client keys"):
        load_server_keys(empty)
    os.chmod(empty / "daemon.key_secret", 0o640)
    with pytest.raises(ConfigError, match="daemon.key_secret: secret key file is readable"):
        load_server_keys(empty)


# ---------------------------------------------------------------------------------------------- exposure
def test_loopback_endpoints():
    for ep in ("tcp://127.0.0.1:5561", "tcp://127.0.0.1:*", "tcp://127.3.4.5:1", "tcp://[::1]:5561",
               "tcp://localhost:5561", "ipc:///tmp/shotpair.sock", "inproc://x"):
        assert is_loopback(ep), ep
    for ep in ("tcp://*:5561", "tcp://0.0.0.0:*", "tcp://[::]:5561", "tcp://192.168.1.20:5561", "tcp://eth0:5561",
               "tcp://lab-pc.example:5561", "tcp://[::ffff:10.0.0.1]:5561", "udp://127.0.0.1:1"):
        assert not is_loopback(ep), ep


def _boom(*args, **kwargs):
    raise AssertionError("the bench must not be built before the endpoints are checked")


def test_open_endpoint_without_keys_is_refused_before_the_bench(tmp_path, monkeypatch, capsys):
    bench = tmp_path / "bench.toml"
    bench.write_text(BENCH)
    monkeypatch.setattr(cli, "build_bench", _boom)
    # No socket is bound here: the refusal comes before the bench is built and before any bind.
    assert cli.main(["serve", str(bench), "--data", "tcp://0.0.0.0:*", "--control", "tcp://127.0.0.1:*"]) == 2
    err = capsys.readouterr().err
    assert "--data = tcp://0.0.0.0:* is reachable from other computers" in err and "shotpair keys" in err, err
    assert "Traceback" not in err
    # the same endpoint in the file: refused when the file is read (so `check` says it too)
    open_bench = tmp_path / "open.toml"
    open_bench.write_text(BENCH.replace("[stream]", '[stream]\ndata_endpoint = "tcp://*:5561"'))
    assert cli.main(["check", str(open_bench), "--offline"]) == 2
    err = capsys.readouterr().err
    assert "stream.auth.keys_dir" in err and "stream.data_endpoint = tcp://*:5561" in err, err
    # switching authentication off does not open it either
    off = tmp_path / "off.toml"
    off.write_text(BENCH + '\n[stream.auth]\nenabled = false\n')
    assert cli.main(["serve", str(off), "--control", "tcp://0.0.0.0:*"]) == 2
    assert "authentication cannot be switched off while --control" in capsys.readouterr().err
    # on, but the folder is missing: named, relative to the bench file
    missing = tmp_path / "missing.toml"
    missing.write_text(BENCH + '\n[stream.auth]\nkeys_dir = "no-such-keys"\n')
    assert cli.main(["serve", str(missing), "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"]) == 2
    err = capsys.readouterr().err
    assert "stream.auth.keys_dir: keys folder not found" in err and str(tmp_path / "no-such-keys") in err, err


def test_open_endpoint_with_keys_passes_the_check(tmp_path):
    folder = tmp_path / "keys"
    write_keys(folder, ["ctl"], [])
    keys = server_keys_for(None, None, {"--data": "tcp://0.0.0.0:*"}, cli_keys_dir=str(folder))
    assert keys is not None and keys.names(CONTROL) == ["ctl"]
    cfg = parse_config({"stream": {"data_endpoint": "tcp://*:5561", "auth": {"keys_dir": "keys"}}},
                       str(tmp_path / "bench.toml"))
    keys = server_keys_for(cfg.stream.auth.enabled, cfg.stream.auth.keys_dir, {"d": cfg.stream.data_endpoint},
                           config_path=cfg.path)
    assert keys is not None and keys.folder == folder  # relative to the bench file's folder
    assert server_keys_for(None, None, {"d": "tcp://127.0.0.1:*"}) is None  # loopback: off by default


def test_daemon_bind_refuses_an_open_endpoint_itself():
    bench = build_bench(BenchSettings(), None, realtime=False)
    daemon = Daemon(bench, LoadedConfig(ShotpairConfig(), "<test>", ""), StreamSettings())
    with pytest.raises(ConfigError, match="reachable from other computers"):
        daemon.bind("tcp://0.0.0.0:*", "tcp://127.0.0.1:*")
    assert daemon._ctx is None and daemon._pub is None  # nothing was created, so nothing bound
    daemon.close()


def test_rights_table():
    check_command(CONTROL, "ctl", "start")
    check_command(READ_ONLY, "viewer", "status")
    check_command(READ_ONLY, "viewer", "snapshot")
    for rights, cmd in ((READ_ONLY, "start"), (READ_ONLY, "shutdown"), (None, "status")):
        with pytest.raises(ProtocolError) as info:
            check_command(rights, "x", cmd)
        assert info.value.code == "forbidden"
    assert "forbidden" in ERROR_CODES


# ---------------------------------------------------------------------------------------------- daemon
@pytest.fixture(scope="module")
def secured(tmp_path_factory):
    """`shotpair serve` on 127.0.0.1 with [stream.auth] keys_dir; clients ctl (control) and viewer
    (read-only); a stranger's keys from another folder."""
    root = tmp_path_factory.mktemp("auth")
    write_keys(root / "keys", ["ctl"], ["viewer"])
    write_keys(root / "other", ["stranger"], [])
    bench = root / "bench.toml"
    bench.write_text(BENCH + '\n[stream.auth]\nkeys_dir = "keys"\n')
    served = Served(bench, fast=False)
    keys = {name: load_client_keys(keys_dir=str(root / "keys"), client=name) for name in ("ctl", "viewer")}
    # a key the daemon does not know, presented to the right daemon key
    keys["stranger"] = load_client_keys(client_key=str(root / "other/clients/control/stranger.key_secret"),
                                        daemon_key=str(root / "keys/daemon.key"))
    # a listed client that holds the wrong daemon key
    keys["misled"] = load_client_keys(client_key=str(root / "keys/clients/control/ctl.key_secret"),
                                      daemon_key=str(root / "other/daemon.key"))
    try:
        yield served, keys, root
    finally:
        try:
            if served.proc.poll() is None:
                with ControlClient(served.control, timeout_s=5.0, keys=keys["ctl"]) as c:
                    c.shutdown()
                served.proc.wait(timeout=WAIT_S)
        finally:
            served.stop()  # kills it if it is still there; closes the pipes


def wait_for(sub, predicate, timeout_s=WAIT_S):
    """The first message that satisfies ``predicate`` within ``timeout_s`` in all (heartbeats keep coming)."""
    deadline = time.monotonic() + timeout_s
    seen = []
    while (left := deadline - time.monotonic()) > 0:
        msg = sub.receive(min(left, 1.0))
        if msg is not None:
            if predicate(msg):
                return msg
            seen.append((msg.topic, msg.get("event") or msg.get("state")))
    raise AssertionError(f"message not seen within {timeout_s} s; last seen: {seen[-8:]}")


def test_listed_clients_act_and_watch_others_get_nothing(secured):
    served, keys, root = secured
    with ControlClient(served.control, timeout_s=10, keys=keys["ctl"]) as ctl, \
            ControlClient(served.control, timeout_s=10, keys=keys["viewer"]) as viewer, \
            Subscriber(served.data, keys=keys["ctl"]) as ctl_sub, \
            Subscriber(served.data, keys=keys["viewer"]) as viewer_sub, \
            Subscriber(served.data, keys=keys["stranger"]) as stranger_sub, \
            Subscriber(served.data) as plain_sub:
        assert ctl.status()["state"] == "idle"
        assert viewer.status()["state"] == "idle"  # read-only clients may ask what changes nothing
        # subscribed: both listed subscribers see the heartbeat
        wait_for(ctl_sub, lambda m: m.topic == "status")
        wait_for(viewer_sub, lambda m: m.topic == "status")

        scan = tomllib.loads(write_scan(root, "auth", shots=500, sweeps=2).read_text())["scan"]
        with pytest.raises(DaemonError) as info:
            viewer.start(scan=scan)
        assert info.value.code == "forbidden" and "read-only" in str(info.value)
        assert ctl.status()["state"] == "idle"  # nothing started

        scan_id = ctl.start(scan=scan)["scan_id"]
        point = wait_for(ctl_sub, lambda m: m.topic == "point")
        assert point["scan_id"] == scan_id
        seen = wait_for(viewer_sub, lambda m: m.topic == "point")  # the read-only client watches the scan
        assert seen["scan_id"] == scan_id
        assert viewer.snapshot()["scan_id"] == scan_id
        for cmd, args in (("abort", {}), ("pause", {}), ("move", {"delay_ps": 1.0}), ("shutdown", {})):
            with pytest.raises(DaemonError) as info:
                viewer.request(cmd, **args)
            assert info.value.code == "forbidden", cmd
        assert ctl.status()["state"] in ("preparing", "acquiring")  # still running: nothing was obeyed

        ctl.abort(reason="auth test")
        end = wait_for(ctl_sub, lambda m: m.topic == "scan" and m["event"] != "started")
        assert end["event"] == "aborted" and end["reason"] == "auth test"
        wait_for(viewer_sub, lambda m: m.topic == "scan" and m["event"] == "aborted")

        # All this time (seconds, heartbeats every 0.2 s, a scan) the unlisted ones got nothing at all.
        assert stranger_sub.receive(REFUSED_S) is None
        assert plain_sub.receive(REFUSED_S) is None
        assert stranger_sub.lost == 0 and plain_sub.lost == 0
    assert served.proc.poll() is None


def test_unknown_keys_get_no_answer_and_are_told_why(secured):
    served, keys, _ = secured
    for who, why in (("stranger", "key"), ("misled", "daemon.key"), (None, "authentication")):
        with ControlClient(served.control, timeout_s=REFUSED_S, keys=keys.get(who)) as c:
            with pytest.raises(DaemonUnavailable) as info:
                c.status()
        assert "no shotpair daemon answered within 0.5 s" in str(info.value)
        assert why in str(info.value).split("running there?)")[1], (who, str(info.value))
    with ControlClient(served.control, timeout_s=10, keys=keys["ctl"]) as c:
        assert c.status()["state"] == "idle"  # the refusals cost the daemon nothing


def test_read_only_monitor_and_cli(secured, capsys):
    served, keys, root = secured
    out = io.StringIO()
    assert run_monitor(control=served.control, once=True, timeout_s=10, out=out, keys=keys["viewer"]) == 0
    assert out.getvalue().startswith("state idle")
    folder = str(root / "keys")
    assert cli.main(["status", "--control", served.control, "--keys", folder, "--client", "viewer"]) == 0
    assert capsys.readouterr().out.startswith("state idle")
    assert cli.main(["abort", "--control", served.control, "--keys", folder, "--client", "viewer"]) == 1
    err = capsys.readouterr().err
    assert "forbidden" in err and "read-only" in err and "Traceback" not in err
    assert cli.main(["monitor", "--once", "--control", served.control, "--keys", folder, "--client", "ctl"]) == 0
    assert capsys.readouterr().out.startswith("state idle")
    assert served.proc.poll() is None
