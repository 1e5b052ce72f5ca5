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
    """The rows of a layout that miss ``r`` features (the last group: ``r`` or more),
    in order: ``rows`` their numbers, ``loc`` their columns in their span's arrays
    (number less the span's first), ``wat`` their places among the span's rows,
    ``pos`` (n, r) where their pairs sit among the span's padded pairs, ``cols`` (n, r)
    the features, ``const`` (n,) the correction's constant ``0.5 |m| log 2 pi +
    sum(log scale[m])``, ``cells`` (n, r, r) the flat (feature, feature) cells of
    their ``H``, ``keys`` (n, r, r) the same where the statistics gather them,
    ``count`` (n,) how many features each row misses and ``cuts`` (n_spans + 1,)
    where each span's rows start. In the last group the rows missing fewer than the
    widest are padded to an identity block: their extra pairs point at the zero slot
    past the span's pairs and at feature 0, their extra cells at the cell past the last
    (one, on the diagonal) or the one after it (zero), their extra keys at cell 0
    (with zero weight)."""

    __slots__ = ("rows", "loc", "wat", "pos", "cols", "const", "cells", "keys", "count",
                 "cuts")

    def __init__(self, at, layout, span_of, local, col, start, count, width, slot):
        n_features = layout.Zf.shape[1]
        pair = start[at][:, None] + np.arange(width)
        self.count = count[at]
        self.rows = layout.rows[at]
        self.loc = self.rows - layout.bounds[span_of[at]]
        self.wat = at - layout.cuts[span_of[at]]
        self.cuts = np.searchsorted(at, layout.cuts)
        self.const = layout.scale_term[at] + (0.5 * LOG_2PI) * self.count
        self.pos, self.cols = local[pair], col[pair]
        if width > 2:
            valid = np.arange(width) < self.count[:, None]
            pair = np.where(valid, pair, col.size)
            self.pos, self.cols = np.append(local, slot)[pair], np.append(col, 0)[pair]
        self.keys = self.cols[:, :, None] * n_features + self.cols[:, None, :]
        self.cells = self.keys if width < 3 else np.where(
            valid[:, :, None] & valid[:, None, :], self.keys,
            n_features * n_features + ~np.eye(width, dtype=bool))


