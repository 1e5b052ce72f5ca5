"""Inputs read, learned and labelled frame by frame: the frames do not depend
on how the file cuts its record batches, the model and labels do not depend on the frame
size, and a reader-thread error ends as a quarantine, not a hang."""
import functools

import blake3
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from shoal.config import load_config
from shoal.daemon.ingest import pipeline as pipeline_module
from shoal.daemon.ingest import rows as rows_module
from shoal.daemon.ingest import stages as stages_module
from shoal.daemon.files import readers
from shoal.daemon.cli.main import open_service_parts
from drills import synthetic_table, write_config
from shoal.daemon.files.readers import iter_frames, prefetch

SEED = 9


@pytest.fixture(params=[True, False], ids=["threads", "inline"])
def threaded(request, monkeypatch):
    """Inputs taken by overlapping threads (as large inputs are) or in one thread."""
    monkeypatch.setattr(pipeline_module, "THREADED_BYTES", 0 if request.param else 1 << 40)
    return request.param


def test_frames_do_not_depend_on_the_files_record_batches(tmp_path, frame_build):
    table = synthetic_table(0, 5000, SEED)
    pq.write_table(table, tmp_path / "one.parquet")
    pq.write_table(table, tmp_path / "many.parquet", row_group_size=333)
    pacsv.write_csv(table, tmp_path / "rows.csv")
    settings = load_config(write_config(tmp_path))

    def frames(name, kind):
        with open(tmp_path / name, "rb") as f:
            return list(iter_frames(f, kind, settings, rows=1024))

    one, many, csv = (frames("one.parquet", "parquet"), frames("many.parquet", "parquet"),
                      frames("rows.csv", "csv"))
    assert [fr.n_rows for fr in one] == [1024] * 4 + [904]
    for a, b, c in zip(one, many, csv):
        np.testing.assert_array_equal(a.features, b.features)
        np.testing.assert_array_equal(a.features, c.features)
        assert a.passthrough.equals(b.passthrough)
        assert a.features.flags.c_contiguous and a.valid.all()
    X = np.concatenate([fr.features for fr in one])
    for j, name in enumerate(["f1", "f2", "f3"]):
        np.testing.assert_array_equal(X[:, j], table.column(name).to_numpy())


@pytest.fixture(params=["compiled", "numpy"])
def frame_build(request):
    """Frames built by the core's compiled rows_from_columns or by numpy passes."""
    from shoal.core import fused
    if request.param == "compiled" and not fused.enabled():
        pytest.skip("the shoal.core._kernels extension is not built")
    before = fused.enabled()
    fused.set_enabled(request.param == "compiled")
    yield request.param
    fused.set_enabled(before)


