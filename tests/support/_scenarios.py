"""Randomised, seeded lifecycle scenarios through the real pipeline (in-process).

Each scenario draws a mixture of K (3-6) well-separated Gaussians in D (2-8) features,
the smallest weight at least 8%, and feeds it as Parquet drops with the shipped
defaults except ``half_life_rows: 50000`` and ``warmup_rows: 5000``. Used by the
lifecycle tests (a few seeds) and by ``scripts/lifecycle_scenarios.py`` (20 or 50
seeds, a table).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

try:   # under pytest tests/support is on the path; a script loads this file by its path
    from drift_stream import Stream
except ImportError:
    from scripts.tests_support import load

    Stream = load("drift_stream").Stream

MIN_WEIGHT = 0.08
SETTINGS = {"half_life_rows": 50_000, "warmup_rows": 5000}
SHAPE = ("mean_shift", "spread_ratio")


class Truth:
    """A drawn mixture: weights (K,), means (K, D), covariances (K, D, D)."""

    def __init__(self, seed: int):
        rng = np.random.default_rng(seed)
        self.seed = seed
        self.K = int(rng.integers(3, 7))
        self.D = int(rng.integers(2, 9))
        self.weights = MIN_WEIGHT + (1.0 - MIN_WEIGHT * self.K) * rng.dirichlet(
            np.full(self.K, 2.0))
        covs = []
        for _ in range(self.K):
            q, _ = np.linalg.qr(rng.normal(size=(self.D, self.D)))
            sd = rng.uniform(0.6, 1.4, self.D)
            covs.append((q * sd**2) @ q.T)
        self.covs = np.array(covs)
        # well separated: every pair of means at least 8 units (5.7 of the largest sd)
        means = []
        while len(means) < self.K:
            m = rng.normal(0.0, 6.0, self.D)
            if all(np.linalg.norm(m - other) >= 8.0 for other in means):
                means.append(m)
        self.means = np.array(means)
        self.rng = np.random.default_rng(seed + 10_000)
        self.features = [f"x{j}" for j in range(self.D)]

    def rows(self, n, weights=None, means=None, covs=None):
        weights = self.weights if weights is None else weights
        means = self.means if means is None else means
        covs = self.covs if covs is None else covs
        labels = self.rng.choice(len(weights), size=n, p=weights / weights.sum())
        chol = np.linalg.cholesky(covs)
        z = self.rng.standard_normal((n, self.D))
        return means[labels] + np.einsum("nde,ne->nd", chol[labels], z)


class Run(Stream):
    """The pipeline on a fresh state folder for one scenario."""

    def __init__(self, folder: Path, truth: Truth, **overrides):
        folder.mkdir(parents=True, exist_ok=True)
        super().__init__(folder, truth.features, truth.K, **{**SETTINGS, **overrides})
        self.truth = truth

    def feed(self, X, drop_rows=10_000):
        super().feed(X, drop_rows)

    def events(self, status=None):
        return [a for a in self.alerts() if a.get("kind") == "lifecycle"
                and (status is None or a["status"] == status)]

    def segment_of(self, true_mean):
        """The segment of the current model whose mean is nearest a true mean."""
        m = self.pipeline.state.mixture
        return int(m.ids[int(np.argmin(np.linalg.norm(m.data_means() - true_mean, axis=1)))])


def vanish(folder: Path, seed: int, after=60_000):
    """A component of weight >= 8% stops appearing at a stream row drawn in 50,000-60,000.

    Returns a dict: K, D, the component's weight, the retirement delay in rows (None if
    it did not retire), the shape alerts (mean_shift, spread_ratio) on its segment
    that raised after the vanishing, and every other lifecycle event.
    """
    truth = Truth(seed)
    comp = int(truth.rng.integers(truth.K))
    before = int(truth.rng.integers(50_000, 60_000))
    run = Run(folder, truth)
    try:
        run.feed(truth.rows(before))
        segment = run.segment_of(truth.means[comp])
        gone = truth.weights.copy()
        gone[comp] = 0.0
        run.feed(truth.rows(after, weights=gone))
        retired = [e for e in run.events("retired") if e["segment"] == segment]
        shape = [a for a in run.alerts() if a.get("kind") == "drift"
                 and a["status"] == "raised" and a["segment"] == segment
                 and a["statistic"] in SHAPE and a["rows"]["last"] >= before]
        others = [(e["status"], e["segment"]) for e in run.events()
                  if not (e["status"] == "retired" and e["segment"] == segment)]
        return {"seed": seed, "K": truth.K, "D": truth.D, "weight": float(truth.weights[comp]),
                "delay": retired[0]["rows"]["first"] - before if retired else None,
                "shape_alerts": [a["statistic"] for a in shape], "other_events": others}
    finally:
        run.close()


def _far_mean(truth: Truth, rng) -> np.ndarray:
    """A mean at least 8 units from every component's (as the components are apart)."""
    while True:
        m = rng.normal(0.0, 6.0, truth.D)
        if np.all(np.linalg.norm(truth.means - m, axis=1) >= 8.0):
            return m


