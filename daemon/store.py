"""Write a scan to HDF5, laid out after the NeXus conventions so general viewers plot it without help.

Layout (n delays, p pixels, s sweeps)::

    /                      NX_class=NXroot, default="entry"
    /entry                 NXentry, default="delta_od"; title, scan_id, state, state_reason,
                           start_time, end_time, program_name (@version)
    /entry/delta_od        NXdata: delta_od[n,p] (signal), delta_od_errors[n,p], delay[n] (ps), wavelength[p] (nm)
    /entry/sweeps          NXdata: delta_od[s,n,p], delta_od_errors[s,n,p], sweep[s], delay, wavelength
    /entry/diagnostics     NXcollection: floors, excess noise, mean counts, pair counts, stage read-back ...
    /entry/dark            NXcollection: the dark of the first run segment
    /entry/accumulator     NXcollection: each point's mergeable sums (PointResult's fields), [s,n,p] and [s,n]
    /entry/segments        NXcollection: the first run and every `shotpair resume` of it: start, dark
    /entry/instrument      NXinstrument: driver, identity and state of every instrument
    /entry/config          NXnote: the configuration text the scan ran with, the bench settings in effect
    /entry/simulation_truth  NXdata (simulated benches only): the simulator's noise-free ΔOD
    /entry/log             fixed-length lines (log_count of them used)

Crash safety. The whole file is laid out, written and fsync'ed under a temporary name that becomes the
final name only when it is complete (a hard link, so an existing file is never replaced). After that the
file's structure never changes: only values inside existing fixed-size datasets are overwritten. (Measured,
DEVELOPERS.md: a SIGKILL while HDF5 adds an object or rewrites a variable-length string can leave objects
unreadable; in-place writes of fixed-size data never did.) So state, reason, end time and log lines are
fixed-length strings, and the dark, the truth and room for resumes are allocated at the start.

Each delay point is committed in two steps, each flushed and fsync'ed: first its data and sums, then its
``completed`` flag with the running average over sweeps. A set flag therefore means the point is whole on
the disk, and its announcement goes out only afterwards (persist first, then publish). Unmeasured entries
are NaN. This module knows nothing of instruments or sockets.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import errno
import json
import logging
import os
import shutil
import time
import uuid
from importlib.metadata import version
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from shotpair.drivers.errors import StorageError

from .point_result import PointResult

__all__ = ["ScanStore", "unique_path", "software_version", "estimate_file_bytes", "check_free_space",
           "check_scan_space", "publish_new_file", "accumulator_fields", "SEGMENT_SLOTS", "LOG_LINES"]

log = logging.getLogger(__name__)

_STR = h5py.string_dtype()
#: Run segments a file has room for: the first run and up to SEGMENT_SLOTS - 1 resumes.
SEGMENT_SLOTS = 64
#: Lines the log keeps (later ones are counted in log_count, not kept) and the bytes of each (UTF-8).
LOG_LINES, LOG_LINE_BYTES = 400, 400
_STATE_BYTES, _REASON_BYTES, _TIME_BYTES = 16, 1024, 40
#: Scalar (per point) datasets the layout holds, counted generously for the size estimate.
_SCALARS_PER_POINT = 40


def _fixed(text: str, nbytes: int) -> np.ndarray:
    """``text`` as a fixed-length UTF-8 string of ``nbytes`` (cut at a character boundary if longer)."""
    raw = text.encode("utf-8")[:nbytes].decode("utf-8", "ignore").encode("utf-8")
    return np.array(raw, dtype=h5py.string_dtype("utf-8", nbytes))


def accumulator_fields() -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(per-pixel array fields, scalar fields) of PointResult: what /entry/accumulator holds per point."""
    scalars = tuple(PointResult._SCALARS)
    arrays = tuple(f.name for f in dataclasses.fields(PointResult) if f.name not in scalars)
    return arrays, scalars


