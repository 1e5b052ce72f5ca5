"""A seeded mixture of log-normal components (K=3, D=4, sdlog 0.6-1.0) and a Gaussian
feature beside it, for the transform tests and scripts (invented data)."""
import numpy as np

from scripts import tests_support

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


class Stream(tests_support.load("drift_stream").Stream):
    """The real pipeline on a fresh state folder (the drift tests' stream), K segments
    over these features; :meth:`feed` returns the segment of every row fed."""

    def __init__(self, folder, features=FEATURES, **overrides):
        folder.mkdir(parents=True, exist_ok=True)
        super().__init__(folder, features, K, **overrides)

    def feed(self, X, drop_rows=10_000):
        """Feed ``X`` in drops; returns the ``segment`` labels of every row (NaN: none).

        The labels files of the drops are read back from the outbox in the order of
        their names (the drops' numbered names) and removed.
        """
        import pyarrow.parquet as pq

        super().feed(X, drop_rows)
        segments = []
        for path in sorted(self.layout.outbox.glob("drop-*.labels.parquet")):
            segments.append(pq.read_table(path).column("segment")
                            .to_numpy(zero_copy_only=False).astype(float))
            path.unlink()
        return np.concatenate(segments)
