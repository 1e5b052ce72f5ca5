"""Rows with gaps laid out for the full covariance type's algebra, and its kernels.

The maths is in :mod:`shoal.core.missing`: a row filled at zero is scored by the
ordinary kernels, then corrected by ``0.5 (|m| log 2 pi - log det H + g^T H^-1 g)``
with ``H = Lam_mm`` and ``g = (Lam (z - mu))_m``, and completing it adds
``z delta^T + delta z^T + delta delta^T + H^-1`` to its second moment
(``delta = -H^-1 g`` on the missing features). Here that algebra runs over a
:class:`GapLayout`: where the gaps are, worked out once for a batch of rows, so that
each span between parameter changes only does the arithmetic that depends on the
parameters.
"""

from __future__ import annotations

import functools

import numpy as np

from .covariance import LOG_2PI

__all__ = ["GapLayout", "precision_matrices", "full_span", "full_completion"]


def precision_matrices(model):
    """The full type's precisions ``Lam_k = U_k U_k^T`` and ``Lam_k mu_k``.

    Parameters
    ----------
    model : Mixture
        A full-covariance mixture.

    Returns
    -------
    lam : ndarray of shape (n_components, n_features, n_features)
    lam_mu : ndarray of shape (n_components, n_features)
    """
    U = model.prec_chol
    lam = U @ np.swapaxes(U, 1, 2)
    return lam, np.einsum("kde,ke->kd", lam, model.means)


class _Group:
    """The rows of a layout that miss ``r`` features (the last group: ``r`` or more):
    ``at`` their places in the layout, ``rows`` their numbers, ``pos`` (n, r) where
    their pairs sit in the feature order, ``cols`` (n, r) the features, ``const`` (n,)
    the correction's constant ``0.5 |m| log 2 pi + sum(log scale[m])``, ``cells``
    (n, r, r) the flat (feature, feature) cells of their ``H``, ``keys`` (n, r, r) the
    same where the statistics gather them, and ``count`` (n,) how many features each
    row misses. In the last group the rows missing fewer than the widest are padded to
    an identity block: their extra pairs point at the zero slot past the last pair and
    at feature 0, their extra cells at the cell past the last (one, on the diagonal)
    or the one after it (zero), their extra keys at cell 0 (with zero weight)."""

    __slots__ = ("at", "rows", "pos", "cols", "const", "cells", "keys", "count")

    def __init__(self, at, layout, place, col, start, count, width):
        n_pairs, n_features = col.size, layout.Zf.shape[1]
        pair = start[at][:, None] + np.arange(width)
        self.count = count[at]
        self.at, self.rows = at, layout.rows[at]
        self.const = layout.scale_term[at] + (0.5 * LOG_2PI) * self.count
        valid = np.arange(width) < self.count[:, None]
        if width > 2:
            pair = np.where(valid, pair, n_pairs)
        self.pos = np.append(place, n_pairs)[pair]
        self.cols = np.append(col, 0)[pair]
        self.keys = self.cols[:, :, None] * n_features + self.cols[:, None, :]
        self.cells = np.where(valid[:, :, None] & valid[:, None, :], self.keys,
                              n_features * n_features + ~np.eye(width, dtype=bool))


