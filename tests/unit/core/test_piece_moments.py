"""A learned piece's moments taken from the M-step (shoal.core.piece_moments), against
direct sums over the rows with numpy: exact counts, the positional row weights the
schedule's ``cell_unit`` promises, the same sums however the rows are cut into pieces,
and means and covariances within the schedule's tilt of the unweighted ones. Seeded
synthetic rows."""
import numpy as np
import pytest

from shoal.core import fused, initialise
from shoal.core.schedule import StepSchedule
from shoal.core.window_statistics import WindowSums, stack_sums

D = 4


def _rows(n, seed=0):
    rng = np.random.default_rng(seed)
    X = np.concatenate([rng.normal(0.0, 1.0, (n // 2, D)),
                        rng.normal(3.0, 0.5, (n - n // 2, D))])
    return X[rng.permutation(n)]


def _model(covariance, half_life=50_000, refresh=1024):
    X = _rows(3000, seed=1)
    schedule = StepSchedule(alpha=0.7, i0=None, half_life_rows=half_life)
    return initialise(X, 2, covariance, seed=0, schedule=schedule, refresh_rows=refresh)


def _positional(schedule, start, n, every):
    """Each row's weight by the rule: eta_i / (eta_{a+1} prod_{a<l<=i} (1 - eta_l)),
    ``a`` the last refresh point at or before the row's predecessor."""
    rows = np.arange(start + 1, start + n + 1)
    out = np.empty(n)
    for j, i in enumerate(rows):
        a = (i - 1) - (i - 1) % every
        eta = schedule.steps(a, i - a)
        out[j] = eta[-1] / (eta[0] * np.prod(1.0 - eta))
    return out


@pytest.mark.parametrize("covariance", ["full", "diag"])
@pytest.mark.parametrize("half_life", [50_000, None])
def test_moments_are_positionally_weighted_sums_of_the_rows(covariance, half_life):
    m = _model(covariance, half_life)
    X = _rows(5000, seed=2)
    after, scores = m.learn(X, moments=True)
    mo = scores.moments
    R = scores.resp                                   # (n, K)
    Xc = X - m.center
    c = _positional(m.schedule, m.n_rows, len(X), m.refresh_rows)
    # responsibilities under the model's floor leave the M-step's statistics
    W = np.where(R >= m.resp_floor, R, 0.0) * c[:, None]
    assert np.allclose(mo.T, R.sum(axis=0), rtol=1e-12)
    assert np.allclose(mo.Q, (R * R).sum(axis=0), rtol=1e-12)
    assert np.allclose(mo.B, W.sum(axis=0), rtol=1e-9)
    assert np.allclose(mo.M, W.T @ Xc, rtol=1e-9, atol=1e-9)
    S = np.einsum("nk,ni,nj->kij", W, Xc, Xc)
    if covariance == "diag":
        at = np.arange(D)
        assert np.allclose(mo.S[:, at, at], S[:, at, at], rtol=1e-9)
        assert np.all(mo.S[:, ~np.eye(D, dtype=bool)] == 0.0)
    else:
        assert np.allclose(mo.S, S, rtol=1e-9, atol=1e-9)
    # and the weights barely tilt: means and covariances as the unweighted ones
    mean_w = mo.M / mo.B[:, None]
    mean_u = R.T @ Xc / R.sum(axis=0)[:, None]
    assert np.allclose(mean_w, mean_u, atol=0.01)
    assert after.n_rows == m.n_rows + len(X)


@pytest.mark.parametrize("compiled", [True, False])
def test_moments_do_not_depend_on_how_the_rows_are_cut(compiled):
    was = fused.enabled()
    if compiled and not was:
        pytest.skip("compiled kernels not built")
    fused.set_enabled(compiled)
    try:
        m = _model("full", refresh=1000)
        X = _rows(6000, seed=3)
        _, whole = m.learn(X, moments=True)
        parts, model = [], m
        for lo, hi in ((0, 700), (700, 2500), (2500, 2501), (2501, 6000)):
            model, sc = model.learn(X[lo:hi], moments=True)
            parts.append(sc.moments)
        for key in ("T", "Q", "B", "M", "S"):
            assert np.allclose(sum(getattr(p, key) for p in parts), getattr(whole.moments, key),
                               rtol=1e-10, atol=1e-12), key
    finally:
        fused.set_enabled(was)


def test_no_moments_unless_asked_or_for_rows_with_gaps_or_spherical_models():
    m = _model("full")
    X = _rows(2000, seed=4)
    assert m.learn(X)[1].moments is None
    gappy = X.copy()
    gappy[5, 1] = np.nan
    assert m.learn(gappy, moments=True)[1].moments is None
    assert _model("spherical").learn(X, moments=True)[1].moments is None


@pytest.mark.parametrize("covariance", ["full", "diag"])
def test_no_rows_give_zero_moments_of_the_model_shape(covariance):
    m = _model(covariance)
    mo = m.learn(np.empty((0, D)), moments=True)[1].moments
    assert mo.T.shape == mo.Q.shape == mo.B.shape == (2,)
    assert mo.M.shape == (2, D) and mo.S.shape == (2, D, D)
    assert not any(np.any(getattr(mo, key)) for key in ("T", "Q", "B", "M", "S"))


def test_a_span_made_by_itself_equals_one_added_to_zeros():
    """The first span's moments are made from its own arrays (PieceMoments.of_span):
    bit for bit what adding it to zero moments gives, for both covariance types."""
    from shoal.core.piece_moments import PieceMoments
    rng = np.random.default_rng(7)
    K, scale, unit = 3, rng.uniform(0.5, 2.0, D), 0.93
    resp = rng.dirichlet(np.ones(K), 50).T
    b0, b1 = rng.uniform(1, 2, K), rng.normal(size=(K, D))
    for b2 in (rng.normal(size=(K, D, D)), rng.uniform(1, 2, (K, D))):
        for sums in (None, (rng.uniform(1, 2, K), rng.uniform(0, 1, K))):
            made = PieceMoments.of_span(resp, b0, b1, b2, unit, scale,
                                        None if sums is None else tuple(a.copy() for a in sums))
            added = PieceMoments.empty(K, D, scale)
            added.add_span(resp, b0, b1, b2, unit, sums)
            for key in ("T", "Q", "B", "M", "S"):
                assert np.array_equal(getattr(made, key), getattr(added, key)), key


def test_stacked_sums_take_unweighted_windows_mass_as_their_counts():
    a = WindowSums(T=np.array([2.0]), Q=np.array([1.0]), M=np.ones((1, D)),
                   S=np.ones((1, D, D)))
    b = WindowSums(T=np.array([3.0]), Q=np.array([2.0]), M=np.ones((1, D)),
                   S=np.ones((1, D, D)), B=np.array([0.5]))
    both = stack_sums([a, b])
    assert both.B.tolist() == [2.0, 0.5]
    assert stack_sums([a, a]).B is None and stack_sums([a, a]).mass.tolist() == [2.0, 2.0]


def test_scores_into_a_scratch_equal_fresh_ones_until_the_next_call():
    # the ingest reuses score buffers from piece to piece (ScoreScratch); the scores of a
    # call are those of fresh buffers, and the next call of the same size overwrites them
    from shoal.core.scoring import ScoreScratch
    m = _model("full")
    X = _rows(8192, seed=5)
    scratch = ScoreScratch()
    a_model, a = m.learn(X[:4096], scratch=scratch)
    b_model, b = m.learn(X[:4096])
    for name in ("log_density", "resp", "component", "segment", "confidence"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    kept = a.log_density.copy()
    a_model.learn(X[4096:], scratch=scratch)
    assert not np.array_equal(a.log_density, kept)      # a view into the reused buffer
    assert np.array_equal(a_model.s2, b_model.s2)
