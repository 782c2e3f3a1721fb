"""Throughput of the data stream and latency of control requests, each beside its baseline, side by side.

Run by hand: ``python benchmarks/stream.py [--messages N] [--repeats R] [--seconds S] [--skip-stream]
[--skip-control]`` (a few minutes with the defaults).

1. Stream: ``point``-sized messages (the eight arrays the daemon sends, 1024 and 2048 px) to 1 and 4
   subscriber processes on 127.0.0.1, through the project's path (protocol.encode_data + PUB send with the
   daemon's flags; client.Subscriber.receive, which decodes) and through plain pyzmq (send_multipart of
   pre-built frames of the same sizes; recv_multipart). Trials alternate between the two in one process,
   on the same machine load; the table gives medians over the repeats and the ratio project/raw.
2. Control: round-trip time of ``status`` to a ``shotpair serve`` subprocess (simulated bench in real time,
   1 kHz, not --fast) while idle (the baseline, before and after) and while a scan acquires, with a
   `shotpair monitor` subscribed to the stream throughout. Median, p99 and max.

This is a measurement script, not a test: it asserts nothing and must not be collected by pytest.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import re
import selectors
import statistics
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from shotpair.daemon import protocol
from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.drivers.errors import ShotpairError

__all__ = ["main"]

ROOT = Path(__file__).resolve().parent.parent
SCAN_ID = "20260101-000000-abcdef"
FLOAT_ARRAYS = ("delta_od", "delta_od_error", "noise_floor", "mean_counts_pump_on", "mean_counts_pump_off",
                "combined_delta_od", "combined_delta_od_error")
WAIT_S = 30.0  # the longest any step of the benchmark waits for a peer


# ---------------------------------------------------------------------------------------------- messages
def point_arrays(pixels: int, seed: int = 1) -> dict[str, np.ndarray]:
    """The arrays of a daemon ``point`` message (server.Daemon._on_event), in its order."""
    rng = np.random.default_rng(seed)
    a = {name: rng.normal(0.0, 1e-3, pixels) for name in FLOAT_ARRAYS[:5]}
    a["masked"] = np.zeros(pixels, dtype=np.int64)
    a["combined_delta_od"] = rng.normal(0.0, 1e-3, pixels)
    a["combined_delta_od_error"] = rng.uniform(1e-4, 2e-4, pixels)
    return a


def point_fields(seq: int) -> dict[str, Any]:
    return {"sweep": 0, "index": seq % 100, "position_in_sweep": seq % 100, "delay_ps": 12.5, "points_done": seq + 1,
            "points_total": 10_000, "pairs": 2500, "rejected_pairs": 3, "gaps": 0, "shots": 5006,
            "eta_s": 1234.5, "shots_per_s": 998.7}


def raw_frames(pixels: int) -> list[bytes]:
    """Pre-built frames of the same sizes as the project's message (topic, header, eight arrays)."""
    frames = protocol.encode_data("point", 123456, SCAN_ID, time.time(), point_fields(123456), point_arrays(pixels))
    return [bytes(f) for f in frames]


def message_bytes(frames: list[Any]) -> int:
    return sum(memoryview(f).nbytes for f in frames)


# ---------------------------------------------------------------------------------------------- subscribers
def subscriber_worker(project_ep: str, raw_ep: str, conn: Any, hwm: int) -> None:
    """A subscriber process: one client.Subscriber and one raw SUB socket; runs trials on command."""
    ctx = zmq.Context()
    sub = Subscriber(project_ep, context=ctx, receive_hwm=hwm)
    raw = ctx.socket(zmq.SUB)
    raw.setsockopt(zmq.LINGER, 0)
    raw.setsockopt(zmq.RCVHWM, hwm)
    raw.setsockopt(zmq.SUBSCRIBE, b"")
    raw.connect(raw_ep)
    try:
        seen_project = seen_raw = False
        deadline = time.monotonic() + WAIT_S
        while not (seen_project and seen_raw) and time.monotonic() < deadline:
            if sub.receive(0.005) is not None:
                seen_project = True
            if raw.poll(5):
                raw.recv_multipart()
                seen_raw = True
        conn.send(("joined", seen_project and seen_raw))
        while conn.poll(WAIT_S * 4):
            cmd = conn.recv()
            if cmd[0] == "quit":
                return
            mode, count = cmd[1], int(cmd[2])
            while sub.receive(0.0) is not None:  # leftovers of the join
                pass
            while raw.poll(0):
                raw.recv_multipart()
            lost_before = sub.lost
            conn.send(("armed",))
            got, first, last = 0, 0.0, 0.0
            while got < count:
                if mode == "project":
                    msg = sub.receive(5.0)
                    if msg is None:
                        break
                else:
                    if not raw.poll(5000):
                        break
                    raw.recv_multipart()
                last = time.perf_counter()
                first = first or last
                got += 1
            conn.send(("done", got, first, last, sub.lost - lost_before))
    finally:
        sub.close()
        raw.close(linger=0)
        ctx.term()


