"""Crash safety of the scan file, and `shotpair resume FILE`.

The kill loop runs `shotpair run CFG --fast` as a subprocess, learns which points were announced from
the live data stream (127.0.0.1, a free port), SIGKILLs it at a random moment (a random number of
announced points plus a random delay inside the next point, both drawn from a seeded generator while
listening to the stream), checks the file, and resumes it with `shotpair resume FILE --fast`, killing
that again, until the scan completes. After every kill the file must open with plain h5py and with
nexusformat, say "running", and hold exactly every point announced: the runner announces a point only
after both of its commit steps were flushed and fsync'ed (daemon/store.py). At the end the file must
be complete, hold every point measured once per sweep, combine the sweeps bit for bit as the runner's
running merge does, and agree with the simulator's truth as an uncrashed scan does
(test_scan_end_to_end.py: reduced chi-square 1 within its bounds).

SHOTPAIR_KILLS sets the number of kills (default 12; a longer soak: SHOTPAIR_KILLS=200).
"""

from __future__ import annotations

import os
import queue
import re
import subprocess
import sys
import threading
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from shotpair.daemon import cli as cli_module
from shotpair.daemon.cli import main
from shotpair.daemon.client import Subscriber
from shotpair.daemon.point_result import PointResult
from shotpair.daemon.store import ScanStore
from test_scan_end_to_end import PURE, read, reduced_chi2

KILLS = int(os.environ.get("SHOTPAIR_KILLS", "12"))
START_TIMEOUT_S = 60.0
END_TIMEOUT_S = 120.0
SHOTS = 300


class Cli:
    """A `shotpair` subprocess with its stderr read line by line into a queue (None at its end)."""

    def __init__(self, args: list[str], cwd: Path) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.cli", *args], cwd=cwd,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        self.lines: queue.Queue[str | None] = queue.Queue()
        self.seen: list[str] = []
        self.ended = False  # its stderr has ended (the None was taken from the queue)
        threading.Thread(target=self._pump, daemon=True).start()

    def _pump(self) -> None:
        for line in self.proc.stderr:  # type: ignore[union-attr]
            self.lines.put(line)
        self.lines.put(None)

    def endpoint(self, timeout_s: float) -> str | None:
        """The data endpoint it prints before the scan starts; None if it ends first."""
        deadline = time.monotonic() + timeout_s
        while True:
            try:
                line = self.lines.get(timeout=max(0.0, deadline - time.monotonic()))
            except queue.Empty:
                raise AssertionError("no data endpoint within the timeout:\n" + "".join(self.seen)) from None
            if line is None:
                self.ended = True
                return None
            self.seen.append(line)
            m = re.search(r"live data on (\S+),", line)
            if m:
                return m.group(1)

    def rest(self, timeout_s: float) -> str:
        """Everything it printed, once its stderr has ended (it has exited or been killed)."""
        deadline = time.monotonic() + timeout_s
        while not self.ended:
            try:
                line = self.lines.get(timeout=max(0.0, deadline - time.monotonic()))
            except queue.Empty:
                raise AssertionError("stderr did not end:\n" + "".join(self.seen)) from None
            if line is None:
                self.ended = True
                break
            self.seen.append(line)
        return "".join(self.seen)

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait(timeout=30)


def plan_order(f: h5py.File) -> list[tuple[int, int]]:
    """(sweep, grid index) of every point, in the order the scan measures them."""
    orders = f["entry/diagnostics/order"][()]
    return [(s, int(i)) for s, order in enumerate(orders) for i in order]


def runner_merge(path: Path) -> tuple[np.ndarray, list[PointResult | None]]:
    """The running merge the runner keeps, redone from the stored per-sweep sums in the scan's order."""
    with h5py.File(path, "r") as f:
        store = ScanStore(path, f)
        completed = f["entry/sweeps/completed"][()]
        per_sweep = [store.point_results(s) for s in range(completed.shape[0])]
        merged: list[PointResult | None] = [None] * completed.shape[1]
        for s, i in plan_order(f):
            if completed[s, i]:
                r = per_sweep[s][i]
                merged[i] = r if merged[i] is None else PointResult.combine([merged[i], r])
    return completed, merged


def mismatched_indices(path: Path) -> list[int]:
    """Grid points whose stored running average differs (bit for bit) from the merge of committed points."""
    completed, merged = runner_merge(path)
    with h5py.File(path, "r") as f:
        dod = f["entry/delta_od/delta_od"][()]
        err = f["entry/delta_od/delta_od_errors"][()]
    bad = []
    for i, m in enumerate(merged):
        want_dod = np.full(dod.shape[1], np.nan) if m is None else m.delta_od
        want_err = np.full(dod.shape[1], np.nan) if m is None else m.delta_od_error
        if not (np.array_equal(dod[i], want_dod, equal_nan=True) and np.array_equal(err[i], want_err, equal_nan=True)):
            bad.append(i)
    return bad


