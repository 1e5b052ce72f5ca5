"""The numba kernels behind :mod:`shoal.core.fused` (imported only through it).

Module-level functions, so that numba's on-disk cache finds them again in every new
process (closures calling one another are recompiled every time).
"""

from __future__ import annotations

import numba
import numpy as np

# the clamp of the shifted log-joint, as on the numpy path: responsibilities below
# e^-230 (1e-100) are taken as e^-230 (subnormal numbers would slow every product)
CLAMP = -230.0

plain = numba.njit(cache=True, nogil=True, boundscheck=False)

# Offsets are taken as row slices (``L[k, lo:lo + n]``) before the inner loops:
# indexing ``L[k, lo + i]`` inside them stops LLVM from vectorising (3x slower).


@plain
def full_log_joint(Y, const, n_features, L, lo):
    """``L[k, lo + i] = const[k] - sum_d Y[k*D + d, i]^2`` for whitened rows
    ``Y`` (K*D, n)."""
    n = Y.shape[1]
    K = const.shape[0]
    D = n_features
    for k in range(K):
        Lk = L[k, lo : lo + n]
        c = const[k]
        for i in range(n):
            Lk[i] = c
        for d in range(D):
            Yr = Y[k * D + d]
            for i in range(n):
                Lk[i] -= Yr[i] * Yr[i]


@plain
def shift(L, lo, n, top, best):
    """Per row of ``L[:, lo:lo + n]``: the largest log-joint ``top[i]`` and its
    component ``best[lo + i]`` (first on ties); then ``L <- max(L - top, CLAMP)``."""
    K = L.shape[0]
    b = best[lo : lo + n]
    L0 = L[0, lo : lo + n]
    for i in range(n):
        top[i] = L0[i]
        b[i] = 0
    for k in range(1, K):
        Lk = L[k, lo : lo + n]
        for i in range(n):
            v = Lk[i]
            if v > top[i]:
                top[i] = v
                b[i] = k
    for k in range(K):
        Lk = L[k, lo : lo + n]
        for i in range(n):
            v = Lk[i] - top[i]
            Lk[i] = v if v > CLAMP else CLAMP


@plain
def normalise(E, lo, n, total):
    """``total[i] = sum_k E[k, lo + i]`` (in component order); then divide."""
    K = E.shape[0]
    E0 = E[0, lo : lo + n]
    for i in range(n):
        total[i] = E0[i]
    for k in range(1, K):
        Ek = E[k, lo : lo + n]
        for i in range(n):
            total[i] += Ek[i]
    for k in range(K):
        Ek = E[k, lo : lo + n]
        for i in range(n):
            Ek[i] /= total[i]


@plain
def gather_rows(A, resp, lo, row_w, floor, G, counts):
    """Per component ``k``: the rows ``i`` of ``A`` whose responsibility
    ``resp[k, lo + i]`` is positive and at least ``floor``, scaled by
    ``sqrt(resp * row_w[i])`` into ``G[k, :counts[k]]``, so that
    ``G[k]^T G[k]`` (one SYRK) is their weighted second-moment matrix."""
    n, W = A.shape
    K = resp.shape[0]
    for k in range(K):
        rk = resp[k, lo : lo + n]
        m = 0
        for i in range(n):
            r = rk[i]
            if r > 0.0 and r >= floor:
                s = np.sqrt(r * row_w[i])
                a = A[i]
                g = G[k, m]
                for j in range(W):
                    g[j] = s * a[j]
                m += 1
        counts[k] = m


@plain
def masked_weights(resp, lo, n, row_w, floor, RW):
    """``RW[:, :n] = resp[:, lo:lo + n] * row_w`` where the responsibility is at
    least ``floor``, else 0."""
    K = resp.shape[0]
    for k in range(K):
        rk = resp[k, lo : lo + n]
        out = RW[k]
        for i in range(n):
            r = rk[i]
            out[i] = r * row_w[i] if r >= floor else 0.0


