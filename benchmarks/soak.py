"""Soak: a simulated 1 kHz scan in real time for a given number of minutes, with a subscriber attached and
control requests going on; does anything get lost, does memory grow, does control stay quick?

Run by hand: ``python benchmarks/soak.py [--minutes 10] [--shots-per-point 5000]`` (as long as asked, plus
about 20 s).

A ``shotpair serve`` subprocess (simulated bench, real time, not --fast; dropped frames switched off in the
simulator so that any gap is the software's) runs one scan of ``minutes × 60 × 1000 / shots_per_point``
point measurements: ``--grid`` delay points (default 10) swept as often as that takes, so that after the
first sweep every structure the daemon keeps per grid point exists and memory must stay flat. This process subscribes to every topic, asks ``status`` twice a second, and samples the
daemon's resident memory (/proc/PID/status VmRSS) every 5 s. At the end it reports:

- shots acquired (from the file) vs planned; frame gaps and unpaired shots inside blocks;
- time per point vs the nominal shots / repetition rate (the acquisition keeps up when the excess is only
  the move and settling);
- stream messages received and lost (``seq`` jumps), and the daemon's own dropped-event count;
- resident memory at start of acquisition, at the end and the highest;
- control round trip of ``status``: median, p99, max.

This is a measurement script, not a test.
"""

from __future__ import annotations

import argparse
import re
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import tomllib
from pathlib import Path

import h5py
import numpy as np

from shotpair.daemon.client import ControlClient, Subscriber
from shotpair.drivers.errors import ShotpairError
from shotpair.simulators.wire.launcher import dumps_toml

__all__ = ["main"]

ROOT = Path(__file__).resolve().parent.parent


def rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024.0
    return float("nan")


def bench_file(tmp: Path) -> Path:
    doc = tomllib.loads((ROOT / "configs" / "demo.toml").read_text())
    doc.pop("scan", None)
    doc.setdefault("simulation", {}).setdefault("noise", {})["dropped_frames"] = False
    path = tmp / "soak-bench.toml"
    path.write_text(dumps_toml(doc))
    return path


class Listener(threading.Thread):
    """Counts every message and every seq jump on the data stream until told to stop."""

    def __init__(self, endpoint: str) -> None:
        super().__init__(daemon=True)
        self.endpoint = endpoint
        self.stop = threading.Event()
        self.ready = threading.Event()
        self.counts: dict[str, int] = {}
        self.lost = 0
        self.ended_event = threading.Event()

    def run(self) -> None:
        last = None
        with Subscriber(self.endpoint) as sub:
            self.ready.set()
            while not self.stop.is_set():
                msg = sub.receive(0.2)
                if msg is None:
                    continue
                seq, kind = msg.get("seq"), msg.get("kind")
                if last is not None and seq > last + 1:
                    self.lost += seq - last - 1
                last = seq
                self.counts[kind] = self.counts.get(kind, 0) + 1
                if kind == "scan" and msg.get("event") in ("complete", "aborted"):
                    self.ended_event.set()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--shots-per-point", type=int, default=5000)
    ap.add_argument("--grid", type=int, default=10, help="delay points in the grid")
    args = ap.parse_args(argv)
    rep_hz = 1000.0
    grid = max(2, args.grid)
    sweeps = max(1, round(args.minutes * 60 * rep_hz / args.shots_per_point / grid))
    points = grid * sweeps
    with tempfile.TemporaryDirectory() as tmpname:
        tmp = Path(tmpname)
        output = tmp / "soak.h5"
        scan = {"title": "soak", "shots_per_point": args.shots_per_point, "sweeps": sweeps, "order": "alternating",
                "output": str(output),
                "delays": [{"kind": "linear", "start_ps": -2.0, "stop_ps": -2.0 + 0.5 * (grid - 1), "step_ps": 0.5}]}
        serve = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.cli", "serve", str(bench_file(tmp)),
                                  "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"],
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
        control = ""
        try:
            line = serve.stdout.readline()  # type: ignore[union-attr]
            m = re.search(r"data (\S+), control (\S+)", line)
            if not m:
                raise SystemExit(f"unexpected first line of serve: {line!r}")
            data, control = m.group(1), m.group(2)
            listener = Listener(data)
            listener.start()
            if not listener.ready.wait(10):
                raise SystemExit("subscriber did not start")
            latencies: list[float] = []
            memory: list[tuple[float, float]] = []
            with ControlClient(control, timeout_s=10.0) as c:
                c.start(scan=scan)
                t0 = time.monotonic()
                memory.append((0.0, rss_mib(serve.pid)))
                next_mem = 5.0
                deadline = t0 + args.minutes * 60 * 3 + 120
                tick = threading.Event()  # never set: its wait is the pacing of the status requests
                while not listener.ended_event.is_set() and time.monotonic() < deadline:
                    t = time.perf_counter()
                    st = c.status()
                    latencies.append(time.perf_counter() - t)
                    now = time.monotonic() - t0
                    if now >= next_mem:
                        memory.append((now, rss_mib(serve.pid)))
                        next_mem += 5.0
                    if st.get("state") == "idle" and st.get("last_scan_id") and len(latencies) > 4:
                        break
                    tick.wait(0.5)
                elapsed = time.monotonic() - t0
                memory.append((elapsed, rss_mib(serve.pid)))
                final = c.status()
            listener.stop.set()
            listener.join(10)
            with h5py.File(output, "r") as f:
                dg = f["entry/diagnostics"]
                shots = int(dg["shots"][()].sum())
                gaps = int(dg["gaps"][()].sum())
                unpaired = int(dg["unpaired_shots"][()].sum())
                measured_at = np.sort(dg["measured_at"][()].ravel())
                state = f["entry/state"][()].decode()
        finally:
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
    planned = points * args.shots_per_point
    per_point = np.diff(measured_at[np.isfinite(measured_at)])
    nominal = args.shots_per_point / rep_hz
    lat_ms = np.asarray(latencies) * 1e3
    mem = [m for _, m in memory]
    print(f"soak: {args.minutes:g} min asked, {elapsed / 60:.2f} min run, scan {state}, {sweeps} sweeps of {grid} "
          f"points of {args.shots_per_point} shots at {rep_hz:g} Hz")
    print(f"shots       {shots:,} acquired of {planned:,} planned; {gaps} frame gaps and {unpaired} unpaired "
          "shots inside blocks")
    print(f"per point   median {statistics.median(per_point):.3f} s, max {per_point.max():.3f} s "
          f"(nominal {nominal:.3f} s of shots + move and settling)")
    print(f"stream      {sum(listener.counts.values()):,} messages received "
          f"({', '.join(f'{k} {v}' for k, v in sorted(listener.counts.items()))}); {listener.lost} lost (seq jumps); "
          f"daemon dropped events {final.get('dropped_events')}")
    quarter = max(1, len(mem) // 4)
    print(f"memory      RSS {mem[0]:.1f} MiB at start, {mem[-1]:.1f} MiB at end, max {max(mem):.1f} MiB; median of "
          f"the first quarter {statistics.median(mem[:quarter]):.1f} MiB, of the last {statistics.median(mem[-quarter:]):.1f} "
          f"MiB ({len(mem)} samples)")
    print(f"control     status round trip median {np.median(lat_ms):.2f} ms, p99 {np.percentile(lat_ms, 99):.2f} ms, "
          f"max {lat_ms.max():.2f} ms ({lat_ms.size} requests)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
