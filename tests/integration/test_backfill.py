"""shoal backfill on a local Dask cluster.

The reference for the distributed rounds is the core's single-process ``Mixture.learn``
over the same stream with ``refresh_rows`` set to the round size: rounds that end at
multiples of R are exactly its refresh intervals (core/distributed.py says why).
"""
import hashlib
import os
import signal
import socket
import subprocess
import sys
import threading
from dataclasses import replace
from pathlib import Path

import cloudpickle
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from distributed import Client, LocalCluster, WorkerPlugin

from _v1_store import write_v1_store
from shoal.config import load_config
from shoal.core import Mixture, StepSchedule, initialise
from shoal.daemon.backfill.learn import backfill, plan_rounds
from drills import InProcessService, synthetic_table, write_config
from shoal.daemon.state.store import StateStore

SEED = 11            # seeds the synthetic drops
ROWS = 500           # rows per history file
ROUND_ROWS = 5000    # rounded up to 8,192: two refresh intervals of 4,096 rows per round
TIMEOUT = 60.0       # every wait on the cluster

# the kill plugin below is defined here; workers get it by value, not by import
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def local_cluster(n_workers=2):
    """Worker processes (two, as the issue asks), one thread each."""
    return LocalCluster(n_workers=n_workers, processes=True, threads_per_worker=1,
                        dashboard_address=None)


@pytest.fixture(scope="module")
def client():
    with local_cluster() as cluster:
        with Client(cluster, set_as_default=False, timeout=TIMEOUT) as c:
            c.wait_for_workers(2, timeout=TIMEOUT)
            yield c


@pytest.fixture(autouse=True)
def no_leaked_threads():
    """conftest's guard, except for Dask's process-wide offload pool, which lives on by
    design once a client has run."""
    before = set(threading.enumerate())
    yield
    new = [t for t in threading.enumerate() if t not in before and t.is_alive()
           and not t.name.startswith("Dask-Offload")]
    for t in new:
        t.join(timeout=5.0)
    leaked = [t for t in new if t.is_alive()]
    assert not leaked, f"test leaked threads: {leaked}"


def make_history(folder: Path, n_files: int) -> list[Path]:
    history = folder / "history"
    history.mkdir(parents=True)
    paths = []
    for i in range(n_files):
        path = history / f"h{i:03d}.parquet"
        pq.write_table(synthetic_table(i, ROWS, SEED), path)
        paths.append(path)
    return paths


def features(paths) -> np.ndarray:
    return np.concatenate([np.column_stack([pq.read_table(p).column(c).to_numpy()
                                            for c in ("f1", "f2", "f3")]) for p in paths])


def final_mixture(settings) -> tuple[int, Mixture]:
    store = StateStore(settings.state / "state.db")
    try:
        cp = store.latest_checkpoint()
        return store.model_version, Mixture.from_state(cp.arrays, cp.meta)
    finally:
        store.close()


def first_model(settings, X) -> Mixture:
    """The warm-up as the service does it, from the first ``warmup_rows`` rows."""
    s = settings
    return initialise(X[:s.warmup_rows], n_components=s.segments.min, covariance=s.covariance,
                      seed=s.seed, n_init=s.learning.n_init, reg_covar=s.learning.reg_covar,
                      schedule=StepSchedule(alpha=s.learning.step_exponent, i0=None,
                                            half_life_rows=s.half_life_rows))


def single_process(settings, X):
    """Warm-up as the service does it, then one process learns the rest with a refresh
    at the end of every round. Returns the model and every row's label (the warm-up rows
    by the first model, the others as scored while learning)."""
    s = settings
    m0 = first_model(settings, X)
    ref, scores = replace(m0, refresh_rows=8192).learn(X[s.warmup_rows:])
    head = m0.score(X[:s.warmup_rows])
    labels = {name: np.concatenate([getattr(head, name), getattr(scores, name)])
              for name in ("segment", "confidence", "log_density")}
    return replace(ref, refresh_rows=m0.refresh_rows), labels


STATE_ARRAYS = ("s0", "s1", "s2", "weights", "means", "covariances", "prec_chol")


