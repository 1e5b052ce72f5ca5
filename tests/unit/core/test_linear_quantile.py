"""The unusual-row threshold's quantile: the same value as numpy's, to the bit."""
import numpy as np
import pytest

from shoal.core.quantile import linear_quantile


@pytest.mark.parametrize("n", [1, 2, 3, 7, 100, 1001, 65_536])
@pytest.mark.parametrize("q", [0.0, 0.001, 0.01, 0.05, 0.25, 0.5, 0.75, 0.99, 0.999, 1.0])
def test_linear_quantile_equals_numpys_to_the_bit(n, q):
    rng = np.random.default_rng(n)
    draws = {"normal": rng.normal(-20.0, 3.0, n),
             "ties": rng.integers(-5, 5, n).astype(np.float64),   # many equal values
             "spread": rng.standard_cauchy(n)}
    for name, x in draws.items():
        kept = x.copy()
        # reference: numpy's own quantile (default method, linear)
        assert linear_quantile(x, q) == float(np.quantile(x, q)), (name, n, q)
        assert np.array_equal(x, kept)   # the input is left as it was
