"""A learned piece's tallies for the segment watch (shoal.core.piece_tallies), on the
compiled kernels and on the numpy path, against a row-by-row Python loop: the
log-density sums, the unusual rows (their count, their centred sum with a missing value
at the centre, their count per component), the near rows and the sampled components.
Seeded synthetic rows."""
import math

import numpy as np
import pytest

from shoal.core import fused
from shoal.core.piece_tallies import piece_tallies

N, D, K = 1000, 5, 4


def _piece(seed=0):
    rng = np.random.default_rng(seed)
    ld = rng.normal(-8.0, 2.0, N)
    component = rng.integers(0, K, N)
    X = rng.normal(0.0, 3.0, (N, D))
    X[rng.random((N, D)) < 0.05] = np.nan
    return ld, component, X, rng.normal(size=D)


def _by_loop(ld, component, X, center, unusual_below, near_below, first, stride):
    """The tallies one row at a time."""
    unusual_sum, unusual_by = [0.0] * D, [0] * K
    unusual, near = 0, []
    for i in range(N):
        if unusual_below is not None and ld[i] < unusual_below:
            unusual += 1
            unusual_by[component[i]] += 1
            for d in range(D):
                if not math.isnan(X[i, d]):
                    unusual_sum[d] += X[i, d] - center[d]
        if near_below is not None and ld[i] < near_below:
            near.append(i)
    sampled = [0] * K
    for i in range(first, N, stride):
        sampled[component[i]] += 1
    return (math.fsum(ld), math.fsum(ld * ld), unusual, unusual_sum, unusual_by, near,
            sampled)


@pytest.mark.parametrize("bounds", [(-9.0, -12.0), (None, -10.0), (-7.5, None),
                                    (None, None)])
@pytest.mark.parametrize("first, stride", [(0, 1), (3, 4), (2, 7)])
def test_the_tallies_are_those_of_a_row_by_row_loop(scoring_path, bounds, first, stride):
    ld, component, X, center = _piece()
    unusual_below, near_below = bounds
    got = piece_tallies(ld, component, X, center, K, unusual_below=unusual_below,
                        near_below=near_below, first=first, stride=stride, sample=True)
    ld_sum, ld2_sum, unusual, unusual_sum, unusual_by, near, sampled = _by_loop(
        ld, component, X, center, unusual_below, near_below, first, stride)
    assert got.ld_sum == pytest.approx(ld_sum, rel=1e-12)
    assert got.ld2_sum == pytest.approx(ld2_sum, rel=1e-12)
    assert got.unusual == unusual
    if unusual_below is not None:
        assert 0 < unusual < N   # the bounds take some rows and leave others
    np.testing.assert_allclose(got.unusual_sum, unusual_sum, rtol=1e-12, atol=1e-9)
    assert got.unusual_by.tolist() == unusual_by
    assert got.near.tolist() == near
    assert got.sampled.tolist() == sampled
    # the sampled rows copied out, rounded to float32, with their log-densities
    np.testing.assert_array_equal(got.sample_rows, X[first::stride].astype(np.float32))
    np.testing.assert_array_equal(got.sample_ld, ld[first::stride])


def test_both_paths_give_the_same_tallies():
    if not fused.enabled():
        pytest.skip("the compiled kernels are not built or SHOAL_COMPILED=0")
    ld, component, X, center = _piece(seed=3)
    kw = dict(unusual_below=-8.5, near_below=-11.0, first=1, stride=4)
    compiled = piece_tallies(ld, component, X, center, K, **kw)
    fused.set_enabled(False)
    try:
        plain = piece_tallies(ld, component, X, center, K, **kw)
    finally:
        fused.set_enabled(True)
    assert compiled.unusual == plain.unusual and compiled.near.tolist() == plain.near.tolist()
    np.testing.assert_allclose(compiled.unusual_sum, plain.unusual_sum, rtol=1e-12)
    assert compiled.ld_sum == pytest.approx(plain.ld_sum, rel=1e-13)


def test_a_component_out_of_range_is_refused():
    if not fused.enabled():
        pytest.skip("the compiled kernels are not built or SHOAL_COMPILED=0")
    ld, component, X, center = _piece()
    component[10] = K
    with pytest.raises(ValueError, match="out of range"):
        piece_tallies(ld, component, X, center, K, first=2, stride=4)
