"""The figure: chosen delays and wavelengths reach the spectra and kinetics panels, as labels."""

import numpy as np

from shotpair.daemon.figures import ScanData, scan_figure
from shotpair.daemon.monitor_state import MonitorState


def data(**kw):
    delays = np.array([-1.0, 0.0, 1.0, 10.0, 100.0])
    wl = np.linspace(420.0, 720.0, 31)
    dod = np.outer(delays > 0, np.sin(wl / 40.0)) * 1e-3
    return ScanData(delays, wl, dod, np.full_like(dod, 1e-5), None, "t", **kw)


def labels(fig, title_start):
    ax = next(a for a in fig.axes if a.get_title().startswith(title_start))
    return ax.get_legend_handles_labels()[1]


def test_chosen_delays_and_wavelengths_are_drawn():
    fig = scan_figure(data(spectra_delays_ps=(10.0, 100.0), kinetics_wavelengths_nm=(520.0,)))
    assert labels(fig, "spectra") == ["10 ps", "100 ps"]
    assert labels(fig, "kinetics") == ["520.0 nm"]


def test_monitor_state_passes_the_choices_on():
    state = MonitorState(spectra_delays_ps=(1.0,), kinetics_wavelengths_nm=(600.0,))
    assert state.spectra_delays_ps == (1.0,) and state.kinetics_wavelengths_nm == (600.0,)