def test_rounds_cover_every_row_once_and_end_on_multiples():
    files = [(0, 700), (1, 0), (2, 5000), (3, 1300), (4, 9000)]
    rounds = plan_rounds(files, skip=900, n0=100, size=4096)
    seen = {i: np.zeros(n, int) for i, n in files}
    at = 100
    for r in rounds:
        assert r.start == at and (r.stop % 4096 == 0) == r.refresh
        for p in r.pieces:
            assert p.at == at and r.start <= p.at < r.stop
            seen[p.file][p.lo:p.hi] += 1
            at += p.hi - p.lo
        assert at == r.stop
    assert rounds[-1].stop == 100 + sum(n for _, n in files) - 900
    for i, n in files:   # the first 900 rows (file 0 and 200 of file 2) went to the warm-up
        skipped = {0: 700, 2: 200}.get(i, 0)
        assert seen[i][:skipped].sum() == 0 and np.all(seen[i][skipped:] == 1)


def test_backfill_matches_single_process_and_labels_every_row(tmp_path, client):
    paths = make_history(tmp_path, 40)
    settings = load_config(write_config(tmp_path))
    report = backfill(settings, [tmp_path / "history"], client=client, round_rows=ROUND_ROWS)
    assert (report.learned, report.rounds, report.round_rows) == (40, 3, 8192)
    assert report.rows == 40 * ROWS - settings.warmup_rows

    version, got = final_mixture(settings)
    assert version == 40
    ref, ref_labels = single_process(settings, features(paths))
    assert got.n_rows == ref.n_rows == 40 * ROWS - settings.warmup_rows
    for name in STATE_ARRAYS:
        np.testing.assert_allclose(getattr(got, name), getattr(ref, name), rtol=1e-9,
                                   atol=1e-13, err_msg=name)
    np.testing.assert_allclose(got.sumsq, ref.sumsq, rtol=1e-9)
    assert got.refresh_rows == ref.refresh_rows == 4096   # the service's own setting stays

    # labels: each row as the single process labelled it while learning
    for i, p in enumerate(paths):
        labels = list((tmp_path / "outbox").glob(f"{p.stem}.*.labels.parquet"))
        assert len(labels) == 1, p
        table = pq.read_table(labels[0])
        source = pq.read_table(p)
        assert table.column("key").to_pylist() == source.column("key").to_pylist()
        assert table.column("segment").null_count == 0
        # a file of warm-up rows only is labelled by the first model, under its version
        first = settings.warmup_rows // ROWS + 1
        assert set(table.column("model_version").to_pylist()) == {max(i + 1, first)}
        rows = slice(i * ROWS, (i + 1) * ROWS)
        np.testing.assert_array_equal(table.column("segment").to_numpy(),
                                      ref_labels["segment"][rows])
        for name in ("confidence", "log_density"):
            np.testing.assert_allclose(table.column(name).to_numpy(), ref_labels[name][rows],
                                       rtol=1e-9, err_msg=name)
    assert not list((tmp_path / "outbox").glob(".*"))     # no scores or temp files left


