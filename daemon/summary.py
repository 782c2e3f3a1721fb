"""Summarise a shotpair HDF5 file in a few human lines: what was measured, how well, and its state.

Reads only; never writes to the file. Used by `shotpair show`.
"""

from __future__ import annotations

import os

import h5py
import numpy as np

from shotpair.drivers.errors import StorageError

__all__ = ["summarise"]


def _text(value: object) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def summarise(path: str | os.PathLike[str]) -> str:
    """A multi-line summary of the scan in ``path``. Raises StorageError if it is not a readable scan file."""
    shown = str(path)
    try:
        f = h5py.File(path, "r", locking=False)
    except (OSError, ValueError) as exc:
        raise StorageError(f"cannot open as HDF5 ({exc})", path=shown) from None
    with f:
        if "entry/delta_od/delta_od" not in f:
            raise StorageError("not a shotpair scan file (no /entry/delta_od)", path=shown)
        e = f["entry"]
        d = e["delta_od"]
        dod, err = d["delta_od"][()], d["delta_od_errors"][()]
        delay, wl = d["delay"][()], d["wavelength"][()]
        dg = e["diagnostics"]
        done = e["sweeps/completed"][()]
        state = _text(e["state"][()])
        reason = _text(e["state_reason"][()])
        lines = [
            f"file        {shown}",
            f"scan        {_text(e['title'][()])!r} (id {_text(e['scan_id'][()])}), state {state}"
            + (f": {reason}" if reason else ""),
            f"time        {_text(e['start_time'][()])} to {_text(e['end_time'][()]) or '(not finished)'}",
            f"grid        {delay.size} delays from {delay.min():.6g} to {delay.max():.6g} ps, {wl.size} px "
            f"{wl.min():.1f}-{wl.max():.1f} nm, {done.shape[0]} sweep(s): {int(done.sum())} of {done.size} "
            "points measured",
        ]
        if np.isfinite(dod).any():
            i_min = np.unravel_index(np.nanargmin(dod), dod.shape)
            i_max = np.unravel_index(np.nanargmax(dod), dod.shape)
            floor = dg["noise_floor_combined"][()]
            excess = dg["excess_noise"][()]
            lines += [
                f"ΔOD         min {dod[i_min]:+.4g} at {wl[i_min[1]]:.1f} nm, {delay[i_min[0]]:.4g} ps; "
                f"max {dod[i_max]:+.4g} at {wl[i_max[1]]:.1f} nm, {delay[i_max[0]]:.4g} ps",
                f"errors      median {np.nanmedian(err):.3g} ΔOD; shot-noise floor median {np.nanmedian(floor):.3g}; "
                f"noise/floor median {np.nanmedian(excess):.3g}",
            ]
        pairs, rejected = int(dg["pairs"][()].sum()), int(dg["rejected_pairs"][()].sum())
        total = pairs + rejected
        lines.append(f"pairs       {pairs:,} accepted, {rejected:,} rejected "
                     f"({100.0 * rejected / total if total else 0.0:.2f} %), {int(dg['gaps'][()].sum()):,} frame "
                     f"gaps, {int(dg['masked_pixels'][()].sum()):,} masked pixel-pairs")
        faults = {k: int(dg[k][()].sum()) for k in ("phase_breaks", "retries", "restarts") if k in dg}
        if faults:
            lines.append(f"faults      {faults.get('phase_breaks', 0):,} pump phase breaks, "
                         f"{faults.get('retries', 0):,} instrument retries, "
                         f"{faults.get('restarts', 0):,} points measured again")
        if "simulation_truth/delta_od" in e and np.isfinite(dod).any():
            truth = e["simulation_truth/delta_od"][()]
            with np.errstate(invalid="ignore", divide="ignore"):
                chi2 = float(np.nanmean(((dod - truth) / err) ** 2))
            lines.append(f"truth       simulated bench: reduced chi-square against the stored truth {chi2:.3g} "
                         "(about 1 when they differ by noise alone)")
        if "log" in e:
            lines += [f"log         {_text(x)}" for x in e["log"][()] if _text(x)]  # unused lines are empty
    return "\n".join(lines)
