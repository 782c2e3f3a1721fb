"""Whole simulated scans through the CLI, checked against the simulator's stored noise-free truth.

The check is a reduced chi-square, mean(((measured - truth) / standard_error)^2) over every delay and
pixel: for honest error bars and an unbiased estimate it is 1 within about sqrt(2 / values) (a
chi-square variable with k degrees of freedom has mean k and variance 2k; any statistics text).
The noise sources the truth does not model as ΔOD (laser intensity fluctuation and drift, which are
common to all pixels and scale the signal) are switched off where the test needs independent pixels;
photon noise, read noise, dark pattern, misfires, dropped frames and phase slips stay on.
"""

import subprocess
import sys

import h5py
import numpy as np
import pytest

from shotpair.daemon.cli import main

PURE = """
laser_fluctuation = false
pump_fluctuation = false
drift = false
scatter = false
emission = false
"""


def read(path):
    with h5py.File(path, "r") as f:
        e = f[f.attrs["default"]]
        d = e[e.attrs["default"]]
        out = {k: d[k][()] for k in ("delta_od", "delta_od_errors", "delay", "wavelength")}
        out["truth"] = e["simulation_truth/delta_od"][()]
        out["state"] = e["state"][()].decode()
        out["reason"] = e["state_reason"][()].decode()
        for k in ("rejected_pairs", "gaps", "pairs", "shots", "masked_pixels"):
            out[k] = e["diagnostics"][k][()]
        out["completed"] = e["sweeps/completed"][()]
        out["excess"] = e["diagnostics/excess_noise"][()]
    return out


def reduced_chi2(d, rows=slice(None)):
    z = (d["delta_od"][rows] - d["truth"][rows]) / d["delta_od_errors"][rows]
    return float(np.mean(z**2)), z


def run(cfg):
    assert main(["run", str(cfg), "--fast"]) == 0
    return read(cfg.with_suffix(".h5"))


def test_scan_agrees_with_truth(small_scan):
    d = run(small_scan(noise=PURE))
    assert d["state"] == "complete" and d["completed"].all()
    chi2, z = reduced_chi2(d)
    assert 0.8 < chi2 < 1.25, chi2
    assert abs(float(z.mean())) < 0.1  # no bias
    # The signal is really there (the check is not passing on noise alone): the bleach near 470 nm.
    assert d["truth"].min() < -5e-3 and np.nanmin(d["delta_od"]) < -5e-3
    # With only photon and read noise the error equals the shot-noise floor (DESIGN.md section 6).
    assert np.nanmedian(d["excess"]) == pytest.approx(1.0, abs=0.1)


def test_before_time_zero_is_zero_within_errors(small_scan):
    d = run(small_scan(noise=PURE, name="pre"))
    early = d["delay"] < -3.0  # well before time zero even at the chirped blue edge (~0.3 ps) and the IRF
    assert early.sum() == 2
    z = d["delta_od"][early] / d["delta_od_errors"][early]
    assert 0.8 < float(np.mean(z**2)) < 1.25
    assert np.all(np.abs(d["truth"][early]) < 1e-9)


def test_misfires_are_rejected_and_counted(small_scan):
    d = run(small_scan(noise=PURE, name="misfire"))
    shots = int(d["shots"].sum())
    # default misfire probability 1e-3 per shot; each misfire costs its pair: binomial mean and 5 sigma.
    expected = shots * 1e-3
    assert abs(int(d["rejected_pairs"].sum()) - expected) < 5 * np.sqrt(expected) + 2
    d_off = run(small_scan(noise=PURE + "misfires = false\n", name="nomisfire"))
    assert int(d_off["rejected_pairs"].sum()) == 0


def test_dropped_frames_are_seen_and_not_paired_across(small_scan):
    d = run(small_scan(noise=PURE + "dropped_frames = true\n", name="drops"))
    assert int(d["gaps"].sum()) >= 1
    d_off = run(small_scan(noise=PURE + "dropped_frames = false\n", name="nodrops"))
    assert int(d_off["gaps"].sum()) == 0
    assert 0.8 < reduced_chi2(d)[0] < 1.25


def test_reference_detector_cancels_laser_fluctuation(small_scan):
    noise = "pump_fluctuation = false\ndrift = false\nscatter = false\nemission = false\n"
    d = run(small_scan(noise=noise, detector_extra="has_reference = true", name="ref"))
    assert 0.8 < reduced_chi2(d)[0] < 1.25