def check_killed_file(path: Path, announced: dict[tuple[int, int], object], most_done: int) -> int:
    """What a SIGKILL must leave; returns the number of committed points (-1: the file was complete, the
    kill came as the process was ending)."""
    if not path.exists():
        # killed while the file was being laid out (under a temporary name): nothing can have been announced
        assert most_done == 0 and not announced
        return 0
    from nexusformat.nexus import nxload

    root = nxload(str(path), "r")  # the NeXus API walks the whole tree: every object must be readable
    try:
        assert root.plottable_data.nxsignal.nxname == "delta_od"
    finally:
        root.nxfile.close()
    with h5py.File(path, "r") as f:
        e = f["entry"]
        completed = e["sweeps/completed"][()]
        order = plan_order(f)
        m = int(completed.sum())
        # the committed points are exactly the first m of the scan's order, m at least what was announced
        assert [completed[p] for p in order] == [True] * m + [False] * (len(order) - m)
        assert m >= most_done
        state = e["state"][()].decode()
        assert state == "running" or (state == "complete" and m == len(order)), state
        for (s, i), msg in announced.items():
            assert completed[s, i]
            # exactly what was announced: the stream carries the float64 arrays unchanged
            np.testing.assert_array_equal(e["sweeps/delta_od"][s, i], msg.arrays["delta_od"])
            np.testing.assert_array_equal(e["sweeps/delta_od_errors"][s, i], msg.arrays["delta_od_error"])
            np.testing.assert_array_equal(e["diagnostics/noise_floor"][s, i], msg.arrays["noise_floor"])
            assert int(e["diagnostics/pairs"][s, i]) == msg["pairs"]
            assert int(e["diagnostics/shots"][s, i]) == msg["shots"]
    # a kill between the two commit steps can leave the running average one point ahead or behind
    assert len(mismatched_indices(path)) <= 1
    return -1 if state == "complete" else m


def listen_and_kill(cli: Cli, rng: np.random.Generator) -> tuple[dict[tuple[int, int], object], int, bool]:
    """Listen to the stream until a random number of points is announced, then a random delay more,
    and SIGKILL. Returns (announced points heard, highest points_done heard, whether it ended by itself)."""
    announced: dict[tuple[int, int], object] = {}
    most_done = 0
    endpoint = cli.endpoint(START_TIMEOUT_S)
    if endpoint is None:
        return announced, most_done, True
    target = int(rng.integers(0, 6))
    extra_s = float(rng.uniform(0.0, 0.04))
    ended = False

    def take(msg) -> None:
        nonlocal most_done, ended
        if msg.topic == "point":
            announced[(int(msg["sweep"]), int(msg["index"]))] = msg
            most_done = max(most_done, int(msg["points_done"]))
        elif msg.topic == "scan" and msg["event"] in ("complete", "aborted"):
            ended = True

    with Subscriber(endpoint, topics=["point", "scan"]) as sub:
        deadline = time.monotonic() + END_TIMEOUT_S
        kill_at = None
        while not ended and cli.proc.poll() is None:
            now = time.monotonic()
            assert now < deadline, "the scan neither advanced nor ended"
            if kill_at is None and len(announced) >= target:
                kill_at = now + extra_s
            if kill_at is not None and now >= kill_at:
                break
            wait = 0.2 if kill_at is None else kill_at - now
            msg = sub.receive(timeout_s=max(0.0, min(wait, 0.2)))
            if msg is not None:
                take(msg)
        if ended:  # the scan ended before the chosen moment: let the process exit by itself
            cli.proc.wait(timeout=END_TIMEOUT_S)
        cli.kill()
        while (msg := sub.receive(timeout_s=0.0)) is not None:  # what had arrived before the kill
            take(msg)
    return announced, most_done, ended or cli.proc.returncode == 0


def args_for(cfg: Path, path: Path) -> list[str]:
    verb = ["resume", str(path)] if path.exists() else ["run", str(cfg)]
    return [*verb, "--fast", "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"]


