"""The compiled kernels (core/_kernels.c via core/fused.py) against the numpy path and LAPACK.

The numpy path is the reference here: it is itself checked against scipy and
scikit-learn in test_core_density.py and test_core_reference_fits.py (which run on
both paths). The two paths differ only in the order of floating-point operations.
"""

import os
import subprocess
import sys

import numpy as np
import pytest
from scipy.linalg import cho_factor

from shoal.core import IllConditionedError, Mixture, fused, initialise, kernel_check
from shoal.core.covariance import FAMILIES

pytestmark = pytest.mark.skipif(not fused.enabled(),
                                reason="the shoal.core._kernels extension is not built")


@pytest.fixture
def numpy_then_compiled():
    """Call ``run()`` once on each path; gives (numpy result, compiled result)."""
    def both(run):
        try:
            fused.set_enabled(False)
            a = run()
            fused.set_enabled(True)
            b = run()
        finally:
            fused.set_enabled(True)
        return a, b
    return both


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_learning_agrees_with_the_numpy_path(covariance, mixture_data, numpy_then_compiled):
    X, *_ = mixture_data(30_000, 5, 6, seed=71)
    start = initialise(X[:4000], 5, covariance, seed=0, n_init=1)
    # 26,000 rows: several refreshes, a piece that ends mid-block and a last partial block
    (a, sa), (b, sb) = numpy_then_compiled(lambda: start.learn(X[4000:]))
    for name in ("s0", "s1", "s2", "weights", "means", "covariances", "prec_chol", "log_det"):
        np.testing.assert_allclose(getattr(b, name), getattr(a, name), rtol=1e-9, atol=1e-13,
                                   err_msg=name)
    np.testing.assert_array_equal(sb.component, sa.component)
    np.testing.assert_allclose(sb.log_density, sa.log_density, rtol=1e-11)
    np.testing.assert_allclose(sb.confidence, sa.confidence, rtol=1e-11)
    np.testing.assert_allclose(sb.resp, sa.resp, rtol=1e-9, atol=1e-15)
    assert b.n_rows == a.n_rows == start.n_rows + 26_000


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_scoring_and_batch_em_agree_with_the_numpy_path(covariance, mixture_data,
                                                        numpy_then_compiled):
    X, *_ = mixture_data(9_000, 4, 5, seed=72)
    m = initialise(X[:3000], 4, covariance, seed=1, n_init=1)
    sa, sb = numpy_then_compiled(lambda: m.score(X))
    np.testing.assert_allclose(sb.log_density, sa.log_density, rtol=1e-12)
    np.testing.assert_array_equal(sb.component, sa.component)
    (ea, lla), (eb, llb) = numpy_then_compiled(lambda: m.em_step(X))
    assert llb == pytest.approx(lla, rel=1e-13)
    for name in ("s0", "s1", "s2", "covariances"):
        np.testing.assert_allclose(getattr(eb, name), getattr(ea, name), rtol=1e-10,
                                   atol=1e-14, err_msg=name)


def test_ties_go_to_the_first_component_on_both_paths(numpy_then_compiled):
    # two identical components: every row is a tie, and the first one must win
    m = Mixture.from_parameters([0.5, 0.5], np.zeros((2, 2)), np.stack([np.eye(2)] * 2),
                                covariance="full")
    X = np.random.default_rng(3).normal(size=(2500, 2))
    sa, sb = numpy_then_compiled(lambda: m.score(X))
    assert np.all(sa.component == 0) and np.all(sb.component == 0)
    np.testing.assert_allclose(sb.confidence, 0.5, rtol=1e-15)