class GapLayout:
    """Rows with gaps arranged for the algebra, whatever the parameters.

    Which rows miss which features does not change with the parameters: the layout is
    made once for a batch and cut into spans (:meth:`span`) between the points where
    the parameters change, so that a span does only the algebra that depends on them.
    For the full type the (row, missing feature) pairs are ordered by feature, then
    row, so that ``g = (Lam (z - mu))_m`` takes one small product per feature over a
    contiguous run of pairs; and the rows are grouped by how many features they miss
    (one, two, three or more), each group with where its pairs sit in that order.

    Parameters
    ----------
    rows : ndarray of shape (n_rows,)
        Increasing numbers of the rows: the columns of the log-joint and weights the
        corrections go to and the weights come from.
    Z : ndarray of shape (n_rows, n_features)
        Standardised rows; their missing values are not read, and set to zero in
        place.
    mask : ndarray of shape (n_rows, n_features)
        True where a feature is missing.
    log_scale : ndarray of shape (n_features,)
        ``log`` of the standardisation's scale (see :func:`gap_correction`).
    covariance : str
        The mixture's covariance type: the pairs are for the full type only.

    Attributes
    ----------
    rows, mask : ndarray
    Zf : ndarray of shape (n_rows, n_features)
        The rows with their missing values at zero.
    """

    __slots__ = ("rows", "mask", "Zf", "scale_term", "pairs", "groups", "_keys", "_work")

    def __init__(self, rows, Z, mask, log_scale, covariance):
        n, D = mask.shape
        self.rows, self.mask, self.Zf = rows, mask, Z
        flat = np.flatnonzero(mask)                     # the pairs in row order
        row, col = np.divmod(flat, D)
        if Z.flags.c_contiguous:
            Z.reshape(-1)[flat] = 0.0
        else:
            Z[row, col] = 0.0
        count = np.bincount(row, minlength=n)
        # sum(log scale[m]): the mixture subtracts the log-scale of every feature, a
        # marginal only those of the observed ones
        self.scale_term = np.bincount(row, weights=log_scale[col], minlength=n)
        self.pairs, self.groups, self._work = None, (), None
        # the keys of span(): the rows' numbers, after the pairs' and the groups'
        size = int(rows[-1]) + 1 if n else 0
        keys = [(D + 3) * size + rows]
        if covariance == "full" and n:
            by_col = np.argsort(col.astype(np.int16 if D < 1 << 15 else np.int64),
                                kind="stable")
            place = np.empty_like(by_col)       # row order -> feature order
            place[by_col] = np.arange(by_col.size)
            self.pairs = np.empty((by_col.size, D + 1))  # each pair's row, then a 1
            self.pairs[:, D] = 1.0
            self.pairs[:, :D] = np.take(Z, row[by_col], axis=0)
            start = np.cumsum(count) - count
            groups = [np.flatnonzero(count == 1), np.flatnonzero(count == 2),
                      np.flatnonzero(count >= 3)]
            widest = max(3, int(count.max()))
            self.groups = tuple(_Group(at, self, place, col, start, count, width)
                                for at, width in zip(groups, (1, 2, widest)))
            keys = ([col[by_col] * size + rows[row[by_col]]]
                    + [(D + r) * size + rows[at] for r, at in enumerate(groups)] + keys)
        self._keys = np.concatenate(keys)

    def span(self, lo, hi):
        """The layout's rows numbered ``lo`` to ``hi - 1``.

        Parameters
        ----------
        lo, hi : int

        Returns
        -------
        part : tuple
            ``(a, b, columns, groups)``: the layout's rows ``a:b``; for the full type
            ``columns``, the runs ``(c, p, q)`` of pairs ``p:q`` missing feature ``c``,
            and ``groups``, the slices ``(u, v)`` of each group's rows and, last, the
            widest of the last group's rows in the span.
        """
        n, D = self.mask.shape
        size = int(self.rows[-1]) + 1 if n else 0
        lo, hi = min(lo, size), min(hi, size)
        base = np.arange(D + 4) * size
        cut = np.searchsorted(self._keys, np.stack((base + lo, base + hi), 1).ravel()).tolist()
        a, b = cut[-2] - (self._keys.size - n), cut[-1] - (self._keys.size - n)
        if self.pairs is None:
            return a, b, (), ()
        columns = [(c, cut[2 * c], cut[2 * c + 1]) for c in range(D)
                   if cut[2 * c + 1] > cut[2 * c]]
        offset, groups = self.pairs.shape[0], []
        for r, grp in enumerate(self.groups):
            groups.append((cut[2 * (D + r)] - offset, cut[2 * (D + r) + 1] - offset))
            offset += grp.rows.size
        u, v = groups[-1]
        groups[-1] += (int(self.groups[-1].count[u:v].max()) if v > u else 0,)
        return a, b, columns, groups

    def work(self, width):
        """A buffer kept from span to span.

        Parameters
        ----------
        width : int

        Returns
        -------
        buffer : ndarray of shape (n_pairs + 1, width)
            C-ordered, its last row (the padding's slot) zero.
        """
        size = (self.pairs.shape[0] + 1) * width
        if self._work is None or self._work.size < size:
            self._work = np.empty(size)
        work = self._work[:size].reshape(-1, width)
        work[-1] = 0.0
        return work


@functools.lru_cache(maxsize=None)
def _above(width):
    """The (row, column) indices of the cells above the diagonal of a width x width
    matrix."""
    return np.triu_indices(width, 1)