def crash_and_resume(cfg: Path, cwd: Path, rng: np.random.Generator, max_kills: int) -> list[int]:
    """Kill one scan up to ``max_kills`` times (checking the file after each), then let a resume finish
    it and check the result. Returns the committed points found after each kill."""
    path = cfg.with_suffix(".h5")
    committed: list[int] = []
    finished = False
    while len(committed) < max_kills:
        cli = Cli(args_for(cfg, path), cwd)
        try:
            announced, most_done, finished = listen_and_kill(cli, rng)
            text = cli.rest(30.0)
        finally:
            cli.kill()
        assert "Traceback" not in text, text
        if finished:
            assert cli.proc.returncode == 0, text
            break
        committed.append(check_killed_file(path, announced, most_done))
        if committed[-1] < 0:  # killed after the scan had ended: nothing left to resume
            finished = True
            break
    if not finished:
        cli = Cli(args_for(cfg, path), cwd)
        try:
            assert cli.proc.wait(timeout=END_TIMEOUT_S) == 0, cli.rest(30.0)
        finally:
            cli.kill()

    d = read(path)
    assert d["state"] == "complete" and d["completed"].all()
    with h5py.File(path, "r") as f:
        e = f["entry"]
        # every point measured once per sweep: exactly its own shots, in the scan's order
        assert (e["diagnostics/shots"][()] == SHOTS).all()
        assert (e["accumulator/shots"][()] == SHOTS).all()
        when = np.array([e["diagnostics/measured_at"][s, i] for s, i in plan_order(f)])
        assert np.all(np.diff(when) >= 0)
        segments = e["diagnostics/segment"][()]
        assert segments.min() >= 0
        if max(committed, default=0) > 0:
            assert len(np.unique(segments)) >= 2  # really measured across resumes
    # the sweeps merged exactly as the runner's running average does
    assert mismatched_indices(path) == []
    chi2, z = reduced_chi2(d)
    assert 0.8 < chi2 < 1.25, chi2
    assert abs(float(z.mean())) < 0.1
    return committed


def test_kill_at_random_moments_and_resume(small_scan, tmp_path):
    rng = np.random.default_rng(20261202)
    kills: list[int] = []
    scans = 0
    while len(kills) < KILLS:  # one scan by default; SHOTPAIR_KILLS beyond what one scan takes runs more
        cfg = small_scan(noise=PURE, shots=SHOTS, name=f"crash{scans}", seed=3 + scans)
        committed = crash_and_resume(cfg, tmp_path, rng, KILLS - len(kills))
        assert len(committed) >= min(KILLS - len(kills), 5), f"the scan ended after {len(committed)} kills"
        kills += committed
        scans += 1
    print(f"{len(kills)} kills in {scans} scan(s); committed points after each: {kills}")  # pytest -s shows it
    assert max(kills) > 0  # some kills came after points were committed


# ---------------------------------------------------------------------- resume in-process
def abort_after(cfg: Path, points: int, tmp_path: Path) -> Path:
    """Run the scan in-process and abort it once ``points`` points are saved; returns the file."""
    from shotpair.daemon.bench import build_bench
    from shotpair.daemon.config import load_config
    from shotpair.daemon.events import PointSaved, ScanEnded
    from shotpair.daemon.plan import make_plan
    from shotpair.daemon.runner import Runner, ScanJob, new_scan_id

    loaded = load_config(cfg)
    scan = loaded.require_scan()
    bench = build_bench(loaded.bench, loaded.config.simulation, realtime=False, seed=scan.seed)
    bench.connect()
    runner = Runner(bench)
    try:
        runner.start(ScanJob(loaded, scan, make_plan(scan, loaded.bench), cfg.with_suffix(".h5"), new_scan_id()))
        while True:
            ev = runner.events.get(timeout=START_TIMEOUT_S)
            if isinstance(ev, PointSaved) and ev.points_done == points:
                runner.abort("test stop")
            if isinstance(ev, ScanEnded):
                assert ev.state == "aborted"
                break
        assert runner.join(START_TIMEOUT_S)
    finally:
        runner.close()
        bench.disconnect()
    return cfg.with_suffix(".h5")


def resume_args(path: Path, *extra: str) -> list[str]:
    return ["resume", str(path), "--fast", "--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", *extra]


