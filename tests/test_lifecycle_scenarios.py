"""Lifecycle on randomised seeded scenarios (K 3-6, D 2-8, well-separated components,
smallest weight 8%, ``half_life_rows: 50000``, ``warmup_rows: 5000``, 10,000-row
Parquet drops through the real pipeline; tests/_scenarios.py). A few seeds here; the
20- and 50-seed sets are ``scripts/lifecycle_scenarios.py``, which prints a table.
"""
import pytest

import _scenarios


@pytest.mark.parametrize("seed", [0, 3, 9, 12, 15])
def test_a_vanished_segment_retires_within_50000_rows_without_shape_alerts(seed, tmp_path):
    r = _scenarios.vanish(tmp_path, seed)
    print(r)
    assert r["delay"] is not None and 0 < r["delay"] <= 50_000, r
    assert r["shape_alerts"] == [], r