@plain
def full_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means,
                cov, prec_chol, log_det, bad):
    """The full type's parameters from statistics, as ``Mixture._derive`` computes
    them on the numpy path (same formulas in the same order): weights, means,
    covariances (symmetrised, shrunk, ``reg_covar`` added), the upper-triangular
    precision Cholesky factors ``U`` (``U U^T = cov^-1``) by an unblocked
    Cholesky and a triangular inverse, and ``log det U``. ``bad[k]`` is set where
    a covariance is not positive definite (or not finite)."""
    K, D = s1.shape
    share = np.empty(K)
    _weights_and_means(s0, s1, n_eff, prior_weight, tiny, weights, means, share)
    for k in range(K):
        sk = s0[k] + tiny
        C = cov[k]
        for d in range(D):
            for e in range(D):
                C[d, e] = s2[k, d, e] / sk - means[k, d] * means[k, e]
        for d in range(D):
            for e in range(d + 1, D):
                v = 0.5 * (C[d, e] + C[e, d])
                C[d, e] = v
                C[e, d] = v
            C[d, d] = 0.5 * (C[d, d] + C[d, d])
        if prior_weight > 0.0:
            for d in range(D):
                for e in range(D):
                    C[d, e] = share[k] * C[d, e] + (1.0 - share[k]) * (1.0 if d == e else 0.0)
        for d in range(D):
            C[d, d] += reg_covar
    full_factor(cov, prec_chol, log_det, bad)


@plain
def full_factor(cov, prec_chol, log_det, bad):
    """Upper-triangular ``U`` with ``U U^T = cov^-1`` per component, by an
    unblocked Cholesky (``cov = L L^T``) and a triangular inverse (``U = L^-T``),
    and ``log det U``; ``bad[k]`` where ``cov[k]`` is not positive definite or not
    finite (its factor is left as zeros)."""
    K, D = cov.shape[0], cov.shape[1]
    L = np.empty((D, D))
    Linv = np.empty((D, D))
    for k in range(K):
        C = cov[k]
        ok = True
        for j in range(D):
            acc = C[j, j]
            for m in range(j):
                acc -= L[j, m] * L[j, m]
            if not (acc > 0.0) or not np.isfinite(acc):
                ok = False
                break
            L[j, j] = np.sqrt(acc)
            for i in range(j + 1, D):
                acc = C[i, j]
                for m in range(j):
                    acc -= L[i, m] * L[j, m]
                L[i, j] = acc / L[j, j]
        for i in range(D):
            for j in range(D):
                if not np.isfinite(C[i, j]):
                    ok = False
        bad[k] = not ok
        if not ok:
            for d in range(D):
                for e in range(D):
                    prec_chol[k, d, e] = 0.0
            log_det[k] = 0.0
            continue
        for j in range(D):
            Linv[j, j] = 1.0 / L[j, j]
            for i in range(j + 1, D):
                acc = 0.0
                for m in range(j, i):
                    acc -= L[i, m] * Linv[m, j]
                Linv[i, j] = acc / L[i, i]
            for i in range(j):
                Linv[i, j] = 0.0
        ld = 0.0
        for d in range(D):
            ld += np.log(Linv[d, d])
            for e in range(D):
                prec_chol[k, d, e] = Linv[e, d]
        log_det[k] = ld


@plain
def full_operator(means, prec_chol, log_det, WT):
    """The full type's scoring operator (see ``covariance._full_scoring_operator``)."""
    K, D = means.shape
    h = np.sqrt(0.5)
    for k in range(K):
        for d in range(D):
            row = k * D + d
            c = 0.0
            for e in range(D):
                u = prec_chol[k, e, d]
                WT[row, e] = u * h
                c += means[k, e] * u
            WT[row, D] = -c * h