def estimate_file_bytes(n_points: int, pixels: int, sweeps: int, *, has_reference: bool = False,
                        text_bytes: int = 0) -> int:
    """Bytes a scan file of this layout takes (an upper estimate, within a few per cent for large scans).

    The file is written in full when the scan starts, so this is also what the disk must have free then.
    """
    arrays, _ = accumulator_fields()
    per_sweep = 6 + len(arrays)            # sweeps (2), diagnostics (4), accumulator [s, n, p]
    per_point = 5                          # main map and errors, floor and excess noise, truth [n, p]
    ref = 2 if has_reference else 1
    values = (per_sweep * sweeps * n_points * pixels + per_point * n_points * pixels
              + _SCALARS_PER_POINT * sweeps * n_points + ref * (SEGMENT_SLOTS + 1) * pixels
              + 8 * SEGMENT_SLOTS + 2 * (n_points + pixels + sweeps))
    fixed = LOG_LINES * LOG_LINE_BYTES + _REASON_BYTES + 256 * 1024  # log, strings, HDF5 metadata
    return int(8 * values * 1.01) + fixed + 2 * int(text_bytes)


def check_scan_space(path: str | os.PathLike[str], n_points: int, pixels: int, sweeps: int, *,
                     has_reference: bool = False, text_bytes: int = 0) -> str | None:
    """:func:`check_free_space` for a scan of this size (the early check before anything is built)."""
    needed = estimate_file_bytes(n_points, pixels, sweeps, has_reference=has_reference, text_bytes=text_bytes)
    return check_free_space(path, needed)


def _nearest_folder(path: Path) -> Path:
    probe = path.parent if str(path.parent) else Path(".")
    while not probe.exists() and probe.parent != probe:
        probe = probe.parent
    return probe


def check_free_space(path: str | os.PathLike[str], needed_bytes: int) -> str | None:
    """Refuse a file that cannot fit on its disk; warn when it takes more than half of the free space.

    Returns the warning text, or None. Raises StorageError (naming the file, the folder, the bytes needed
    and free) when ``needed_bytes`` exceed what ``shutil.disk_usage`` reports free to this user.
    """
    p = Path(path).expanduser()
    folder = _nearest_folder(p)
    try:
        free = shutil.disk_usage(folder).free
    except OSError as exc:
        log.warning("cannot ask %s for its free space: %s", folder, exc)
        return None
    mb = 1024 * 1024
    if needed_bytes > free:
        raise StorageError(f"not enough free disk space: the scan file needs about {needed_bytes / mb:,.1f} MB, "
                           f"{str(folder)!r} has {free / mb:,.1f} MB free", path=str(p))
    if needed_bytes > free / 2:
        return (f"the scan file ({needed_bytes / mb:,.1f} MB) takes more than half of the {free / mb:,.1f} MB "
                f"free on {str(folder)!r}")
    return None


def _fsync_folder(folder: Path) -> None:
    """fsync a folder so a new name in it survives a power cut (POSIX fsync(2) on the directory)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # some file systems refuse fsync on folders (EINVAL): nothing more can be done
        pass
    finally:
        os.close(fd)


def publish_new_file(tmp: Path, final: Path) -> None:
    """Give the finished file its final name atomically, never replacing a file of that name.

    link(2) fails with EEXIST when ``final`` exists (POSIX); where hard links are not supported (FAT,
    some network shares) the file is renamed after checking the name is still free.
    """
    try:
        os.link(tmp, final)
    except FileExistsError:
        raise
    except OSError:
        if final.exists():
            raise FileExistsError(errno.EEXIST, "file exists", str(final)) from None
        os.rename(tmp, final)
    else:
        os.unlink(tmp)
    _fsync_folder(final.parent)


def _write_error(what: str, exc: BaseException, path: Path) -> StorageError:
    """A StorageError for a failed write; "disk full" when the system said so (ENOSPC, EDQUOT)."""
    text = str(exc)
    code = getattr(exc, "errno", None)
    full = code in (errno.ENOSPC, errno.EDQUOT) or "No space left" in text or "errno = 28" in text \
        or "quota" in text.lower()
    return StorageError(f"{'disk full: ' if full else ''}{what} ({exc}); the points written before are kept",
                        path=str(path))


def software_version() -> str:
    return version("shotpair")


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).astimezone().isoformat(timespec="seconds")


def unique_path(path: str | os.PathLike[str]) -> Path:
    """``path`` if free, else the same name with the first free ``-001``, ``-002``... before the suffix."""
    p = Path(path).expanduser()
    if not p.exists():
        return p
    for k in range(1, 10_000):
        candidate = p.with_name(f"{p.stem}-{k:03d}{p.suffix}")
        if not candidate.exists():
            return candidate
    raise StorageError("no free file name", path=str(p))


class _Opened:
    """A group's datasets, each opened once: looking one up by name costs more than writing a row to it."""

    def __init__(self, group: h5py.Group) -> None:
        self._group = group
        self._open: dict[str, h5py.Dataset] = {}
        self._has: dict[str, bool] = {}

    def __getitem__(self, name: str) -> h5py.Dataset:
        ds = self._open.get(name)
        if ds is None:
            ds = self._open[name] = self._group[name]
        return ds

    def __contains__(self, name: str) -> bool:
        if name not in self._has:
            self._has[name] = name in self._group
        return self._has[name]


