"""Content digests of inputs: a new state store records BLAKE3 and its ledger holds
BLAKE3 of each input's bytes; a version-1 store is migrated in one transaction and keeps
SHA-256, so an input it committed before the upgrade is still found done after it; a store
that records an algorithm shoal does not compute is refused with a clear error.

The references are the digest packages themselves, on the file's bytes: ``blake3`` (the
official binding) and the standard library's ``hashlib.sha256``."""
import hashlib
import json
import sqlite3

import blake3
import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from _v1_store import write_v1_store
from shoal.config import load_config
from shoal.daemon.ingest import pipeline as pipeline_module
from shoal.daemon.state import store as store_module
from shoal.daemon.cli.main import main, open_service_parts
from shoal.daemon.files.digest import content_hasher, digest_file
from drills import synthetic_table, write_config
from shoal.daemon.errors import StateError
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.files.readers import file_digest
from shoal.daemon.state.store import SCHEMA_VERSION, StateStore

SEED = 5


@pytest.fixture(params=[True, False], ids=["threads", "inline"])
def threaded(request, monkeypatch):
    """Inputs hashed in a thread beside the model (as large inputs are) or inline."""
    monkeypatch.setattr(pipeline_module, "THREADED_BYTES", 0 if request.param else 1 << 40)
    return request.param


def _columns(db) -> list[str]:
    con = sqlite3.connect(db)
    try:
        return [row[1] for row in con.execute("PRAGMA table_info(ledger)")]
    finally:
        con.close()


def _meta(db) -> dict:
    con = sqlite3.connect(db)
    try:
        return dict(con.execute("SELECT key, value FROM meta"))
    finally:
        con.close()


def _indexes(db) -> set[str]:
    con = sqlite3.connect(db)
    try:
        return {name for (name,) in con.execute(
            "SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'ledger' "
            "AND name NOT LIKE 'sqlite_%'")}
    finally:
        con.close()


def test_a_new_store_records_blake3_and_its_ledger_holds_blake3_of_each_input(
        tmp_path, threaded):
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    parquet, csv, bad = (tmp_path / n for n in ("a.parquet", "b.csv", "c.csv"))
    pq.write_table(synthetic_table(0, 800, SEED), parquet)
    pacsv.write_csv(synthetic_table(1, 300, SEED), csv)
    bad.write_text("key,ts,f1\nk,1,2.0\n")   # no f2, f3: quarantined
    with open_service_parts(settings) as (layout, store, pipeline):
        assert store.digest_algorithm == "blake3"
        results = [pipeline.process(p, in_inbox=False) for p in (parquet, csv, bad)]
        assert [r.outcome for r in results] == ["committed", "committed", "quarantined"]
        ledger = store.ledger()
        labelled = pipeline.label_only(parquet, tmp_path / "only.parquet")
    # the reference: the blake3 package on the files' bytes
    want = [blake3.blake3(p.read_bytes()).hexdigest() for p in (parquet, csv, bad)]
    assert [e.digest for e in ledger] == want
    assert hashlib.sha256(parquet.read_bytes()).hexdigest() != want[0]
    assert _meta(layout.db)["digest_algorithm"] == "blake3"
    assert _meta(layout.db)["schema_version"] == str(store_module.SCHEMA_VERSION)
    assert "digest" in _columns(layout.db) and "sha256" not in _columns(layout.db)
    for result, digest in zip(results[:2], want):
        assert result.labels.name.split(".")[1] == digest[:16]
    for path in (results[0].labels, labelled.labels):
        meta = pq.read_schema(path).metadata
        assert meta[b"shoal.input_digest"].decode() == want[0]
        assert meta[b"shoal.digest_algorithm"] == b"blake3"
        assert b"shoal.input_sha256" not in meta
    sidecar = json.loads((layout.quarantine / "c.csv.json").read_text())
    assert (sidecar["digest"], sidecar["digest_algorithm"]) == (want[2], "blake3")


@pytest.mark.parametrize("algorithm", ["blake3", "sha256"])
def test_every_way_of_hashing_a_file_gives_the_reference_digest(tmp_path, algorithm):
    """Several read blocks and a part block; the file's offset is left where it was."""
    data = np.random.default_rng(SEED).bytes(2 * (1 << 20) + 12345)
    path = tmp_path / "data.bin"
    path.write_bytes(data)
    # references: the blake3 package and hashlib, on the bytes at once
    want = (blake3.blake3(data) if algorithm == "blake3" else hashlib.sha256(data)).hexdigest()
    with open(path, "rb") as f:
        f.seek(100)
        assert digest_file(f, algorithm) == want
        for threaded in (True, False):
            with file_digest(f, algorithm, threaded) as hashing:
                assert hashing.result() == want
        assert f.tell() == 100
    hasher = content_hasher(algorithm)
    hasher.update(data[:7])
    hasher.update(data[7:])
    assert hasher.hexdigest() == want


