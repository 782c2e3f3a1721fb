"""Throughput of the spectrometer path: shot records over 127.0.0.1 through the real driver, beside a raw
socket reading the same bytes from the same server, side by side in one process.

Run by hand: ``python benchmarks/drivers.py [--pixels 1024] [--shots 10000] [--repeats 7] [--seconds 1.5]``.

The server is the wire simulators' SCPI device framework with one extra trick: the spectrometer answers
``ACQuire:SHOTs? n`` with a record built once, so the simulated physics (about 58k shots/s with every
noise source on) is not what is measured. Three clients take turns on the same server for the same time:

- raw: a plain socket sends the query and ``recv_into``s the block into a preallocated buffer (the
  baseline: what the bytes alone cost through this server);
- driver over tcp://: ``ScpiDetector.acquire``, which parses the block and decodes it into a ShotBlock;
- driver over visa://: the same through pyvisa-py (``TCPIP0::127.0.0.1::PORT::SOCKET``).

The goal (issue: real drivers) is at least 10 kHz × 1024 px through the driver, about 21 MB/s. Medians over
the repeats and the ratio driver/raw are printed. This is a measurement script, not a test.
"""

from __future__ import annotations

import argparse
import socket
import statistics
import time
from typing import Any, Callable

import numpy as np

from shotpair.drivers.base import ShotBlock
from shotpair.drivers.scpi_devices import make_detector
from shotpair.drivers.shot_record import encode_shot_block
from shotpair.simulators.wire.scpi_device import ScpiDevice
from shotpair.simulators.wire.tcp_server import ScpiTcpServer

__all__ = ["main"]


def cached_record(n: int, pixels: int, seed: int = 1) -> bytes:
    rng = np.random.default_rng(seed)
    frame = np.arange(n, dtype=np.int64)
    block = ShotBlock(counts=rng.integers(0, 65535, (n, pixels), dtype=np.uint16), pump_on=frame % 2 == 0,
                      frame_id=frame)
    return bytes(encode_shot_block(block, four_state=False))


def make_server(pixels: int, record: bytes) -> ScpiTcpServer:
    device = ScpiDevice("detector", ["shotpair benchmark", "spectrometer", "bench-0001", "1"])
    device.add("SENSe:PIXels?", lambda a: str(pixels))
    device.add("SENSe:REFerence?", lambda a: "0")
    device.add("ACQuire:SHOTs?", lambda a: record, params=(1, 1), locked=False)
    server = ScpiTcpServer(device)
    server.start()
    return server


def raw_client(port: int, n: int, record: bytes) -> Callable[[], int]:
    sock = socket.create_connection(("127.0.0.1", port), timeout=10.0)
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    query = f"ACQ:SHOT? {n}\n".encode()
    want = len(record) + 1  # the block and its terminator
    buf = bytearray(want)
    view = memoryview(buf)

    def once() -> int:
        sock.sendall(query)
        got = 0
        while got < want:
            k = sock.recv_into(view[got:], want - got)
            if k == 0:
                raise ConnectionError("server closed")
            got += k
        return n

    once.close = sock.close  # type: ignore[attr-defined]
    return once


def driver_client(address: str, n: int, pixels: int) -> Callable[[], int]:
    det = make_detector("detector", {"address": address, "timeout_s": 10.0}, None)
    det.connect()
    assert det.pixels == pixels

    def once() -> int:
        block = det.acquire(n, timeout_s=10.0)
        return block.n_shots

    once.close = det.disconnect  # type: ignore[attr-defined]
    return once


def rate(fn: Callable[[], int], seconds: float) -> float:
    fn()  # warm up
    shots, t0 = 0, time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        shots += fn()
    return shots / (time.perf_counter() - t0)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pixels", type=int, default=1024)
    ap.add_argument("--shots", type=int, default=10_000, help="shots per block")
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--seconds", type=float, default=1.5, help="time per trial")
    args = ap.parse_args(argv)
    record = cached_record(args.shots, args.pixels)
    server = make_server(args.pixels, record)
    port = int(server.address.rsplit(":", 1)[1])
    clients: dict[str, Any] = {
        "raw socket": raw_client(port, args.shots, record),
        "driver tcp://": driver_client(f"tcp://127.0.0.1:{port}", args.shots, args.pixels),
        "driver visa://": driver_client(f"visa://TCPIP0::127.0.0.1::{port}::SOCKET", args.shots, args.pixels),
    }
    results: dict[str, list[float]] = {k: [] for k in clients}
    try:
        for _ in range(args.repeats):
            for name, fn in clients.items():  # alternate: every client sees the same machine load
                results[name].append(rate(fn, args.seconds))
    finally:
        for fn in clients.values():
            fn.close()
        server.request_stop()
        server.stop()
    mb = len(record) / args.shots / 1e6
    raw = statistics.median(results["raw socket"])
    print(f"{args.pixels} px, blocks of {args.shots} shots ({len(record) / 1e6:.1f} MB), {args.repeats} trials "
          f"of {args.seconds} s; medians (min-max)")
    print("| path | shots/s | MB/s | ratio to raw |\n|---|---|---|---|")
    for name, values in results.items():
        med = statistics.median(values)
        print(f"| {name} | {med:,.0f} ({min(values):,.0f}-{max(values):,.0f}) | {med * mb:,.0f} | {med / raw:.2f} |")


if __name__ == "__main__":
    main()