def test_resume_of_an_aborted_scan_completes_it_and_refuses_a_second_time(small_scan, tmp_path, capsys):
    path = abort_after(small_scan(noise=PURE, shots=200, name="aborted"), 7, tmp_path)
    with h5py.File(path, "r") as f:
        before = f["entry/sweeps/delta_od"][()]
        kept = f["entry/sweeps/completed"][()]
        assert f["entry/state"][()].decode() == "aborted" and kept.sum() >= 7
    assert main(resume_args(path)) == 0
    err = capsys.readouterr().err
    assert f"resuming: {int(kept.sum())} of {kept.size} points are in the file (it was aborted: test stop)" in err
    d = read(path)
    assert d["state"] == "complete" and d["completed"].all() and d["reason"] == ""
    with h5py.File(path, "r") as f:
        # the points measured before the resume are untouched, the new ones come from segment 1 with its own dark
        np.testing.assert_array_equal(f["entry/sweeps/delta_od"][()][kept], before[kept])
        seg = f["entry/diagnostics/segment"][()]
        assert (seg[kept] == 0).all() and (seg[~kept] == 1).all()
        assert np.isfinite(f["entry/segments/dark_counts"][1]).all()
        assert f["entry/segments/points_done_at_start"][1] == kept.sum()
        log = [x.decode() for x in f["entry/log"][()] if x]
        assert any("resumed (run segment 1)" in line for line in log)
    assert mismatched_indices(path) == []
    assert 0.8 < reduced_chi2(d)[0] < 1.25
    # a complete file is refused, untouched, without building a bench
    raw = path.read_bytes()
    assert main(resume_args(path)) == 2
    err = capsys.readouterr().err
    assert f"{path}: the scan is already complete ({kept.size} of {kept.size} points)" in err
    assert "Traceback" not in err and path.read_bytes() == raw


def test_resume_to_a_copy_leaves_the_original_as_it_was(small_scan, tmp_path):
    path = abort_after(small_scan(noise=PURE, shots=200, name="orig"), 3, tmp_path)
    raw = path.read_bytes()
    copy = tmp_path / "more" / "copy.h5"
    assert main(resume_args(path, "--output", str(copy))) == 0
    assert path.read_bytes() == raw
    assert read(copy)["state"] == "complete" and read(path)["state"] == "aborted"
    assert main(resume_args(path, "--output", str(copy))) == 2  # never over an existing file


def refuse(argv: list[str], capsys, monkeypatch) -> str:
    """Run ``argv`` in-process, which must fail with one clear line before any bench is built."""

    def no_bench(*args, **kwargs):
        raise AssertionError("a bench was built before the file was refused")

    monkeypatch.setattr(cli_module, "build_bench", no_bench)
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.startswith("shotpair: error: ")
    return err


def test_files_that_cannot_be_resumed_are_refused_before_anything_moves(small_scan, tmp_path, capsys, monkeypatch):
    path = abort_after(small_scan(noise=PURE, shots=200, name="damaged"), 2, tmp_path)
    assert "file not found" in refuse(resume_args(tmp_path / "none.h5"), capsys, monkeypatch)
    junk = tmp_path / "junk.h5"
    junk.write_text("not hdf5")
    assert "cannot open as HDF5" in refuse(resume_args(junk), capsys, monkeypatch)
    older = tmp_path / "older.h5"
    with h5py.File(older, "w") as f:
        f.create_dataset("entry/state", data="aborted")
    assert "not a scan file shotpair can resume" in refuse(resume_args(older), capsys, monkeypatch)

    with h5py.File(path, "r") as f:
        text = f["entry/config/data"][()].decode()
    bad = tmp_path / "bad.h5"
    bad.write_bytes(path.read_bytes())
    with h5py.File(bad, "r+") as f:  # a configuration that no longer validates (a test can rewrite it)
        f["entry/config/data"][()] = text.replace("shots_per_point = 200", "shots_per_point = -5")
    err = refuse(resume_args(bad), capsys, monkeypatch)
    assert f"{bad} (the configuration stored in it)" in err and "scan.shots_per_point" in err
    other = tmp_path / "other.h5"
    other.write_bytes(path.read_bytes())
    with h5py.File(other, "r+") as f:  # valid, but no longer the grid the file was laid out for
        f["entry/config/data"][()] = text.replace("points = 8", "points = 9")
    err = refuse(resume_args(other), capsys, monkeypatch)
    assert "scan.delays" in err and "differ from the 23 in the file" in err


def test_a_file_still_being_written_is_refused(small_scan, tmp_path):
    path = abort_after(small_scan(noise=PURE, shots=200, name="held"), 2, tmp_path)
    # HDF5 file locking (LIBRARY-NOTES.md): a writer holding the file keeps other processes out
    with h5py.File(path, "r+"):
        proc = subprocess.run([sys.executable, "-m", "shotpair.daemon.cli", *resume_args(path)], cwd=tmp_path,
                              capture_output=True, text=True, timeout=END_TIMEOUT_S)
    assert proc.returncode == 2
    assert f"{path}: the file is open in another program (is its scan still running?)" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_a_file_with_every_point_is_marked_complete_without_a_bench(small_scan, tmp_path, capsys, monkeypatch):
    path = abort_after(small_scan(noise=PURE, shots=200, name="ends"), 2, tmp_path)
    with h5py.File(path, "r+") as f:  # as if killed after the last point's commit and before its end mark
        f["entry/sweeps/completed"][...] = True
    monkeypatch.setattr(cli_module, "build_bench", lambda *a, **k: pytest.fail("no bench is needed"))
    assert main(resume_args(path)) == 0
    assert "all 46 point(s) were already in" in capsys.readouterr().err
    assert read(path)["state"] == "complete"


