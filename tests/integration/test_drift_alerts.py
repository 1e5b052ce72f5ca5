"""Drift alerts from the pipeline: quiet on a stationary stream, and each kind of change found.

2,000,000 stationary rows (K=6, D=5, default bounds) raise no alert; a 1-sd mean shift
of a segment with >= 10% of rows is alerted within 20,000 rows, naming that segment and
the moved feature first; so are a weight change of 0.15 and a doubling of a segment's
spread; the alert ends after the population returns. Streams are
seeded synthetic mixtures (tests/conftest.py) fed as Parquet drops through the real
pipeline in-process, with the shipped default settings except ``segments: 6``.
"""
import numpy as np
import pytest
import pyarrow.parquet as pq

from shoal.config import parse_config
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.segments.monitor import alert_id

from drift_stream import (D, FEATURES, K, SEED, Stream, first_raised as _first_raised,  # noqa: F401
                          rows as _rows, stream, truth as _truth)

def _windows_evaluated(s):
    st = s.drift_state()
    return st["recent"][-1]["index"] + 1 - st["baseline_info"]["row"] // \
        s.settings.drift.window_rows


def test_two_million_stationary_rows_raise_no_alert(stream):
    # 40 drops of 50,000 rows with the default bounds; the drift layer
    # must have been live the whole time (baseline taken, every window after it
    # evaluated: ~480 of the default 4,096 rows).
    weights, means, covs = _truth()
    rng = np.random.default_rng(2024)
    s = stream()
    for _ in range(40):
        s.feed(_rows(rng, 50_000, weights, means, covs), 50_000)
    assert s.rows == 2_000_000
    state = s.drift_state()
    assert state["baseline"] is not None
    w = s.settings.drift.window_rows
    settle_windows = -(-s.settings.drift.settle_rows // w)
    assert _windows_evaluated(s) == (s.rows - s.settings.warmup_rows) // w - settle_windows
    assert _windows_evaluated(s) >= 450
    assert s.alerts() == []
    # nothing was even part-way to being raised at the end
    assert state["bounds"]["entries"] == {}
    # no birth, retirement or merge either (they would be alerts
    # too); the lifecycle was watching: decision points passed, the pool stayed small
    assert [h for h in s.store.history() if h["event"]] == []
    assert s.pipeline.state.mixture.ids.tolist() == list(range(K))
    life = s.pipeline.state.extra["lifecycle"]
    assert life["done_at"] == 2_000_000 - s.settings.warmup_rows - \
        (2_000_000 - s.settings.warmup_rows) % s.settings.lifecycle.check_rows
    assert len(life["pool"]["rows"]) < s.settings.lifecycle.birth_rows


CHANGE_ROW = 60_000        # stream row of the change (not on a window boundary)
AFTER = 40_000             # rows fed after it


def test_one_sd_mean_shift_is_alerted_within_20000_rows_naming_segment_and_feature(stream):
    weights, means, covs = _truth()
    comp = 2                           # weight 0.126: a segment with >= 10% of the rows
    assert weights[comp] >= 0.10
    feature = 3
    sd = float(np.sqrt(covs[comp][feature, feature]))
    rng = np.random.default_rng(7)
    s = stream()
    s.feed(_rows(rng, CHANGE_ROW, weights, means, covs), 10_000)
    segment = s.segment_of(means[comp])
    after = _rows(rng, AFTER, weights, means, covs, shift=(comp, feature, sd))
    s.feed(after, 10_000)
    alert = _first_raised(s.alerts(), "mean_shift")
    assert alert is not None, s.alerts()
    delay = alert["rows"]["last"] + 1 - CHANGE_ROW
    print(f"1-sd mean shift alerted {delay} rows after the change")
    assert 0 < delay <= 20_000
    assert alert["segment"] == segment
    assert alert["explanation"]["features"][0]["feature"] == FEATURES[feature]
    assert alert["explanation"]["features"][0]["shift_sd"] == pytest.approx(1.0, abs=0.25)
    assert alert["value"] > alert["bound"] and alert["value"] > 3 * alert["noise"]
    # no other segment is blamed
    assert {a["segment"] for a in s.alerts()} == {segment}

    # the population returns: the same alert (same id) clears
    s.feed(_rows(rng, 40_000, weights, means, covs), 10_000)
    cleared = [a for a in s.alerts() if a["status"] == "cleared" and a["id"] == alert["id"]]
    assert len(cleared) == 1
    assert cleared[0]["rows"]["first"] == alert["rows"]["first"]
    print(f"cleared {cleared[0]['rows']['last'] + 1 - (CHANGE_ROW + AFTER)} rows after "
          "the return")


def test_weight_change_of_015_is_alerted(stream):
    weights, means, covs = _truth()
    moved = weights.copy()
    moved[0] -= 0.15                   # 0.357 -> 0.207
    moved[2] += 0.15                   # 0.126 -> 0.276
    rng = np.random.default_rng(8)
    s = stream()
    s.feed(_rows(rng, CHANGE_ROW, weights, means, covs), 10_000)
    segments = {s.segment_of(means[0]), s.segment_of(means[2])}
    s.feed(_rows(rng, AFTER, moved, means, covs), 10_000)
    alert = _first_raised(s.alerts(), "weight_change")
    assert alert is not None, s.alerts()
    assert alert["segment"] in segments
    assert alert["value"] == pytest.approx(0.15, abs=0.03)
    print(f"weight change alerted {alert['rows']['last'] + 1 - CHANGE_ROW} rows after it")


def test_doubling_of_a_segments_spread_is_alerted(stream):
    weights, means, covs = _truth()
    comp = 1                           # weight 0.189
    rng = np.random.default_rng(9)
    s = stream()
    s.feed(_rows(rng, CHANGE_ROW, weights, means, covs), 10_000)
    segment = s.segment_of(means[comp])
    s.feed(_rows(rng, AFTER, weights, means, covs, spread=(comp, 2.0)), 10_000)
    alert = _first_raised(s.alerts(), "spread_ratio", segment)
    assert alert is not None, s.alerts()
    assert alert["value"] > 1.5
    print(f"spread doubling alerted {alert['rows']['last'] + 1 - CHANGE_ROW} rows after it, "
          f"ratio {alert['value']:.2f}")


def test_diag_model_windows_sum_variances_only_and_still_see_a_spread_doubling(stream):
    # a diag model's windows keep each segment's sums of squares, not its scatter
    # matrices: their off-diagonal entries stay zero, and the spread change is found
    weights, means, covs = _truth()
    comp = 1
    rng = np.random.default_rng(9)
    s = stream(covariance="diag")
    s.feed(_rows(rng, CHANGE_ROW, weights, means, covs), 10_000)
    segment = s.segment_of(means[comp])
    s.feed(_rows(rng, AFTER, weights, means, covs, spread=(comp, 2.0)), 10_000)
    window = s.drift_state()["window"]
    assert window is not None and window["segments"]
    for acc in window["segments"].values():
        S = np.asarray(acc["S"])
        assert np.all(np.diag(S) > 0)
        assert np.all(S[~np.eye(D, dtype=bool)] == 0.0)
    alert = _first_raised(s.alerts(), "spread_ratio", segment)
    assert alert is not None, s.alerts()
    assert alert["value"] > 1.5


def test_alerts_do_not_depend_on_how_the_stream_is_cut(stream):
    # Windows are counted along the stream, so other drop sizes give the same alerts
    # (same ids and rows; values equal up to the order of floating-point sums); only
    # the inputs and model versions named differ.
    weights, means, covs = _truth()
    rng = np.random.default_rng(10)
    X = np.concatenate([_rows(rng, 30_000, weights, means, covs),
                        _rows(rng, 16_000, weights, means, covs, shift=(2, 0, 2.0))])
    runs = []
    for drop in (10_000, 7_000):
        s = stream(drift={"settle_rows": 8000, "window_rows": 2000})
        s.feed(X, drop)
        runs.append(s.alerts())
    key = ("id", "status", "segment", "statistic", "rows")
    assert runs[0]
    assert [[a[k] for k in key] for a in runs[0]] == [[a[k] for k in key] for a in runs[1]]
    for a, b in zip(*runs):
        assert a["value"] == pytest.approx(b["value"], rel=1e-9)
        assert [f["feature"] for f in a["explanation"]["features"]] == \
            [f["feature"] for f in b["explanation"]["features"]]


def test_alert_ids_are_deterministic_and_name_their_cause():
    assert alert_id(0, 3, "mean_shift", 17) == alert_id(0, 3, "mean_shift", 17)
    others = {alert_id(1, 3, "mean_shift", 17), alert_id(0, 4, "mean_shift", 17),
              alert_id(0, 3, "spread_ratio", 17), alert_id(0, 3, "mean_shift", 18)}
    assert alert_id(0, 3, "mean_shift", 17) not in others and len(others) == 4


def test_overrides_bound_one_feature_and_silence_one_segment(stream):
    # A small persistent move of one feature (0.2 sd) stays under the default
    # mean_shift bound but crosses a per-feature bound; a per-segment override
    # lifts the segment's mean_shift bound so a large move there stays quiet.
    weights, means, covs = _truth()
    rng = np.random.default_rng(11)
    base = _rows(rng, 30_000, weights, means, covs)
    sd0 = float(np.sqrt(covs[0][1, 1]))
    moved = _rows(rng, 16_000, weights, means, covs, shift=(0, 1, 0.2 * sd0))
    s = stream(drift={"settle_rows": 8000, "window_rows": 2000,
                      "overrides": [{"feature": "x1", "feature_shift": 0.12}]})
    s.feed(np.concatenate([base, moved]), 10_000)
    seg0 = s.segment_of(means[0])
    raised = {(a["segment"], a["statistic"]) for a in s.alerts() if a["status"] == "raised"}
    assert (seg0, "feature_shift[x1]") in raised
    assert (seg0, "mean_shift") not in raised

    big = _rows(rng, 16_000, weights, means, covs, shift=(0, 1, 2.0 * sd0))
    quiet = stream(drift={"settle_rows": 8000, "window_rows": 2000})
    quiet.feed(base, 10_000)
    seg = quiet.segment_of(means[0])
    quiet.settings = parse_config(
        {"features": FEATURES, "segments": K,
         "drift": {"settle_rows": 8000, "window_rows": 2000,
                   "overrides": [{"segment": seg, "mean_shift": 5.0, "spread_ratio": 10.0,
                                  "weight_change": 0.5}]}}, quiet.folder)
    quiet.pipeline.settings = quiet.settings
    quiet.feed(big, 10_000)
    assert not [a for a in quiet.alerts() if a["segment"] == seg and a["statistic"] in
                ("mean_shift", "spread_ratio", "weight_change")], quiet.alerts()


def test_rebaseline_accepts_the_present_and_clears_raised_alerts(stream):
    weights, means, covs = _truth()
    rng = np.random.default_rng(12)
    s = stream(drift={"settle_rows": 8000, "window_rows": 2000})
    s.feed(_rows(rng, 30_000, weights, means, covs), 10_000)
    shifted = means.copy()
    shifted[2, 0] += 2.0
    s.feed(_rows(rng, 20_000, weights, shifted, covs), 10_000)
    raised = [a for a in s.alerts() if a["status"] == "raised"]
    assert raised
    segment = s.segment_of(means[2])
    before = s.drift_state()["baseline_info"]["number"]
    request = s.store.request_rebaseline("new compressor fitted")
    s.pipeline.rebaseline_now(request, "new compressor fitted")
    state = s.drift_state()
    assert state["baseline"] is None and state["rebase"]["note"] == "new compressor fitted"
    assert s.store.pending_rebaseline() is None
    assert s.store.rebaselines()[0]["model_version"] == s.pipeline.state.version
    cleared = [a for a in s.alerts() if a["status"] == "cleared"]
    assert {a["id"] for a in raised} == {a["id"] for a in cleared}
    assert all(a["cleared_by"] == "rebaseline" for a in cleared)
    # the stored checkpoint carries the re-baseline (a restart keeps it)
    again = Pipeline(s.settings, s.layout, s.store)
    assert again.state.extra["drift"] == state
    # the next settle_rows rows become the baseline: the shifted population is normal
    n_alerts = len(s.alerts())
    s.feed(_rows(rng, 30_000, weights, shifted, covs), 10_000)
    state = s.drift_state()
    assert state["baseline_info"]["number"] == before + 1
    assert state["baseline_info"]["note"] == "new compressor fitted"
    ref = state["baseline"]
    at = ref["ids"].index(segment)
    sd = np.sqrt(covs[2][0, 0])
    assert abs(ref["means"][at][0] - shifted[2, 0]) < 0.1 * sd    # the data, not the model
    assert s.alerts()[n_alerts:] == []


@pytest.mark.parametrize("waiting", [None, 3])
def test_windows_evaluated_together_decide_as_one_at_a_time(stream, monkeypatch, waiting):
    # Closed windows wait and are evaluated together (at the end of an input, or when
    # WAITING_WINDOWS of them wait); reading the watch's state after every piece
    # evaluates each window as it closes. Both must raise and clear the same alerts
    # with the same payloads and leave the same bound state. A mean shift and its
    # return make both kinds of event.
    from shoal.daemon.segments import monitor
    from shoal.daemon.segments.monitor import InputWatch
    if waiting is not None:
        monkeypatch.setattr(monitor, "WAITING_WINDOWS", waiting)
    weights, means, covs = _truth()
    rng = np.random.default_rng(12)
    X = np.concatenate([_rows(rng, 30_000, weights, means, covs),
                        _rows(rng, 20_000, weights, means, covs, shift=(2, 0, 2.0)),
                        _rows(rng, 30_000, weights, means, covs)])
    runs = []
    for one_at_a_time in (False, True):
        if one_at_a_time:
            observe = InputWatch.observe

            def eager(self, *a, **k):
                observe(self, *a, **k)
                self.state   # evaluates the windows closed so far
            monkeypatch.setattr(InputWatch, "observe", eager)
        s = stream(drift={"settle_rows": 8000, "window_rows": 2000})
        s.feed(X, 20_000)
        runs.append((s.alerts(), s.drift_state()["bounds"]))
    (together, bounds_t), (single, bounds_s) = runs
    assert {a["status"] for a in together} == {"raised", "cleared"}
    assert len(together) == len(single)
    for a, b in zip(together, single):
        assert {k: v for k, v in a.items() if k not in ("value", "noise", "peak", "explanation")} \
            == {k: v for k, v in b.items() if k not in ("value", "noise", "peak", "explanation")}
        assert a["value"] == pytest.approx(b["value"], rel=1e-9)
    assert bounds_t == bounds_s


def test_reused_score_buffers_change_nothing(stream, monkeypatch):
    # The ingest learns piece after piece into score buffers it reuses; whatever the
    # watches keep of a piece must be their own copy. The same stream with fresh buffers
    # for every piece must end in the same model, alerts, drift and lifecycle state and
    # labels. A mean shift (alerts) and a new group (pooled rows) exercise both watches;
    # a birth that needs a full pool lets unexplained rows wait over many pieces.
    from shoal.core.scoring import ScoreBuffer, ScoreScratch
    weights, means, covs = _truth()
    rng = np.random.default_rng(13)
    X = np.concatenate([_rows(rng, 30_000, weights, means, covs),
                        _rows(rng, 20_000, weights, means, covs, shift=(2, 0, 2.0))])
    new_group = rng.normal(means.mean(axis=0) + 12.0, 0.5, (3_000, D))
    X = np.concatenate([X, new_group, _rows(rng, 10_000, weights, means, covs)])
    X[30_000:] = X[30_000:][rng.permutation(len(X) - 30_000)]
    ends = []
    for fresh in (False, True):
        if fresh:
            monkeypatch.setattr(ScoreScratch, "buffer",
                                lambda self, n, k: ScoreBuffer(n, k))
        s = stream(drift={"settle_rows": 8000, "window_rows": 2000},
                   lifecycle={"birth_rows": 2000})
        s.feed(X, 21_000)
        arrays, _ = s.pipeline.state.mixture.to_state()
        labels = sorted(s.folder.rglob("*.labels.parquet"))
        extra = dict(s.pipeline.state.extra)   # less the wall times segments were born at
        extra["segment_born"] = {k: v["version"] for k, v in extra["segment_born"].items()}
        ends.append((arrays, s.alerts(), extra,
                     [pq.read_table(p).to_pydict() for p in labels]))
    (a_arrays, a_alerts, a_extra, a_labels), (b_arrays, b_alerts, b_extra, b_labels) = ends
    assert len(a_extra["lifecycle"]["pool"]["rows"]) > 20
    assert any(a["status"] == "raised" for a in a_alerts)
    assert a_arrays.keys() == b_arrays.keys()
    for key in a_arrays:
        assert np.array_equal(a_arrays[key], b_arrays[key]), key
    assert a_alerts == b_alerts
    assert a_extra == b_extra
    assert a_labels and len(a_labels) == len(b_labels) and a_labels == b_labels


def test_the_committed_baseline_is_worked_out_once_while_the_settings_stay(stream,
                                                                          monkeypatch):
    # The pipeline keeps its drift monitor between inputs, and the monitor what it
    # worked out of the committed baseline record: inputs after the one that took the
    # baseline factorise no Gaussians of it again, until a reload brings new settings.
    import dataclasses

    import shoal.daemon.segments.monitor as monitor
    made = []
    real = monitor.GaussianSet

    def counted(*args, **kwargs):
        made.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(monitor, "GaussianSet", counted)
    weights, means, covs = _truth()
    rng = np.random.default_rng(5)
    s = stream(drift={"settle_rows": 4096, "window_rows": 1024})
    s.feed(_rows(rng, 12_000, weights, means, covs), 12_000)
    assert s.drift_state()["baseline"] is not None
    before = len(made)
    s.feed(_rows(rng, 9_000, weights, means, covs), 3_000)
    assert len(made) == before   # three inputs, windows evaluated, nothing worked out
    assert _windows_evaluated(s) > 10
    s.pipeline.settings = dataclasses.replace(s.settings)   # as a reload sets them
    s.feed(_rows(rng, 3_000, weights, means, covs), 3_000)
    assert len(made) == before + 1


def test_the_model_version_is_made_before_the_labels_file_is_settled(stream, monkeypatch):
    # The new model version (the last windows evaluated, the lifecycle's state taken)
    # is made while the labels writer's thread finishes the file, so the two overlap:
    # before the pipeline settles the labels file, for inputs after the first model.
    # The input that makes the first model labels the warm-up's inputs anew (files
    # written): that waits until its content is known new. A duplicate commits nothing.
    import pyarrow as pa

    import shoal.daemon.ingest.pipeline as pipeline
    order = []
    real_model, real_keep = pipeline.learned_model, pipeline.Pipeline._keep_labels

    def model(*args, **kwargs):
        order.append("model")
        return real_model(*args, **kwargs)

    def keep(self, *args, **kwargs):
        order.append("keep")
        return real_keep(self, *args, **kwargs)

    monkeypatch.setattr(pipeline, "learned_model", model)
    monkeypatch.setattr(pipeline.Pipeline, "_keep_labels", keep)
    weights, means, covs = _truth()
    rng = np.random.default_rng(8)
    s = stream(warmup_rows=5_000, drift={"settle_rows": 4096, "window_rows": 1024})
    X = _rows(rng, 9_000, weights, means, covs)
    s.feed(X[:3_000], 3_000)     # below warmup_rows: labels with null segments
    assert s.pipeline.state.mixture is None and order == ["keep", "model"]
    order.clear()
    s.feed(X[3_000:6_000], 3_000)   # the first model
    assert s.pipeline.state.mixture is not None and order == ["keep", "model"]
    order.clear()
    s.feed(X[6_000:], 3_000)
    assert order == ["model", "keep"]
    version = s.pipeline.state.version
    same = s.folder / "same.parquet"    # the last input's content again
    pq.write_table(pa.table({f: X[6_000:, j] for j, f in enumerate(s.features)}), same)
    assert s.pipeline.process(same, in_inbox=False).outcome == "duplicate"
    assert s.pipeline.state.version == version
