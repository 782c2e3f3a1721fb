"""Disk space and failing writes: refused or warned before the scan starts, and a write that fails in the
middle of a scan stops it with a clear error naming the file, keeping every point written before.

Failures are injected (monkeypatched ``shutil.disk_usage``, an OSError from the store's writes, a failing
``os.fsync``), never by filling a real disk. ENOSPC is "No space left on device" and EIO an I/O error
(POSIX errno values, Python's ``errno`` module).
"""

from __future__ import annotations

import errno
import os
from collections import namedtuple

import h5py
import numpy as np
import pytest

import shotpair.daemon.store as store_module
from shotpair.daemon.cli import main
from shotpair.daemon.runner import DelayDrive
from shotpair.daemon.store import ScanStore, check_free_space, estimate_file_bytes
from shotpair.drivers.errors import StorageError
from test_scan_end_to_end import PURE, read, reduced_chi2

Usage = namedtuple("Usage", "total used free")
ENDPOINTS = ["--data", "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*"]
MB = 1024 * 1024


def fake_free(monkeypatch, free_bytes: int) -> None:
    monkeypatch.setattr(store_module.shutil, "disk_usage", lambda path: Usage(10 * free_bytes, 0, free_bytes))


def make_store(path, n, px, sweeps, *, has_reference=False, truth=True):
    return ScanStore.create(path, scan_id="x", title="t", delays_ps=np.arange(n, dtype=float),
                            wavelengths_nm=np.linspace(400.0, 700.0, px), sweeps=sweeps,
                            orders=[np.arange(n)] * sweeps, config_text="[scan]\n" * 50, instruments={},
                            truth=np.zeros((n, px)) if truth else None, has_reference=has_reference,
                            settings_json={"bench": "{}"})


@pytest.mark.parametrize("n, px, sweeps, ref", [(23, 256, 2, False), (60, 1024, 3, True), (5, 16, 1, False)])
def test_the_size_estimate_bounds_the_real_file(tmp_path, n, px, sweeps, ref):
    path = tmp_path / "e.h5"
    make_store(path, n, px, sweeps, has_reference=ref).finish("complete")
    size = path.stat().st_size
    estimate = estimate_file_bytes(n, px, sweeps, has_reference=ref, text_bytes=len("[scan]\n" * 50) + 2)
    # the file is written in full at the start: the estimate must cover it, and not by much more
    assert size <= estimate <= 1.3 * size + 512 * 1024, (size, estimate)


def test_free_space_is_refused_or_warned_naming_the_file_and_folder(tmp_path, monkeypatch):
    target = tmp_path / "not" / "yet" / "scan.h5"  # measured on the nearest folder that exists
    seen = []
    monkeypatch.setattr(store_module.shutil, "disk_usage", lambda p: seen.append(p) or Usage(0, 0, 10 * MB))
    with pytest.raises(StorageError, match=r"not enough free disk space: the scan file needs about 20\.0 MB, .* "
                                           r"has 10\.0 MB free") as info:
        check_free_space(target, 20 * MB)
    assert str(target) in str(info.value) and str(tmp_path) in str(info.value) and seen[-1] == tmp_path
    warning = check_free_space(target, 6 * MB)
    assert warning is not None and "more than half of the 10.0 MB free" in warning
    assert check_free_space(target, 4 * MB) is None


def test_a_scan_that_cannot_fit_is_refused_before_anything_moves(small_scan, monkeypatch, capsys):
    cfg = small_scan(noise=PURE, shots=100, name="full")
    moves = []
    monkeypatch.setattr(DelayDrive, "prepare", lambda self: moves.append("prepare"))
    fake_free(monkeypatch, 1 * MB)
    assert main(["run", str(cfg), "--fast", *ENDPOINTS]) == 2  # a storage mistake: refused before the bench
    err = capsys.readouterr().err
    assert f"error: {cfg.with_suffix('.h5')}: not enough free disk space" in err
    assert "Traceback" not in err and moves == []
    assert list(cfg.parent.glob("*.h5")) == [] and list(cfg.parent.glob(".*partial")) == []