class ScanStore:
    """One open output file for one scan.

    ``segment`` is the run segment points are written for: 0 for the run that created the file, then the
    slot :meth:`begin_segment` gives a resume.
    """

    def __init__(self, path: Path, file: h5py.File) -> None:
        self.path = path
        self._f = file
        self._e = file["entry"]
        # h5py: get_vfd_handle() returns the POSIX file descriptor for the default "sec2" driver.
        self._fd = int(file.id.get_vfd_handle()) if file.driver == "sec2" else None
        self.segment = 0
        self._g = {name: _Opened(self._e[name]) for name in ("sweeps", "diagnostics", "delta_od", "accumulator")
                   if name in self._e}
        #: Seconds the last write_point took in all, and in flush + fsync (both commit steps).
        self.last_write_s = self.last_commit_s = 0.0

    def _sync(self) -> None:
        """Flush HDF5's buffers to the OS, then fsync: on return the bytes are on the storage device
        (POSIX fsync(2)), so a power cut keeps them too; a flush alone survives only a process crash."""
        self._f.flush()
        if self._fd is not None:
            os.fsync(self._fd)

    # ------------------------------------------------------------------ creation
    @classmethod
    def create(
        cls,
        path: str | os.PathLike[str],
        *,
        scan_id: str,
        title: str,
        delays_ps: np.ndarray,
        wavelengths_nm: np.ndarray,
        sweeps: int,
        orders: list[np.ndarray],
        config_text: str,
        instruments: dict[str, dict[str, Any]],
        axis_kind: str = "optical delay line",
        extra: dict[str, Any] | None = None,
        truth: np.ndarray | None = None,
        truth_note: str = "",
        has_reference: bool = False,
        settings_json: dict[str, str] | None = None,
    ) -> "ScanStore":
        """Create the file with every group and dataset sized for the whole scan, durable on return.

        ``truth`` (simulated benches) is the noise-free ΔOD [n, p]; ``has_reference`` makes room for the
        reference detector's dark; ``settings_json`` maps "bench" (and "simulation") to the JSON of the
        validated settings in effect, which `shotpair resume` rebuilds the bench from. The file appears
        under its name only once complete. Raises StorageError if it cannot be created (an existing
        file of that name is never touched).
        """
        p = Path(path).expanduser()
        tmp = p.with_name(f".{p.name}.{uuid.uuid4().hex[:8]}.partial")
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
            if p.exists():
                raise FileExistsError(errno.EEXIST, "file exists", str(p))
            f = h5py.File(tmp, "x")
        except (OSError, ValueError) as exc:
            raise StorageError(f"cannot create the output file ({exc})", path=str(p)) from None
        try:
            cls._lay_out(f, p, scan_id=scan_id, title=title, delays_ps=delays_ps, wavelengths_nm=wavelengths_nm,
                         sweeps=sweeps, orders=orders, config_text=config_text, instruments=instruments,
                         axis_kind=axis_kind, extra=extra, truth=truth, truth_note=truth_note,
                         has_reference=has_reference, settings_json=settings_json or {})
            f.flush()
            os.fsync(f.id.get_vfd_handle())
            f.close()
            publish_new_file(tmp, p)
            f = h5py.File(p, "r+")
        except (OSError, ValueError, RuntimeError) as exc:
            with contextlib.suppress(Exception):
                f.close()
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise _write_error("cannot create the output file", exc, p) from None
        return cls(p, f)

    @staticmethod
    def _lay_out(f: h5py.File, p: Path, *, scan_id: str, title: str, delays_ps: np.ndarray,
                 wavelengths_nm: np.ndarray, sweeps: int, orders: list[np.ndarray], config_text: str,
                 instruments: dict[str, dict[str, Any]], axis_kind: str, extra: dict[str, Any] | None,
                 truth: np.ndarray | None, truth_note: str, has_reference: bool,
                 settings_json: dict[str, str]) -> None:
        n, px, s = int(delays_ps.size), int(wavelengths_nm.size), int(sweeps)
        nan2 = np.full((n, px), np.nan)
        nan3 = np.full((s, n, px), np.nan)

        f.attrs.update({"NX_class": "NXroot", "default": "entry", "file_name": p.name, "file_time": _now(),
                        "creator": f"shotpair {software_version()}", "HDF5_Version": h5py.version.hdf5_version,
                        "h5py_version": h5py.version.version})
        e = f.create_group("entry")
        e.attrs.update({"NX_class": "NXentry", "default": "delta_od"})
        e.create_dataset("title", data=title, dtype=_STR)
        e.create_dataset("scan_id", data=scan_id, dtype=_STR)
        # fixed-length: rewritten in place when the scan ends or is resumed (module docstring)
        e.create_dataset("state", data=_fixed("running", _STATE_BYTES))
        e.create_dataset("state_reason", data=_fixed("", _REASON_BYTES))
        e.create_dataset("start_time", data=_now(), dtype=_STR)
        e.create_dataset("end_time", data=_fixed("", _TIME_BYTES))
        prog = e.create_dataset("program_name", data="shotpair", dtype=_STR)
        prog.attrs["version"] = software_version()
        e.create_dataset("delay_axis_kind", data=axis_kind, dtype=_STR)

        def axes(group: h5py.Group) -> None:
            d = group.create_dataset("delay", data=np.asarray(delays_ps, dtype=np.float64))
            d.attrs.update({"units": "ps", "long_name": "pump-probe delay (ps)"})
            w = group.create_dataset("wavelength", data=np.asarray(wavelengths_nm, dtype=np.float64))
            w.attrs.update({"units": "nm", "long_name": "probe wavelength (nm)"})

        main = e.create_group("delta_od")
        main.attrs.update({"NX_class": "NXdata", "signal": "delta_od", "axes": ["delay", "wavelength"],
                           "delay_indices": 0, "wavelength_indices": 1})
        sig = main.create_dataset("delta_od", data=nan2, dtype=np.float64)
        sig.attrs.update({"units": "", "long_name": "ΔOD (pumped minus unpumped absorbance)"})
        main.create_dataset("delta_od_errors", data=nan2, dtype=np.float64).attrs["long_name"] = "standard error of ΔOD"
        main.create_dataset("pairs", data=np.zeros(n, dtype=np.int64))
        axes(main)

        sw = e.create_group("sweeps")
        sw.attrs.update({"NX_class": "NXdata", "signal": "delta_od", "axes": ["sweep", "delay", "wavelength"],
                         "sweep_indices": 0, "delay_indices": 1, "wavelength_indices": 2})
        sw.create_dataset("delta_od", data=nan3, dtype=np.float64)
        sw.create_dataset("delta_od_errors", data=nan3, dtype=np.float64)
        sw.create_dataset("sweep", data=np.arange(s, dtype=np.int64))
        sw.create_dataset("completed", data=np.zeros((s, n), dtype=bool))
        axes(sw)

        dg = e.create_group("diagnostics")
        dg.attrs["NX_class"] = "NXcollection"
        for name, desc in (("noise_floor", "shot-noise floor of the mean ΔOD from photoelectrons and read noise"),
                           ("mean_counts_pump_on", "mean dark-corrected counts of accepted pumped shots"),
                           ("mean_counts_pump_off", "mean dark-corrected counts of accepted unpumped shots")):
            dg.create_dataset(name, data=nan3, dtype=np.float64).attrs["long_name"] = desc
        dg.create_dataset("masked_pixels", data=np.zeros((s, n, px), dtype=np.int64)).attrs["long_name"] = (
            "pairs masked at this pixel (saturated, or no signal above dark)")
        dg.create_dataset("noise_floor_combined", data=nan2, dtype=np.float64)
        dg.create_dataset("excess_noise", data=nan2, dtype=np.float64).attrs["long_name"] = (
            "measured standard error / shot-noise floor, all sweeps")
        for name in ("pairs", "rejected_pairs", "unpaired_shots", "gaps", "shots"):
            dg.create_dataset(name, data=np.zeros((s, n), dtype=np.int64))
        for name, desc in (("phase_breaks", "two consecutive frames with the same pump flag (never paired across)"),
                           ("retries", "instrument faults retried while measuring the point (its move included)"),
                           ("restarts", "times the point was discarded and measured again from its start (pause, "
                                        "lost connection, chopper lock lost, fault pause)")):
            dg.create_dataset(name, data=np.zeros((s, n), dtype=np.int64)).attrs["long_name"] = desc
        pos = dg.create_dataset("stage_position", data=np.full((s, n), np.nan))
        pos.attrs["units"] = "mm"
        dly = dg.create_dataset("delay_readback", data=np.full((s, n), np.nan))
        dly.attrs["units"] = "ps"
        gen = dg.create_dataset("generator_setting", data=np.full((s, n), np.nan))
        gen.attrs.update({"units": "ps", "long_name": "delay generator read-back (NaN when the stage sets the delay)"})
        t = dg.create_dataset("measured_at", data=np.full((s, n), np.nan))
        t.attrs.update({"units": "s", "long_name": "end of the point, seconds since 1970-01-01 UTC"})
        dg.create_dataset("order", data=np.stack(orders).astype(np.int64))
        dg.create_dataset("segment", data=np.full((s, n), -1, dtype=np.int64)).attrs["long_name"] = (
            "run segment that measured the point: 0 the first run, k the k-th resume (/entry/segments); -1 none")

        ins = e.create_group("instrument")
        ins.attrs["NX_class"] = "NXinstrument"
        ins.create_dataset("name", data=(extra or {}).get("bench_name", "bench"), dtype=_STR)
        for name, info in instruments.items():
            g = ins.create_group(name)
            g.attrs["NX_class"] = "NXcollection"
            g.create_dataset("driver", data=str(info.get("driver", "")), dtype=_STR)
            g.create_dataset("identity", data=str(info.get("identity", "")), dtype=_STR)
            g.create_dataset("state", data=json.dumps(info.get("state", {})), dtype=_STR)

        note = e.create_group("config")
        note.attrs["NX_class"] = "NXnote"
        note.create_dataset("type", data="text/x-toml", dtype=_STR)
        note.create_dataset("data", data=config_text, dtype=_STR)
        for key, text in settings_json.items():
            note.create_dataset(f"{key}_settings", data=text, dtype=_STR).attrs["type"] = "application/json"

        dark = e.create_group("dark")
        dark.attrs["NX_class"] = "NXcollection"
        dark.create_dataset("counts", data=np.full(px, np.nan)).attrs["units"] = "counts"
        dark.create_dataset("shots", data=np.int64(0))
        dark.create_dataset("measured", data=np.bool_(False))
        if has_reference:
            dark.create_dataset("reference_counts", data=np.full(px, np.nan)).attrs["units"] = "counts"
            dark.create_dataset("reference_pixels", data=np.int64(0))

        if truth is not None:
            g = e.create_group("simulation_truth")
            g.attrs.update({"NX_class": "NXdata", "signal": "delta_od", "axes": ["delay", "wavelength"],
                            "delay_indices": 0, "wavelength_indices": 1})
            g.create_dataset("delta_od", data=np.asarray(truth, dtype=np.float64))
            g.create_dataset("description", data=truth_note, dtype=_STR)
            g["delay"] = main["delay"]  # hard links: the same axes, stored once
            g["wavelength"] = main["wavelength"]

        acc = e.create_group("accumulator")
        acc.attrs.update({"NX_class": "NXcollection", "long_name": (
            "every point's mergeable statistics (count, mean, M2 and sums of ΔOD per pixel; counters), from "
            "which any set of sweeps merges exactly (Chan et al.); valid where sweeps/completed is true")})
        arrays, scalars = accumulator_fields()
        empty = PointResult.empty(1)
        for name in arrays:
            dtype = getattr(empty, name).dtype
            fill = np.nan if np.issubdtype(dtype, np.floating) else 0
            acc.create_dataset(name, data=np.full((s, n, px), fill, dtype=dtype))
        for name in scalars:
            acc.create_dataset(name, data=np.zeros((s, n), dtype=np.int64))

        seg = e.create_group("segments")
        seg.attrs.update({"NX_class": "NXcollection", "long_name": (
            "row 0: the run that created the file; row k: the k-th `shotpair resume` (diagnostics/segment)")})
        r = SEGMENT_SLOTS
        seg.create_dataset("started_at", data=np.full(r, np.nan)).attrs["units"] = "s"
        seg["started_at"][0] = time.time()
        seg.create_dataset("points_done_at_start", data=np.full(r, -1, dtype=np.int64))
        seg["points_done_at_start"][0] = 0
        seg.create_dataset("dark_counts", data=np.full((r, px), np.nan)).attrs["units"] = "counts"
        seg.create_dataset("dark_shots", data=np.zeros(r, dtype=np.int64))
        seg.create_dataset("dark_measured", data=np.zeros(r, dtype=bool))
        if has_reference:
            seg.create_dataset("dark_reference_counts", data=np.full((r, px), np.nan)).attrs["units"] = "counts"

        e.create_dataset("log", data=np.zeros(LOG_LINES, dtype=h5py.string_dtype("utf-8", LOG_LINE_BYTES)))
        e["log"].attrs["long_name"] = "warnings and faults met during the scan; empty lines are unused"
        e.create_dataset("log_count", data=np.int64(0)).attrs["long_name"] = (
            f"log lines written (beyond {LOG_LINES} they are counted, not kept)")

    @classmethod
    def open_existing(cls, path: str | os.PathLike[str]) -> "ScanStore":
        """Open a scan file of this layout for writing, to resume it.

        Raises StorageError (naming the file) if it is missing, not HDF5, held open by another program
        (HDF5 file locking: a scan still writing it), or lacks what resuming needs.
        """
        p = Path(path).expanduser()
        if not p.is_file():
            raise StorageError("file not found" if not p.exists() else "not a file", path=str(p))
        try:
            f = h5py.File(p, "r+")
        except OSError as exc:
            if "lock" in str(exc).lower():
                raise StorageError("the file is open in another program (is its scan still running?)",
                                   path=str(p)) from None
            raise StorageError(f"cannot open as HDF5 for writing ({exc})", path=str(p)) from None
        missing = [k for k in ("entry/accumulator", "entry/segments", "entry/log_count", "entry/diagnostics/segment")
                   if k not in f]
        if missing:
            f.close()
            raise StorageError(f"not a scan file shotpair can resume (no /{missing[0]})", path=str(p))
        return cls(p, f)

    def point_results(self, sweep: int) -> list[PointResult]:
        """Every grid point's stored statistics of one sweep, exactly as measured (valid where completed)."""
        arrays, scalars = accumulator_fields()
        acc = self._e["accumulator"]
        values = {name: acc[name][sweep] for name in arrays + scalars}
        n = int(self._e["sweeps/completed"].shape[1])
        return [PointResult(**{name: values[name][i].copy() for name in arrays},
                            **{name: int(values[name][i]) for name in scalars}) for i in range(n)]

    def committed(self) -> tuple[np.ndarray, list[PointResult | None]]:
        """The committed points, ``completed`` [s, n], and per grid point the merge over its committed sweeps.

        The merge is the runner's: sweep after sweep, ``combine([so_far, this_sweep])``, so a resumed scan
        continues with bit-for-bit the running average an uninterrupted run would hold at this point.
        """
        completed = np.asarray(self._e["sweeps/completed"][()], dtype=bool)
        combined: list[PointResult | None] = [None] * completed.shape[1]
        for sweep in range(completed.shape[0]):
            if not completed[sweep].any():
                continue
            results = self.point_results(sweep)
            for i in np.flatnonzero(completed[sweep]):
                previous = combined[i]
                combined[i] = results[i] if previous is None else PointResult.combine([previous, results[i]])
        return completed, combined

    def next_segment(self, completed: np.ndarray) -> int:
        """The segment a resume writes as: one after the last that left points in the file (0 if none did)."""
        seg = np.asarray(self._e["diagnostics/segment"][()])
        return int(seg[completed].max()) + 1 if completed.any() else 0

    def begin_segment(self, segment: int, points_done: int) -> None:
        """Start run segment ``segment`` (a resume): mark the file running again and note when and where.

        Raises StorageError when the file has no room for another segment or cannot be written.
        """
        if not 0 <= segment < SEGMENT_SLOTS:
            raise StorageError(f"the file has room for {SEGMENT_SLOTS - 1} resumes and this would be one more",
                               path=str(self.path))
        try:
            sg = self._e["segments"]
            sg["started_at"][segment] = time.time()
            sg["points_done_at_start"][segment] = int(points_done)
            sg["dark_counts"][segment] = np.nan
            sg["dark_shots"][segment] = 0
            sg["dark_measured"][segment] = False
            self._e["state_reason"][()] = _fixed("", _REASON_BYTES)
            self._e["end_time"][()] = _fixed("", _TIME_BYTES)
            self._e["state"][()] = _fixed("running", _STATE_BYTES)
            self._sync()
        except (OSError, RuntimeError) as exc:
            raise _write_error("cannot mark the file as resumed", exc, self.path) from None
        self.segment = int(segment)

    # ------------------------------------------------------------------ writing
    def write_dark(self, counts: np.ndarray, shots: int, reference: np.ndarray | None = None, measured: bool = True) -> None:
        """Record the dark of the present run segment (/entry/dark too for the first one); durable on return.

        A reference dark is kept in its first m entries (m = its pixels, in ``reference_pixels``).
        Raises StorageError when the write fails.
        """
        c = np.asarray(counts, dtype=np.float64)
        r = None if reference is None else np.asarray(reference, dtype=np.float64).reshape(-1)
        try:
            sg, k = self._e["segments"], self.segment
            sg["dark_counts"][k] = c
            sg["dark_shots"][k] = int(shots)
            sg["dark_measured"][k] = bool(measured)
            if r is not None and "dark_reference_counts" in sg:
                sg["dark_reference_counts"][k, : r.size] = r
            if k == 0:
                g = self._e["dark"]
                g["counts"][...] = c
                g["shots"][()] = int(shots)
                g["measured"][()] = bool(measured)
                if r is not None and "reference_counts" in g:
                    g["reference_counts"][: r.size] = r
                    g["reference_pixels"][()] = r.size
            self._sync()
        except (OSError, RuntimeError) as exc:
            raise _write_error("cannot write the dark", exc, self.path) from None

    def write_truth(self, delta_od: np.ndarray, note: str) -> None:
        """Overwrite the simulation truth laid out by :meth:`create` (it must have been given there)."""
        if "simulation_truth" not in self._e:
            raise StorageError("the file was laid out without a simulation truth", path=str(self.path))
        self._e["simulation_truth/delta_od"][...] = np.asarray(delta_od, dtype=np.float64)
        self._sync()

    def write_point(self, sweep: int, index: int, result: Any, combined: Any, *, position_mm: float,
                    delay_readback_ps: float, measured_at_s: float, generator_ps: float = float("nan"),
                    retries: int = 0, restarts: int = 0) -> None:
        """Write one finished point of one sweep and the running average over sweeps; durable on return.

        Two commit steps, each flushed and fsync'ed (see :meth:`_sync`): first everything about this point
        of this sweep (results, diagnostics, its mergeable sums in /entry/accumulator), then its
        ``completed`` flag with the running average over sweeps. ``retries`` and ``restarts`` are the
        point's instrument-fault retries and restarts (diagnostics). Raises StorageError (naming the file,
        "disk full" when the system says so) when a write fails; points committed before are untouched.
        """
        t0 = time.perf_counter()
        try:
            self._write_point_data(sweep, index, result, position_mm=position_mm,
                                   delay_readback_ps=delay_readback_ps, measured_at_s=measured_at_s,
                                   generator_ps=generator_ps, retries=retries, restarts=restarts)
            t1 = time.perf_counter()
            self._sync()
            t2 = time.perf_counter()
            self._g["sweeps"]["completed"][sweep, index] = True
            self.write_combined(index, combined, sync=False)
            t3 = time.perf_counter()
            self._sync()
        except (OSError, RuntimeError) as exc:
            raise _write_error(f"cannot write point {index} of sweep {sweep + 1}", exc, self.path) from None
        t4 = time.perf_counter()
        self.last_commit_s, self.last_write_s = (t2 - t1) + (t4 - t3), t4 - t0

    def write_combined(self, index: int, combined: Any, *, sync: bool = True) -> None:
        """Write the running average over sweeps at grid point ``index`` (the main map and its diagnostics)."""
        main, dg = self._g["delta_od"], self._g["diagnostics"]
        main["delta_od"][index] = combined.delta_od
        main["delta_od_errors"][index] = combined.delta_od_error
        main["pairs"][index] = int(combined.pairs)
        dg["noise_floor_combined"][index] = combined.floor
        dg["excess_noise"][index] = combined.excess_noise
        if sync:
            self._sync()

    def _write_point_data(self, sweep: int, index: int, result: Any, *, position_mm: float,
                          delay_readback_ps: float, measured_at_s: float, generator_ps: float, retries: int,
                          restarts: int) -> None:
        sw, dg = self._g["sweeps"], self._g["diagnostics"]
        sw["delta_od"][sweep, index] = result.delta_od
        sw["delta_od_errors"][sweep, index] = result.delta_od_error
        dg["segment"][sweep, index] = self.segment
        if isinstance(result, PointResult):  # test doubles carry only the derived quantities
            arrays, scalars = accumulator_fields()
            acc = self._g["accumulator"]
            for name in arrays:
                acc[name][sweep, index] = getattr(result, name)
            for name in scalars:
                acc[name][sweep, index] = int(getattr(result, name))
        dg["noise_floor"][sweep, index] = result.floor
        dg["mean_counts_pump_on"][sweep, index] = result.mean_counts_on
        dg["mean_counts_pump_off"][sweep, index] = result.mean_counts_off
        dg["masked_pixels"][sweep, index] = result.masked
        for name in ("pairs", "rejected_pairs", "unpaired_shots", "gaps", "shots"):
            dg[name][sweep, index] = int(getattr(result, name))
        dg["stage_position"][sweep, index] = position_mm
        dg["delay_readback"][sweep, index] = delay_readback_ps
        dg["generator_setting"][sweep, index] = generator_ps
        dg["measured_at"][sweep, index] = measured_at_s
        if "phase_breaks" in dg:  # files laid out before these diagnostics existed have none
            dg["phase_breaks"][sweep, index] = int(getattr(result, "phase_breaks", 0))
            dg["retries"][sweep, index] = int(retries)
            dg["restarts"][sweep, index] = int(restarts)

    def log(self, message: str) -> bool:
        """Add a line to the entry's event log (warnings, faults); durable on return.

        Never raises: a line that cannot be written goes to the Python logger and False is returned.
        """
        try:
            count = int(self._e["log_count"][()])
            line = f"{_now()} {message}"
            if count == LOG_LINES - 1:
                line = f"{_now()} the log is full: later lines are counted in log_count, not kept"
            if count < LOG_LINES:
                self._e["log"][count] = _fixed(line, LOG_LINE_BYTES)
            self._e["log_count"][()] = count + 1
            self._sync()
            return True
        except (OSError, RuntimeError, ValueError, KeyError) as exc:
            log.error("%s: could not log %r: %s", self.path, message, exc)
            return False

    def finish(self, state: str, reason: str = "") -> list[str]:
        """Mark the scan complete or aborted (with the reason) and close the file.

        Never raises (it runs on every exit path, a full disk included): returns the problems met, e.g.
        a state that could not be written; the points already committed stay as they are.
        """
        if not self._f.id.valid:
            return []
        problems: list[str] = []
        try:
            self._e["state_reason"][()] = _fixed(reason, _REASON_BYTES)
            self._e["end_time"][()] = _fixed(_now(), _TIME_BYTES)
            self._e["state"][()] = _fixed(state, _STATE_BYTES)
            self._sync()
        except (OSError, RuntimeError) as exc:
            problems.append(f"could not mark {self.path} {state} ({exc}); the points in it are kept")
        try:
            self._f.close()
        except (OSError, RuntimeError) as exc:
            problems.append(f"could not close {self.path} cleanly ({exc})")
        for p in problems:
            log.error("%s", p)
        return problems

    @property
    def is_open(self) -> bool:
        return bool(self._f.id.valid)