def test_a_v1_store_is_migrated_and_still_knows_its_inputs_by_sha256(tmp_path, threaded):
    settings = load_config(write_config(tmp_path, warmup_rows=600))
    layout = prepare_folders(settings)
    first, copy, new = (tmp_path / n for n in ("h000.parquet", "copy.parquet", "new.parquet"))
    pq.write_table(synthetic_table(0, 400, SEED), first)   # fewer rows than the warm-up
    copy.write_bytes(first.read_bytes())
    pq.write_table(synthetic_table(1, 400, SEED), new)
    [recorded] = write_v1_store(layout.db, [first])
    assert "sha256" in _columns(layout.db) and "digest_algorithm" not in _meta(layout.db)
    with open_service_parts(settings) as (layout, store, pipeline):
        assert store.digest_algorithm == "sha256"
        assert store.model_version == 1 and store.warmup_rows().shape == (400, 3)
        assert [(e.name, e.digest) for e in store.ledger()] == [("h000.parquet", recorded)]
        again = pipeline.process(first, in_inbox=False)
        duplicate = pipeline.process(copy, in_inbox=False)
        learned = pipeline.process(new, in_inbox=False)
        ledger = store.ledger()
        model = pipeline.state.mixture
    assert (again.outcome, duplicate.outcome, learned.outcome) == \
        ("already_done", "duplicate", "committed")
    assert learned.model_version == 2 and model is not None   # the buffer's 400 rows + 400
    # reference: hashlib's SHA-256 of the files' bytes, as a version-1 shoal made them
    sha = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in (first, copy, new)}
    assert [(e.name, e.outcome, e.digest) for e in ledger] == [
        ("h000.parquet", "committed", recorded), ("copy.parquet", "duplicate", sha["copy.parquet"]),
        ("new.parquet", "committed", sha["new.parquet"])]
    assert recorded == sha["h000.parquet"]
    meta = pq.read_schema(learned.labels).metadata
    assert meta[b"shoal.input_digest"].decode() == sha["new.parquet"]
    assert meta[b"shoal.digest_algorithm"] == b"sha256"
    assert learned.labels.name.split(".")[1] == sha["new.parquet"][:16]
    assert _meta(layout.db)["schema_version"] == str(store_module.SCHEMA_VERSION)
    assert _meta(layout.db)["digest_algorithm"] == "sha256"
    assert _columns(layout.db)[1] == "digest" and "sha256" not in _columns(layout.db)
    assert _indexes(layout.db) == {"ledger_digest"}
    store = StateStore(layout.db)        # opened again: nothing more to migrate
    try:
        assert store.digest_algorithm == "sha256" and store.model_version == 2
    finally:
        store.close()


def test_a_migration_that_fails_leaves_the_v1_store_as_it_was(tmp_path, monkeypatch):
    first = tmp_path / "h000.parquet"
    pq.write_table(synthetic_table(0, 200, SEED), first)
    db = tmp_path / "state.db"
    [recorded] = write_v1_store(db, [first])
    real = store_module.MIGRATIONS[1]

    def fails_at_the_end(con):
        real(con)
        raise sqlite3.OperationalError("disk I/O error (injected)")

    monkeypatch.setitem(store_module.MIGRATIONS, 1, fails_at_the_end)
    with pytest.raises(StateError, match="cannot be used: disk I/O error"):
        StateStore(db)
    assert _meta(db) == {"schema_version": "1", "model_version": "1"}
    assert _columns(db)[1] == "sha256" and _indexes(db) == {"ledger_sha256"}
    monkeypatch.setitem(store_module.MIGRATIONS, 1, real)
    store = StateStore(db)
    try:
        assert store.digest_algorithm == "sha256"
        assert [e.name for e in store.find_done(recorded)] == ["h000.parquet"]
    finally:
        store.close()


def test_a_store_recording_an_unknown_algorithm_is_refused_clearly(tmp_path, capsys):
    settings = load_config(write_config(tmp_path))
    layout = prepare_folders(settings)
    StateStore(layout.db).close()
    con = sqlite3.connect(layout.db)
    with con:
        con.execute("UPDATE meta SET value = 'md5' WHERE key = 'digest_algorithm'")
    con.close()
    with pytest.raises(StateError, match=r"content digests as 'md5', which this shoal does "
                                         r"not compute \(it computes blake3, sha256\)"):
        StateStore(layout.db)
    drop = tmp_path / "a.parquet"
    pq.write_table(synthetic_table(0, 100, SEED), drop)
    assert main(["ingest", "-c", str(tmp_path / "shoal.yaml"), str(drop)]) == 3
    assert "'md5'" in capsys.readouterr().err
    con = sqlite3.connect(layout.db)
    try:                                 # nothing was taken
        assert con.execute("SELECT COUNT(*) FROM ledger").fetchone()[0] == 0
    finally:
        con.close()
    with pytest.raises(StateError, match="'md5'"):
        content_hasher("md5")


def test_a_store_of_a_later_schema_version_is_refused(tmp_path):
    db = tmp_path / "state.db"
    StateStore(db).close()
    con = sqlite3.connect(db)
    with con:
        con.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'",
                    (str(store_module.SCHEMA_VERSION + 1),))
    con.close()
    with pytest.raises(StateError, match=f"schema version {store_module.SCHEMA_VERSION + 1}; "
                                         "this shoal reads versions up to "
                                         f"{store_module.SCHEMA_VERSION}"):
        StateStore(db)
