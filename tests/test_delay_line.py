"""Delay-line arithmetic against the speed of light (SI, exact) and Ciddor's air index."""

import math

import pytest
import scipy.constants
from hypothesis import given
from hypothesis import strategies as st

from shotpair.drivers.delay_line import SPEED_OF_LIGHT_M_PER_S, DelayLine, air_group_index, air_refractive_index


def test_speed_of_light_is_the_si_value():
    # Reference library: scipy.constants.c = 299 792 458 m/s, exact by the SI definition of the metre (BIPM).
    assert SPEED_OF_LIGHT_M_PER_S == scipy.constants.c


@pytest.mark.parametrize("passes, expected_ps_per_mm", [(2, 6.671282), (4, 13.34256)])
def test_vacuum_delay_per_mm(passes, expected_ps_per_mm):
    # REFERENCES.md [derived]: retroreflector moved by d changes the path by 2d: 2/c = 6.671282 ps/mm;
    # beam meeting it twice (4d): 13.34256 ps/mm. Computed here from scipy.constants.c as well.
    line = DelayLine(passes=passes, time_zero_mm=0.0)
    from_scipy = passes * 1e-3 / scipy.constants.c * 1e12
    assert line.ps_per_mm == pytest.approx(from_scipy, rel=1e-12)
    assert line.ps_per_mm == pytest.approx(expected_ps_per_mm, abs=5e-6)


def test_air_index_ciddor_at_800nm():
    # Ciddor, Appl. Opt. 35, 1566 (1996), values in REFERENCES.md: n - 1 = 2.7505e-4 and
    # group index - 1 = 2.7997e-4 at 800 nm; double pass in air = 6.67315 ps/mm.
    assert air_refractive_index(800.0) - 1 == pytest.approx(2.7505e-4, abs=1e-8)
    assert air_group_index(800.0) - 1 == pytest.approx(2.7997e-4, abs=1e-8)
    line = DelayLine(passes=2, time_zero_mm=0.0, group_index=air_group_index(800.0))
    assert line.ps_per_mm == pytest.approx(6.67315, abs=1e-5)


def test_group_index_is_n_minus_lambda_dn_dlambda():
    # Definition n_g = n - lambda dn/dlambda, checked by a central difference of the phase index.
    lam, h = 650.0, 1e-3
    dn = (air_refractive_index(lam + h) - air_refractive_index(lam - h)) / (2 * h)
    assert air_group_index(lam) == pytest.approx(air_refractive_index(lam) - lam * dn, abs=1e-9)


def test_sign_follows_the_delayed_beam():
    # Lengthening the probe path delays the probe (positive delay); lengthening the pump path makes the
    # probe arrive earlier relative to the pump (negative delay). Fact of the geometry.
    probe = DelayLine(passes=2, time_zero_mm=50.0, delayed_beam="probe")
    pump = DelayLine(passes=2, time_zero_mm=50.0, delayed_beam="pump")
    assert probe.delay_ps(51.0) > 0 > pump.delay_ps(51.0)
    assert probe.delay_ps(50.0) == 0.0 == pump.delay_ps(50.0)
    assert pump.delay_range_ps((0.0, 100.0)) == pytest.approx((-50 * pump.ps_per_mm, 50 * pump.ps_per_mm))


@given(st.floats(-2000.0, 2000.0), st.integers(1, 8), st.floats(0.0, 300.0), st.sampled_from(["probe", "pump"]))
def test_position_and_delay_round_trip(delay_ps, passes, zero_mm, beam):
    line = DelayLine(passes=passes, time_zero_mm=zero_mm, delayed_beam=beam)
    back = line.delay_ps(line.position_mm(delay_ps))
    assert math.isclose(back, delay_ps, rel_tol=1e-9, abs_tol=1e-9)
