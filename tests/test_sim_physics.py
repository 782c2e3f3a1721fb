"""Physics of the simulated bench checked against published values and reference libraries.

Sources are named beside each check; tags follow /work/shared/REFERENCES.md ([published], [derived]).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants
import scipy.integrate
import scipy.special
import scipy.stats
from pydantic import ValidationError

from shotpair.drivers.errors import ConfigError
from shotpair.simulators.dispersion import (
    chirp_arrival_ps,
    fused_silica_group_delay_fs_per_mm,
    fused_silica_group_index,
    fused_silica_index,
)
from shotpair.simulators.kinetics import FWHM_PER_SIGMA, KineticScheme, fwhm_to_sigma, gaussian_step_exp
from shotpair.simulators.sample import SampleModel
from shotpair.simulators.settings import SampleSettings, Step
from shotpair.simulators.special import erfc, erfcx

# --------------------------------------------------------------------------------------------------
# Dispersion: Malitson, J. Opt. Soc. Am. 55, 1205 (1965)
# --------------------------------------------------------------------------------------------------


def test_fused_silica_index_at_helium_d_line() -> None:
    # [published] Malitson (1965): n(587.6 nm) = 1.45846.
    assert float(fused_silica_index(587.6)) == pytest.approx(1.45846, abs=1e-5)


def test_fused_silica_index_and_group_index_at_800_nm() -> None:
    # [derived] REFERENCES.md from Malitson's Sellmeier terms: n = 1.453317, n_g = 1.46714 at 800 nm.
    assert float(fused_silica_index(800.0)) == pytest.approx(1.453317, abs=2e-6)
    assert float(fused_silica_group_index(800.0)) == pytest.approx(1.46714, abs=2e-5)


def test_group_delay_is_group_index_over_c() -> None:
    # [derived] group delay of 1 mm = n_g * 1 mm / c, c from scipy.constants (exact SI value).
    expected_fs = 1.46714 * 1e-3 / scipy.constants.c * 1e15
    assert float(fused_silica_group_delay_fs_per_mm(800.0)) == pytest.approx(expected_fs, rel=2e-5)


@pytest.mark.parametrize(("blue_nm", "red_nm", "expected_fs"), [(450.0, 750.0, 102.5), (400.0, 800.0, 155.0)])
def test_group_delay_differences(blue_nm: float, red_nm: float, expected_fs: float) -> None:
    # [derived] REFERENCES.md: 450 vs 750 nm ≈ 102.5 fs/mm; 400 vs 800 nm ≈ 155 fs/mm of fused silica.
    diff = float(fused_silica_group_delay_fs_per_mm(blue_nm) - fused_silica_group_delay_fs_per_mm(red_nm))
    assert diff == pytest.approx(expected_fs, abs=0.6)
    # Blue trails red after the glass (normal dispersion): a positive arrival time, scaling with thickness.
    arrival_ps = float(chirp_arrival_ps(blue_nm, 2.0, red_nm))
    assert arrival_ps == pytest.approx(2.0 * expected_fs * 1e-3, abs=1.2e-3)


# --------------------------------------------------------------------------------------------------
# Special functions: reference library scipy.special
# --------------------------------------------------------------------------------------------------


def test_erfcx_and_erfc_match_scipy() -> None:
    # Reference library: scipy.special.erfcx / erfc. Documented accuracy of ours: relative 1.2e-7.
    x = np.concatenate([np.linspace(-25.0, 30.0, 20001), np.logspace(1.5, 8, 200)])
    np.testing.assert_allclose(erfcx(x), scipy.special.erfcx(x), rtol=1.5e-7, atol=0)
    y = np.linspace(-8.0, 25.0, 20001)
    np.testing.assert_allclose(erfc(y), scipy.special.erfc(y), rtol=1.5e-7, atol=0)
    assert erfc(np.array([40.0]))[0] == 0.0 and np.isfinite(erfcx(np.array([1e300]))[0])


# --------------------------------------------------------------------------------------------------
# Exponential convolved with a Gaussian response
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("k", "sigma"), [(2.0, 0.1), (1 / 0.8, 0.051), (1 / 450.0, 0.051), (80.0, 0.05), (0.5, 1.0)])
def test_gaussian_step_exp_matches_exponnorm(k: float, sigma: float) -> None:
    # Reference library (REFERENCES.md): S(t) = scipy.stats.exponnorm.pdf(t, K=1/(kσ), scale=σ) / k.
    t = np.linspace(-5.0, 60.0, 50001)
    ref = scipy.stats.exponnorm.pdf(t, K=1.0 / (k * sigma), scale=sigma) / k
    got = gaussian_step_exp(t, k, sigma)
    np.testing.assert_allclose(got, ref, rtol=2e-7, atol=1e-15)


def test_gaussian_step_exp_check_values() -> None:
    # [derived] REFERENCES.md: σ = 0.1, k = 2: S(0.5) = 0.3753108, S(2.0) = 0.01868564.
    s = gaussian_step_exp(np.array([0.5, 2.0]), 2.0, 0.1)
    assert s[0] == pytest.approx(0.3753108, abs=1e-7)
    assert s[1] == pytest.approx(0.01868564, abs=1e-8)


def test_gaussian_step_exp_is_stable_far_from_zero() -> None:
    # Far after time zero the convolution is the bare exponential exp(k²σ²/2 − k t) (REFERENCES.md form);
    # far before it is zero; never inf or NaN.
    k, sigma = 50.0, 0.05
    t = np.array([-1e6, -50.0, 2.0, 1e3, 1e7])
    s = gaussian_step_exp(t, k, sigma)
    assert np.all(np.isfinite(s))
    assert s[0] == 0.0 and s[1] == 0.0
    assert s[2] == pytest.approx(math.exp(0.5 * (k * sigma) ** 2 - k * 2.0), rel=1e-6)


def test_zero_rate_is_a_smoothed_step() -> None:
    # k = 0: ½ erfc(−t/(σ√2)) = Gaussian CDF (reference: scipy.stats.norm.cdf).
    t = np.linspace(-1.0, 1.0, 2001)
    np.testing.assert_allclose(gaussian_step_exp(t, 0.0, 0.07), scipy.stats.norm.cdf(t / 0.07), rtol=2e-7, atol=1e-15)


def test_instrument_response_fwhm() -> None:
    # [published] FWHM of a Gaussian = 2 sqrt(2 ln 2) σ = 2.35482 σ. The response the sample applies,
    # measured as the derivative of its smoothed step, must have the configured 120 fs FWHM.
    assert FWHM_PER_SIGMA == pytest.approx(2.35482, abs=1e-5)
    sigma = SampleModel(SampleSettings()).sigma_ps
    t = np.linspace(-0.5, 0.5, 200001)
    response = np.gradient(gaussian_step_exp(t, 0.0, sigma), t)
    above = t[response >= 0.5 * response.max()]
    assert above[-1] - above[0] == pytest.approx(0.120, abs=2e-5)
    assert fwhm_to_sigma(2.35482) == pytest.approx(1.0, abs=1e-5)


# --------------------------------------------------------------------------------------------------
# Kinetic schemes
# --------------------------------------------------------------------------------------------------


def test_bateman_check_values() -> None:
    # [published form, derived values] A → B → C, k1 = 5, k2 = 0.2 (Bateman; e.g. Atkins):
    # B(1) = 0.845826, B(5) = 0.383208, t_max = ln(k1/k2)/(k1 − k2) = 0.670599.
    scheme = KineticScheme(["A", "B"], [("A", "B", 5.0), ("B", "ground", 0.2)])
    b = scheme.populations(np.array([1.0, 5.0]), np.array([1.0, 0.0]))[:, 1]
    assert b[0] == pytest.approx(0.845826, abs=1e-6)
    assert b[1] == pytest.approx(0.383208, abs=1e-6)
    t = np.linspace(0.5, 0.85, 350001)
    b_fine = scheme.populations(t, np.array([1.0, 0.0]))[:, 1]
    assert t[np.argmax(b_fine)] == pytest.approx(0.670599, abs=2e-6)
    # Before the excitation there is nothing.
    assert np.all(scheme.populations(np.array([-1.0, -1e-9]), np.array([1.0, 0.0])) == 0.0)


def test_branched_scheme_matches_solve_ivp() -> None:
    # Reference library: scipy.integrate.solve_ivp on dP/dt = K P for a branched 3-species scheme.
    steps = [("A", "B", 2.0), ("A", "C", 0.5), ("B", "C", 0.3), ("B", "ground", 0.1), ("C", "ground", 0.05)]
    scheme = KineticScheme(["A", "B", "C"], steps)
    rates = {(a, b): k for a, b, k in steps}

    def rhs(_t: float, p: np.ndarray) -> list[float]:
        a, b, c = p
        return [
            -(rates["A", "B"] + rates["A", "C"]) * a,
            rates["A", "B"] * a - (rates["B", "C"] + rates["B", "ground"]) * b,
            rates["A", "C"] * a + rates["B", "C"] * b - rates["C", "ground"] * c,
        ]

    t_eval = np.array([0.0, 0.1, 0.5, 1.0, 3.0, 10.0, 40.0, 100.0])
    sol = scipy.integrate.solve_ivp(rhs, (0.0, 100.0), [0.7, 0.3, 0.0], t_eval=t_eval, rtol=1e-11, atol=1e-13,
                                    method="LSODA")
    got = scheme.populations(t_eval, np.array([0.7, 0.3, 0.0]))
    np.testing.assert_allclose(got, sol.y.T, atol=1e-9)


def test_convolved_populations_match_numerical_convolution() -> None:
    # Reference: numpy.convolve of the bare Bateman populations (published form) with a sampled Gaussian.
    k1, k2, sigma = 5.0, 0.2, 0.08
    dt = 5e-4
    t = dt * np.arange(-4000, 24000)
    tp = np.clip(t, 0, None)
    bare_b = np.where(t >= 0, k1 / (k2 - k1) * (np.exp(-k1 * tp) - np.exp(-k2 * tp)), 0.0)
    half_width = int(round(8 * sigma / dt))
    kt = dt * np.arange(-half_width, half_width + 1)  # odd length: centred for mode="same"
    kernel = np.exp(-0.5 * (kt / sigma) ** 2)
    kernel /= kernel.sum()
    numeric = np.convolve(bare_b, kernel, mode="same")
    scheme = KineticScheme(["A", "B"], [("A", "B", k1), ("B", "ground", k2)])
    analytic = scheme.populations(t, np.array([1.0, 0.0]), sigma)[:, 1]
    inner = slice(len(kt), -len(kt))
    np.testing.assert_allclose(analytic[inner], numeric[inner], atol=5e-5)


def test_schemes_without_exponential_basis_are_refused() -> None:
    # Equal total decay rates along a chain give t·exp(−kt) terms (no eigenbasis): refused clearly.
    with pytest.raises(ConfigError, match="equal total decay rates"):
        KineticScheme(["A", "B"], [("A", "B", 1.0), ("B", "ground", 1.0)])
    # An irreversible cycle has complex eigenvalues (oscillating populations): refused.
    with pytest.raises(ConfigError, match="oscillating"):
        KineticScheme(["A", "B", "C"], [("A", "B", 1.0), ("B", "C", 1.0), ("C", "A", 1.0)])
    with pytest.raises(ValidationError):
        SampleSettings(steps=[Step(from_species="S1_hot", to_species="S1", lifetime_ps=5.0),
                              Step(from_species="S1", to_species="ground", lifetime_ps=5.0)])


# --------------------------------------------------------------------------------------------------
# The demo sample
# --------------------------------------------------------------------------------------------------


def _bands_od(bands: list[tuple[float, float, float]], lam: np.ndarray) -> np.ndarray:
    """Gaussian bands (centre, FWHM, peak) written out independently of the code under test."""
    return sum(a * np.exp(-4 * np.log(2) * ((lam - c) / w) ** 2) for c, w, a in bands)


def _sellmeier_arrival_ps(lam_nm: np.ndarray, thickness_mm: float, ref_nm: float) -> np.ndarray:
    """Chirp from Malitson's published Sellmeier terms, group index by numerical differentiation (numpy)."""
    b = (0.6961663, 0.4079426, 0.8974794)
    c = (0.0684043, 0.1162414, 9.896161)

    def n(l_um: np.ndarray) -> np.ndarray:
        l2 = l_um**2
        return np.sqrt(1 + sum(bi * l2 / (l2 - ci**2) for bi, ci in zip(b, c)))

    def ng(l_nm: np.ndarray) -> np.ndarray:
        l_um = np.asarray(l_nm, dtype=float) / 1000.0
        h = 1e-4
        return n(l_um) - l_um * (n(l_um + h) - n(l_um - h)) / (2 * h)

    return thickness_mm * 1e-3 / scipy.constants.c * (ng(lam_nm) - ng(ref_nm)) * 1e12


