"""Write a scan to HDF5, laid out after the NeXus conventions so general viewers plot it without help.

Layout (n delays, p pixels, s sweeps)::

    /                      NX_class=NXroot, default="entry"
    /entry                 NXentry, default="delta_od"; title, scan_id, state, state_reason,
                           start_time, end_time, program_name (@version)
    /entry/delta_od        NXdata: delta_od[n,p] (signal), delta_od_errors[n,p], delay[n] (ps), wavelength[p] (nm)
    /entry/sweeps          NXdata: delta_od[s,n,p], delta_od_errors[s,n,p], sweep[s], delay, wavelength
    /entry/diagnostics     NXcollection: floors, excess noise, mean counts, pair counts, stage read-back ...
    /entry/dark            NXcollection: the dark used for the scan
    /entry/instrument      NXinstrument: driver, identity and state of every instrument
    /entry/config          NXnote: the configuration text the scan ran with
    /entry/simulation_truth  NXdata (simulated benches only): the simulator's noise-free ΔOD

Each delay point is written and flushed before its announcement goes out (persist first, then
publish). Unmeasured entries are NaN. This module knows nothing of instruments or sockets.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from importlib.metadata import version
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from shotpair.drivers.errors import StorageError

__all__ = ["ScanStore", "unique_path", "software_version"]

_STR = h5py.string_dtype()


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


class ScanStore:
    """One open output file for one scan."""

    def __init__(self, path: Path, file: h5py.File) -> None:
        self.path = path
        self._f = file
        self._e = file["entry"]

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
    ) -> "ScanStore":
        """Create the file with every group and dataset sized for the whole scan.

        Raises StorageError if the file cannot be created.
        """
        p = Path(path).expanduser()
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
            f = h5py.File(p, "x")
        except (OSError, ValueError) as exc:
            raise StorageError(f"cannot create the output file ({exc})", path=str(p)) from None
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
        e.create_dataset("state", data="running", dtype=_STR)
        e.create_dataset("state_reason", data="", dtype=_STR)
        e.create_dataset("start_time", data=_now(), dtype=_STR)
        e.create_dataset("end_time", data="", dtype=_STR)
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
        pos = dg.create_dataset("stage_position", data=np.full((s, n), np.nan))
        pos.attrs["units"] = "mm"
        dly = dg.create_dataset("delay_readback", data=np.full((s, n), np.nan))
        dly.attrs["units"] = "ps"
        gen = dg.create_dataset("generator_setting", data=np.full((s, n), np.nan))
        gen.attrs.update({"units": "ps", "long_name": "delay generator read-back (NaN when the stage sets the delay)"})
        t = dg.create_dataset("measured_at", data=np.full((s, n), np.nan))
        t.attrs.update({"units": "s", "long_name": "end of the point, seconds since 1970-01-01 UTC"})
        dg.create_dataset("order", data=np.stack(orders).astype(np.int64))

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
        f.flush()
        return cls(p, f)

    # ------------------------------------------------------------------ writing
    def write_dark(self, counts: np.ndarray, shots: int, reference: np.ndarray | None = None, measured: bool = True) -> None:
        g = self._e.create_group("dark")
        g.attrs["NX_class"] = "NXcollection"
        g.create_dataset("counts", data=np.asarray(counts, dtype=np.float64)).attrs["units"] = "counts"
        g.create_dataset("shots", data=int(shots))
        g.create_dataset("measured", data=bool(measured))
        if reference is not None:
            g.create_dataset("reference_counts", data=np.asarray(reference, dtype=np.float64))
        self._f.flush()

    def write_truth(self, delta_od: np.ndarray, note: str) -> None:
        g = self._e.create_group("simulation_truth")
        g.attrs.update({"NX_class": "NXdata", "signal": "delta_od", "axes": ["delay", "wavelength"],
                        "delay_indices": 0, "wavelength_indices": 1})
        g.create_dataset("delta_od", data=np.asarray(delta_od, dtype=np.float64))
        g.create_dataset("description", data=note, dtype=_STR)
        g["delay"] = self._e["delta_od/delay"]  # hard links: the same axes, stored once
        g["wavelength"] = self._e["delta_od/wavelength"]
        self._f.flush()

    def write_point(self, sweep: int, index: int, result: Any, combined: Any, *, position_mm: float,
                    delay_readback_ps: float, measured_at_s: float, generator_ps: float = float("nan")) -> None:
        """Write one finished point of one sweep and the running average over sweeps, then flush."""
        sw, dg, main = self._e["sweeps"], self._e["diagnostics"], self._e["delta_od"]
        sw["delta_od"][sweep, index] = result.delta_od
        sw["delta_od_errors"][sweep, index] = result.delta_od_error
        sw["completed"][sweep, index] = True
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
        main["delta_od"][index] = combined.delta_od
        main["delta_od_errors"][index] = combined.delta_od_error
        main["pairs"][index] = int(combined.pairs)
        dg["noise_floor_combined"][index] = combined.floor
        dg["excess_noise"][index] = combined.excess_noise
        self._f.flush()

    def log(self, message: str) -> None:
        """Append a line to the entry's event log (warnings, faults)."""
        if "log" not in self._e:
            self._e.create_dataset("log", shape=(0,), maxshape=(None,), dtype=_STR)
        ds = self._e["log"]
        ds.resize((ds.shape[0] + 1,))
        ds[-1] = f"{_now()} {message}"
        self._f.flush()

    def finish(self, state: str, reason: str = "") -> None:
        """Mark the scan complete or aborted (with the reason) and close the file."""
        if not self._f.id.valid:
            return
        self._e["state"][()] = state
        self._e["state_reason"][()] = reason
        self._e["end_time"][()] = _now()
        self._f.flush()
        self._f.close()

    @property
    def is_open(self) -> bool:
        return bool(self._f.id.valid)
