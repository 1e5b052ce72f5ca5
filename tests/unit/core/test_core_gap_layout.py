"""The numpy path's layout of a batch's gaps (core/gap_layout.py, core/gap_spans.py):
made once per batch for a grid of spans, each span's correction the same as the
one-span correction of its rows (which test_core_missing.py checks against scipy and a
written-out Ghahramani & Jordan step), and a span off the grid laid out again."""

import numpy as np
import pytest

from shoal.core import fused, missing
from shoal.core.gap_spans import batch_layout
from shoal.core.scoring import Standardiser
from test_core_missing import _mixture, _with_gaps


@pytest.fixture
def numpy_path():
    before = fused.enabled()
    fused.set_enabled(False)
    yield
    fused.set_enabled(before)


def _rows(covariance, n, seed=61):
    m, rng = _mixture(covariance, seed=seed, n_components=3, n_features=6)
    X = _with_gaps(m.data_means()[rng.integers(0, 3, n)] + rng.normal(0, 1.5, (n, 6)),
                   rng, share=0.2)
    return m, X


@pytest.mark.parametrize("covariance", ["full", "diag"])
def test_each_span_of_the_grid_corrects_its_rows_as_one_span_would(covariance):
    m, X = _rows(covariance, 1000)
    gaps = missing.find(X)
    rows = Standardiser(m.center, m.scale)
    layout, part = batch_layout(m, X, gaps, rows, 0, 300, 256)
    if covariance == "full":
        assert layout.bounds.tolist() == [0, 300, 556, 812, 1000]
    for lo, hi in [(0, 300), (300, 556), (556, 812), (812, 1000)]:
        again, part = batch_layout(m, X, gaps, rows, lo, hi, 256)
        assert again is layout                      # made once for the batch
        a, b = part[:2]
        inside = gaps.rows[(gaps.rows >= lo) & (gaps.rows < hi)]
        np.testing.assert_array_equal(layout.rows[a:b], inside)
        corr = np.zeros((hi - lo, m.n_components))
        missing.span_correction(m, layout, part, corr)
        Zf = np.where(gaps.mask, 0.0, (X[gaps.rows] - m.center) / m.scale)
        mine = (gaps.rows >= lo) & (gaps.rows < hi)
        want, _ = missing.gap_correction(m, Zf[mine], gaps.mask[mine])
        np.testing.assert_allclose(corr[inside - lo], want.T, rtol=1e-12, atol=1e-12)
        untouched = np.setdiff1d(np.arange(hi - lo), inside - lo)
        assert not corr[untouched].any()            # complete rows get no correction


def test_a_span_off_the_grid_is_laid_out_again():
    m, X = _rows("full", 600)
    gaps = missing.find(X)
    rows = Standardiser(m.center, m.scale)
    layout, _ = batch_layout(m, X, gaps, rows, 0, 200, 200)
    assert layout.span(100, 300) is None
    other, part = batch_layout(m, X, gaps, rows, 100, 300, 200)
    assert other is not layout and other.bounds.tolist() == [0, 100, 300, 500, 600]
    a, b = part[:2]
    np.testing.assert_array_equal(other.rows[a:b],
                                  gaps.rows[(gaps.rows >= 100) & (gaps.rows < 300)])


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_scoring_across_spans_equals_scoring_in_pieces(covariance, numpy_path):
    # more rows than one scoring span (SPAN_ROWS = 8192): the layout's grid is the
    # spans', and each row scores as it does alone in a piece of fewer rows
    m, X = _rows(covariance, 20_000, seed=62)
    whole = m.score(X)
    pieces = [m.score(X[a:a + 7_000]) for a in range(0, len(X), 7_000)]
    np.testing.assert_allclose(whole.log_density,
                               np.concatenate([p.log_density for p in pieces]), rtol=1e-12)
    np.testing.assert_allclose(whole.resp, np.concatenate([p.resp for p in pieces]),
                               rtol=1e-10, atol=1e-15)