class GapLayout:
    """Rows with gaps arranged for the algebra, whatever the parameters.

    Which rows miss which features does not change with the parameters: the layout is
    made once for a batch, for the spans between the points where the parameters
    change, so that a span does only the algebra that depends on them. For the full
    type each span's (row, missing feature) pairs are laid out by feature, each
    feature's run padded to the longest run of the batch, so that
    ``g = (Lam (z - mu))_m`` for the whole span is one stacked product, feature by
    feature; and the rows are grouped by how many features they miss (one, two,
    three or more), each group with where its pairs sit in that layout.

    Parameters
    ----------
    rows : ndarray of shape (n_rows,)
        Increasing numbers of the rows: where the corrections go and the weights come
        from.
    Z : ndarray of shape (n_rows, n_features)
        Standardised rows; their missing values are not read, and set to zero in
        place.
    mask : ndarray of shape (n_rows, n_features)
        True where a feature is missing.
    log_scale : ndarray of shape (n_features,)
        ``log`` of the standardisation's scale (see :func:`gap_correction`).
    covariance : str
        The mixture's covariance type: the pairs are for the full type only.
    bounds : array-like of int or None
        Increasing numbers where the spans start, then where the last ends (past the
        last row); None for one span over all the rows.

    Attributes
    ----------
    rows, mask : ndarray
    Zf : ndarray of shape (n_rows, n_features)
        The rows with their missing values at zero.
    bounds : ndarray of shape (n_spans + 1,)
    cuts : ndarray of shape (n_spans + 1,)
        Where each span's rows start among the layout's.
    """

    __slots__ = ("rows", "mask", "Zf", "scale_term", "bounds", "cuts", "source", "groups",
                 "_index", "_work", "_scratch")

    def __init__(self, rows, Z, mask, log_scale, covariance, bounds=None):
        n, D = mask.shape
        self.rows, self.mask, self.Zf = rows, mask, Z
        end = int(rows[-1]) + 1 if n else 0
        self.bounds = np.asarray([0, end] if bounds is None else bounds, dtype=np.int64)
        self.cuts = np.searchsorted(rows, self.bounds)
        self._index = {lo: s for s, lo in enumerate(self.bounds[:-1].tolist())}
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
        self.source, self.groups, self._work, self._scratch = None, (), None, {}
        if covariance != "full" or not n:
            return
        n_spans = self.bounds.size - 1
        span_of = np.repeat(np.arange(n_spans), np.diff(self.cuts))
        # each pair's run (span, feature), its rank in the run, its padded place
        run = span_of[row] * D + col
        order = np.argsort(run.astype(np.int16 if n_spans * D < 1 << 15 else np.int64),
                           kind="stable")
        size = np.bincount(run, minlength=n_spans * D)
        longest = int(size.max())
        ranked = run[order]
        place = ranked * longest + np.arange(order.size) - (np.cumsum(size) - size)[ranked]
        # each pair's row; the padding repeats row 0 (finite, and never weighs: its
        # weights are zero)
        self.source = np.zeros((n_spans, D * longest), dtype=np.intp)
        self.source.reshape(-1)[place] = row[order]
        local = np.empty_like(place)                    # row order -> place in its span
        local[order] = place - span_of[row[order]] * (D * longest)
        start = np.cumsum(count) - count
        groups = [np.flatnonzero(count == 1), np.flatnonzero(count == 2),
                  np.flatnonzero(count >= 3)]
        widest = max(3, int(count.max()))
        self.groups = tuple(_Group(at, self, span_of, local, col, start, count, width,
                                   D * longest)
                            for at, width in zip(groups, (1, 2, widest)))

    def span(self, lo, hi):
        """The layout's rows numbered ``lo`` to ``hi - 1``.

        Parameters
        ----------
        lo, hi : int

        Returns
        -------
        part : tuple or None
            ``(a, b, lo, s, groups)``: the layout's rows ``a:b``; for the full type
            ``s``, the span's index, and ``groups``, the slices ``(u, v)`` of each
            group's rows and, last, the widest of the last group's rows in the span.
            None if ``lo:hi`` is not one of the layout's spans (full type).
        """
        if self.source is None:
            a, b = np.searchsorted(self.rows, (lo, hi)).tolist()
            return a, b, lo, None, ()
        s = self._index.get(lo)
        if s is None or self.bounds[s + 1] != hi:
            return None
        groups = [(int(grp.cuts[s]), int(grp.cuts[s + 1])) for grp in self.groups]
        u, v = groups[-1]
        groups[-1] += (int(self.groups[-1].count[u:v].max()) if v > u else 0,)
        return int(self.cuts[s]), int(self.cuts[s + 1]), lo, s, groups

    def work(self, width):
        """A buffer kept from span to span.

        Parameters
        ----------
        width : int

        Returns
        -------
        buffer : ndarray of shape (n_features * longest run + 1, width)
            C-ordered, its last row (the padding's slot) zero.
        """
        size = (self.source.shape[1] + 1) * width
        if self._work is None or self._work.size < size:
            self._work = np.empty(size)
        work = self._work[:size].reshape(-1, width)
        work[-1] = 0.0
        return work

    def pairs(self, s):
        """The rows of span ``s``'s pairs, laid out by feature.

        Parameters
        ----------
        s : int

        Returns
        -------
        pairs : ndarray of shape (n_features, longest run, n_features + 1)
            Each pair's row, then a 1, in a buffer kept from span to span (until
            another span's are asked for).
        """
        D = self.Zf.shape[1]
        kept = self._scratch.get("pairs")
        if kept is None:
            kept = self._scratch["pairs"] = np.ones((self.source.shape[1], D + 1))
        if self._scratch.get("span") != s:
            np.take(self.Zf, self.source[s], axis=0, out=kept[:, :D])
            self._scratch["span"] = s
        return kept.reshape(D, -1, D + 1)

    def zeros(self, name, shape):
        """A C-ordered array of zeros kept from span to span under ``name`` (fresh
        memory for every span would be pages the kernel must map and zero again).

        Parameters
        ----------
        name : str
        shape : tuple of int

        Returns
        -------
        zeros : ndarray of shape ``shape``
        """
        size = int(np.prod(shape))
        kept = self._scratch.get(name)
        if kept is None or kept.size < size:
            kept = self._scratch[name] = np.empty(size)
        out = kept[:size].reshape(shape)
        out.fill(0.0)
        return out


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