def _collect(conns: list[Any], tag: str) -> list[tuple[Any, ...]]:
    out = []
    for c in conns:
        if not c.poll(WAIT_S):
            raise SystemExit(f"a subscriber did not answer ({tag}) within {WAIT_S} s")
        msg = c.recv()
        if msg[0] != tag:
            raise SystemExit(f"subscriber said {msg!r}, expected {tag}")
        out.append(msg)
    return out


def stream_case(pixels: int, subscribers: int, messages: int, repeats: int) -> dict[str, Any]:
    """Medians of delivered messages/s for the project's path and for raw pyzmq, trials alternating."""
    ctx = zmq.Context()
    # No high-water mark (0): the figure is the throughput, not the loss. With a finite mark, PUB drops
    # although fewer messages are queued than the mark, because it learns of the reader's progress only
    # every half mark; the daemon's own setting (1000) is about protecting the scan, not this measurement.
    hwm = 0
    pubs = {}
    for mode in ("project", "raw"):
        s = ctx.socket(zmq.PUB)
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.SNDHWM, hwm)
        s.bind("tcp://127.0.0.1:*")
        pubs[mode] = s
    eps = {m: s.getsockopt_string(zmq.LAST_ENDPOINT) for m, s in pubs.items()}
    spawn = mp.get_context("spawn")
    conns, procs = [], []
    try:
        for _ in range(subscribers):
            here, there = spawn.Pipe()
            p = spawn.Process(target=subscriber_worker, args=(eps["project"], eps["raw"], there, hwm), daemon=True)
            p.start()
            conns.append(here)
            procs.append(p)
        hello = protocol.encode_data("log", 0, None, 0.0, {"level": "info", "message": "hello"})
        joined: list[Any] = []
        deadline = time.monotonic() + WAIT_S * 2
        while len(joined) < subscribers and time.monotonic() < deadline:
            for s in pubs.values():
                s.send_multipart(hello)
            for c in conns:
                if c not in joined and c.poll(0.02):  # paces the hellos; not a synchronisation by sleeping
                    msg = c.recv()
                    if not msg[1]:
                        raise SystemExit("a subscriber never saw the publishers")
                    joined.append(c)
        if len(joined) < subscribers:
            raise SystemExit("subscribers did not join")
        arrays = point_arrays(pixels)
        prebuilt = raw_frames(pixels)
        size = message_bytes(prebuilt)
        rates: dict[str, list[float]] = {"project": [], "raw": []}
        send_rates: dict[str, list[float]] = {"project": [], "raw": []}
        lost = {"project": 0, "raw": 0}
        seq = 1
        for r in range(repeats):
            for mode in (("project", "raw") if r % 2 == 0 else ("raw", "project")):
                for c in conns:
                    c.send(("trial", mode, messages))
                _collect(conns, "armed")
                pub = pubs[mode]
                t0 = time.perf_counter()
                if mode == "project":
                    for _ in range(messages):  # what Daemon._publish does
                        frames = protocol.encode_data("point", seq, SCAN_ID, time.time(), point_fields(seq), arrays)
                        try:
                            pub.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
                        except zmq.Again:
                            pass
                        seq += 1
                else:
                    for _ in range(messages):
                        pub.send_multipart(prebuilt)
                t1 = time.perf_counter()
                done = _collect(conns, "done")
                got = min(d[1] for d in done)
                last = max(d[3] for d in done)
                lost[mode] += sum(messages - d[1] for d in done)
                rates[mode].append(got / (last - t0) if last > t0 else float("nan"))
                send_rates[mode].append(messages / (t1 - t0))
        for c in conns:
            c.send(("quit",))
        for p in procs:
            p.join(WAIT_S)
        med = {m: statistics.median(v) for m, v in rates.items()}
        return {"pixels": pixels, "subscribers": subscribers, "bytes": size, "project": med["project"],
                "raw": med["raw"], "ratio": med["project"] / med["raw"],
                "send_project": statistics.median(send_rates["project"]),
                "send_raw": statistics.median(send_rates["raw"]), "lost": lost}
    finally:
        for p in procs:
            if p.is_alive():
                p.kill()
                p.join(5)
        for s in pubs.values():
            s.close(linger=0)
        ctx.term()