def test_frames_checked_against_a_model_range_refuse_the_rows_the_model_would(tmp_path,
                                                                            frame_build):
    """Rows read with a model's range are refused exactly where the check of a whole
    frame against the model (pipeline._mark_beyond_model, as before the reader did it)
    refuses them, whatever the record batches; NaN, infinite and past-1e50 rows stay
    invalid without counting as beyond the range; ranges near 1e50 keep that bound.
    (On both ways of building frames: compiled and numpy.)"""
    from shoal.daemon.files.readers import FEATURE_BOUND, Frame

    table = synthetic_table(0, 3000, SEED)
    X = np.column_stack([table.column(c).to_numpy() for c in ("f1", "f2", "f3")])
    X[[5, 700, 1500], 0] = [np.nan, np.inf, 1e60]      # invalid by the bound
    X[[9, 1025, 2999], [1, 2, 0]] = [4e3, -4e3, 5e3]     # beyond a range of 1e3
    X[11] = [np.nan, 1e4, 0.0]                           # both: not counted as beyond
    for j, name in enumerate(("f1", "f2", "f3")):
        table = table.set_column(table.schema.get_field_index(name), name, pa.array(X[:, j]))
    pq.write_table(table, tmp_path / "many.parquet", row_group_size=333)
    settings = load_config(write_config(tmp_path))
    sds = rows_module.MODEL_RANGE_SDS
    for center, scale, n_beyond in (
            (np.array([0.5, -1.0, 2.0]), np.full(3, 1e3 / sds), 3),
            (np.zeros(3), np.array([1e3, 0.6 * FEATURE_BOUND, 1e3]) / sds, 2)):
        mixture = type("Model", (), {"center": center, "scale": scale})
        limit = rows_module.model_range(mixture)[1]
        with open(tmp_path / "many.parquet", "rb") as f:
            checked = list(iter_frames(f, "parquet", settings, rows=1024,
                                       model_range=(center, limit)))
        with open(tmp_path / "many.parquet", "rb") as f:
            plain = list(iter_frames(f, "parquet", settings, rows=1024))
        for a, b in zip(checked, plain):
            np.testing.assert_array_equal(a.features, b.features)
            with np.errstate(invalid="ignore"):
                far = np.any(np.abs(b.features - center) > limit, axis=1) & b.valid
            np.testing.assert_array_equal(a.valid, b.valid & ~far)
            assert a.beyond_range == int(far.sum())
            # the pipeline's own check of a frame read without the range agrees
            again = Frame(b.features, b.passthrough, b.valid.copy())
            rows_module.mark_beyond_model(again, mixture)
            np.testing.assert_array_equal(again.valid, a.valid)
        assert sum(fr.beyond_range for fr in checked) == n_beyond


def _learn_two_inputs(folder, monkeypatch, frame_rows, row_group_rows=None):
    """Two inputs (the first one ends the warm-up part-way) learned in frames of
    ``frame_rows``; returns the model's state arrays and the labels tables."""
    monkeypatch.setattr(stages_module, "iter_frames",
                        functools.partial(readers.iter_frames, rows=frame_rows))
    settings = load_config(write_config(folder, warmup_rows=600))
    drops = []
    for i, rows in enumerate((3000, 5000)):
        drops.append(folder / f"in-{i}.parquet")
        pq.write_table(synthetic_table(i, rows, SEED), drops[-1], row_group_size=row_group_rows)
    with open_service_parts(settings) as (layout, store, pipeline):
        results = [pipeline.process(p, in_inbox=False) for p in drops]
        arrays, _ = pipeline.state.mixture.to_state()
    assert [r.outcome for r in results] == ["committed"] * 2
    assert [r.rows for r in results] == [3000, 5000]
    return arrays, [pq.read_table(r.labels) for r in results]


def test_model_and_labels_do_not_depend_on_the_files_record_batches(tmp_path, monkeypatch,
                                                                    threaded):
    arrays_a, labels_a = _learn_two_inputs(tmp_path / "a", monkeypatch, 1024, 97)
    arrays_b, labels_b = _learn_two_inputs(tmp_path / "b", monkeypatch, 1024)
    for name in arrays_a:   # the same frames: identical to the bit
        np.testing.assert_array_equal(arrays_a[name], arrays_b[name], err_msg=name)
    for a, b in zip(labels_a, labels_b):
        assert a.equals(b)


def test_model_and_labels_hardly_depend_on_the_frame_size(tmp_path, monkeypatch):
    arrays_a, labels_a = _learn_two_inputs(tmp_path / "a", monkeypatch, 256)
    arrays_b, labels_b = _learn_two_inputs(tmp_path / "b", monkeypatch, 65_536)
    assert arrays_a.keys() == arrays_b.keys()
    for name in arrays_a:
        # stepwise EM is cut-invariant up to rounding (tests/unit/core/test_core_stepwise.py)
        np.testing.assert_allclose(arrays_a[name], arrays_b[name], rtol=1e-9, atol=1e-12,
                                   err_msg=name)
    for a, b in zip(labels_a, labels_b):
        # the unusual-row threshold moves once per frame, so that column may differ
        assert a.column("segment").null_count == 0
        for name in ("key", "ts", "segment", "model_version"):
            assert a.column(name).equals(b.column(name)), name
        for name in ("confidence", "log_density"):
            np.testing.assert_allclose(a.column(name).to_numpy(), b.column(name).to_numpy(),
                                       rtol=1e-9, atol=1e-12)


