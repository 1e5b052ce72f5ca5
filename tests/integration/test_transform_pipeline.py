"""Transforms in the service: rows outside a transform's domain are invalid and counted,
labels' log_density is a density in the data's units, the Yeo-Johnson parameter is
fitted on the warm-up rows and stored, and a changed transform is refused."""
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy import stats

import drift_stream as drift_alerts

from shoal.config import parse_config
from shoal.core import Mixture
from shoal.daemon.model import transforming
from shoal.daemon.errors import UsageError
from shoal.daemon.ingest.pipeline import Pipeline

FEATURES = ["dur_s", "temp_c"]
SEED = 11


def _rows(rng, n, zeros=0.0):
    """Two groups: a log-normal duration (some exact zeros) and a Gaussian temperature."""
    group = rng.random(n) < 0.4
    dur = np.where(group, rng.lognormal(2.0, 0.5, n), rng.lognormal(0.0, 0.7, n))
    dur[rng.random(n) < zeros] = 0.0
    temp = np.where(group, rng.normal(4.0, 1.0, n), rng.normal(-2.0, 1.0, n))
    return np.column_stack([dur, temp])


class Stream(drift_alerts.Stream):
    """The real pipeline on a fresh state folder (tests/support/drift_stream.py), two
    segments over FEATURES; :meth:`feed` keeps the labels of one drop."""

    def __init__(self, folder, **overrides):
        super().__init__(folder, FEATURES, 2, warmup_rows=600, learning={"n_init": 2},
                         **overrides)

    def feed(self, X):
        path = self.folder / f"drop-{self.n:05d}.parquet"
        pq.write_table(pa.table({f: X[:, j] for j, f in enumerate(FEATURES)}), path)
        self.n += 1
        r = self.pipeline.process(path, in_inbox=False)
        assert r.outcome == "committed", r
        return r, pq.read_table(r.labels)


stream = drift_alerts.stream_fixture(Stream)


def test_zeros_under_log_are_invalid_and_counted_under_log1p_fine(stream):
    rng = np.random.default_rng(SEED)
    X = _rows(rng, 2000, zeros=0.05)
    zeros = int(np.count_nonzero(X[:, 0] == 0.0))
    assert zeros > 50
    s = stream(transforms={"dur_s": "log"})
    r, labels = s.feed(X)
    assert r.rows_outside_domain == zeros and r.rows_invalid == zeros
    seg = labels.column("segment").to_numpy(zero_copy_only=False)
    assert np.isnan(seg[X[:, 0] == 0.0]).all()          # null segment
    assert not np.isnan(seg[X[:, 0] > 0.0]).any()
    s1p = stream(transforms={"dur_s": "log1p"})
    r, labels = s1p.feed(X)
    assert r.rows_outside_domain == 0 and r.rows_invalid == 0
    assert labels.column("segment").null_count == 0


def test_labels_log_density_is_in_the_data_units(stream):
    rng = np.random.default_rng(SEED + 1)
    s = stream(transforms={"dur_s": "log"}, covariance="full")
    s.feed(_rows(rng, 1500))
    X = _rows(rng, 800)
    r, labels = s.feed(X)
    cp = s.store.latest_checkpoint()
    m = Mixture.from_state(cp.arrays, cp.meta)
    assert transforming.from_meta(cp.meta, 2).kinds == ("log", "none")
    # the model that labelled the second drop is the one after the first: refit labels
    # with the stored model through `shoal label` semantics (label only, no learning)
    out = s.folder / "again.parquet"
    src = s.folder / "again-in.parquet"
    pq.write_table(pa.table({f: X[:, j] for j, f in enumerate(FEATURES)}), src)
    s.pipeline.label_only(src, out)
    got = pq.read_table(out).column("log_density").to_numpy()
    # reference: scipy.stats.multivariate_normal on (log dur, temp), mixed by the stored
    # weights, plus the log-Jacobian of log: -log(dur)
    Y = np.column_stack([np.log(X[:, 0]), X[:, 1]])
    dens = sum(w * stats.multivariate_normal(mu, c).pdf(Y) for w, mu, c in
               zip(m.weights, m.data_means(), m.data_covariance_matrices()))
    np.testing.assert_allclose(got, np.log(dens) - np.log(X[:, 0]), rtol=1e-10)
    # unusual ranks by the density in the model's units (without the Jacobian)
    unusual = pq.read_table(out).column("unusual").to_numpy(zero_copy_only=False)
    below = s.pipeline.state.extra["unusual_below"]
    np.testing.assert_array_equal(unusual, np.log(dens) < below)