def test_a_scan_that_takes_most_of_the_disk_is_warned_about_and_runs(small_scan, monkeypatch, capsys):
    cfg = small_scan(noise=PURE, shots=100, name="tight")
    fake_free(monkeypatch, int(1.5 * estimate_file_bytes(23, 256, 2)))
    assert main(["run", str(cfg), "--fast", *ENDPOINTS]) == 0
    assert "warning: the scan file (" in capsys.readouterr().err
    with h5py.File(cfg.with_suffix(".h5"), "r") as f:
        assert "takes more than half" in f["entry/log"][0].decode()
        assert f["entry/log_count"][()] == 1


def fail_from_point(monkeypatch, k: int, error: OSError, where: str = "write") -> None:
    """Make the store's k-th point (1-based) and everything after it fail with ``error``:
    at its data writes (``where="write"``), or at every fsync from then on (``where="fsync"``)."""
    calls = {"n": 0}
    real_write, real_fsync = ScanStore._write_point_data, os.fsync

    def write(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] >= k and where == "write":
            raise error
        return real_write(self, *args, **kwargs)

    def fsync(fd):
        if calls["n"] >= k:
            raise error
        return real_fsync(fd)

    monkeypatch.setattr(ScanStore, "_write_point_data", write)
    if where == "fsync":
        monkeypatch.setattr(store_module.os, "fsync", fsync)


def test_a_full_disk_mid_scan_stops_it_keeps_the_points_and_resume_finishes(small_scan, monkeypatch, capsys):
    cfg = small_scan(noise=PURE, shots=200, name="enospc")
    path = cfg.with_suffix(".h5")
    fail_from_point(monkeypatch, 6, OSError(errno.ENOSPC, "No space left on device"))
    assert main(["run", str(cfg), "--fast", *ENDPOINTS]) == 1
    err = capsys.readouterr().err
    assert f"error: {path}: disk full: cannot write point" in err and "the points written before are kept" in err
    assert "Traceback" not in err and "internal error" not in err and "WARNING" not in err  # bench left safe
    with h5py.File(path, "r") as f:
        e = f["entry"]
        assert e["state"][()].decode() == "aborted"
        reason = e["state_reason"][()].decode()
        assert "disk full" in reason and str(path) in reason
        done = e["sweeps/completed"][()]
        assert done.sum() == 5
        assert np.isfinite(e["sweeps/delta_od"][()][done]).all()
    monkeypatch.undo()  # the disk has room again
    assert main(["resume", str(path), "--fast", *ENDPOINTS]) == 0
    d = read(path)
    assert d["state"] == "complete" and d["completed"].all()
    assert 0.8 < reduced_chi2(d)[0] < 1.25


def test_a_failing_fsync_stops_the_scan_with_a_storage_error(small_scan, monkeypatch, capsys):
    cfg = small_scan(noise=PURE, shots=200, name="eio")
    path = cfg.with_suffix(".h5")
    fail_from_point(monkeypatch, 4, OSError(errno.EIO, "Input/output error"), where="fsync")
    assert main(["run", str(cfg), "--fast", *ENDPOINTS]) == 1
    err = capsys.readouterr().err
    assert f"error: {path}: cannot write point" in err and "Input/output error" in err
    # the end mark could be flushed but not synced: reported, never a traceback
    assert f"WARNING: could not mark {path} aborted" in err and "Traceback" not in err
    with h5py.File(path, "r") as f:
        assert f["entry/sweeps/completed"][()].sum() == 3
        assert f["entry/state"][()].decode() == "aborted"


def test_a_file_that_cannot_be_laid_out_leaves_nothing_behind(tmp_path, monkeypatch):
    def no_room(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(ScanStore, "_lay_out", staticmethod(no_room))
    with pytest.raises(StorageError, match="disk full: cannot create the output file"):
        make_store(tmp_path / "x.h5", 3, 8, 1)
    assert list(tmp_path.iterdir()) == []


def test_an_existing_file_is_never_replaced(tmp_path):
    path = tmp_path / "keep.h5"
    path.write_bytes(b"precious")
    with pytest.raises(StorageError, match="cannot create the output file"):
        make_store(path, 3, 8, 1)
    assert path.read_bytes() == b"precious" and sorted(p.name for p in tmp_path.iterdir()) == ["keep.h5"]