def test_a_reader_error_part_way_is_a_quarantine(tmp_path, monkeypatch, threaded):
    monkeypatch.setattr(stages_module, "iter_frames",
                        functools.partial(readers.iter_frames, rows=500))
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    good = tmp_path / "good.parquet"
    pq.write_table(synthetic_table(0, 1000, SEED), good)
    lines = (tmp_path / "x.csv")
    pacsv.write_csv(synthetic_table(1, 3000, SEED), lines)
    text = lines.read_text().splitlines()
    text[2001] = "k,1,0.5,warm,1"            # line 2002: frames before it are learned first
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(text) + "\n")
    with open_service_parts(settings) as (layout, store, pipeline):
        first = pipeline.process(good, in_inbox=False)
        assert first.outcome == "committed"
        r = pipeline.process(bad, in_inbox=False)
        assert (r.outcome, r.reason) == ("quarantined", "non_numeric_feature"), r
        assert "line 2002" in r.detail
        assert pipeline.state.version == store.model_version == 1
        assert [p.name for p in layout.outbox.iterdir()] == [first.labels.name]  # no partial


def test_prefetch_hands_on_an_error_after_the_items_before_it():
    def items():
        yield 1
        yield 2
        raise ValueError("boom")

    got = []
    with pytest.raises(ValueError, match="boom"):
        with prefetch(items()) as ahead:
            for x in ahead:
                got.append(x)
    assert got == [1, 2]


def test_prefetch_left_early_stops_its_reader():
    made = []

    def items():
        for i in range(1000):
            made.append(i)
            yield i

    with prefetch(items(), depth=2) as ahead:
        for x in ahead:
            if x == 3:
                break
    assert 4 <= len(made) <= 8   # a few items ahead at most; the thread is joined


@pytest.mark.parametrize("output", ["parquet", "csv"])
@pytest.mark.parametrize("hash_known", ["at_once", "at_the_end"])
def test_an_input_seen_before_is_learned_once_whatever_was_done_before_its_hash(
        tmp_path, monkeypatch, threaded, output, hash_known):
    """The hash is made while the input is learned; a duplicate or an input already done
    is found before its labels file is named, and nothing of the attempt is kept -
    whether the hash is known when the first labels are written or only after the last
    (the model does not wait for it), and for labels written as CSV too (whose writer
    once never asked for the hash: the ledger got an empty one and a copy was learned
    twice)."""
    if hash_known == "at_the_end":
        monkeypatch.setattr(readers.file_digest, "ready", lambda self: False)
    settings = load_config(write_config(tmp_path, warmup_rows=600, output={"format": output}))
    first, again, other = (tmp_path / n for n in ("a.parquet", "b.parquet", "c.parquet"))
    pq.write_table(synthetic_table(0, 1500, SEED), first)
    again.write_bytes(first.read_bytes())
    pq.write_table(synthetic_table(1, 1500, SEED), other)
    with open_service_parts(settings) as (layout, store, pipeline):
        a = pipeline.process(first, in_inbox=False)
        b = pipeline.process(again, in_inbox=False)
        a2 = pipeline.process(first, in_inbox=False)
        c = pipeline.process(other, in_inbox=False)
        assert [r.outcome for r in (a, b, a2, c)] == \
            ["committed", "duplicate", "already_done", "committed"]
        assert [r.model_version for r in (a, b, a2, c)] == [1, 1, 1, 2]
        assert store.model_version == 2
        names = sorted(p.name for p in layout.outbox.iterdir())
        assert names == sorted([a.labels.name, b.labels.name, c.labels.name])  # no temp
        # a new store's digest: BLAKE3 of the bytes, from the blake3 package (the reference)
        digest = blake3.blake3(first.read_bytes()).hexdigest()
        assert digest[:16] in a.labels.name and digest[:16] in b.labels.name
        if output == "parquet":
            la, lb = pq.read_table(a.labels), pq.read_table(b.labels)
            meta = pq.read_schema(b.labels).metadata
            assert meta[b"shoal.input_digest"].decode() == digest
            assert meta[b"shoal.digest_algorithm"] == b"blake3"
        else:
            la, lb = pacsv.read_csv(a.labels), pacsv.read_csv(b.labels)
        assert la.column("segment").equals(lb.column("segment"))