def test_compiled_factor_matches_lapack():
    rng = np.random.default_rng(5)
    A = rng.normal(size=(6, 16, 16))
    cov = A @ np.swapaxes(A, 1, 2) + 0.05 * np.eye(16)
    K = cov.shape[0]
    prec, log_det, bad = np.zeros_like(cov), np.empty(K), np.zeros(K, dtype=bool)
    fused.kernels().full_factor(cov, prec, log_det, bad)
    assert not bad.any()
    reference = FAMILIES["full"].precision_cholesky(cov)      # LAPACK potrf + trtri
    np.testing.assert_allclose(prec, reference, rtol=1e-9, atol=1e-12)
    # U U^T is the inverse (numpy.linalg as an outside reference)
    np.testing.assert_allclose(prec @ np.swapaxes(prec, 1, 2), np.linalg.inv(cov),
                               rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(log_det, -0.5 * np.linalg.slogdet(cov)[1], rtol=1e-12)
    # lower-triangular factor check against scipy's Cholesky
    c, _ = cho_factor(cov[0], lower=True)
    np.testing.assert_allclose(np.linalg.inv(np.tril(c)).T, prec[0], rtol=1e-9, atol=1e-12)


def test_compiled_factor_reports_what_lapack_refuses():
    cov = np.stack([np.eye(3), np.diag([1.0, -1.0, 1.0]), np.full((3, 3), np.nan)])
    prec, log_det, bad = np.zeros_like(cov), np.empty(3), np.zeros(3, dtype=bool)
    fused.kernels().full_factor(cov, prec, log_det, bad)
    assert bad.tolist() == [False, True, True]
    with pytest.raises(IllConditionedError, match=r"component\(s\) \[1, 2\].*reg_covar"):
        Mixture.from_parameters([0.4, 0.3, 0.3], np.zeros((3, 3)), cov, covariance="full")


def test_shoal_compiled_0_switches_the_kernels_off():
    code = ("from shoal.daemon.runtime.compiled_switch import apply_environment; apply_environment(); "
            "from shoal.core import fused; print(fused.enabled())")
    env = dict(os.environ, SHOAL_COMPILED="0")
    off = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, timeout=120)
    assert off.returncode == 0, off.stderr
    assert off.stdout.strip() == "False"


def test_core_reads_no_environment():
    # the switch is the daemon's: core alone keeps the compiled path it has built
    code = "from shoal.core import fused; print(fused.enabled())"
    env = dict(os.environ, SHOAL_COMPILED="0")
    on = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                        text=True, timeout=120)
    assert on.returncode == 0, on.stderr
    assert on.stdout.strip() == "True"


def test_warm_compiles_on_the_compiled_path_only():
    assert kernel_check.warm() is True
    try:
        fused.set_enabled(False)
        assert kernel_check.warm() is False
    finally:
        fused.set_enabled(True)


@pytest.mark.parametrize("covariance", ["diag", "spherical"])
def test_a_zero_variance_is_refused_on_both_paths(covariance, numpy_then_compiled):
    from dataclasses import replace

    cov = np.ones((2, 2)) if covariance == "diag" else np.ones(2)
    m = Mixture.from_parameters([0.5, 0.5], np.array([[0.0, 0.0], [1.0, 1.0]]), cov,
                                covariance=covariance)
    m = replace(m, reg_covar=0.0, prior_weight=0.0)
    s0 = np.array([0.5, 0.5])
    s1 = np.array([[0.5, 0.5], [1.0, 1.0]])
    # second moments below the squared means: every variance clips to exactly 0
    s2 = np.zeros_like(s1) if covariance == "diag" else np.zeros(2)

    def derive():
        with pytest.raises(IllConditionedError, match="non-positive variance.*reg_covar"):
            m._derive(s0, s1, s2, 1e-4)
        return True

    assert numpy_then_compiled(derive) == (True, True)


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_derive_takes_the_number_of_components_from_the_statistics(covariance, mixture_data,
                                                                   numpy_then_compiled):
    # segment merges derive a (K-1)-component model from a K-component one's statistics
    X, *_ = mixture_data(4000, 3, 3, seed=74)
    m = initialise(X, 3, covariance, seed=0, n_init=1)
    s0 = np.array([m.s0[0] + m.s0[1], m.s0[2]])
    s1 = np.stack([m.s1[0] + m.s1[1], m.s1[2]])
    s2 = np.stack([m.s2[0] + m.s2[1], m.s2[2]])
    a, b = numpy_then_compiled(lambda: m._derive(s0, s1, s2, m.sumsq))
    for name in a:
        assert b[name].shape == a[name].shape == (2,) + np.shape(m.__dict__[name])[1:]
        np.testing.assert_allclose(b[name], a[name], rtol=1e-9, atol=1e-14, err_msg=name)