@plain
def design(X, lo, n, center, scale, kind, A):
    """The design matrix of rows ``lo:lo + n`` of ``X`` standardised as
    ``(x - center) / scale``, into ``A[:n]``: ``[z, 1]`` (``kind`` 0, full),
    ``[z*z, z, 1]`` (1, diag) or ``[|z|^2, z, 1]`` (2, spherical)."""
    D = X.shape[1]
    for i in range(n):
        x = X[lo + i]
        a = A[i]
        if kind == 0:
            for d in range(D):
                a[d] = (x[d] - center[d]) / scale[d]
            a[D] = 1.0
        elif kind == 1:
            for d in range(D):
                z = (x[d] - center[d]) / scale[d]
                a[d] = z * z
                a[D + d] = z
            a[2 * D] = 1.0
        else:
            s = 0.0
            for d in range(D):
                z = (x[d] - center[d]) / scale[d]
                s += z * z
                a[1 + d] = z
            a[0] = s
            a[D + 1] = 1.0


@plain
def _weights_and_means(s0, s1, n_eff, prior_weight, tiny, weights, means, share):
    """Weights, means and each component's shrinkage share (its rows' weight against
    ``prior_weight``), as ``Mixture._derive`` and ``covariance._shrink`` compute them."""
    K, D = s1.shape
    total = 0.0
    for k in range(K):
        total += s0[k] + tiny
    for k in range(K):
        sk = s0[k] + tiny
        weights[k] = sk / total
        share[k] = 1.0
        if prior_weight > 0.0:
            nk = sk / total * n_eff if total > 0.0 else 0.0
            share[k] = nk / (nk + prior_weight)
        for d in range(D):
            means[k, d] = s1[k, d] / sk


@plain
def diag_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means, var):
    """The diag type's weights, means and variances (K, D) from statistics, as
    ``covariance._diag_covariance`` computes them (clipped at 0, shrunk towards 1,
    ``reg_covar`` added). Returns False if a variance is not positive."""
    K, D = s1.shape
    share = np.empty(K)
    _weights_and_means(s0, s1, n_eff, prior_weight, tiny, weights, means, share)
    ok = True
    for k in range(K):
        sk = s0[k] + tiny
        for d in range(D):
            v = max(s2[k, d] / sk - means[k, d] * means[k, d], 0.0)
            if prior_weight > 0.0:
                v = share[k] * v + (1.0 - share[k])
            v += reg_covar
            var[k, d] = v
            ok = ok and v > 0.0
    return ok


@plain
def spherical_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means,
                     var):
    """:func:`diag_derive` for the spherical type (``var`` (K,), the mean variance
    over features, as ``covariance._spherical_covariance`` computes it)."""
    K, D = s1.shape
    share = np.empty(K)
    _weights_and_means(s0, s1, n_eff, prior_weight, tiny, weights, means, share)
    ok = True
    for k in range(K):
        sk = s0[k] + tiny
        msq = 0.0
        for d in range(D):
            msq += means[k, d] * means[k, d]
        v = max(s2[k] / sk - msq / D, 0.0)
        if prior_weight > 0.0:
            v = share[k] * v + (1.0 - share[k])
        v += reg_covar
        var[k] = v
        ok = ok and v > 0.0
    return ok


@plain
def diag_operator(means, prec, log_const, BT):
    """The diag scoring operator (see ``covariance._diag_scoring_operator``) from
    ``prec`` = 1/var (K, D) and ``log_const`` = log w + log det U - D/2 log 2 pi."""
    K, D = means.shape
    for k in range(K):
        c = 0.0
        for d in range(D):
            p = prec[k, d]
            BT[k, d] = -0.5 * p
            BT[k, D + d] = means[k, d] * p
            c += means[k, d] * means[k, d] * p
        BT[k, 2 * D] = log_const[k] - 0.5 * c


@plain
def spherical_operator(means, prec, log_const, BT):
    """The spherical scoring operator (see ``covariance._spherical_scoring_operator``),
    ``prec`` = 1/var (K,)."""
    K, D = means.shape
    for k in range(K):
        p = prec[k]
        BT[k, 0] = -0.5 * p
        msq = 0.0
        for d in range(D):
            BT[k, 1 + d] = means[k, d] * p
            msq += means[k, d] * means[k, d]
        BT[k, D + 1] = log_const[k] - 0.5 * (msq * p)