def _huge_rows_then_normal(folder, monkeypatch, limit_sds):
    """Warm up, then an input with one finite row at ~1e40 among normal ones, then
    normal inputs across several refresh points; returns the inputs' results."""
    monkeypatch.setattr(rows_module, "MODEL_RANGE_SDS", limit_sds)
    settings = load_config(write_config(folder, warmup_rows=600))
    tables = [synthetic_table(i, 3000, SEED) for i in range(5)]
    # One row far out in every feature: its outer product (rank one, ~1e80) drowns the
    # rest of its segment's second moments in rounding error.
    for j, name in enumerate(["f1", "f2", "f3"]):
        values = tables[1].column(name).to_numpy().copy()
        values[1234] = 1e40 * (1.0 + j)
        tables[1] = tables[1].set_column(2 + j, name, pa.array(values))
    drops = []
    for i, table in enumerate(tables):
        drops.append(folder / f"in-{i}.parquet")
        pq.write_table(table, drops[-1])
    (folder / "copy-of-in-1.parquet").write_bytes(drops[1].read_bytes())
    drops.append(folder / "copy-of-in-1.parquet")
    with open_service_parts(settings) as (layout, store, pipeline):
        results = [pipeline.process(p, in_inbox=False) for p in drops]
    return results


def test_rows_far_beyond_the_models_range_are_invalid_not_poison(tmp_path, monkeypatch):
    # Finite but absurd values (1e40 where the warm-up spread is ~1) are marked invalid
    # once a model exists, so they cannot swamp the statistics: every later input is
    # committed. Without the bound the same inputs break the model's refreshes.
    results = _huge_rows_then_normal(tmp_path / "bounded", monkeypatch, 1e6)
    assert [r.outcome for r in results] == ["committed"] * 5 + ["duplicate"]
    assert results[1].rows_invalid == results[5].rows_invalid == 1   # a copy: the same rows
    labels = pq.read_table(results[1].labels)
    assert labels.column("segment").null_count == 1
    assert labels.column("segment")[1234].as_py() is None
    copy = pq.read_table(results[5].labels)    # scored by the later model: same null rows
    assert copy.column("segment").is_null().equals(labels.column("segment").is_null())
    unbounded = _huge_rows_then_normal(tmp_path / "unbounded", monkeypatch, np.inf)
    assert any(r.outcome == "quarantined" for r in unbounded[1:5])


def test_parquet_inputs_leave_no_file_open(tmp_path):
    # the reader opens its own Arrow file on the input (through /proc/self/fd on Linux):
    # read to the end, left part-way or refused, it is closed again
    import os
    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs /proc/self/fd")
    table = synthetic_table(0, 3000, SEED)
    good = tmp_path / "good.parquet"
    pq.write_table(table, good)
    narrow = tmp_path / "narrow.parquet"
    pq.write_table(table.select(["f1"]), narrow)        # a feature column is missing
    settings = load_config(write_config(tmp_path))
    before = len(os.listdir("/proc/self/fd"))
    for _ in range(20):
        with open(good, "rb") as f:
            assert sum(fr.n_rows for fr in iter_frames(f, "parquet", settings, rows=1024)) == 3000
        with open(good, "rb") as f:
            frames = iter_frames(f, "parquet", settings, rows=1024)
            next(frames)
            frames.close()                               # left part-way
        with open(narrow, "rb") as f, pytest.raises(readers.InputRejected):
            next(iter_frames(f, "parquet", settings))
    assert len(os.listdir("/proc/self/fd")) <= before
