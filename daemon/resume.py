"""Continue an interrupted scan in its own file (`shotpair resume FILE`).

Reads what the file holds (the configuration text, the bench and simulation settings that were in
effect, the sweep orders, which points are committed), checks all of it and builds the ScanJob the
runner continues with, before any instrument is built, let alone moved. A file it cannot continue is
refused with one StorageError or ConfigError naming the file: missing, not a scan file of this layout,
already complete, held open by a scan still writing it, or a stored configuration that no longer
validates or no longer gives the file's grid.

This module must not write to the file (the runner does, through daemon/store.py) nor touch an
instrument; its one write is the copy made for ``--output``.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import tomllib
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from shotpair.drivers.errors import ConfigError, StorageError
from shotpair.simulators.settings import SimulationSettings

from .config import LoadedConfig, check_output, load_config, parse_config
from .plan import make_plan
from .runner import ScanJob
from .store import check_free_space, publish_new_file

__all__ = ["ResumePlan", "prepare_resume", "resumed_simulation", "copy_for_resume"]

#: Delays or wavelengths closer than this are the same (ps, nm): far below anything a bench resolves.
_SAME = 1e-9
_NEEDED = ("entry/config/data", "entry/config/bench_settings", "entry/sweeps/completed", "entry/diagnostics/order",
           "entry/diagnostics/segment", "entry/accumulator", "entry/segments", "entry/delta_od/delay",
           "entry/delta_od/wavelength", "entry/scan_id", "entry/state", "entry/log_count")


def _text(value: object) -> str:
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)


@dataclass(frozen=True)
class ResumePlan:
    """A checked file and the job that continues it.

    ``points_done`` of ``points_total`` points are committed; ``next_point`` is the (sweep, position in
    that sweep) measured first, both counted from 0, or None when every point is in. ``notes`` are
    warnings for the user (an instrument now served by another driver than the file records).
    """

    path: Path
    job: ScanJob
    points_done: int
    points_total: int
    state: str
    reason: str
    next_point: tuple[int, int] | None
    notes: list[str] = field(default_factory=list)

    @property
    def config(self) -> LoadedConfig:
        return self.job.config


def _open_for_reading(p: Path, shown: str) -> h5py.File:
    if not p.exists():
        raise StorageError("file not found", path=shown)
    if not p.is_file():
        raise StorageError("not a file", path=shown)
    try:
        return h5py.File(p, "r")
    except OSError as exc:
        if "lock" in str(exc).lower():
            # HDF5 file locking: a writer holds it, i.e. a scan that is still running (LIBRARY-NOTES.md)
            raise StorageError("the file is open in another program (is its scan still running?)", path=shown) from None
        raise StorageError(f"cannot open as HDF5 ({exc})", path=shown) from None


def _read(p: Path, shown: str) -> dict[str, Any]:
    with _open_for_reading(p, shown) as f:
        missing = [k for k in _NEEDED if k not in f]
        if missing:
            raise StorageError(f"not a scan file shotpair can resume (no /{missing[0]}; it was written by an older "
                               "shotpair, or by another program)", path=shown)
        e = f["entry"]
        out: dict[str, Any] = {
            "state": _text(e["state"][()]), "reason": _text(e["state_reason"][()]) if "state_reason" in e else "",
            "scan_id": _text(e["scan_id"][()]), "config_text": _text(e["config/data"][()]),
            "bench_json": _text(e["config/bench_settings"][()]),
            "simulation_json": _text(e["config/simulation_settings"][()]) if "config/simulation_settings" in e else None,
            "completed": np.asarray(e["sweeps/completed"][()], dtype=bool),
            "orders": np.asarray(e["diagnostics/order"][()], dtype=np.int64),
            "delays_ps": np.asarray(e["delta_od/delay"][()], dtype=np.float64),
            "wavelengths_nm": np.asarray(e["delta_od/wavelength"][()], dtype=np.float64),
            "drivers": {name: _text(g["driver"][()]) for name, g in e["instrument"].items()
                        if isinstance(g, h5py.Group) and "driver" in g} if "instrument" in e else {},
        }
    return out


def _merged_config(p: Path, shown: str, stored: dict[str, Any], bench_path: str | None) -> LoadedConfig:
    """The stored [scan] and [stream] with the stored bench and simulation settings (or --bench's), validated."""
    label = f"{shown} (the configuration stored in it)"
    text = stored["config_text"]
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=label) from None
    if not isinstance(data.get("scan"), dict):
        raise ConfigError("no [scan] section", file=label, key_path="scan")
    merged: dict[str, Any] = {k: data[k] for k in ("scan", "stream") if k in data}
    # The file is the output now: its stored scan.output may name a folder of another computer.
    merged["scan"] = {**data["scan"], "output": str(p)}
    simulation = json.loads(stored["simulation_json"]) if stored["simulation_json"] else None
    if bench_path is not None:
        bench_cfg = load_config(bench_path)  # its own mistakes are named in its own file
        if bench_cfg.config.bench is None:
            raise ConfigError("no [bench] section", file=bench_cfg.path, key_path="bench")
        merged["bench"] = bench_cfg.config.bench.model_dump(mode="json")
        if bench_cfg.config.simulation is not None:
            simulation = bench_cfg.config.simulation.model_dump(mode="json")
        if bench_cfg.config.stream is not None and "stream" not in merged:
            merged["stream"] = bench_cfg.config.stream.model_dump(mode="json")
    else:
        try:
            merged["bench"] = json.loads(stored["bench_json"])
        except json.JSONDecodeError as exc:
            raise StorageError(f"the stored bench settings are damaged ({exc}); give --bench", path=shown) from None
    if simulation is not None:
        merged["simulation"] = simulation
    return parse_config(merged, label, text)