def birth(folder: Path, seed: int, share=0.08, after=30_000):
    """A new group of ``share`` of the rows appears at a stream row drawn in 40,000-50,000.

    Returns a dict: K, D, the rows from its appearance to its ``born`` event (None if no
    birth), the event's mean error (Mahalanobis distance under the group's true
    covariance) and share, and every other lifecycle event.
    """
    truth = Truth(seed)
    rng = np.random.default_rng(seed + 20_000)
    start = int(rng.integers(40_000, 50_000))
    new_mean = _far_mean(truth, rng)
    q, _ = np.linalg.qr(rng.normal(size=(truth.D, truth.D)))
    new_cov = (q * rng.uniform(0.6, 1.4, truth.D) ** 2) @ q.T
    weights = np.append(truth.weights * (1.0 - share), share)
    means = np.vstack([truth.means, new_mean])
    covs = np.concatenate([truth.covs, new_cov[None]])
    run = Run(folder, truth)
    try:
        run.feed(truth.rows(start))
        run.feed(truth.rows(after, weights, means, covs))
        born = run.events("born")
        first = born[0] if born else None
        error = None
        if first is not None:
            diff = np.array(list(first["explanation"]["mean"].values())) - new_mean
            error = float(np.sqrt(diff @ np.linalg.solve(new_cov, diff)))
        return {"seed": seed, "K": truth.K, "D": truth.D,
                "delay": first["rows"]["first"] - start if first else None,
                "error": error, "share": first["explanation"]["weight"] if first else None,
                "other_events": [(e["status"], e["segment"]) for e in run.events()
                                 if first is None or e["id"] != first["id"]]}
    finally:
        run.close()


def spread(folder: Path, seed: int, factor=2.0, after=100_000):
    """One component's spread grows ``factor`` times at a stream row drawn in
    40,000-50,000. Returns K, D, and the lifecycle events after the change (a
    spread change should be followed by the segment widening, not by a birth)."""
    truth = Truth(seed)
    rng = np.random.default_rng(seed + 30_000)
    comp = int(rng.integers(truth.K))
    start = int(rng.integers(40_000, 50_000))
    covs = truth.covs.copy()
    covs[comp] *= factor**2
    run = Run(folder, truth)
    try:
        run.feed(truth.rows(start))
        run.feed(truth.rows(after, covs=covs))
        return {"seed": seed, "K": truth.K, "D": truth.D,
                "events": [(e["status"], e["segment"], e["rows"]["first"] - start)
                           for e in run.events()]}
    finally:
        run.close()


