"""`shotpair plot`: draw a scan file's figure to a PNG (or a window). Reads the file, draws, writes the image.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Sequence

import h5py

from shotpair.drivers.errors import StorageError

from .figures import ScanData, load_pyplot, scan_figure

__all__ = ["read_scan_data", "plot_file"]


def read_scan_data(path: str | os.PathLike[str]) -> ScanData:
    """The plotted arrays of a shotpair file. Raises StorageError if it is not one."""
    try:
        f = h5py.File(path, "r", locking=False)
    except (OSError, ValueError) as exc:
        raise StorageError(f"cannot open as HDF5 ({exc})", path=str(path)) from None
    with f:
        if "entry/delta_od/delta_od" not in f:
            raise StorageError("not a shotpair scan file (no /entry/delta_od)", path=str(path))
        e = f["entry"]
        d = e["delta_od"]
        floor = e["diagnostics/noise_floor_combined"][()] if "diagnostics/noise_floor_combined" in e else None
        title = e["title"][()]
        return ScanData(d["delay"][()], d["wavelength"][()], d["delta_od"][()], d["delta_od_errors"][()], floor,
                        title.decode() if isinstance(title, bytes) else str(title))


def plot_file(path: str | os.PathLike[str], png: str | None = None, *, show: bool = False,
              delays_ps: Sequence[float] | None = None, wavelengths_nm: Sequence[float] | None = None) -> Path | None:
    """Draw the file's figure; write it to ``png`` (default: the file name with .png) unless ``show``."""
    data = read_scan_data(path)
    fig = scan_figure(data, delays_ps=delays_ps, wavelengths_nm=wavelengths_nm)
    plt = load_pyplot()
    if show:
        plt.show()
        return None
    target = Path(png) if png else Path(path).with_suffix(".png")
    try:
        fig.savefig(target, dpi=110)
    except OSError as exc:
        raise StorageError(f"cannot write the image ({exc.strerror})", path=str(target)) from None
    finally:
        plt.close(fig)
    return target