def test_strided_rows_and_weights_are_taken_as_they_are(mixture_data, numpy_then_compiled):
    from shoal.core.distributed import partition_statistics

    X, *_ = mixture_data(3000, 2, 3, seed=75)
    m = initialise(X, 2, "full", seed=0, n_init=1)
    weights = np.linspace(1.0, 2.0, 6000)[::2]        # a strided view
    rows = np.asfortranarray(X)                      # column-major rows
    (a, sa), (b, sb) = numpy_then_compiled(lambda: partition_statistics(m, rows, weights))
    np.testing.assert_allclose(b.s2, a.s2, rtol=1e-10)
    np.testing.assert_array_equal(sb.component, sa.component)
    (la, _), (lb, _) = numpy_then_compiled(lambda: m.learn(rows[::-1]))
    np.testing.assert_allclose(lb.s1, la.s1, rtol=1e-10)


def _isas():
    """The tiled log-joint's instruction sets this CPU runs, 'none' (BLAS) first."""
    kern = fused.kernels()
    best = kern.tile_isa()
    order = ["none", "avx2", "avx512"]
    return order[: order.index(best) + 1] if best in order else ["none"]


@pytest.fixture
def tile_isa():
    """Set the tiled kernels' instruction set for one test; restore the CPU's best."""
    kern = fused.kernels()
    best = kern.tile_isa()
    yield kern.tile_isa
    kern.tile_isa(best)


@pytest.mark.parametrize("D", [1, 3, 4, 5, 13, 16])
@pytest.mark.parametrize("m", [1, 7, 33, 100])
def test_tiled_full_log_joint_equals_whitening_then_squares(D, m, tile_isa):
    # the reference is the plain definition: y = WT @ [z, 1], L = const - sum(y^2)
    kern = fused.kernels()
    rng = np.random.default_rng(D * 1000 + m)
    K = 3
    U = np.triu(rng.normal(size=(K, D, D))) + 3 * np.eye(D)
    means = rng.normal(size=(K, D))
    WT = np.empty((K * D, D + 1))
    kern.full_operator(means, U, np.zeros(K), WT)
    A = np.hstack([rng.normal(size=(m, D)), np.ones((m, 1))])
    const = rng.normal(size=K)
    want = const[:, None] - ((WT @ A.T).reshape(K, D, m) ** 2).sum(axis=1)
    P = np.empty(fused.packed_full_len(K, D))
    kern.pack_full(WT, P)
    for isa in _isas()[1:]:
        tile_isa(isa)
        L = np.full((K, m + 5), np.nan)
        kern.log_joint(A, P, const, D, L, 2)
        np.testing.assert_allclose(L[:, 2:2 + m], want, rtol=1e-12, atol=1e-12, err_msg=isa)
        assert np.isnan(L[:, :2]).all() and np.isnan(L[:, 2 + m:]).all()   # nothing else written


@pytest.mark.parametrize("K", [1, 3, 4, 8, 9])
@pytest.mark.parametrize("m", [1, 31, 64, 100])
def test_tiled_linear_log_joint_equals_the_product(K, m, tile_isa):
    kern = fused.kernels()
    rng = np.random.default_rng(K * 1000 + m)
    W = 11
    A, B = rng.normal(size=(m, W)), rng.normal(size=(K, W))
    for isa in _isas()[1:]:
        tile_isa(isa)
        L = np.full((K, m + 3), np.nan)
        kern.log_joint(A, B, None, 5, L, 3)
        np.testing.assert_allclose(L[:, 3:], B @ A.T, rtol=1e-12, atol=1e-12, err_msg=isa)
        assert np.isnan(L[:, :3]).all()


@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_every_tile_isa_learns_what_the_numpy_path_learns(covariance, mixture_data, tile_isa):
    X, *_ = mixture_data(12_000, 4, 7, seed=73)
    start = initialise(X[:3000], 4, covariance, seed=0, n_init=1)
    fused.set_enabled(False)
    try:
        ref, sref = start.learn(X[3000:])
    finally:
        fused.set_enabled(True)
    for isa in _isas():
        tile_isa(isa)
        got, s = start.learn(X[3000:])
        np.testing.assert_allclose(got.s2, ref.s2, rtol=1e-9, atol=1e-12, err_msg=isa)
        np.testing.assert_allclose(got.means, ref.means, rtol=1e-9, atol=1e-12, err_msg=isa)
        np.testing.assert_allclose(s.log_density, sref.log_density, rtol=1e-11, err_msg=isa)
        np.testing.assert_array_equal(s.component, sref.component)