class KillOnce(WorkerPlugin):
    """Kills its worker process (SIGKILL) when a task of round ``round_no`` starts, once:
    the marker file records that it happened."""

    def __init__(self, marker: str, round_no: int):
        self.marker, self.round_no = marker, round_no

    def transition(self, key, start, finish, **kwargs):
        parts = str(key).split("-")
        if finish != "executing" or parts[:2] != ["shoal", "piece"]:
            return
        if int(parts[3]) != self.round_no:
            return
        try:
            fd = os.open(self.marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            return
        os.write(fd, str(os.getpid()).encode())
        os.close(fd)
        os.kill(os.getpid(), signal.SIGKILL)


# 2 workers: the other worker holds the snapshot and Dask reruns the lost tasks;
# 1 worker: the snapshot is lost with it, and the round is broadcast again
@pytest.mark.parametrize("n_workers", [2, 1])
def test_a_worker_killed_mid_round_changes_nothing(tmp_path, client, n_workers):
    paths = make_history(tmp_path / "calm", 20)
    calm = load_config(write_config(tmp_path / "calm"))
    backfill(calm, [paths[0].parent], client=client, round_rows=ROUND_ROWS)

    killed = load_config(write_config(tmp_path / "killed"))
    marker = tmp_path / "killed.marker"
    # a cluster of its own: the killed worker's restart belongs to this test
    with local_cluster(n_workers) as cluster, Client(cluster, set_as_default=False,
                                                     timeout=TIMEOUT) as own:
        own.wait_for_workers(n_workers, timeout=TIMEOUT)
        workers_before = set(own.scheduler_info()["workers"])
        own.register_plugin(KillOnce(str(marker), round_no=1), name="kill-once")
        report = backfill(killed, [paths[0].parent], client=own, round_rows=ROUND_ROWS)
        own.wait_for_workers(n_workers, timeout=TIMEOUT)
        assert marker.exists(), "no worker was killed"
        assert int(marker.read_text()) not in own.run(os.getpid).values()
        assert set(own.scheduler_info()["workers"]) != workers_before
    assert report.learned == 20 and report.rounds == 2
    assert report.broadcasts_again == (1 if n_workers == 1 else 0)

    v1, a = final_mixture(calm)
    v2, b = final_mixture(killed)
    assert v1 == v2 == 20
    for name in STATE_ARRAYS:   # the same sums in the same order: identical to the bit
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert a.sumsq == b.sumsq and a.n_rows == b.n_rows
    for p in paths:
        [x] = (tmp_path / "calm" / "outbox").glob(f"{p.stem}.*.labels.parquet")
        [y] = (tmp_path / "killed" / "outbox").glob(f"{p.stem}.*.labels.parquet")
        assert pq.read_table(x).equals(pq.read_table(y))


def test_watch_after_backfill_takes_only_new_files(tmp_path, client):
    paths = make_history(tmp_path, 10)
    history = paths[0].parent
    (history / "z-copy-of-h000.parquet").write_bytes(paths[0].read_bytes())  # a duplicate
    (history / "h999.parquet").write_bytes(paths[1].read_bytes()[:-20])     # truncated
    settings = load_config(write_config(tmp_path))
    report = backfill(settings, [history], client=client, round_rows=ROUND_ROWS,
                      labels="final")
    assert (report.learned, report.duplicates, report.quarantined) == (10, 1, 1)
    version, model = final_mixture(settings)
    assert version == 10
    for p in paths[:2] + [history / "z-copy-of-h000.parquet"]:   # labelled by the final model
        [out] = (tmp_path / "outbox").glob(f"{p.stem}.*.labels.parquet")
        table = pq.read_table(out)
        np.testing.assert_array_equal(table.column("segment").to_numpy(),
                                      model.score(features([p])).segment)
        assert set(table.column("model_version").to_pylist()) == {10}
    assert (tmp_path / "state" / "quarantine" / "h999.parquet.json").exists()

    again = backfill(settings, [history], client=client, round_rows=ROUND_ROWS)
    assert (again.learned, again.skipped, again.duplicates) == (0, 11, 0)
    assert final_mixture(settings)[0] == 10

    new = synthetic_table(100, ROWS, SEED)
    with InProcessService(tmp_path, timeout=TIMEOUT) as svc:
        old = svc.layout.inbox / "h003.parquet"
        old.write_bytes(paths[3].read_bytes())                  # a backfilled file again
        svc.n += 1
        assert svc.wait_results(svc.n).outcome == "already_done"
        result = svc.drop(new, "new-000.parquet")
        assert result.outcome == "committed" and result.model_version == 11
    v, after = final_mixture(settings)
    assert v == 11
    X_new = np.column_stack([new.column(c).to_numpy() for c in ("f1", "f2", "f3")])
    expected, _ = model.learn(X_new)       # the service continued from the backfilled model
    assert after.n_rows == model.n_rows + ROWS
    for name in STATE_ARRAYS:
        np.testing.assert_allclose(getattr(after, name), getattr(expected, name),
                                   rtol=1e-10, err_msg=name)
    store = StateStore(settings.state / "state.db")
    try:
        names = [e.name for e in store.ledger("committed")]
    finally:
        store.close()
    assert names == [p.name for p in paths] + ["new-000.parquet"]


def test_backfill_into_a_migrated_v1_store_keeps_its_sha256(tmp_path, client):
    """A store made before BLAKE3 keeps SHA-256 after its migration: the file its version-1
    ledger holds is skipped, a copy of it is a duplicate, and the new files' ledger rows
    and labels carry their SHA-256 (hashlib on the bytes, the reference)."""
    paths = make_history(tmp_path, 3)
    history = paths[0].parent
    (history / "z-copy-of-h000.parquet").write_bytes(paths[0].read_bytes())
    settings = load_config(write_config(tmp_path))
    [recorded] = write_v1_store(settings.state / "state.db", paths[:1])  # its rows buffered
    report = backfill(settings, [history], client=client, round_rows=ROUND_ROWS,
                      labels="final")
    assert (report.learned, report.duplicates, report.skipped) == (2, 1, 1)
    store = StateStore(settings.state / "state.db")
    try:
        assert store.digest_algorithm == "sha256"
        ledger = [(e.name, e.outcome, e.digest) for e in store.ledger()]
    finally:
        store.close()
    sha = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in history.iterdir()}
    assert recorded == sha["h000.parquet"]
    assert ledger == [("h000.parquet", "committed", recorded),
                      ("h001.parquet", "committed", sha["h001.parquet"]),
                      ("h002.parquet", "committed", sha["h002.parquet"]),
                      ("z-copy-of-h000.parquet", "duplicate", sha["h000.parquet"])]
    [labels] = (tmp_path / "outbox").glob(f"h001.{sha['h001.parquet'][:16]}.labels.parquet")
    meta = pq.read_schema(labels).metadata
    assert meta[b"shoal.input_digest"].decode() == sha["h001.parquet"]
    assert meta[b"shoal.digest_algorithm"] == b"sha256"