def test_four_state_removes_scatter_and_emission(small_scan):
    noise = "laser_fluctuation = false\npump_fluctuation = false\ndrift = false\n"
    d = run(small_scan(noise=noise, chopped=True, name="four"))
    assert 0.8 < reduced_chi2(d)[0] < 1.25
    # Without probe chopping the same artefacts bias ΔOD: the check must then fail clearly.
    biased = run(small_scan(noise=noise, chopped=False, name="two"))
    assert reduced_chi2(biased)[0] > 3.0


def test_ctrl_c_leaves_a_readable_aborted_file(small_scan, tmp_path):
    cfg = small_scan(noise=PURE, shots=200, name="interrupt")
    proc = subprocess.Popen([sys.executable, "-m", "shotpair.daemon.cli", "run", str(cfg)], cwd=tmp_path,
                            stderr=subprocess.PIPE, text=True)
    try:
        # real-time bench at 1 kHz: wait for the first saved point, then interrupt
        for line in proc.stderr:
            if "point 1 [" in line:
                break
        proc.send_signal(__import__("signal").SIGINT)
        rest = proc.stderr.read()
        assert proc.wait(timeout=60) == 130
    finally:
        if proc.poll() is None:
            proc.kill()
    assert "Traceback" not in rest
    d = read(cfg.with_suffix(".h5"))
    assert d["state"] == "aborted" and "Ctrl-C" in d["reason"]
    assert 1 <= int(d["completed"].sum()) < d["completed"].size


def test_a_nexus_reader_finds_the_map_with_errors(small_scan):
    # nexusformat (the NeXus project's Python API) resolves the default plottable data the way NeXus
    # viewers do: root @default -> NXentry @default -> NXdata @signal/@axes, errors in <signal>_errors.
    from nexusformat.nexus import nxload

    cfg = small_scan(noise=PURE, name="nexus")
    run(cfg)
    root = nxload(str(cfg.with_suffix(".h5")), "r")
    try:
        data = root.plottable_data
        assert data.nxclass == "NXdata" and data.nxsignal.nxname == "delta_od"
        assert [a.nxname for a in data.nxaxes] == ["delay", "wavelength"]
        assert data.nxerrors is not None and data.nxerrors.shape == data.nxsignal.shape
        assert str(data.nxaxes[0].attrs["units"]) == "ps" and str(data.nxaxes[1].attrs["units"]) == "nm"
    finally:
        root.nxfile.close()


def test_show_summarises_a_file(small_scan, capsys, tmp_path):
    cfg = small_scan(noise=PURE, name="show")
    d = run(cfg)
    capsys.readouterr()
    assert main(["show", str(cfg.with_suffix(".h5"))]) == 0
    out = capsys.readouterr().out
    n = d["completed"].size
    assert "state complete" in out and f"{n} of {n} points measured" in out
    assert f"{int(d['pairs'].sum()):,} accepted" in out
    with h5py.File(cfg.with_suffix(".h5"), "r") as f:
        breaks = int(f["entry/diagnostics/phase_breaks"][()].sum())
    assert f"faults      {breaks:,} pump phase breaks, 0 instrument retries, 0 points measured again" in out
    chi2 = float(out.split("stored truth ")[1].split()[0])
    assert chi2 == pytest.approx(reduced_chi2(d)[0], rel=1e-2)
    not_h5 = tmp_path / "x.h5"
    not_h5.write_text("not hdf5")
    assert main(["show", str(not_h5)]) == 2
    assert "cannot open as HDF5" in capsys.readouterr().err


def test_plot_writes_a_png_with_the_map(small_scan, capsys, tmp_path):
    import matplotlib.image

    cfg = small_scan(noise=PURE, name="plot")
    run(cfg)
    png = tmp_path / "fig.png"
    assert main(["plot", str(cfg.with_suffix(".h5")), "--save-png", str(png), "--delays", "0.5,100",
                 "--wavelengths", "470,630"]) == 0
    img = matplotlib.image.imread(png)
    assert img.shape[0] > 400 and img.shape[1] > 600
    r, b = img[..., 0], img[..., 2]
    # the diverging map shows the bleach in blue and the absorption in red
    assert ((b - r) > 0.4).sum() > 500 and ((r - b) > 0.4).sum() > 500
    assert main(["plot", str(tmp_path / "missing.h5")]) == 2
    assert "cannot open as HDF5" in capsys.readouterr().err