def _invert(H):
    """``H^-1`` and ``log det H`` of a stack of small positive-definite matrices
    (..., r, r).

    Gauss-Jordan elimination over the whole stack at once on ``[H | I]``, no
    pivoting: a positive-definite matrix keeps positive pivots (the squares of its
    Cholesky diagonal), their logs sum to ``log det H``, and a few vectorised passes
    cost less than LAPACK's calls per matrix at these sizes.
    """
    r = H.shape[-1]
    M = np.concatenate((H, np.broadcast_to(np.eye(r), H.shape)), axis=-1)
    pivots = np.empty(H.shape[:-1])
    for j in range(r):
        pivots[..., j] = M[..., j, j]
        M[..., j, :] /= pivots[..., j, None]
        factor = M[..., :, j].copy()
        factor[..., j] = 0.0
        M -= factor[..., :, None] * M[..., None, j, :]
    if not np.all(pivots > 0.0):
        raise np.linalg.LinAlgError("a precision block is not positive definite")
    return M[..., r:], np.sum(np.log(pivots), axis=-1)


def full_span(model, layout, part, learn, out, first):
    """Correct the log-joint of a span's rows filled at zero to their marginals.

    Pair-major throughout (rows, then components): gathering whole rows of K values
    costs a fraction of gathering columns.

    Parameters
    ----------
    model : Mixture
        A full-covariance mixture: the parameters in force for the span.
    layout : GapLayout
    part : tuple
        The span, from ``layout.span``.
    learn : bool
        Also return what the E-step needs.
    out : ndarray of shape (n_components, n)
        C-ordered; the layout's row numbered ``i`` gets its correction in column
        ``i - first``.
    first : int

    Returns
    -------
    aux : tuple or None
        With ``learn``, for :func:`full_completion`: per group of rows missing as many
        features, ``step = H^-1 g`` (rows, K) or (rows, r, K), the diagonal of
        ``H^-1`` in the same shape and, for two or more, its cells above the diagonal
        (rows, r(r-1)/2, K).
    """
    a, b, columns, groups = part
    lam, lam_mu = precision_matrices(model)
    K, D = lam.shape[:2]
    # g = (Lam (z - mu))_m for every (row, missing feature) pair: one small product
    # per feature over the rows that miss it (a D-th of the product over all of Lam)
    lam1 = np.concatenate((lam, -lam_mu[:, :, None]), axis=2)
    gp = layout.work(K)
    for c, p, q in columns:
        np.matmul(layout.pairs[p:q], lam1[:, c].T, out=gp[p:q])
    # the precisions' cells (D * D, K), then a cell of ones and one of zeros (padding)
    flat = np.concatenate((lam.reshape(K, D * D).T, [np.ones(K), np.zeros(K)]))
    diag = flat[: D * D : D + 1]
    # flat places (K, rows) of the rows' corrections: along the components' rows, the
    # order memory has
    lanes = out.shape[1] * np.arange(K)[:, None] - first
    out = out.reshape(-1)
    pieces = []
    (one, two, more), ((u, v), (u2, v2), (u3, v3, width)) = layout.groups, groups
    if v > u:
        # one missing feature (most rows): H is the precision's diagonal entry
        g = np.take(gp, one.pos[u:v, 0], axis=0)
        table = np.take(np.concatenate((1.0 / diag, np.log(diag)), axis=1),
                        one.cols[u:v, 0], axis=0)
        sd = np.empty((v - u, 1, 2, K))     # per pair: step, its square + H^-1
        step = np.multiply(g, table[:, :K], out=sd[:, 0, 0])
        corr = g * step
        corr -= table[:, K:]
        corr *= 0.5
        corr += one.const[u:v, None]
        out[lanes + one.rows[u:v]] = corr.T
        if learn:
            np.multiply(step, step, out=sd[:, 0, 1])
            sd[:, 0, 1] += table[:, :K]
            pieces.append((one, u, v, sd, None))
    if v2 > u2:
        # two, in closed form
        g = np.take(gp, two.pos[u2:v2], axis=0)            # (rows, 2, K)
        h = np.take(diag, two.cols[u2:v2], axis=0)
        h01 = np.take(flat, two.cells[u2:v2, 0, 1], axis=0)
        det = h[:, 0] * h[:, 1] - h01 * h01
        inv = h[:, ::-1] / det[:, None]
        inv01 = -h01 / det
        sd = np.empty((v2 - u2, 2, 2, K))
        step = np.multiply(inv, g, out=sd[:, :, 0])
        step += inv01[:, None] * g[:, ::-1]
        corr = np.einsum("nrk,nrk->nk", g, step) - np.log(det)
        corr *= 0.5
        corr += two.const[u2:v2, None]
        out[lanes + two.rows[u2:v2]] = corr.T
        if learn:
            np.multiply(step, step, out=sd[:, :, 1])
            sd[:, :, 1] += inv
            pieces.append((two, u2, v2, sd, (step[:, 0] * step[:, 1] + inv01)[:, None]))
    if v3 > u3:
        # more (few rows): each H padded to the widest of the span with an identity
        # block (inverse and determinant of the real block unchanged; g is zero in the
        # padding), components first
        g = np.take(gp, more.pos[u3:v3, :width], axis=0).transpose(0, 2, 1)
        H = np.take(flat, more.cells[u3:v3, :width, :width], axis=0)
        inv, log_det = _invert(np.moveaxis(H, -1, 1))
        step = (inv @ g[..., None])[..., 0]       # (rows, K, r)
        corr = 0.5 * (np.einsum("nkr,nkr->nk", g, step) - log_det) + more.const[u3:v3, None]
        out[lanes + more.rows[u3:v3]] = corr.T
        if learn:
            i, j = _above(width)
            step = step.transpose(0, 2, 1)
            sd = np.stack((step, step * step + np.diagonal(inv, 0, -2, -1).transpose(0, 2, 1)),
                          axis=2)
            pieces.append((more, u3, v3, sd, step[:, i] * step[:, j]
                           + inv[..., i, j].transpose(0, 2, 1)))
    return (layout, part, pieces, K) if learn else None


