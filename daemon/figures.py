"""Figures of a ΔOD data set: the map, spectra at chosen delays, kinetics at chosen wavelengths, and the
measured noise beside the shot-noise floor.

Drawing only (matplotlib, the optional extra ``[plot]``); it reads arrays, never files or instruments.
The same figure serves a finished file (`shotpair plot`) and, later, live snapshots.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from shotpair.drivers.errors import ConfigError, ShotpairError

__all__ = ["ScanData", "parse_numbers", "load_pyplot", "scan_figure", "pick_delays", "pick_wavelengths"]

#: Delays within this distance of time zero are drawn on a linear scale, beyond it logarithmically (ps).
LINEAR_WINDOW_PS = 1.0


@dataclass(frozen=True)
class ScanData:
    """What a figure needs: ΔOD[n, p] and its standard error on delay (ps) × wavelength (nm) axes."""

    delays_ps: np.ndarray
    wavelengths_nm: np.ndarray
    delta_od: np.ndarray
    delta_od_error: np.ndarray
    noise_floor: np.ndarray | None = None
    title: str = ""
    #: Delays (ps) for the spectra panel and wavelengths (nm) for the kinetics panel; None: chosen here.
    spectra_delays_ps: tuple[float, ...] | None = None
    kinetics_wavelengths_nm: tuple[float, ...] | None = None


def parse_numbers(text: str | None, option: str) -> list[float] | None:
    """``"0.5,10,100"`` → ``[0.5, 10.0, 100.0]`` for the figure's choices; None when empty.

    Raises ConfigError naming the command-line option when a piece is not a number.
    """
    if not text:
        return None
    try:
        return [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise ConfigError("expected numbers separated by commas", file="command line", key_path=option,
                          value=text) from None


def load_pyplot() -> Any:
    """matplotlib.pyplot with a file-only backend unless a display was chosen; clear error if missing."""
    try:
        import matplotlib
    except ImportError:
        raise ShotpairError("plotting needs matplotlib: pip install 'shotpair[plot]'") from None
    if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
        import os

        if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
            matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _nearest(values: np.ndarray, wanted: Sequence[float]) -> list[int]:
    out: list[int] = []
    for w in wanted:
        i = int(np.nanargmin(np.abs(values - w)))
        if i not in out:
            out.append(i)
    return out


def pick_delays(data: ScanData, wanted_ps: Sequence[float] | None = None) -> list[int]:
    """Indices of the delays to draw spectra at: those asked for, else a spread over the measured ones."""
    measured = np.flatnonzero(np.isfinite(data.delta_od).any(axis=1))
    if measured.size == 0:
        return []
    d = data.delays_ps[measured]
    if wanted_ps:
        return [int(measured[i]) for i in _nearest(d, wanted_ps)]
    positive = d[d > 0]
    if positive.size < 2:
        return [int(measured[i]) for i in _nearest(d, [d.min(), d.max()])]
    targets = np.geomspace(max(positive.min(), 0.2), positive.max(), 5)
    return [int(measured[i]) for i in _nearest(d, targets)]


def pick_wavelengths(data: ScanData, wanted_nm: Sequence[float] | None = None) -> list[int]:
    """Indices of the wavelengths to draw kinetics at: those asked for, else the strongest features."""
    if wanted_nm:
        return _nearest(data.wavelengths_nm, wanted_nm)
    if not np.isfinite(data.delta_od).any():
        return []
    peak = np.nanmax(np.abs(data.delta_od), axis=0)
    signed = np.nanmean(data.delta_od, axis=0)
    picks = [int(np.nanargmin(signed)), int(np.nanargmax(signed)), int(np.nanargmax(peak))]
    out: list[int] = []
    for p in picks:
        if all(abs(p - q) > data.wavelengths_nm.size // 20 for q in out):
            out.append(p)
    return out


def _delay_axis(ax: Any, which: str) -> None:
    getattr(ax, f"set_{which}scale")("symlog", linthresh=LINEAR_WINDOW_PS, linscale=1.0)


def scan_figure(data: ScanData, *, delays_ps: Sequence[float] | None = None,
                wavelengths_nm: Sequence[float] | None = None) -> Any:
    """A 2×2 matplotlib figure of the data set. Raises ShotpairError if matplotlib is missing."""
    plt = load_pyplot()
    from matplotlib.colors import TwoSlopeNorm

    delays_ps = delays_ps or data.spectra_delays_ps
    wavelengths_nm = wavelengths_nm or data.kinetics_wavelengths_nm
    fig, axes = plt.subplots(2, 2, figsize=(12, 8.5), constrained_layout=True)
    ax_map, ax_spec, ax_kin, ax_noise = axes[0, 0], axes[0, 1], axes[1, 0], axes[1, 1]
    dod = data.delta_od
    finite = np.isfinite(dod)
    limit = float(np.nanpercentile(np.abs(dod[finite]), 99.5)) if finite.any() else 1e-3
    limit = limit if limit > 0 else 1e-3
    mesh = ax_map.pcolormesh(data.wavelengths_nm, data.delays_ps, np.ma.masked_invalid(dod) * 1e3, shading="nearest",
                             cmap="RdBu_r", norm=TwoSlopeNorm(vcenter=0.0, vmin=-limit * 1e3, vmax=limit * 1e3))
    _delay_axis(ax_map, "y")
    ax_map.set_xlabel("wavelength (nm)")
    ax_map.set_ylabel(f"delay (ps; linear within ±{LINEAR_WINDOW_PS:g} ps, log beyond)")
    ax_map.set_title("ΔOD map")
    fig.colorbar(mesh, ax=ax_map, label="ΔOD (mOD)")

    for i in pick_delays(data, delays_ps):
        y, e = dod[i] * 1e3, data.delta_od_error[i] * 1e3
        line, = ax_spec.plot(data.wavelengths_nm, y, lw=1.0, label=f"{data.delays_ps[i]:.3g} ps")
        ax_spec.fill_between(data.wavelengths_nm, y - e, y + e, color=line.get_color(), alpha=0.25, lw=0)
    ax_spec.axhline(0.0, color="0.5", lw=0.6)
    ax_spec.set_xlabel("wavelength (nm)")
    ax_spec.set_ylabel("ΔOD (mOD)")
    ax_spec.set_title("spectra (band: ±1 standard error)")
    if ax_spec.lines[1:]:
        ax_spec.legend(fontsize="small")

    for j in pick_wavelengths(data, wavelengths_nm):
        ax_kin.errorbar(data.delays_ps, dod[:, j] * 1e3, yerr=data.delta_od_error[:, j] * 1e3, fmt="o-", ms=2.5,
                        lw=0.8, capsize=1.5, label=f"{data.wavelengths_nm[j]:.1f} nm")
    _delay_axis(ax_kin, "x")
    ax_kin.axhline(0.0, color="0.5", lw=0.6)
    ax_kin.set_xlabel(f"delay (ps; linear within ±{LINEAR_WINDOW_PS:g} ps, log beyond)")
    ax_kin.set_ylabel("ΔOD (mOD)")
    ax_kin.set_title("kinetics (bars: ±1 standard error)")
    if any(not line.get_label().startswith("_") for line in ax_kin.lines):
        ax_kin.legend(fontsize="small")

    with np.errstate(all="ignore"):
        measured = np.nanmedian(data.delta_od_error, axis=0) if finite.any() else np.full(dod.shape[1], np.nan)
    ax_noise.semilogy(data.wavelengths_nm, measured, lw=1.0, label="measured standard error (median over delays)")
    if data.noise_floor is not None and np.isfinite(data.noise_floor).any():
        with np.errstate(all="ignore"):
            floor = np.nanmedian(data.noise_floor, axis=0)
        ax_noise.semilogy(data.wavelengths_nm, floor, lw=1.0, ls="--", label="shot-noise floor (median over delays)")
    ax_noise.set_xlabel("wavelength (nm)")
    ax_noise.set_ylabel("ΔOD")
    ax_noise.set_title("noise and shot-noise floor")
    ax_noise.legend(fontsize="small")
    if data.title:
        fig.suptitle(data.title)
    return fig
