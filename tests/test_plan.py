"""Delay grids, sweep orders and the travel check of the scan plan."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from shotpair.daemon.config import BenchSettings, ScanSettings
from shotpair.daemon.plan import build_grid_ps, make_plan, sweep_orders
from shotpair.drivers.errors import ConfigError


def scan(**kw):
    base = dict(delays=[{"kind": "linear", "start_ps": -1.0, "stop_ps": 2.0, "step_ps": 0.5}], shots_per_point=10,
                output="out.h5")
    base.update(kw)
    return ScanSettings.model_validate(base)


def test_segments_merge_sorted_without_duplicates():
    s = scan(delays=[
        {"kind": "linear", "start_ps": -1.0, "stop_ps": 2.0, "step_ps": 0.5},
        {"kind": "list", "delays_ps": [0.0, 1.5, 10.0]},
        {"kind": "log", "start_ps": 2.0, "stop_ps": 200.0, "points": 3},
    ])
    grid = build_grid_ps(list(s.delays))
    # -1..2 by 0.5 is 7 points; 0 and 1.5 repeat; log 2, 20, 200 (2 repeats); 10 new.
    expected = np.array([-1.0, -0.5, 0.0, 0.5, 1.0, 1.5, 2.0, 10.0, 20.0, 200.0])
    np.testing.assert_allclose(grid, expected, rtol=1e-12, atol=1e-12)


def test_dense_then_log_to_1500_ps():
    s = scan(delays=[{"kind": "linear", "start_ps": -1.0, "stop_ps": 2.0, "step_ps": 0.05},
                     {"kind": "log", "start_ps": 2.0, "stop_ps": 1500.0, "points": 40}])
    grid = build_grid_ps(list(s.delays))
    assert grid.size == 61 + 40 - 1
    assert np.all(np.diff(grid) > 0)
    # log part: constant ratio between neighbours (numpy.geomspace as reference)
    np.testing.assert_allclose(grid[60:], np.geomspace(2.0, 1500.0, 40), rtol=1e-12)


@pytest.mark.parametrize("order", ["ascending", "descending", "alternating", "shuffled"])
def test_every_sweep_visits_every_point_once(order):
    orders = sweep_orders(17, 4, order, seed=3)
    assert len(orders) == 4
    for o in orders:
        assert sorted(o.tolist()) == list(range(17))


def test_order_kinds():
    up = list(range(5))
    assert [o.tolist() for o in sweep_orders(5, 2, "ascending", None)] == [up, up]
    assert [o.tolist() for o in sweep_orders(5, 2, "descending", None)] == [up[::-1]] * 2
    assert [o.tolist() for o in sweep_orders(5, 3, "alternating", None)] == [up, up[::-1], up]
    a = sweep_orders(50, 3, "shuffled", seed=11)
    b = sweep_orders(50, 3, "shuffled", seed=11)
    c = sweep_orders(50, 3, "shuffled", seed=12)
    assert all((x == y).all() for x, y in zip(a, b))
    assert not all((x == y).all() for x, y in zip(a, c))
    assert not (a[0] == a[1]).all()


def test_positions_follow_the_delay_line():
    bench = BenchSettings.model_validate({"delay_axis": {"passes": 2, "time_zero_mm": 20.0, "travel_mm": [0, 100],
                                                         "medium": "vacuum"}})
    plan = make_plan(scan(), bench)
    # 2 passes in vacuum: 6.671282 ps/mm (REFERENCES.md, from c): delay 2 ps sits 0.299792 mm past time zero.
    assert plan.positions_mm[-1] == pytest.approx(20.0 + 2.0 / 6.671282, abs=1e-6)
    assert plan.total_shots == plan.n_points * 10 + bench.dark_shots


def test_delay_beyond_travel_is_refused_with_the_range():
    bench = BenchSettings.model_validate({"delay_axis": {"passes": 4, "time_zero_mm": 10.0, "travel_mm": [0, 150]}})
    s = scan(delays=[{"kind": "linear", "start_ps": -1.0, "stop_ps": 1.0, "step_ps": 0.5},
                     {"kind": "log", "start_ps": 1.0, "stop_ps": 5000.0, "points": 10}])
    with pytest.raises(ConfigError) as info:
        make_plan(s, bench, "scan.toml")
    text = str(info.value)
    assert "scan.toml" in text and "scan.delays[1]" in text and "5000" in text
    assert "outside the stage travel" in text and "ps" in text


def test_estimated_duration_counts_shots_and_moves():
    bench = BenchSettings.model_validate({"repetition_rate_hz": 1000.0,
                                          "delay_axis": {"velocity_mm_per_s": 10.0, "medium": "vacuum"}})
    plan = make_plan(scan(sweeps=2), bench)
    shots_s = (plan.n_points * 2 * 10 + bench.dark_shots) / 1000.0
    span = plan.positions_mm.max() - plan.positions_mm.min()
    # alternating: up, then down again with no return move in between
    assert plan.estimated_duration_s() == pytest.approx(shots_s + 2 * span / 10.0, rel=1e-9)


@given(st.lists(st.floats(-100, 100, allow_nan=False), min_size=1, max_size=40))
def test_list_grid_is_sorted_unique(values):
    grid = build_grid_ps([ScanSettings.model_validate(
        {"delays": [{"kind": "list", "delays_ps": values}], "shots_per_point": 2}).delays[0]])
    assert np.all(np.diff(grid) > 1e-6)
    assert set(np.round(grid, 5)) <= set(np.round(values, 5))
    assert grid.size >= 1
