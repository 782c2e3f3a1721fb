"""Mergeable per-pixel statistics against numpy computed over all the data at once.

Reference: Welford, Technometrics 4, 419 (1962) for the running update; Chan, Golub & LeVeque (1979/1983)
for the pairwise combination; numpy mean/var (ddof=1) over the whole data set as the reference library
(REFERENCES.md, "Streaming mean/variance").
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shotpair.daemon.welford import PixelStats, chan_merge, chunk_moments
from shotpair.drivers.errors import ShotpairError


def masked_reference(data: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-column count, mean, variance (ddof=1) over valid entries, with numpy on each column's subset."""
    count = valid.sum(axis=0)
    mean = np.array([data[valid[:, j], j].mean() if count[j] else np.nan for j in range(data.shape[1])])
    var = np.array([data[valid[:, j], j].var(ddof=1) if count[j] > 1 else np.nan for j in range(data.shape[1])])
    return count, mean, var


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 60), pixels=st.integers(1, 6),
       cuts=st.lists(st.integers(0, 60), max_size=6), keep=st.floats(0.3, 1.0), offset=st.floats(-1e6, 1e6))
def test_chunked_masked_updates_match_numpy_over_all_data(seed: int, n: int, pixels: int, cuts: list[int],
                                                           keep: float, offset: float) -> None:
    """Any chunking and any mask give numpy's mean/var over the valid entries (Welford; Chan et al.)."""
    rng = np.random.default_rng(seed)
    data = offset + rng.standard_normal((n, pixels)) * rng.uniform(1e-3, 10.0)
    valid = rng.random((n, pixels)) < keep
    stats = PixelStats(pixels)
    edges = sorted({0, n, *(c for c in cuts if c < n)})
    for a, b in zip(edges[:-1], edges[1:]):
        stats.update(data[a:b], valid[a:b])
    count, mean, var = masked_reference(data, valid)
    assert np.array_equal(stats.count, count)
    has = count > 0
    np.testing.assert_allclose(stats.mean[has], mean[has], rtol=1e-12, atol=1e-9 * (1 + abs(offset)))
    two = count > 1
    np.testing.assert_allclose(stats.variance[two], var[two], rtol=1e-8, atol=1e-12 * (1 + offset**2))
    assert np.all(np.isnan(stats.variance[~two]))
    assert np.all(np.isnan(stats.std_error[~two]))


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_a=st.integers(0, 40), n_b=st.integers(0, 40))
def test_merge_of_two_statistics_equals_numpy_over_the_union(seed: int, n_a: int, n_b: int) -> None:
    """Chan, Golub & LeVeque pairwise combination vs numpy over the concatenated data."""
    rng = np.random.default_rng(seed)
    a, b = rng.normal(5.0, 2.0, (n_a, 3)), rng.normal(-1.0, 0.5, (n_b, 3))
    sa, sb = PixelStats(3), PixelStats(3)
    sa.update(a)
    sb.update(b)
    sa.merge(sb)
    both = np.concatenate([a, b])
    assert np.all(sa.count == n_a + n_b)
    if n_a + n_b >= 2:
        np.testing.assert_allclose(sa.mean, both.mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(sa.variance, both.var(axis=0, ddof=1), rtol=1e-10)
        np.testing.assert_allclose(sa.std_error, both.std(axis=0, ddof=1) / np.sqrt(n_a + n_b), rtol=1e-10)


def test_chan_merge_textbook_case() -> None:
    """{1, 2, 3} merged with {4, 5}: numpy gives mean 3 and variance 2.5 (ddof=1) for 1..5."""
    n, mean, m2 = chan_merge(np.array([3]), np.array([2.0]), np.array([2.0]),
                             np.array([2]), np.array([4.5]), np.array([0.5]))
    ref = np.arange(1.0, 6.0)
    assert n[0] == 5
    assert mean[0] == pytest.approx(ref.mean())
    assert m2[0] / (n[0] - 1) == pytest.approx(ref.var(ddof=1))


def test_one_sample_gives_nan_error_and_bad_shape_raises() -> None:
    stats = PixelStats(2)
    stats.update(np.array([[1.0, 2.0]]))
    assert np.all(np.isnan(stats.variance)) and np.all(np.isnan(stats.std_error))
    with pytest.raises(ShotpairError):
        stats.update(np.zeros((3, 4)))
    with pytest.raises(ShotpairError):
        chunk_moments(np.zeros((2, 2)), np.ones((3, 2), bool))