def full_completion(W, aux):
    """What completing a span's rows adds to the moments of the rows filled at zero.

    A row completes to ``zhat = z + delta`` with ``delta = -H^-1 g`` on its missing
    features (``z`` is zero there), so ``zhat zhat^T + Cov = z z^T + z delta^T +
    delta z^T + delta delta^T + Cov``: the first term is the filled row's, the cross
    terms fill the missing columns, the last two the missing-by-missing block.

    Parameters
    ----------
    W : ndarray of shape (n_part, n_components)
        The E-step weights of the span's rows, C-ordered.
    aux : tuple
        From :func:`full_span` with ``learn``.

    Returns
    -------
    s1 : ndarray of shape (n_components, n_features)
    s2 : ndarray of shape (n_components, n_features, n_features)
    """
    layout, (a, _, columns, _), pieces, K = aux
    D = layout.Zf.shape[1]
    # per pair: W H^-1 g = -W delta (first K) and the diagonal of W (delta delta^T +
    # H^-1) (last K); the sums of both per feature come out of the cross products
    # below (the pairs' last column is 1)
    VU = layout.work(2 * K)
    rows_of = np.dtype((np.void, VU.itemsize * 2 * K))    # a pair's row as one item
    upper = np.zeros(D * D * K)         # the cells above the diagonal, once, cell-major
    for grp, u, v, sd, off in pieces:
        w = np.take(W, grp.at[u:v] - a, axis=0)
        both = sd * w[:, None, None]
        r = sd.shape[1]
        np.put(VU.view(rows_of), grp.pos[u:v, :r], both.reshape(-1, r, 2 * K).view(rows_of))
        if off is not None:
            i, j = _above(r)
            keys = grp.keys[u:v, i, j, None] * K + np.arange(K)
            upper += np.bincount(keys.ravel(), weights=(w[:, None] * off).ravel(),
                                 minlength=D * D * K)
    # cross terms, one missing feature at a time: sum_i -W_ki delta_kic (z_i, 1)
    cross = np.zeros((2 * K, D, D + 1))
    for c, p, q in columns:
        np.matmul(VU[p:q].T, layout.pairs[p:q], out=cross[:, c])
    half = upper.reshape(D * D, K).T.reshape(K, D, D) - cross[:K, :, :D]
    s2 = half + np.swapaxes(half, 1, 2)
    s2.reshape(K, D * D)[:, :: D + 1] += cross[K:, :, D]
    return -cross[:K, :, D], s2
