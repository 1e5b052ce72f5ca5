"""Every valid row ends with a segment: inputs taken before the first model (the
warm-up) are labelled by that model once it exists, under its model version."""
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from shoal.config import load_config
from shoal.core import StepSchedule, initialise
from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config
from shoal.daemon.state.store import StateStore

SEED = 5          # seeds the synthetic drops
ROWS = 1000       # rows per drop
WARMUP = 2500     # the third drop completes the warm-up


def _drops(folder, n, invalid_every=0):
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n):
        table = synthetic_table(i, ROWS, SEED)
        if invalid_every:   # a null feature: an invalid row, which keeps a null segment
            f1 = table.column("f1").to_pylist()
            for j in range(0, ROWS, invalid_every):
                f1[j] = None
            table = table.set_column(table.column_names.index("f1"), "f1",
                                     pa.array(f1, pa.float64()))
        path = folder / f"d{i:02d}.parquet"
        pq.write_table(table, path)
        paths.append(path)
    return paths


def _labels(outbox, path):
    [found] = list(outbox.glob(f"{path.stem}.*.labels.parquet"))
    return pq.read_table(found)


def test_rows_of_inputs_before_the_first_model_end_with_its_segment(tmp_path, capsys):
    # every feature required: a row with a null feature stays invalid (null segment)
    cfg = write_config(tmp_path, warmup_rows=WARMUP, learning={"min_observed": 3})
    settings = load_config(cfg)
    paths = _drops(tmp_path / "drops", 4, invalid_every=97)
    assert main(["ingest", "-c", str(cfg), *map(str, paths)]) == 0
    # the first model, as the service makes it from the first WARMUP valid rows
    X = np.concatenate([np.column_stack([pq.read_table(p).column(c).to_numpy(
        zero_copy_only=False) for c in ("f1", "f2", "f3")]) for p in paths[:3]])
    valid = np.isfinite(X).all(axis=1)
    s = settings
    model = initialise(X[valid][:WARMUP], n_components=s.segments.min,
                       covariance=s.covariance, seed=s.seed, n_init=s.learning.n_init,
                       reg_covar=s.learning.reg_covar,
                       schedule=StepSchedule(alpha=s.learning.step_exponent, i0=None,
                                             half_life_rows=s.half_life_rows))
    for i, path in enumerate(paths[:2]):   # wholly warm-up inputs
        table = _labels(tmp_path / "outbox", path)
        rows = valid[i * ROWS:(i + 1) * ROWS]
        segment = table.column("segment")
        assert segment.null_count == int(np.count_nonzero(~rows)) > 0
        assert np.array_equal(pc.is_valid(segment).to_numpy(zero_copy_only=False), rows)
        scores = model.score(X[i * ROWS:(i + 1) * ROWS][rows])
        np.testing.assert_array_equal(segment.drop_null().to_numpy(), scores.segment)
        np.testing.assert_allclose(table.column("log_density").drop_null().to_numpy(),
                                   scores.log_density, rtol=1e-9)
        assert set(table.column("model_version").drop_null().to_pylist()) == {3}
        assert table.schema.metadata[b"shoal.model_version"] == b"3"
        assert table.column("key").to_pylist() == \
            pq.read_table(path).column("key").to_pylist()
    third = _labels(tmp_path / "outbox", paths[2])
    assert set(third.column("model_version").drop_null().to_pylist()) == {3}
    store = StateStore(settings.state / "state.db")
    try:
        assert store.warmup_inputs() == []      # nothing left waiting
        counts = store.latest_checkpoint().extra["segment_rows"]
    finally:
        store.close()
    # every valid row of the four inputs counted in its segment, the warm-up's too
    invalid_per_input = int(np.count_nonzero(~valid[:ROWS]))
    assert sum(counts.values()) == 4 * (ROWS - invalid_per_input)


def test_labels_written_during_the_warm_up_carry_no_model_version_text(tmp_path):
    cfg = write_config(tmp_path, warmup_rows=WARMUP)
    [path] = _drops(tmp_path / "drops", 1)
    assert main(["ingest", "-c", str(cfg), str(path)]) == 0
    table = _labels(tmp_path / "outbox", path)
    assert table.column("segment").null_count == ROWS
    assert b"shoal.model_version" not in table.schema.metadata


def test_csv_labels_of_warm_up_inputs_keep_their_pass_through_values(tmp_path):
    """output.format csv: the rewritten labels files read back as they were written (a key
    like "007" stays text)."""
    import pyarrow.csv as pacsv

    cfg = write_config(tmp_path, warmup_rows=WARMUP, output={"format": "csv"})
    paths = _drops(tmp_path / "drops", 3)
    first = pq.read_table(paths[0])
    keys = [f"{i:03d}" for i in range(ROWS)]
    pq.write_table(first.set_column(0, "key", pa.array(keys)), paths[0])
    assert main(["ingest", "-c", str(cfg), *map(str, paths)]) == 0
    [found] = (tmp_path / "outbox").glob("d00.*.labels.csv")
    table = pacsv.read_csv(found, convert_options=pacsv.ConvertOptions(
        column_types={"key": pa.string()}))
    assert table.column("key").to_pylist() == keys
    assert table.column("segment").null_count == 0
    assert set(table.column("model_version").to_pylist()) == {3}


def test_warm_up_inputs_of_one_group_are_labelled_at_its_commit(tmp_path):
    """A backlog is taken as one group committed together: the inputs of the group
    before the one that completes the warm-up are labelled too."""
    import os

    from drills import MTIME_BASE, InProcessService, wait_until

    svc = InProcessService(tmp_path, warmup_rows=WARMUP)
    for i, path in enumerate(_drops(tmp_path / "drops", 4)):
        os.utime(path, ns=((MTIME_BASE + i) * 10**9,) * 2)
        os.rename(path, svc.layout.inbox / path.name)
    with svc:
        wait_until(lambda: len(svc.results) >= 4, 30, "four inputs")
        versions = [r.model_version for r in svc.results]
    assert versions == [1, 2, 3, 4]
    for i in range(3):
        table = _labels(tmp_path / "outbox", tmp_path / "drops" / f"d{i:02d}.parquet")
        assert table.column("segment").null_count == 0
        assert set(table.column("model_version").to_pylist()) == {3}


def test_a_duplicate_taken_during_the_warm_up_is_labelled_too(tmp_path):
    cfg = write_config(tmp_path, warmup_rows=WARMUP)
    settings = load_config(cfg)
    paths = _drops(tmp_path / "drops", 4)
    copy = tmp_path / "drops" / "copy.parquet"
    copy.write_bytes(paths[0].read_bytes())
    assert main(["ingest", "-c", str(cfg), str(paths[0]), str(copy), *map(str, paths[1:])]) == 0
    original = _labels(tmp_path / "outbox", paths[0])
    duplicate = _labels(tmp_path / "outbox", copy)
    assert duplicate.column("segment").null_count == 0
    for name in ("segment", "model_version", "key"):
        assert duplicate.column(name).to_pylist() == original.column(name).to_pylist()
    store = StateStore(settings.state / "state.db")
    try:   # the duplicate's rows were not learned: not counted in the segments' rows
        assert sum(store.latest_checkpoint().extra["segment_rows"].values()) == 4 * ROWS
    finally:
        store.close()