def test_tile_isa_refuses_what_the_cpu_lacks(tile_isa):
    with pytest.raises(ValueError, match="not available"):
        tile_isa("sse9")
    if tile_isa() != "avx512":
        with pytest.raises(ValueError, match="not available"):
            tile_isa("avx512")
    tile_isa("none")
    assert not fused.tiled()
    with pytest.raises(ValueError, match="no tiled kernel"):
        fused.kernels().log_joint(np.ones((2, 3)), np.ones((1, 3)), None, 1, np.empty((1, 2)), 0)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_a_non_finite_value_is_refused_on_both_paths(bad, covariance, mixture_data,
                                                     numpy_then_compiled):
    # the compiled path checks inside its design kernel instead of a sum over X first
    from shoal.core import ModelError
    X, *_ = mixture_data(9_000, 3, 4, seed=74)
    m = initialise(X[:2000], 3, covariance, seed=0, n_init=1)
    Y = X.copy()
    Y[8_500, 2] = bad             # in the last block, after several have been learned

    def outcome(call):
        try:
            call()
        except ModelError as exc:
            return str(exc)
        return "accepted"
    for call in (lambda: m.learn(Y), lambda: m.score(Y)):
        a, b = numpy_then_compiled(lambda: outcome(call))
        # NaN marks a missing feature (scored by the marginal); infinity is refused
        assert a == b and (b == "accepted" if np.isnan(bad) else "infinite" in b)
    # huge but finite values (their sum overflows) are rows like any other
    Z = X[:64].copy()
    Z[0, 0] = 1e308
    Z[1, 0] = 1e308
    with np.errstate(over="ignore", invalid="ignore"):   # their densities do overflow
        a, b = numpy_then_compiled(lambda: outcome(lambda: m.score(Z)))
    assert a == b == "accepted"


def test_rows_from_columns_copies_and_checks_like_numpy():
    kern = fused.kernels()
    rng = np.random.default_rng(75)
    n, D = 1500, 5
    cols = [rng.normal(size=n) for _ in range(D)]
    cols[0][3], cols[1][700], cols[2][1499], cols[4][10] = np.nan, np.inf, -1e60, 40.0
    center, limit = np.full(D, 0.5), np.full(D, 30.0)
    X = np.column_stack(cols)
    with np.errstate(invalid="ignore"):
        in_bound = np.all(np.abs(X) <= 1e50, axis=1)
        in_range = np.all(np.abs(X - center) <= limit, axis=1)
    for c, lim, want in ((None, None, in_bound), (center, limit, in_bound & in_range)):
        out, valid = np.empty((n, D)), np.empty(n, dtype=bool)
        kern.rows_from_columns(cols, out, 1e50, c, lim, valid)
        np.testing.assert_array_equal(out, X)
        np.testing.assert_array_equal(valid, want)
    assert (~in_bound).sum() == 3 and (in_bound & ~in_range).sum() == 1
    with pytest.raises(ValueError, match="one value per row"):
        kern.rows_from_columns(cols[:-1] + [cols[-1][:-1]], np.empty((n, D)), 1e50, None,
                               None, np.empty(n, dtype=bool))
    with pytest.raises(ValueError, match="one column per output column"):
        kern.rows_from_columns(cols[:-1], np.empty((n, D)), 1e50, None, None,
                               np.empty(n, dtype=bool))


