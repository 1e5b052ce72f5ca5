"""The drift tests' stream: a seeded K=6, D=5 synthetic Gaussian mixture (drawn as
tests/conftest.py draws its mixtures) fed as Parquet drops through the real pipeline,
in-process, with the shipped default settings except what a test overrides."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shoal.config import parse_config
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.state.store import StateStore

K, D = 6, 5
FEATURES = [f"x{j}" for j in range(D)]
SEED = 3


def truth(seed=SEED):
    """True weights, means and covariances of the K=6, D=5 test mixture (as conftest draws)."""
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(K, 5.0))
    means = rng.normal(0.0, 4.0, (K, D))
    A = rng.normal(0.0, 0.3, (K, D, D))
    covs = A @ np.swapaxes(A, 1, 2) + np.eye(D) * 0.5
    return weights, means, covs


def rows(rng, n, weights, means, covs, *, shift=None, spread=None):
    """n rows; ``shift``: (component, feature, amount); ``spread``: (component, factor)."""
    labels = rng.choice(K, size=n, p=weights / weights.sum())
    chol = np.linalg.cholesky(covs)
    X = means[labels] + np.einsum("nde,ne->nd", chol[labels], rng.standard_normal((n, D)))
    if shift is not None:
        comp, feature, amount = shift
        X[labels == comp, feature] += amount
    if spread is not None:
        comp, factor = spread
        on = labels == comp
        X[on] = means[comp] + factor * (X[on] - means[comp])
    return X


class Stream:
    """The real pipeline on a fresh state folder, fed one Parquet drop at a time."""

    def __init__(self, folder, features=FEATURES, segments=K, **overrides):
        self.folder = folder
        self.features = list(features)
        self.settings = parse_config({"features": self.features, "segments": segments,
                                      **overrides}, folder)
        self.layout = prepare_folders(self.settings)
        self.store = StateStore(self.layout.db)
        self.pipeline = Pipeline(self.settings, self.layout, self.store)
        self.rows = 0
        self.n = 0

    def feed(self, X, drop_rows):
        for start in range(0, len(X), drop_rows):
            part = X[start:start + drop_rows]
            path = self.folder / f"drop-{self.n:05d}.parquet"
            pq.write_table(pa.table({f: part[:, j] for j, f in enumerate(self.features)}),
                           path)
            r = self.pipeline.process(path, in_inbox=False)
            assert r.outcome == "committed", r
            path.unlink()
            self.n += 1
            self.rows += len(part)

    def alerts(self):
        return [a["payload"] for a in self.store.alerts()]

    def drift_state(self):
        return self.pipeline.state.extra["drift"]

    def segment_of(self, true_mean):
        """The segment whose baseline mean is nearest a true component mean."""
        ref = self.drift_state()["baseline"]
        d = np.linalg.norm(np.asarray(ref["means"]) - true_mean, axis=1)
        return int(ref["ids"][int(np.argmin(d))])

    def close(self):
        self.store.close()


def stream_fixture(kind):
    """A pytest fixture that makes streams of class ``kind`` in the test's temporary
    folder (``make(**overrides)``) and closes every one it made."""

    @pytest.fixture
    def stream(tmp_path):
        made = []

        def make(**overrides):
            s = kind(tmp_path / f"s{len(made)}", **overrides)
            made.append(s)
            return s

        yield make
        for s in made:
            s.close()

    return stream


stream = stream_fixture(Stream)


def first_raised(alerts, statistic, segment=None):
    hits = [a for a in alerts if a["status"] == "raised" and a["statistic"] == statistic
            and (segment is None or a["segment"] == segment)]
    return hits[0] if hits else None