def full_span(model, layout, part, learn, out):
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
    out : ndarray of shape (n, n_components)
        C-ordered; the span's row numbered ``i`` gets its correction in row ``i - lo``
        (``lo`` where the span starts).

    Returns
    -------
    aux : tuple or None
        With ``learn``, for :func:`full_completion`: per group of rows missing as many
        features, ``step = H^-1 g`` (rows, r, K) with its square plus the diagonal of
        ``H^-1`` (rows, r, 2, K) and, for two or more, ``step_i step_j + (H^-1)_ij``
        above the diagonal (rows, r(r-1)/2, K).
    """
    a, b, _, s, groups = part
    if layout.source is None:           # no row misses a value
        return (layout, part, [], model.n_components) if learn else None
    lam, lam_mu = precision_matrices(model)
    K, D = lam.shape[:2]
    # g = (Lam (z - mu))_m for every (row, missing feature) pair: one product per
    # feature over the span's rows that miss it (a D-th of the product over all of
    # Lam), all features in one stacked call
    lam1 = np.concatenate((lam, -lam_mu[:, :, None]), axis=2)      # (K, D, D + 1)
    gp = layout.work(K)
    np.matmul(layout.pairs(s), lam1.transpose(1, 2, 0), out=gp[:-1].reshape(D, -1, K))
    # the precisions' cells (D * D, K), then a cell of ones and one of zeros (padding)
    flat = np.concatenate((lam.reshape(K, D * D).T, [np.ones(K), np.zeros(K)]))
    diag = flat[: D * D : D + 1]
    out = out.view(np.dtype((np.void, out.itemsize * K))).reshape(-1)   # rows as items
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
        np.put(out, one.loc[u:v], np.ascontiguousarray(corr).view(out.dtype))
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
        np.put(out, two.loc[u2:v2], np.ascontiguousarray(corr).view(out.dtype))
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
        np.put(out, more.loc[u3:v3], np.ascontiguousarray(corr).view(out.dtype))
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
    layout, (_, _, _, s, _), pieces, K = aux
    D = layout.Zf.shape[1]
    if not pieces:
        return np.zeros((K, D)), np.zeros((K, D, D))
    # per pair: W H^-1 g = -W delta (first K) and the diagonal of W (delta delta^T +
    # H^-1) (last K); zero on the padding, then a slot the padded rows point at
    VU = layout.zeros("completion", (layout.source.shape[1] + 1, 2 * K))
    rows_of = np.dtype((np.void, VU.itemsize * 2 * K))    # a pair's row as one item
    upper = np.zeros(D * D * K)         # the cells above the diagonal, once, cell-major
    for grp, u, v, sd, off in pieces:
        w = np.take(W, grp.wat[u:v], axis=0)
        both = sd * w[:, None, None]
        r = sd.shape[1]
        np.put(VU.view(rows_of), grp.pos[u:v, :r], both.reshape(-1, r, 2 * K).view(rows_of))
        if off is not None:
            i, j = _above(r)
            keys = grp.keys[u:v, i, j, None] * K + np.arange(K)
            upper += np.bincount(keys.ravel(), weights=(w[:, None] * off).ravel(),
                                 minlength=D * D * K)
    # cross terms, feature by feature in one stacked call: sum_i -W_ki delta_kic
    # (z_i, 1), the last column summing both per-pair quantities per feature
    VU = VU[:-1].reshape(D, -1, 2 * K)
    cross = np.matmul(VU.transpose(0, 2, 1), layout.pairs(s)).transpose(1, 0, 2)
    sums = cross[:, :, D]                       # (2K, D)
    half = upper.reshape(D * D, K).T.reshape(K, D, D) - cross[:K, :, :D]
    s2 = half + np.swapaxes(half, 1, 2)
    s2.reshape(K, D * D)[:, :: D + 1] += sums[K:]
    return -sums[:K], s2
