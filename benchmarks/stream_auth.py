"""What CURVE authentication costs the data stream: the same messages with and without it, side by side.

Run by hand: ``python benchmarks/stream_auth.py [--messages N] [--repeats R]`` (about a minute).

Messages of the daemon's sizes (a ``status``-like 1 kB header alone, and a ``point`` of 1024 and 2048 px:
eight arrays) go through the daemon's publishing path (protocol.encode_data + PUB send with its flags) to
one client.Subscriber in another process on 127.0.0.1, which decodes them; once with plain sockets and
once with both sides CURVE (daemon/auth.py's ZAP handler admitting the subscriber's key). Trials
alternate between the two; the table gives the median of delivered messages/s and the ratio.

This is a measurement script, not a test: it asserts nothing and must not be collected by pytest.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from shotpair.daemon import protocol
from shotpair.daemon.auth import DaemonAuthenticator, load_client_keys, load_server_keys
from shotpair.daemon.client import Subscriber
from shotpair.daemon.keys_cmd import write_keys

__all__ = ["main"]

WAIT_S = 30.0


def arrays_for(pixels: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(1)
    if pixels == 0:
        return {}
    a = {f"a{i}": rng.normal(0.0, 1e-3, pixels) for i in range(7)}
    a["masked"] = np.zeros(pixels, dtype=np.int64)
    return a


def worker(endpoint: str, keys_dir: str | None, conn: Any) -> None:
    keys = load_client_keys(keys_dir=keys_dir, client="bench") if keys_dir else None
    ctx = zmq.Context()
    sub = Subscriber(endpoint, context=ctx, receive_hwm=0, keys=keys)
    try:
        deadline = time.monotonic() + WAIT_S
        while sub.receive(0.01) is None and time.monotonic() < deadline:
            pass
        conn.send("joined")
        while conn.poll(WAIT_S * 4):
            cmd = conn.recv()
            if cmd[0] == "quit":
                return
            while sub.receive(0.0) is not None:
                pass
            conn.send("armed")
            got, first, last = 0, 0.0, 0.0
            while got < cmd[1]:
                if sub.receive(5.0) is None:
                    break
                last = time.perf_counter()
                first = first or last
                got += 1
            conn.send((got, first, last))
    finally:
        sub.close()
        ctx.term()


def case(pixels: int, messages: int, repeats: int, keys_dir: Path) -> dict[str, float]:
    ctx = zmq.Context()
    auth = DaemonAuthenticator(ctx, load_server_keys(keys_dir))
    auth.start()
    pubs: dict[str, zmq.Socket[Any]] = {}
    spawn = mp.get_context("spawn")
    conns, procs = {}, []
    try:
        for mode in ("plain", "curve"):
            s = ctx.socket(zmq.PUB)
            s.setsockopt(zmq.LINGER, 0)
            s.setsockopt(zmq.SNDHWM, 0)
            if mode == "curve":
                auth.secure(s)
            s.bind("tcp://127.0.0.1:*")
            pubs[mode] = s
            here, there = spawn.Pipe()
            p = spawn.Process(target=worker, args=(s.getsockopt_string(zmq.LAST_ENDPOINT),
                                                   str(keys_dir) if mode == "curve" else None, there), daemon=True)
            p.start()
            conns[mode], procs = here, procs + [p]
        hello = protocol.encode_data("log", 0, None, 0.0, {"level": "info", "message": "hello"})
        joined: set[str] = set()
        deadline = time.monotonic() + WAIT_S * 2
        while len(joined) < 2 and time.monotonic() < deadline:
            for mode, s in pubs.items():
                s.send_multipart(hello)
                if mode not in joined and conns[mode].poll(0.02):  # paces the hellos
                    conns[mode].recv()
                    joined.add(mode)
        if len(joined) < 2:
            raise SystemExit("subscribers did not join")
        arrays = arrays_for(pixels)
        fields = {"sweep": 0, "index": 3, "delay_ps": 12.5, "points_done": 4, "points_total": 10_000}
        size = sum(memoryview(f).nbytes for f in protocol.encode_data("point", 1, "x", 0.0, fields, arrays))
        rates: dict[str, list[float]] = {"plain": [], "curve": []}
        seq = 1
        for r in range(repeats):
            for mode in (("plain", "curve") if r % 2 == 0 else ("curve", "plain")):
                conns[mode].send(("trial", messages))
                if not conns[mode].poll(WAIT_S) or conns[mode].recv() != "armed":
                    raise SystemExit("subscriber not armed")
                for _ in range(messages):
                    frames = protocol.encode_data("point", seq, "x", time.time(), fields, arrays)
                    try:
                        pubs[mode].send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
                    except zmq.Again:
                        pass
                    seq += 1
                if not conns[mode].poll(WAIT_S):
                    raise SystemExit("subscriber did not finish")
                got, first, last = conns[mode].recv()
                if got < messages:
                    raise SystemExit(f"{mode}: {got} of {messages} messages arrived")
                rates[mode].append((got - 1) / (last - first))
        for c in conns.values():
            c.send(("quit",))
        return {"bytes": size, "plain": statistics.median(rates["plain"]), "curve": statistics.median(rates["curve"])}
    finally:
        for p in procs:
            p.join(timeout=WAIT_S)
            if p.is_alive():
                p.kill()
        for s in pubs.values():
            s.close(linger=0)
        auth.stop()
        ctx.term()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--messages", type=int, default=3000)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        keys_dir = Path(tmp) / "keys"
        write_keys(keys_dir, ["bench"], [])
        print("| message | bytes | plain msg/s (MB/s) | CURVE msg/s (MB/s) | CURVE/plain |")
        print("|---|---|---|---|---|")
        for label, pixels in (("header only", 0), ("point 1024 px", 1024), ("point 2048 px", 2048)):
            r = case(pixels, args.messages, args.repeats, keys_dir)
            mb = r["bytes"] / 1e6
            print(f"| {label} | {r['bytes']:,} | {r['plain']:,.0f} ({r['plain'] * mb:,.0f}) | "
                  f"{r['curve']:,.0f} ({r['curve'] * mb:,.0f}) | {r['curve'] / r['plain']:.2f} |", flush=True)


if __name__ == "__main__":
    main()
