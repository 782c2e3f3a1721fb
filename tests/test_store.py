"""The HDF5 file follows the NeXus conventions a generic viewer relies on, and keeps what was flushed.

Rules checked (NeXus manual, "NXdata" and "Find the plottable data"): the root attribute `default` names
the NXentry, whose `default` names an NXdata group; its `signal` attribute names the plotted field; `axes`
lists one axis field name per dimension of the signal; `<axis>_indices` give the dimension; the
uncertainty of the signal is the field `<signal>_errors` of the same shape; fields carry `units`.
"""

from types import SimpleNamespace

import h5py
import numpy as np
import pytest

from shotpair.daemon.store import ScanStore, unique_path
from shotpair.drivers.errors import StorageError


def fake_result(px, value, pairs=10):
    arr = np.full(px, value)
    return SimpleNamespace(delta_od=arr, delta_od_error=arr / 10, floor=arr / 20, excess_noise=np.full(px, 2.0),
                           mean_counts_on=arr * 1e4, mean_counts_off=arr * 1e4, masked=np.zeros(px, dtype=np.int64),
                           pairs=pairs, rejected_pairs=1, unpaired_shots=0, gaps=0, shots=2 * pairs + 2)


def make(tmp_path, n=4, px=8, sweeps=2):
    return ScanStore.create(tmp_path / "s.h5", scan_id="id-1", title="t", delays_ps=np.linspace(-1, 2, n),
                            wavelengths_nm=np.linspace(420, 720, px), sweeps=sweeps,
                            orders=[np.arange(n), np.arange(n)[::-1]], config_text="[scan]\n",
                            instruments={"detector": {"driver": "sim", "identity": "sim det", "state": {"a": 1}}})


def test_nexus_default_chain_and_axes(tmp_path):
    store = make(tmp_path)
    store.write_point(0, 1, fake_result(8, 0.01), fake_result(8, 0.01), position_mm=10.1, delay_readback_ps=0.0,
                      measured_at_s=1.0)
    store.finish("complete")
    with h5py.File(tmp_path / "s.h5", "r") as f:
        entry = f[f.attrs["default"]]
        assert entry.attrs["NX_class"] == "NXentry"
        data = entry[entry.attrs["default"]]
        assert data.attrs["NX_class"] == "NXdata"
        signal = data[data.attrs["signal"]]
        axes = list(data.attrs["axes"])
        assert len(axes) == signal.ndim
        for k, name in enumerate(axes):
            assert data[name].shape == (signal.shape[k],)
            assert data.attrs[f"{name}_indices"] == k
            assert data[name].attrs["units"] in ("ps", "nm")
        errors = data[data.attrs["signal"] + "_errors"]
        assert errors.shape == signal.shape
        np.testing.assert_array_equal(signal[1], np.full(8, 0.01))
        assert np.isnan(signal[0]).all()  # unmeasured points are NaN
        assert entry["state"][()].decode() == "complete"
        assert entry["config/data"][()].decode() == "[scan]\n"
        assert entry["instrument/detector/identity"][()].decode() == "sim det"
        assert entry["diagnostics/stage_position"][0, 1] == 10.1
        assert entry["sweeps/completed"][0, 1] and not entry["sweeps/completed"][1, 1]


def test_flushed_points_are_readable_while_open(tmp_path):
    # h5py/HDF5 file locking forbids a second open while we write; copy the bytes instead, as a crash
    # would leave them (LIBRARY-NOTES: default libver + flush per point opens normally after SIGKILL).
    store = make(tmp_path)
    store.write_point(0, 2, fake_result(8, 0.02), fake_result(8, 0.02), position_mm=1.0, delay_readback_ps=1.0,
                      measured_at_s=2.0)
    copy = tmp_path / "copy.h5"
    copy.write_bytes((tmp_path / "s.h5").read_bytes())
    with h5py.File(copy, "r", locking=False) as f:
        assert f["entry/state"][()].decode() == "running"
        np.testing.assert_array_equal(f["entry/delta_od/delta_od"][2], np.full(8, 0.02))
    store.finish("aborted", "test")


def test_aborted_with_reason(tmp_path):
    store = make(tmp_path)
    store.log("chopper unlocked")
    store.finish("aborted", "interrupted by the user")
    with h5py.File(tmp_path / "s.h5", "r") as f:
        assert f["entry/state"][()].decode() == "aborted"
        assert f["entry/state_reason"][()].decode() == "interrupted by the user"
        assert f["entry/log"][0].decode().endswith("chopper unlocked")
        assert f["entry/end_time"][()].decode() != ""


def test_never_overwrites(tmp_path):
    first = tmp_path / "a.h5"
    first.write_bytes(b"x")
    assert unique_path(first) == tmp_path / "a-001.h5"
    (tmp_path / "a-001.h5").write_bytes(b"x")
    assert unique_path(first) == tmp_path / "a-002.h5"
    make(tmp_path).finish("complete")
    with pytest.raises(StorageError, match="cannot create"):
        make(tmp_path)  # the same path again: refused, the first file is untouched