def stationary(folder: Path, seed: int, rows=300_000, weights=None):
    """``rows`` rows of an unchanging mixture (its weights from 8% up, or ``weights``).
    Returns K, D and every alert (drift and lifecycle)."""
    truth = Truth(seed)
    if weights is not None:
        truth.weights = np.asarray(weights, dtype=np.float64)
    run = Run(folder, truth)
    try:
        run.feed(truth.rows(rows))
        return {"seed": seed, "K": truth.K, "D": truth.D,
                "weights": truth.weights.round(3).tolist(),
                "alerts": [(a.get("kind"), a["status"], a["segment"], a["statistic"],
                            a["rows"]["first"]) for a in run.alerts()]}
    finally:
        run.close()


def _mahalanobis(x, mean, cov) -> float:
    diff = np.asarray(x) - mean
    return float(np.sqrt(diff @ np.linalg.solve(cov, diff)))


def lumped(folder: Path, seed: int, after=60_000):
    """The model starts from a warm-up fit with one component fewer (the core's
    ``initialise`` on the pipeline's own warm-up rows, put in place of the pipeline's
    fit), so one segment lumps two components. Returns K, D, the rows from the end of
    warm-up to the lumped segment's ``split`` event (None if none), and how far the
    two parts' means end from the true means (Mahalanobis under the true
    covariances), and every lifecycle event."""
    from shoal.core import StepSchedule, initialise
    from dataclasses import replace

    truth = Truth(seed)
    run = Run(folder, truth)
    try:
        warm = truth.rows(SETTINGS["warmup_rows"])
        run.feed(warm)
        st, s = run.pipeline.state, run.settings
        fewer = initialise(warm, truth.K - 1, s.covariance, seed=s.seed, n_init=s.learning.n_init,
                           schedule=StepSchedule(alpha=s.learning.step_exponent,
                                                 half_life_rows=s.half_life_rows),
                           reg_covar=s.learning.reg_covar, refresh_rows=s.learning.refresh_rows)
        run.pipeline.state = replace(st, mixture=fewer, warmup=None)
        owner = fewer.score(truth.means).segment           # the segment of each true mean
        ids, counts = np.unique(owner, return_counts=True)
        if counts.max() < 2:
            return {"seed": seed, "K": truth.K, "D": truth.D, "lumped": None}
        segment = int(ids[np.argmax(counts)])
        comps = np.flatnonzero(owner == segment)
        run.feed(truth.rows(after))
        splits = [e for e in run.events("split") if e["segment"] == segment]
        m = run.pipeline.state.mixture
        errors = []
        for c in comps:
            errors.append(min(_mahalanobis(mean, truth.means[c], truth.covs[c])
                              for mean in m.data_means()))
        return {"seed": seed, "K": truth.K, "D": truth.D, "lumped": comps.tolist(),
                "delay": splits[0]["rows"]["first"] - SETTINGS["warmup_rows"] if splits
                else None, "errors": errors,
                "events": [(e["status"], e["segment"], e["rows"]["first"])
                           for e in run.events()]}
    finally:
        run.close()


def warmup_gap(seed: int, n_init: int = 5, rows: int = 5000):
    """shoal's warm-up fit of a drawn buffer against scikit-learn's best of 20 restarts
    (``GaussianMixture(n_init=20, max_iter=500, tol=1e-6)``) on the same rows: mean
    log-likelihood per row of each, the gap (reference minus ours) and the seconds."""
    import time

    from sklearn.mixture import GaussianMixture

    from shoal.core import initialise

    truth = Truth(seed)
    X = truth.rows(rows)
    t0 = time.perf_counter()
    m = initialise(X, truth.K, "full", seed=0, n_init=n_init)
    t1 = time.perf_counter()
    ref = GaussianMixture(truth.K, covariance_type="full", n_init=20, max_iter=500,
                          tol=1e-6, random_state=seed).fit(X)
    t2 = time.perf_counter()
    ours, best = float(np.mean(m.log_density(X))), float(ref.score(X))
    return {"seed": seed, "K": truth.K, "D": truth.D, "ours": ours, "reference": best,
            "gap": best - ours, "ours_s": t1 - t0, "reference_s": t2 - t1}