def test_yeo_johnson_is_fitted_on_the_warm_up_rows_and_stored(stream):
    rng = np.random.default_rng(SEED + 2)
    s = stream(transforms={"dur_s": "yeo-johnson"})
    first = _rows(rng, 400)                  # buffered: no model yet
    s.feed(first)
    second = _rows(rng, 900)                 # the warm-up ends inside this drop
    r, labels = s.feed(second)
    cp = s.store.latest_checkpoint()
    lam = transforming.from_meta(cp.meta, 2).lambdas[0]
    warm = np.concatenate([first, second])[:600, 0]
    # reference: scipy's maximum-likelihood Yeo-Johnson parameter of the same rows
    assert lam == pytest.approx(stats.yeojohnson(warm)[1], rel=1e-6)
    # every row of the second drop, before and after the warm-up's end, is in the same
    # units: its data-unit density is the model's on scipy's transform plus the Jacobian
    m = Mixture.from_state(cp.arrays, cp.meta)
    out = s.folder / "again.parquet"
    src = s.folder / "again-in.parquet"
    pq.write_table(pa.table({f: second[:, j] for j, f in enumerate(FEATURES)}), src)
    s.pipeline.label_only(src, out)
    Y = np.column_stack([stats.yeojohnson(second[:, 0], lam), second[:, 1]])
    jac = (lam - 1) * np.log1p(second[:, 0])          # dur >= 0: (l-1) log(1+x)
    np.testing.assert_allclose(pq.read_table(out).column("log_density").to_numpy(),
                               m.log_density(Y) + jac, rtol=1e-9)
    # and a restart keeps the parameter
    again = Pipeline(s.settings, s.layout, s.store)
    assert again.state.transforms.lambdas[0] == lam


def test_a_changed_transform_is_refused_naming_feature_and_values(stream, tmp_path):
    rng = np.random.default_rng(SEED + 3)
    s = stream(transforms={"dur_s": "log1p"})
    s.feed(_rows(rng, 800))
    changed = parse_config({"features": FEATURES, "segments": 2, "warmup_rows": 600,
                            "transforms": {"dur_s": "log"}}, s.folder)
    with pytest.raises(UsageError) as err:
        Pipeline(changed, s.layout, s.store)
    assert err.value.exit_code == 2
    for word in ("transforms.dur_s", "'log1p'", "'log'"):
        assert word in str(err.value)
    none = parse_config({"features": FEATURES, "segments": 2, "warmup_rows": 600}, s.folder)
    with pytest.raises(UsageError, match="learned with 'log1p', the config says 'none'"):
        Pipeline(none, s.layout, s.store)
    s.close()
    # the command line: exit code 2 and the message on stderr
    cfg = s.folder / "changed.yaml"
    cfg.write_text("features: [dur_s, temp_c]\nsegments: 2\nwarmup_rows: 600\n"
                   "transforms: {dur_s: logit}\n")
    drop = s.folder / "more.parquet"
    X = _rows(rng, 100)
    pq.write_table(pa.table({f: X[:, j] for j, f in enumerate(FEATURES)}), drop)
    r2 = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "ingest", "-c", str(cfg),
                         str(drop)], capture_output=True, text=True, timeout=60)
    assert r2.returncode == 2, r2.stderr
    assert "transforms.dur_s" in r2.stderr and "'log1p'" in r2.stderr and "'logit'" in r2.stderr


def test_status_and_report_show_medians_of_a_transformed_feature(stream):
    from shoal.daemon.state.readout import open_reader, state_snapshot
    from shoal.daemon.views.status_text import format_status
    from shoal.daemon.views.report import report_data, segments_table, write_report

    rng = np.random.default_rng(SEED + 4)
    s = stream(transforms={"dur_s": "log"}, output={"keep_inputs": True})
    s.feed(_rows(rng, 3000))
    reader = open_reader(s.layout)
    try:
        snap = state_snapshot(reader, s.settings, s.layout)
        assert "dur_s median" in format_status(snap) and "temp_c mean" in format_status(snap)
        table = segments_table(snap, {})
        assert "dur_s median [68%]" in table and "temp_c mean ± sd" in table
        data = report_data(reader, s.settings, s.layout)
        # the band of dur_s is in seconds: each holds one of the generating log-normals'
        # medians, e^2 and e^0
        medians = [np.exp(2.0), 1.0]
        for mean, sd in data["baseline"].values():
            assert sum(mean[0] - sd[0] < m < mean[0] + sd[0] for m in medians) == 1
        out = write_report(reader, s.settings, s.layout, s.folder / "r.html", config="c")
        assert "dur_s median [68%]" in out.read_text()
    finally:
        reader.close()


def test_backfill_refuses_transforms_it_does_not_apply(tmp_path):
    from shoal.daemon.backfill.learn import backfill

    settings = parse_config({"features": FEATURES, "transforms": {"dur_s": "log"}}, tmp_path)
    with pytest.raises(UsageError, match="does not apply transforms"):
        backfill(settings, [tmp_path])