@pytest.mark.parametrize("K", [1, 2, 7, 9])
@pytest.mark.parametrize("n", [1, 13, 64])
def test_tiled_softmax_equals_its_definition(K, n, tile_isa):
    # reference: numpy's exp and log of the definition (shift by the row maximum, clamp
    # at -230, normalise); the compiled exp and log are series of their own (~1 ulp)
    kern = fused.kernels()
    rng = np.random.default_rng(K * 100 + n)
    L0 = rng.normal(-40.0, 60.0, (K, n + 4))
    L0[:, 5 % (n + 4)] = 3.0                     # a tie: the first component wins
    L0[-1, 1 % (n + 4)] = L0[0, 1 % (n + 4)] - 500.0   # far below: clamped at e^-230
    lo, lss = 2, 0.75
    top = L0[:, lo:lo + n].max(axis=0)
    e = np.exp(np.maximum(L0[:, lo:lo + n] - top, -230.0))
    total = e.sum(axis=0)
    for isa in _isas()[1:]:
        tile_isa(isa)
        L = L0.copy()
        best, ld, conf = np.full(n + 4, -1), np.full(n + 4, np.nan), np.full(n + 4, np.nan)
        kern.softmax(L, lo, n, lss, best, ld, conf)
        np.testing.assert_allclose(L[:, lo:lo + n], e / total, rtol=1e-14, atol=1e-300,
                                   err_msg=isa)
        np.testing.assert_array_equal(best[lo:lo + n], np.argmax(L0[:, lo:lo + n], axis=0))
        np.testing.assert_allclose(ld[lo:lo + n], np.log(total) + top - lss, rtol=1e-14,
                                   atol=1e-14, err_msg=isa)
        np.testing.assert_allclose(conf[lo:lo + n], 1.0 / total, rtol=1e-14, err_msg=isa)
        # rows outside lo..lo+n untouched
        np.testing.assert_array_equal(L[:, :lo], L0[:, :lo])
        np.testing.assert_array_equal(L[:, lo + n:], L0[:, lo + n:])
        assert (best[:lo] == -1).all() and np.isnan(ld[lo + n:]).all()


@pytest.mark.parametrize("K", [1, 3, 9])
@pytest.mark.parametrize("n", [1, 13, 100])
def test_tiled_softmax_sums_the_responsibilities_it_makes(K, n, tile_isa):
    # T[k] and Q[k] gain the sums of the responsibilities the softmax wrote and of their
    # squares (vector lanes and the rows past the last vector), on top of what they held
    kern = fused.kernels()
    rng = np.random.default_rng(K * 10 + n)
    L0 = rng.normal(-5.0, 4.0, (K, n + 4))
    for isa in _isas()[1:]:
        tile_isa(isa)
        L = L0.copy()
        best, ld, conf = np.zeros(n + 4, dtype=np.int64), np.zeros(n + 4), np.zeros(n + 4)
        T, Q = np.full(K, 2.0), np.full(K, 3.0)
        kern.softmax(L, 2, n, 0.0, best, ld, conf, T, Q)
        R = L[:, 2:2 + n]
        np.testing.assert_allclose(T, 2.0 + R.sum(axis=1), rtol=1e-13, err_msg=isa)
        np.testing.assert_allclose(Q, 3.0 + (R * R).sum(axis=1), rtol=1e-13, err_msg=isa)
        L2 = L0.copy()   # the responsibilities themselves as without the sums
        kern.softmax(L2, 2, n, 0.0, best, ld, conf)
        np.testing.assert_array_equal(L2, L)
        with pytest.raises(ValueError, match="together"):
            kern.softmax(L0.copy(), 2, n, 0.0, best, ld, conf, T)
        with pytest.raises(ValueError, match="one value per component"):
            kern.softmax(L0.copy(), 2, n, 0.0, best, ld, conf, T[:-1] if K > 1 else
                         np.zeros(2), Q[:-1] if K > 1 else np.zeros(2))


def test_compiled_span_sums_match_on_every_instruction_set(tile_isa):
    # the responsibility totals a learned span hands the drift watch are the same with the
    # tiled softmax (summed as made) and without it (summed by numpy), and equal the
    # totals of the responsibilities scored
    rng = np.random.default_rng(7)
    m = Mixture.from_parameters([0.3, 0.7], [[0.0, 0.0, 0.0], [4.0, 1.0, 0.0]],
                                np.stack([np.eye(3)] * 2))
    X = rng.normal(size=(3000, 3)) + rng.integers(0, 2, 3000)[:, None] * 4.0
    got = {}
    for isa in _isas():
        tile_isa(isa)
        _, scores = m.learn(X, moments=True)
        got[isa] = scores.moments
        np.testing.assert_allclose(scores.moments.T, scores.resp.sum(axis=0), rtol=1e-12)
        np.testing.assert_allclose(scores.moments.Q, (scores.resp ** 2).sum(axis=0),
                                   rtol=1e-12)
    for isa, mo in got.items():
        np.testing.assert_allclose(mo.T, got["none"].T, rtol=1e-12, err_msg=isa)
        np.testing.assert_allclose(mo.Q, got["none"].Q, rtol=1e-12, err_msg=isa)