def test_unreachable_scheduler_is_a_clear_error(tmp_path):
    make_history(tmp_path, 1)
    cfg = write_config(tmp_path)
    with socket.socket() as s:            # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "backfill", "-c", str(cfg),
                        str(tmp_path / "history"), "--scheduler", f"tcp://127.0.0.1:{port}",
                        "--connect-timeout", "1"],
                       capture_output=True, text=True, timeout=TIMEOUT)
    assert r.returncode == 4, r.stderr
    assert f"the Dask scheduler at tcp://127.0.0.1:{port} cannot be reached" in r.stderr
    assert "Traceback" not in r.stderr


def test_rest_of_shoal_does_not_import_dask_and_a_missing_dask_says_what_to_install(tmp_path):
    make_history(tmp_path, 1)
    cfg = write_config(tmp_path)
    script = (
        "import sys\n"
        "import shoal.daemon.cli.main as cli\n"
        "assert not {'dask', 'distributed'} & set(sys.modules), 'shoal imported dask'\n"
        "sys.modules['distributed'] = None   # as if shoal[cluster] were not installed\n"
        f"sys.exit(cli.main(['backfill', '-c', {str(cfg)!r}, {str(tmp_path / 'history')!r}]))\n")
    r = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                       timeout=TIMEOUT)
    assert r.returncode == 4, r.stderr
    assert "pip install 'shoal[cluster]'" in r.stderr and "Traceback" not in r.stderr


def test_history_backfilled_in_two_runs_gives_the_same_model(tmp_path, client):
    # rounds end at global multiples of the round size, so a second backfill continues
    # the first one's unfinished round with the same snapshot
    paths = make_history(tmp_path / "once", 20)
    once = load_config(write_config(tmp_path / "once"))
    backfill(once, paths, client=client, round_rows=ROUND_ROWS)
    twice = load_config(write_config(tmp_path / "twice"))
    first = backfill(twice, paths[:9], client=client, round_rows=ROUND_ROWS)
    second = backfill(twice, paths, client=client, round_rows=ROUND_ROWS)
    assert (first.learned, second.learned, second.skipped) == (9, 11, 9)
    assert second.warmup_rows == 0
    (v1, a), (v2, b) = final_mixture(once), final_mixture(twice)
    assert v1 == v2 == 20 and a.n_rows == b.n_rows
    for name in STATE_ARRAYS:
        np.testing.assert_allclose(getattr(b, name), getattr(a, name), rtol=1e-9, atol=1e-13,
                                   err_msg=name)