def cost_breakdown(pixels: int, number: int = 2000) -> dict[str, float]:
    """Per-message costs in this process (µs, best of 5): the project's encode and decode, and the
    header's plain JSON dump alone (the rest of encode_data's header time is its JSON-safe copy)."""
    import json
    import timeit

    arrays = point_arrays(pixels)
    frames = protocol.encode_data("point", 5, SCAN_ID, time.time(), point_fields(5), arrays)
    header = json.loads(bytes(frames[1]))
    raw = raw_frames(pixels)

    def best(fn: Any) -> float:
        return min(timeit.repeat(fn, number=number, repeat=5)) / number * 1e6

    return {"encode": best(lambda: protocol.encode_data("point", 5, SCAN_ID, time.time(), point_fields(5), arrays)),
            "arrays": best(lambda: protocol.encode_arrays(arrays)),
            "json": best(lambda: json.dumps(header, separators=(",", ":"), allow_nan=False).encode()),
            "decode": best(lambda: protocol.decode_data(raw))}


# ---------------------------------------------------------------------------------------------- control
def _read_line(stream: Any, timeout_s: float) -> str:
    with selectors.DefaultSelector() as sel:
        sel.register(stream, selectors.EVENT_READ)
        if not sel.select(timeout_s):
            raise SystemExit(f"serve printed nothing within {timeout_s} s")
    return stream.readline()


def _round_trips(client: ControlClient, seconds: float, cmd: str = "status") -> list[float]:
    out: list[float] = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end:
        t = time.perf_counter()
        client.request(cmd)
        out.append(time.perf_counter() - t)
    return out


def _wait_state(client: ControlClient, data_endpoint: str, wanted: str, timeout_s: float) -> None:
    """Wait on the stream's status messages (published on every state change) until ``wanted``."""
    with Subscriber(data_endpoint, topics=["status"]) as sub:
        if client.status()["state"] == wanted:  # asked after subscribing: a change in between is not missed
            return
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            msg = sub.receive(max(0.0, deadline - time.monotonic()))
            if msg is not None and msg.get("state") == wanted:
                return
    raise SystemExit(f"the daemon did not reach {wanted!r} within {timeout_s} s")


def _stats_ms(values: list[float]) -> tuple[float, float, float, int]:
    a = np.asarray(values) * 1e3
    return float(np.median(a)), float(np.percentile(a, 99)), float(a.max()), int(a.size)