def prepare_resume(path: str | os.PathLike[str], *, bench_path: str | None = None) -> ResumePlan:
    """Check that the scan in ``path`` can be continued and build the job that continues it.

    ``bench_path`` takes the bench (and its [simulation], [stream]) from that file instead of the bench
    settings stored in the scan file (when an instrument moved to another port, say). Nothing is written
    and no instrument is touched. Raises StorageError (missing, unreadable, locked, not of this layout,
    complete, damaged orders) or ConfigError (a stored configuration that no longer validates, or whose
    grid, pixels or wavelengths differ from the file's), each naming the file.
    """
    p = Path(path).expanduser()
    shown = str(path)
    stored = _read(p, shown)
    completed: np.ndarray = stored["completed"]
    done, total = int(completed.sum()), int(completed.size)
    if stored["state"] == "complete":
        raise StorageError(f"the scan is already complete ({done} of {total} points); there is nothing to resume",
                           path=shown)
    if not os.access(p, os.W_OK):
        raise StorageError("the file is not writable (a resume adds the missing points to it; or give --output)",
                           path=shown)
    cfg = _merged_config(p, shown, stored, bench_path)
    label = cfg.path
    scan = cfg.require_scan()
    plan = make_plan(scan, cfg.bench, label)
    delays, wavelengths = stored["delays_ps"], stored["wavelengths_nm"]
    if plan.delays_ps.shape != delays.shape or not np.allclose(plan.delays_ps, delays, rtol=0.0, atol=_SAME):
        raise ConfigError(f"gives {plan.n_points} delays that differ from the {delays.size} in the file",
                          file=label, key_path="scan.delays")
    wl = cfg.bench.detector.wavelengths_nm()
    if wl.shape != wavelengths.shape:
        raise ConfigError(f"the bench has {wl.size} pixels, the file {wavelengths.size}", file=label,
                          key_path="bench.detector.pixels", value=wl.size, allowed=str(wavelengths.size))
    if not np.allclose(wl, wavelengths, rtol=0.0, atol=_SAME):
        raise ConfigError("the bench's wavelengths differ from the file's", file=label,
                          key_path="bench.detector.wavelength_poly_nm")
    orders = stored["orders"]
    n = plan.n_points
    if (orders.shape != (plan.sweeps, n) or completed.shape != orders.shape
            or any(not np.array_equal(np.sort(row), np.arange(n)) for row in orders)):
        raise StorageError(f"the sweep orders or completed flags in the file do not fit {plan.sweeps} sweep(s) of "
                           f"{n} points", path=shown)
    plan = dataclasses.replace(plan, orders=[row.copy() for row in orders])
    next_point = next(((s, k) for s, order in enumerate(orders) for k, i in enumerate(order) if not completed[s, i]),
                      None)
    notes = []
    sections = cfg.bench.instrument_sections()
    for name, driver in stored["drivers"].items():
        now = getattr(sections.get(name), "driver", None)
        if now is not None and now != driver:
            notes.append(f"the {name} recorded in the file used driver {driver!r}; the resume uses {now!r}")
    job = ScanJob(cfg, scan, plan, p, stored["scan_id"], resume=True)
    return ResumePlan(p, job, done, total, stored["state"], stored["reason"], next_point, notes)


def resumed_simulation(simulation: SimulationSettings | None, scan_seed: int | None,
                       points_done: int) -> SimulationSettings | None:
    """The simulated bench's settings for a resume that starts with ``points_done`` points in the file.

    With a seed, the resumed bench draws fresh random numbers from a seed derived from it and
    ``points_done`` (numpy SeedSequence): a resume does not repeat the noise the first run already
    measured, and resuming the same file at the same point twice repeats itself. A resume of a file with
    no point in it keeps the seed, so it reproduces the run that was interrupted.
    """
    if simulation is None:
        return None
    seed = simulation.seed if simulation.seed is not None else scan_seed
    if seed is None:
        return simulation
    if points_done > 0:
        seed = int(np.random.SeedSequence([int(seed), int(points_done)]).generate_state(1)[0])
    return simulation.model_copy(update={"seed": seed})


def copy_for_resume(source: str | os.PathLike[str], target: str) -> Path:
    """Copy a scan file to ``target`` (a new file) for a resume that leaves the original untouched.

    The copy appears under its name only once complete and synced. Raises ConfigError for a target that
    cannot be written, StorageError when it exists or the disk is too full.
    """
    src = Path(source)
    check_output(target, "--output", "--output")
    dst = Path(target).expanduser()
    if dst.exists():
        raise StorageError("already exists; --output must name a new file", path=str(dst))
    check_free_space(dst, src.stat().st_size)
    dst.parent.mkdir(parents=True, exist_ok=True)
    tmp = dst.with_name(f".{dst.name}.{uuid.uuid4().hex[:8]}.partial")
    try:
        shutil.copyfile(src, tmp)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        publish_new_file(tmp, dst)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise StorageError(f"cannot copy {str(src)!r} here ({exc})", path=str(dst)) from None
    return dst
