"""A seeded mixture of log-normal components (K=3, D=4, sdlog 0.6-1.0) and a Gaussian
feature beside it, for the transform tests and scripts (invented data)."""
import numpy as np

K, D = 3, 4
FEATURES = [f"dur{j}" for j in range(D)]
WEIGHTS = np.array([0.5, 0.3, 0.2])
# log-scale means: components apart by about 2.5-3 log-sds in most features
MEANLOG = np.array([[0.0, 1.0, -0.5, 2.0],
                    [2.0, -0.8, 1.5, 0.5],
                    [-1.8, 2.6, 0.8, 3.4]])


def truth(seed: int = 0):
    """Weights, log-scale means and covariances (sdlog 0.6-1.0, mild correlation)."""
    rng = np.random.default_rng(seed)
    sdlog = rng.uniform(0.6, 1.0, (K, D))
    covs = np.empty((K, D, D))
    for k in range(K):
        A = rng.normal(0.0, 1.0, (D, D))
        S = A @ A.T / D + np.eye(D)                     # positive definite
        corr = S / np.sqrt(np.outer(np.diag(S), np.diag(S)))   # mild correlations
        covs[k] = corr * np.outer(sdlog[k], sdlog[k])
    return WEIGHTS, MEANLOG, covs


def log_rows(rng, n, weights, meanlog, covs, *, shift=None):
    """``(labels, log rows)``; ``shift``: (component, feature, amount on the log scale)."""
    labels = rng.choice(len(weights), size=n, p=weights / weights.sum())
    chol = np.linalg.cholesky(covs)
    Y = meanlog[labels] + np.einsum("nde,ne->nd", chol[labels], rng.standard_normal((n, D)))
    if shift is not None:
        comp, feature, amount = shift
        Y[labels == comp, feature] += amount
    return labels, Y


class Stream:
    """The real pipeline on a fresh state folder, fed Parquet drops of these features."""

    def __init__(self, folder, features=FEATURES, **overrides):
        from shoal.config import parse_config
        from shoal.daemon.files.layout import prepare_folders
        from shoal.daemon.ingest.pipeline import Pipeline
        from shoal.daemon.state.store import StateStore

        folder.mkdir(parents=True, exist_ok=True)
        self.folder, self.features = folder, list(features)
        self.settings = parse_config({"features": self.features, "segments": K,
                                      **overrides}, folder)
        self.layout = prepare_folders(self.settings)
        self.store = StateStore(self.layout.db)
        self.pipeline = Pipeline(self.settings, self.layout, self.store)
        self.n = 0

    def feed(self, X, drop_rows=10_000):
        """Feed ``X`` in drops; returns the ``segment`` labels of every row (NaN: none)."""
        import pyarrow as pa
        import pyarrow.parquet as pq

        segments = []
        for start in range(0, len(X), drop_rows):
            part = X[start:start + drop_rows]
            path = self.folder / f"drop-{self.n:06d}.parquet"
            pq.write_table(pa.table({f: part[:, j] for j, f in enumerate(self.features)}),
                           path)
            r = self.pipeline.process(path, in_inbox=False)
            assert r.outcome == "committed", r
            segments.append(pq.read_table(r.labels).column("segment")
                            .to_numpy(zero_copy_only=False).astype(float))
            r.labels.unlink()
            path.unlink()
            self.n += 1
        return np.concatenate(segments)

    def alerts(self):
        return [a["payload"] for a in self.store.alerts()]

    def close(self):
        self.store.close()
