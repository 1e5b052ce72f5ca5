"""Starting a mixture: k-means++ seeding, batch EM, and the choice of K by BIC.

Everything is deterministic from ``seed``: the same warm-up buffer and seed give
bit-identical mixtures.
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np

from .covariance import COVARIANCE_TYPES, FAMILIES
from .errors import ModelError, NotEnoughDataError
from .learning import em_step_standardised
from .mixture import Mixture
from .parameters import derive
from .schedule import StepSchedule
from .scoring import score_standardised
from .split_screen import hard_split_gain

__all__ = ["kmeans_plus_plus", "batch_em", "initialise", "select_n_components", "bic"]

SCREEN_ITER = 20  # EM iterations each restart gets before the best one is run on


def _check_rows(X, n_components) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] < 1:
        raise ModelError(f"X should have shape (n_samples, n_features), got {X.shape}")
    if not np.all(np.isfinite(X)):
        raise ModelError("X contains NaN or infinite values; drop those rows first")
    if not (isinstance(n_components, (int, np.integer)) and n_components >= 1):
        raise ModelError(f"n_components should be a positive integer, got {n_components!r}")
    if X.shape[0] < n_components:
        raise NotEnoughDataError(
            f"{X.shape[0]} rows cannot seed {n_components} segments; "
            "collect more warm-up rows (warmup_rows) or ask for fewer segments"
        )
    distinct = np.unique(X, axis=0).shape[0]
    if distinct < n_components:
        raise NotEnoughDataError(
            f"the warm-up rows hold only {distinct} distinct points, fewer than the "
            f"{n_components} segments asked for; ask for at most {distinct} segments "
            "or collect more varied warm-up rows"
        )
    return X


def kmeans_plus_plus(Z, n_components, rng) -> np.ndarray:
    """k-means++ seeds (Arthur & Vassilvitskii 2007).

    Parameters
    ----------
    Z : ndarray of shape (n_samples, n_features)
    n_components : int
    rng : numpy.random.Generator

    Returns
    -------
    centers : ndarray of shape (n_components, n_features)
    """
    n = Z.shape[0]
    centers = np.empty((n_components, Z.shape[1]))
    centers[0] = Z[rng.integers(n)]
    closest = np.sum((Z - centers[0]) ** 2, axis=1)
    for c in range(1, n_components):
        total = closest.sum()
        if total > 0:
            pick = int(np.searchsorted(np.cumsum(closest), rng.random() * total))
            pick = min(pick, n - 1)
        else:
            pick = int(rng.integers(n))
        centers[c] = Z[pick]
        np.minimum(closest, np.sum((Z - centers[c]) ** 2, axis=1), out=closest)
    return centers


def _lloyd(Z, centers, n_iter=20):
    """A few Lloyd iterations; returns hard labels, shape (n_samples,)."""
    labels = None
    for _ in range(n_iter):
        d2 = (
            np.sum(Z * Z, axis=1)[:, None]
            - 2.0 * Z @ centers.T
            + np.sum(centers * centers, axis=1)
        )
        new = np.argmin(d2, axis=1)
        if labels is not None and np.array_equal(new, labels):
            break
        labels = new
        for k in range(centers.shape[0]):
            members = Z[labels == k]
            if members.shape[0]:
                centers[k] = members.mean(axis=0)
    return labels


def _from_hard_labels(template: Mixture, Z, labels) -> Mixture:
    """A mixture whose statistics are those of the hard partition ``labels``."""
    n = Z.shape[0]
    resp = np.zeros((n, template.n_components))
    resp[np.arange(n), labels] = 1.0
    s0, s1, s2 = template.family.moments(template.family.design(Z), resp.T / n)
    sumsq = 1.0 / n
    return replace(template, s0=s0, s1=s1, s2=s2, sumsq=sumsq,
                   **derive(template, s0, s1, s2, sumsq))


def batch_em(X, mixture: Mixture, *, max_iter=300, tol=1e-7):
    """Run full-batch EM from ``mixture`` until the mean log-density gains less than ``tol``.

    Parameters
    ----------
    X : array-like of shape (n_samples, n_features)
    mixture : Mixture
        The starting point.
    max_iter : int
    tol : float
        Stop when an iteration raises the mean log-density per row by less than this.

    Returns
    -------
    mixture : Mixture
    history : ndarray of shape (n_iter + 1,)
        Mean log-density per row (data units) before each iteration and at the end.
        EM never lowers it (up to rounding).
    """
    Z = mixture.standardise(X)
    return _batch_em(Z, mixture, max_iter=max_iter, tol=tol)


def _batch_em(Z, mixture, *, max_iter, tol):
    history = []
    for _ in range(max_iter):
        mixture, before = em_step_standardised(mixture, Z)
        history.append(before)
        if len(history) >= 2 and history[-1] - history[-2] < tol:
            break
    history.append(float(np.mean(score_standardised(mixture, Z).log_density)))
    return mixture, np.asarray(history)


def initialise(
    X,
    n_components,
    covariance="full",
    *,
    seed=0,
    n_init=5,
    max_iter=300,
    tol=1e-6,
    schedule: StepSchedule | None = None,
    reg_covar=1e-6,
    prior_weight=1e-3,
    resp_floor=1e-3,
    refresh_rows=4096,
    mass_floor=1e-3,
    averaging=None,
) -> Mixture:
    """Fit a mixture to a warm-up buffer: k-means++ restarts, then batch EM; best log-likelihood wins.

    Parameters
    ----------
    X : array-like of shape (n_samples, n_features)
        The warm-up rows, finite, in data units. Their mean and standard deviation
        become the frozen pivot and scale of the standardised units.
    n_components : int
    covariance : {"full", "diag", "spherical"}
    seed : int
        Seeds the k-means++ restarts; the result is a deterministic function of X and seed.
    n_init : int
        Number of k-means++ restarts.
    max_iter, tol : int, float
        Batch EM of each restart stops after ``max_iter`` iterations or when the
        average log-likelihood gains less than ``tol`` per row.
    schedule : StepSchedule, optional
        The stepwise schedule for later learning; ``i0`` is resolved from ``len(X)``.
    reg_covar, prior_weight : float
        Added to the diagonal; weight in rows of the identity prior on covariances.
    resp_floor : float
        Responsibilities below this are left out of stepwise updates: the sparse
        variant of EM of Neal & Hinton (1998), which skips most of the second-moment
        work on separated data. Batch EM (warm-up) is always exact; what the floor
        costs in average log-likelihood is bounded by
        ``tests/unit/core/test_core_stepwise.py``. 0 keeps every responsibility.
    refresh_rows : int
        The parameters are derived from the statistics at every multiple of this many
        learned rows (fewer for a slow stream, so that it learns between inputs).
    mass_floor : float
        Weight under which the fitted mixture's :meth:`Mixture.low_mass` lists a
        component.
    averaging : bool or None
        Derive parameters from the running average of the statistics at refresh
        points (Polyak-Ruppert). ``None``: on when the schedule has no floor (the
        model converges), off when it tracks a drifting population.

    Returns
    -------
    Mixture
    """
    if covariance not in FAMILIES:
        raise ModelError(f"covariance should be one of {COVARIANCE_TYPES}, got {covariance!r}")
    X = _check_rows(X, n_components)
    if int(n_init) < 1:
        raise ModelError(f"n_init should be >= 1, got {n_init!r}")
    if int(refresh_rows) < 1:
        raise ModelError(f"refresh_rows should be >= 1, got {refresh_rows!r}")
    n, d = X.shape
    center = X.mean(axis=0)
    scale = X.std(axis=0)
    constant = ~(scale > 1e-12 * np.maximum(np.abs(center), 1.0))
    if np.any(constant):
        warnings.warn(
            f"features {np.flatnonzero(constant).tolist()} are constant in the warm-up "
            "rows; they are kept with unit scale and only reg_covar as spread",
            RuntimeWarning,
            stacklevel=2,
        )
        scale = np.where(constant, 1.0, scale)
    if covariance == "spherical":
        scale = np.full(d, float(np.sqrt(np.mean(scale**2))))
    Z = (X - center) / scale

    template = Mixture.from_parameters(
        np.full(n_components, 1.0 / n_components),
        np.zeros((n_components, d)),
        {"full": np.broadcast_to(np.eye(d), (n_components, d, d)).copy(),
         "diag": np.ones((n_components, d)),
         "spherical": np.ones(n_components)}[covariance],
        covariance=covariance,
        n_eff=n,
        schedule=schedule,
        reg_covar=reg_covar,
        prior_weight=prior_weight,
        resp_floor=resp_floor,
        refresh_rows=refresh_rows,
        mass_floor=mass_floor,
    )
    schedule = (schedule or StepSchedule()).resolved(n)
    if averaging is None:
        averaging = schedule.half_life_rows is None
    rng = np.random.default_rng(seed)
    # Short runs first: every restart gets SCREEN_ITER iterations of EM, and only the
    # best of them is run to convergence (the "short-run EM" start of Biernacki,
    # Celeux & Govaert 2003). It costs one long run instead of n_init.
    best, best_ll = None, -np.inf
    for _ in range(int(n_init)):
        labels = _lloyd(Z, kmeans_plus_plus(Z, n_components, rng))
        start = _from_hard_labels(template, Z, labels)
        fitted, history = _batch_em(Z, start, max_iter=min(SCREEN_ITER, max_iter), tol=tol)
        if history[-1] > best_ll or best is None:
            best, best_ll = fitted, history[-1]
    best, history = _batch_em(Z, best, max_iter=max_iter, tol=tol)
    best = _split_merge_check(Z, template, best, float(history[-1]), rng,
                              max_iter=max_iter, tol=tol)
    return replace(best, center=center, scale=scale, averaging=bool(averaging))


def _split_merge_check(Z, template, best, best_ll, rng, *, max_iter, tol,
                       n_pairs=3, rounds=3):
    """A final check of a fit: merge a pair of components and split another, re-run EM,
    and keep the result if it fits better (the split-and-merge EM of Ueda, Nakano,
    Ghahramani & Hinton 2000).

    Restarts from k-means++ seeds can all put two seeds in one group and none in
    another; EM then keeps one component over two groups and two over one. Here the
    split candidate is the component whose rows a cut along a main axis explains best
    (the BIC gain of :func:`shoal.core.split_screen.hard_split_gain`; only a positive
    gain is tried), and the merge candidates are the pairs whose responsibilities overlap most
    (Ueda et al.'s ``J_merge``, the cosine of the two responsibility vectors). The new
    labels start a batch EM run like a restart's.
    """

    k = best.n_components
    if k < 3:
        return best
    for _ in range(rounds):
        scores = best.score(Z)
        labels, resp = scores.component, scores.resp
        gains = np.array([hard_split_gain(Z[labels == j], rng) if np.sum(labels == j) > 2 * (
            Z.shape[1] + 2) else -np.inf for j in range(k)])
        split = int(np.argmax(gains))
        if not gains[split] > 0.0:
            return best
        norms = np.sqrt(np.sum(resp * resp, axis=0))
        overlap = (resp.T @ resp) / np.outer(norms, norms)
        pairs = sorted(((overlap[a, b], a, b) for a in range(k) for b in range(a + 1, k)
                        if split not in (a, b)), reverse=True)[:n_pairs]
        improved = False
        for _, a, b in pairs:
            trial = labels.copy()
            trial[trial == b] = a
            rows = np.flatnonzero(labels == split)
            cut = _lloyd(Z[rows], kmeans_plus_plus(Z[rows], 2, rng))
            trial[rows[cut == 1]] = b
            start = _from_hard_labels(template, Z, trial)
            fitted, history = _batch_em(Z, start, max_iter=max_iter, tol=tol)
            if history[-1] > best_ll + tol:
                best, best_ll, improved = fitted, float(history[-1]), True
                break
        if not improved:
            return best
    return best


def bic(mixture: Mixture, X) -> float:
    """Schwarz's Bayesian information criterion, ``-2 log L + p log n`` (data units).

    Parameters
    ----------
    mixture : Mixture
    X : array-like of shape (n_samples, n_features)

    Returns
    -------
    bic : float
    """
    X = np.asarray(X, dtype=np.float64)
    total = float(np.sum(mixture.log_density(X)))
    return -2.0 * total + mixture.n_parameters() * np.log(X.shape[0])


def select_n_components(X, k_min, k_max, covariance="full", **kwargs):
    """Fit K = k_min .. k_max on the warm-up buffer and keep the lowest BIC (Schwarz 1978).

    Parameters
    ----------
    X : array-like of shape (n_samples, n_features)
        The warm-up rows.
    k_min, k_max : int
        The range of K tried; a K that the rows cannot seed ends the search.
    covariance : {"full", "diag", "spherical"}
    **kwargs
        Passed to :func:`initialise`.

    Returns
    -------
    mixture : Mixture
        The chosen fit.
    table : list of dict
        One row per K tried: ``{"n_components", "bic", "log_likelihood"}`` (data units).
    """
    if not (isinstance(k_min, (int, np.integer)) and isinstance(k_max, (int, np.integer))
            and 1 <= k_min <= k_max):
        raise ModelError(f"need 1 <= k_min <= k_max, got k_min={k_min!r}, k_max={k_max!r}")
    X = np.asarray(X, dtype=np.float64)
    best, best_bic, table = None, np.inf, []
    for k in range(int(k_min), int(k_max) + 1):
        try:
            fitted = initialise(X, k, covariance, **kwargs)
        except NotEnoughDataError:
            if best is None:
                raise
            break
        score = bic(fitted, X)
        table.append({"n_components": k, "bic": score,
                      "log_likelihood": float(np.sum(fitted.log_density(X)))})
        if score < best_bic:
            best, best_bic = fitted, score
    return best, table