def test_extra_passes_learn_the_history_again_and_label_from_the_last(tmp_path, client):
    paths = make_history(tmp_path, 12)
    settings = load_config(write_config(tmp_path))
    report = backfill(settings, [tmp_path / "history"], client=client, round_rows=ROUND_ROWS,
                      passes=2)
    X = features(paths)
    w = settings.warmup_rows
    assert report.rows == 2 * len(X) - w
    _, got = final_mixture(settings)
    # one process: warm-up on X[:w], then X[w:] and the whole of X again
    m0 = first_model(settings, X)
    ref_model, ref_scores = replace(m0, refresh_rows=8192).learn(np.concatenate([X[w:], X]))
    assert got.n_rows == ref_model.n_rows == 2 * len(X) - w
    for name in STATE_ARRAYS:
        np.testing.assert_allclose(getattr(got, name), getattr(ref_model, name), rtol=1e-9,
                                   atol=1e-13, err_msg=name)
    last = ref_scores.segment[len(X) - w:]          # the second pass's labels
    for i, p in enumerate(paths):
        [out] = (tmp_path / "outbox").glob(f"{p.stem}.*.labels.parquet")
        np.testing.assert_array_equal(pq.read_table(out).column("segment").to_numpy(),
                                      last[i * ROWS:(i + 1) * ROWS])


def test_backfill_labels_carry_segment_names_when_configured(tmp_path, client):
    from shoal.daemon.segments.segment_names import set_segment_name

    paths = make_history(tmp_path, 12)
    settings = load_config(write_config(tmp_path, output={"segment_names": True}))
    backfill(settings, paths[:6], client=client, round_rows=ROUND_ROWS)
    set_segment_name(settings.state / "state.db", 1, "group B", by="test")
    backfill(settings, paths, client=client, round_rows=ROUND_ROWS)
    for p in paths[6:]:
        labels = pq.read_table(next((tmp_path / "outbox").glob(f"{p.stem}.*.labels.parquet")))
        segs = labels.column("segment").to_pylist()
        names = labels.column("segment_name").to_pylist()
        assert 1 in segs
        assert names == ["group B" if s == 1 else None for s in segs]


def test_backfill_and_ingest_label_the_warm_up_rows_alike(tmp_path, client):
    """The same history through ``shoal ingest`` (one input after another, the warm-up
    inputs labelled once the first model exists) and ``shoal backfill``: the warm-up rows
    get the same segment and model version, and the other columns agree to rtol 1e-9."""
    from shoal.daemon.cli.main import main

    paths = make_history(tmp_path, 4)
    settings = {}
    for how in ("ingest", "backfill"):
        settings[how] = load_config(write_config(tmp_path / how, warmup_rows=1200))
    backfill(settings["backfill"], paths, client=client, round_rows=ROUND_ROWS)
    assert main(["ingest", "-c", str(tmp_path / "ingest" / "shoal.yaml"),
                 *map(str, paths)]) == 0
    warm = 0
    for p in paths[:3]:        # 500 + 500 + the first 200 rows of the third file
        tables = {how: pq.read_table(next((tmp_path / how / "outbox").glob(
            f"{p.stem}.*.labels.parquet"))) for how in settings}
        rows = min(ROWS, 1200 - warm)
        warm += rows
        got, ref = (tables[how].slice(0, rows) for how in ("ingest", "backfill"))
        assert got.column("segment").null_count == 0
        for name in ("segment", "model_version", "unusual", "key"):
            assert got.column(name).to_pylist() == ref.column(name).to_pylist(), name
        assert set(got.column("model_version").to_pylist()) == {3}
        for name in ("confidence", "log_density"):
            np.testing.assert_allclose(got.column(name).to_numpy(), ref.column(name).to_numpy(),
                                       rtol=1e-9, err_msg=name)


def test_backfill_and_ingest_of_csv_history_write_one_labels_schema(tmp_path, client):
    """CSV pass-through columns come out in the stream's types whichever path took them:
    a backfill after an ingest keeps the types the ingest fixed (ts: int64)."""
    import pyarrow.csv as pacsv
    import pyarrow.dataset as ds

    from shoal.daemon.cli.main import main

    history = tmp_path / "history"
    history.mkdir()
    paths = []
    for i in range(4):
        paths.append(history / f"h{i}.csv")
        pacsv.write_csv(synthetic_table(i, ROWS, SEED), paths[-1])
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    assert main(["ingest", "-c", str(tmp_path / "shoal.yaml"), *map(str, paths[:2])]) == 0
    backfill(settings, paths[2:], client=client, round_rows=ROUND_ROWS)
    files = sorted((tmp_path / "outbox").glob("*.labels.parquet"))
    assert len(files) == 4
    assert len({str(pq.read_schema(f).remove_metadata()) for f in files}) == 1
    table = ds.dataset(files).to_table()
    assert table.schema.field("ts").type == pa.int64()
    assert sorted(table.column("ts").to_pylist()) == list(range(4 * ROWS))