def test_demo_signs_bleach_esa_and_stimulated_emission() -> None:
    # Sign conventions (REFERENCES.md, common practice): bleach and stimulated emission negative,
    # excited-state absorption positive.
    model = SampleModel(SampleSettings())
    d = model.delta_od(np.array([5.0]), np.array([470.0, 540.0, 630.0]))[0]
    assert d[0] < -5e-3, "ground-state bleach near 470 nm must be negative"
    assert d[1] < -3e-3, "stimulated emission near 540 nm must be negative"
    assert d[2] > 5e-3, "singlet absorption near 630 nm must be positive"
    # Peak magnitude of the demo: 10-20 mOD.
    full = model.delta_od(np.array([1.0, 5.0, 100.0, 3000.0]), np.linspace(420, 720, 512))
    assert 0.010 <= np.abs(full).max() <= 0.020


def test_demo_nothing_before_time_zero() -> None:
    # 1 ps before time zero is > 10 response widths (σ = 51 fs) even after the 0.27 ps chirp: ΔOD ≈ 0.
    model = SampleModel(SampleSettings())
    d = model.delta_od(np.array([-3.0, -1.0]), np.linspace(420, 720, 301))
    assert np.abs(d).max() < 1e-12


def test_demo_long_time_spectrum_is_the_triplet() -> None:
    # At 5 ns (11 singlet lifetimes of 450 ps) only T1 remains: ΔOD = f·P_T1·(A_T1 − A_ground), with
    # P_T1 from the Bateman formula for a three-step chain (published form) and the demo bands.
    lam = np.linspace(420, 720, 301)
    f = 0.04
    k = np.array([1 / 0.8, 1 / 450.0, 1 / 2.0e6])
    t = 5000.0
    p_t1 = k[0] * k[1] * sum(np.exp(-k[i] * t) / np.prod([k[j] - k[i] for j in range(3) if j != i]) for i in range(3))
    ground = _bands_od([(470.0, 45.0, 0.40), (400.0, 40.0, 0.25)], lam)
    triplet = _bands_od([(580.0, 60.0, 0.45)], lam)
    expected = f * p_t1 * (triplet - ground)
    got = SampleModel(SampleSettings()).delta_od(np.array([t]), lam)[0]
    np.testing.assert_allclose(got, expected, atol=1e-6)
    assert got[np.argmin(np.abs(lam - 580))] > 0.015


def test_demo_time_zero_follows_fused_silica_chirp() -> None:
    # At 420 nm the signal is a pure bleach whose onset is the response-smoothed step (half height at
    # time zero). Time zero there lies earlier than at 570 nm by the group-delay difference of 3 mm of
    # fused silica (Malitson Sellmeier, computed here independently): blue light trails red, so it
    # probes a longer real delay at the same stage setting.
    model = SampleModel(SampleSettings())
    t0 = -float(_sellmeier_arrival_ps(np.array([420.0]), 3.0, 570.0)[0])
    assert t0 == pytest.approx(-0.2656, abs=2e-3)
    plateau = model.delta_od(np.array([2.0]), np.array([420.0]))[0, 0]
    at_t0 = model.delta_od(np.array([t0]), np.array([420.0]))[0, 0]
    assert plateau < 0
    assert at_t0 / plateau == pytest.approx(0.5, abs=0.01)
    # Scanning the delay finds the half-height crossing at the same place.
    times = np.linspace(-0.6, 0.6, 2401)
    trace = model.delta_od(times, np.array([420.0]))[:, 0]
    half = times[np.argmin(np.abs(trace - 0.5 * plateau))]
    assert half == pytest.approx(t0, abs=0.01)