def control_latency(seconds: float) -> dict[str, Any]:
    demo = ROOT / "configs" / "demo.toml"
    scan = tomllib.loads(demo.read_text())["scan"]
    with tempfile.TemporaryDirectory() as tmp:
        scan["output"] = str(Path(tmp) / "bench-latency.h5")
        serve = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.cli", "serve", str(demo),
                                  "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"],
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
        watcher: subprocess.Popen[bytes] | None = None
        control = ""
        try:
            line = _read_line(serve.stdout, 60.0)
            m = re.search(r"data (\S+), control (\S+)", line)
            if not m:
                raise SystemExit(f"unexpected first line of serve: {line!r}")
            data, control = m.group(1), m.group(2)
            watcher = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.monitor", "--control", control],
                                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL)
            with ControlClient(control, timeout_s=5.0) as c:
                idle = _round_trips(c, seconds / 2)
                c.start(scan=scan)
                _wait_state(c, data, "acquiring", 60.0)
                before = c.status()
                acquiring = _round_trips(c, seconds)
                after = c.status()
                snap_acq = []
                for _ in range(20):
                    t = time.perf_counter()
                    c.snapshot()
                    snap_acq.append(time.perf_counter() - t)
                c.abort("benchmark done")
                _wait_state(c, data, "idle", 60.0)
                idle += _round_trips(c, seconds / 2)
            return {"idle": _stats_ms(idle), "acquiring": _stats_ms(acquiring), "snapshot": _stats_ms(snap_acq),
                    "shots_per_s": after.get("shots_per_s"),
                    "points": (before.get("points_done"), after.get("points_done"))}
        finally:
            if watcher is not None:
                watcher.terminate()
                try:
                    watcher.wait(10)
                except subprocess.TimeoutExpired:
                    watcher.kill()
            if control and serve.poll() is None:
                try:
                    with ControlClient(control, timeout_s=3.0) as c:
                        c.shutdown()
                except ShotpairError:
                    pass
            try:
                serve.wait(15)
            except subprocess.TimeoutExpired:
                serve.kill()
                serve.wait(5)


# ---------------------------------------------------------------------------------------------- main
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--messages", type=int, default=1000, help="messages per trial (default 1000)")
    ap.add_argument("--repeats", type=int, default=5, help="trials per path and case (default 5)")
    ap.add_argument("--seconds", type=float, default=6.0, help="seconds of status requests while acquiring "
                                                               "(and as long idle, half before, half after)")
    ap.add_argument("--skip-stream", action="store_true")
    ap.add_argument("--skip-control", action="store_true")
    args = ap.parse_args(argv)
    print(f"shotpair stream benchmark: {args.messages} messages x {args.repeats} repeats per path, "
          f"127.0.0.1, subscribers in processes; medians")
    if not args.skip_stream:
        print(f"{'pixels':>6} {'subs':>4} {'msg kB':>7} | {'project msg/s':>13} {'MB/s/sub':>8} | "
              f"{'raw msg/s':>9} {'MB/s/sub':>8} | {'ratio':>5} | {'send proj/raw msg/s':>19} | lost p/r")
        for pixels in (1024, 2048):
            for subs in (1, 4):
                r = stream_case(pixels, subs, args.messages, args.repeats)
                mb = r["bytes"] / 1e6
                print(f"{pixels:>6} {subs:>4} {r['bytes'] / 1e3:>7.1f} | {r['project']:>13.0f} "
                      f"{r['project'] * mb:>8.1f} | {r['raw']:>9.0f} {r['raw'] * mb:>8.1f} | {r['ratio']:>5.2f} | "
                      f"{r['send_project']:>9.0f}/{r['send_raw']:<9.0f} | {r['lost']['project']}/{r['lost']['raw']}",
                      flush=True)
        print("\nwhere a message's time goes, in one process (µs per message, best of 5)")
        for pixels in (1024, 2048):
            c = cost_breakdown(pixels)
            print(f"{pixels:>6} px: encode_data {c['encode']:.0f} (arrays {c['arrays']:.0f}, header as plain "
                  f"json.dumps {c['json']:.0f}, the JSON-safe copy the rest), decode_data {c['decode']:.0f}")
    if not args.skip_control:
        r = control_latency(args.seconds)
        print("\ncontrol round trip of `status` (ms), serve in real time at 1 kHz, a monitor subscribed")
        print(f"{'phase':>22} | {'median':>7} {'p99':>7} {'max':>7} {'n':>6}")
        for name, key in (("idle (baseline)", "idle"), ("acquiring", "acquiring"),
                          ("snapshot, acquiring", "snapshot")):
            med, p99, mx, n = r[key]
            print(f"{name:>22} | {med:>7.2f} {p99:>7.2f} {mx:>7.2f} {n:>6}")
        print(f"acquisition meanwhile: {r['shots_per_s'] or float('nan'):.0f} shots/s, points done "
              f"{r['points'][0]} -> {r['points'][1]}; p99 ratio acquiring/idle "
              f"{r['acquiring'][1] / r['idle'][1]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