@pytest.mark.parametrize("W", [2, 5, 8, 17])
@pytest.mark.parametrize("m", [1, 9, 100])
def test_tiled_gather_syrk_equals_the_weighted_outer_products(W, m, tile_isa):
    # the definition: P[k] += sum over rows with resp > 0 and >= floor of resp*w*a a^T
    kern = fused.kernels()
    rng = np.random.default_rng(W * 1000 + m)
    K, lo, floor = 3, 4, 0.2
    A = np.hstack([rng.normal(size=(m, W - 1)), np.ones((m, 1))])
    R = rng.random((K, m + 6))
    R[1, lo:lo + m] = 0.0                       # a component no row is active for
    R[2, lo] = floor                            # exactly at the floor: counts
    w = rng.random(m + 2)
    P0 = rng.normal(size=(K, W, W))
    P0 = P0 + np.swapaxes(P0, 1, 2)             # symmetric, as the statistics are
    act = np.where(R[:, lo:lo + m] >= floor, R[:, lo:lo + m], 0.0) * w[:m]
    want = P0 + np.einsum("kn,ni,nj->kij", act, A, A)
    for isa in _isas()[1:]:
        tile_isa(isa)
        P = P0.copy()
        kern.gather_syrk(A, R, lo, w, floor, P)
        np.testing.assert_allclose(P, want, rtol=1e-12, atol=1e-12, err_msg=isa)


def test_segment_scatter_is_the_same_on_both_paths(numpy_then_compiled):
    # drift windows' second moments (shoal.core.window_statistics.add_segment_scatter): rows at or
    # under the floor are left out on both paths, the rest weighted by responsibility
    from shoal.core.window_statistics import add_segment_scatter
    rng = np.random.default_rng(76)
    X = rng.normal(size=(700, 6))
    R = rng.dirichlet(np.ones(4), size=700).T.copy()
    R[2, :50] = 1e-12                              # exactly at the floor: left out
    R[3, 50:60] = 0.0
    S0 = np.zeros((4, 6, 6))

    def run():
        S = S0.copy()
        add_segment_scatter(S, X, R, 1e-12)
        add_segment_scatter(S, X[:100], R[:, :100], 1e-12)   # accumulates
        return S
    a, b = numpy_then_compiled(run)
    keep = np.where(R > 1e-12, R, 0.0)
    want = np.einsum("kn,ni,nj->kij", keep, X, X) + \
        np.einsum("kn,ni,nj->kij", keep[:, :100], X[:100], X[:100])
    np.testing.assert_allclose(a, want, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(b, want, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("isa", ["none", "avx2", "avx512"])
@pytest.mark.parametrize("covariance", ["full", "diag", "spherical"])
def test_compiled_gaps_equal_the_numpy_path_on_every_instruction_set(covariance, isa):
    # the compiled kernels (core/_kernels_gaps.h) against core/missing.py's numpy path,
    # over several refreshes and blocks, with a sparse responsibility floor
    from test_core_missing import _mixture, _with_gaps
    kern = fused.kernels()
    best = kern.tile_isa()
    order = ["none", "avx2", "avx512"]
    if order.index(isa) > order.index(best):
        pytest.skip(f"the CPU has no {isa}")
    m, rng = _mixture(covariance, seed=31, n_components=4, n_features=7)
    m = m._evolve(refresh_rows=512, resp_floor=1e-6)
    X = _with_gaps(m.data_means()[rng.integers(0, 4, 3000)] + rng.normal(0, 1.5, (3000, 7)),
                   rng, share=0.08)
    try:
        kern.tile_isa(isa)
        a_model, a_scores = m.learn(X)
        a_ld = a_model.score(X).log_density
        fused.set_enabled(False)
        b_model, b_scores = m.learn(X)
        b_ld = b_model.score(X).log_density
    finally:
        fused.set_enabled(True)
        kern.tile_isa(best)
    np.testing.assert_allclose(a_scores.log_density, b_scores.log_density, rtol=1e-9)
    np.testing.assert_allclose(a_scores.resp, b_scores.resp, rtol=1e-7, atol=1e-12)
    for name in ("s0", "s1", "s2", "means", "covariances"):
        np.testing.assert_allclose(getattr(a_model, name), getattr(b_model, name),
                                   rtol=1e-9, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(a_ld, b_ld, rtol=1e-9)