def test_point_results_round_trip_exactly(tmp_path):
    rng = np.random.default_rng(4)
    px, n = 16, 3
    store = ScanStore.create(tmp_path / "r.h5", scan_id="x", title="t", delays_ps=np.arange(n, dtype=float),
                             wavelengths_nm=np.linspace(400, 700, px), sweeps=2, orders=[np.arange(n)] * 2,
                             config_text="", instruments={})

    def result(seed_shift: int) -> PointResult:
        count = rng.integers(0, 50, px)
        return PointResult(count=count, mean=rng.normal(size=px), m2=rng.random(px), sigma2_sum=rng.random(px),
                           counts_on_sum=rng.random(px) * 1e6, counts_off_sum=rng.random(px) * 1e6,
                           saturated=rng.integers(0, 3, px), nonpositive=rng.integers(0, 3, px),
                           shots=100 + seed_shift, pairs=50, rejected_pairs=1, unpaired_shots=2, gaps=3, blocks=4,
                           background_missing_blocks=5, phase_breaks=6)

    written = {(s, i): result(10 * s + i) for s in range(2) for i in range(n)}
    for (s, i), r in written.items():
        store.write_point(s, i, r, r, position_mm=0.0, delay_readback_ps=0.0, measured_at_s=0.0)
    for s in range(2):
        for i, got in enumerate(store.point_results(s)):
            want = written[(s, i)]
            for field in want.__dataclass_fields__:
                a, b = getattr(want, field), getattr(got, field)
                assert np.array_equal(a, b) and np.asarray(a).dtype == np.asarray(b).dtype, field
    completed, merged = store.committed()
    assert completed.all()
    for i in range(n):
        want = PointResult.combine([written[(0, i)], written[(1, i)]])
        assert np.array_equal(merged[i].mean, want.mean) and np.array_equal(merged[i].m2, want.m2)
    store.finish("complete")


def test_a_point_is_committed_in_two_durable_steps(tmp_path, monkeypatch):
    import shotpair.daemon.store as store_module

    store = ScanStore.create(tmp_path / "c.h5", scan_id="x", title="t", delays_ps=np.arange(2, dtype=float),
                             wavelengths_nm=np.linspace(400, 700, 4), sweeps=1, orders=[np.arange(2)],
                             config_text="", instruments={})
    seen: list[tuple[bool, bool]] = []
    synced_fds: list[int] = []
    real_fsync = os.fsync

    def spy_fsync(fd: int) -> None:
        synced_fds.append(fd)
        # what the OS holds of the file when each fsync is asked for (its bytes, read through another
        # descriptor into a copy, as a crash would leave them): (point data there, completed flag set)
        copy = tmp_path / f"copy{len(seen)}.h5"
        copy.write_bytes((tmp_path / "c.h5").read_bytes())
        with h5py.File(copy, "r", locking=False) as f:
            seen.append((bool(np.isfinite(f["entry/sweeps/delta_od"][0, 1]).all()),
                         bool(f["entry/accumulator/count"][0, 1].sum() == 12), bool(f["entry/sweeps/completed"][0, 1])))
        real_fsync(fd)

    monkeypatch.setattr(store_module.os, "fsync", spy_fsync)
    r = PointResult.empty(4)
    r = PointResult.combine([r, PointResult(np.full(4, 3), np.full(4, 0.01), np.full(4, 1e-6), np.ones(4),
                                            np.ones(4), np.ones(4), np.zeros(4, np.int64), np.zeros(4, np.int64))])
    store.write_point(0, 1, r, r, position_mm=0.0, delay_readback_ps=0.0, measured_at_s=0.0)
    assert seen == [(True, True, False), (True, True, True)]  # data durable first, then the flag saying so
    # h5py: get_vfd_handle() is the file's own descriptor (sec2 driver): the same file as on disk
    assert all(os.fstat(fd).st_ino == os.stat(tmp_path / "c.h5").st_ino for fd in synced_fds)
    assert store.last_commit_s > 0.0
    store.finish("complete")