def test_yeo_johnson_fitted_inside_a_large_input_gives_the_model_of_a_cut_stream(stream):
    # frames read before the parameter existed are mapped once it does: one input of
    # three frames learns the model that a first input of exactly the warm-up rows and
    # a second of the rest learn (the same stream cut otherwise)
    rng = np.random.default_rng(SEED + 5)
    X = _rows(rng, 140_000)
    one = stream(transforms={"dur_s": "yeo-johnson"})
    one.feed(X)
    two = stream(transforms={"dur_s": "yeo-johnson"})
    two.feed(X[:600])
    two.feed(X[600:])
    a, b = one.pipeline.state, two.pipeline.state
    assert a.transforms.lambdas[0] == b.transforms.lambdas[0]
    assert a.mixture.n_rows == b.mixture.n_rows == 140_000 - 600
    np.testing.assert_allclose(a.mixture.data_means(), b.mixture.data_means(), rtol=1e-9)
    np.testing.assert_allclose(a.mixture.weights, b.mixture.weights, rtol=1e-9)


def test_warm_up_rows_wait_in_the_data_units_until_the_first_model(stream):
    # rows buffered before the first model are only checked; a config that changes the
    # transform before then is used for the whole warm-up (nothing was mapped yet)
    rng = np.random.default_rng(SEED + 6)
    first = _rows(rng, 400, zeros=0.05)
    s = stream(transforms={"dur_s": "log1p"})
    s.feed(first)                                         # buffered, no model
    assert s.pipeline.state.mixture is None
    np.testing.assert_array_equal(s.store.warmup_rows(), first)   # as they came
    changed = parse_config({"features": FEATURES, "segments": 2, "warmup_rows": 600,
                            "learning": {"n_init": 2}, "transforms": {"dur_s": "log"}},
                           s.folder)
    s.pipeline = Pipeline(changed, s.layout, s.store)     # no model stored: accepted
    r, _ = s.feed(_rows(rng, 800))
    m = s.pipeline.state.mixture
    assert m is not None and s.pipeline.state.transforms.kinds == ("log", "none")
    # the buffered zeros are left out under log; the segments sit at the generating
    # log-means 0 and 2 of dur_s (under log1p they would sit near 0.55 and 2.1)
    got = np.sort(m.data_means()[:, 0])
    np.testing.assert_allclose(got, [0.0, 2.0], atol=0.15)


def test_missing_values_of_a_transformed_feature_are_missing_not_outside(stream):
    # A row with a missing value is scored by the features present (their marginal), so
    # under a transform its density in the data's units carries the Jacobian of the
    # features present only; a value present but outside the domain still makes the row
    # invalid, and is counted, even when another feature is missing.
    rng = np.random.default_rng(SEED + 7)
    s = stream(transforms={"dur_s": "log"}, covariance="full")
    s.feed(_rows(rng, 1500))
    X = _rows(rng, 300)
    X[0:50, 1] = np.nan        # temperature missing: scored on log(dur)
    X[50:100, 0] = np.nan      # duration missing: scored on temperature
    X[100:110, 0] = 0.0        # outside log's domain ...
    X[100:110, 1] = np.nan     # ... with the other feature missing: still invalid
    src, out = s.folder / "gaps-in.parquet", s.folder / "gaps.parquet"
    pq.write_table(pa.table({f: X[:, j] for j, f in enumerate(FEATURES)}), src)
    r = s.pipeline.label_only(src, out)
    assert r.rows_outside_domain == 10 and r.rows_invalid == 10
    labels = pq.read_table(out)
    seg = labels.column("segment").to_numpy(zero_copy_only=False)
    assert np.isnan(seg[100:110]).all() and not np.isnan(seg[:100]).any()
    assert not np.isnan(seg[110:]).any()
    observed = labels.column("observed").to_numpy()
    np.testing.assert_array_equal(observed[:100], 1)
    got = labels.column("log_density").to_numpy(zero_copy_only=False)
    cp = s.store.latest_checkpoint()
    m = Mixture.from_state(cp.arrays, cp.meta)
    w, mu, cov = m.weights, m.data_means(), m.data_covariance_matrices()
    # reference: scipy.stats.norm of each observed margin (in the model's units), mixed
    # by the stored weights, plus -log(dur) where dur is the feature present
    log_dur = np.log(X[0:50, 0])
    dens_dur = sum(wk * stats.norm(mk[0], np.sqrt(ck[0, 0])).pdf(log_dur)
                   for wk, mk, ck in zip(w, mu, cov))
    np.testing.assert_allclose(got[0:50], np.log(dens_dur) - log_dur, rtol=1e-10)
    temp = X[50:100, 1]
    dens_temp = sum(wk * stats.norm(mk[1], np.sqrt(ck[1, 1])).pdf(temp)
                    for wk, mk, ck in zip(w, mu, cov))
    np.testing.assert_allclose(got[50:100], np.log(dens_temp), rtol=1e-10)
