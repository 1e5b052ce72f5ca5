"""One labels schema per stream: the pass-through columns' types are fixed by the
stream's first input (or passthrough_types) and every later input is converted to them;
Parquet files as pandas writes them, nested and all-null columns."""
import json

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config

SEED = 17


def _table(index, rows=300):
    """A synthetic drop with an integer id, an epoch-second time and a text tag."""
    t = synthetic_table(index, rows, SEED)
    ids = np.arange(rows, dtype=np.int64) + index * rows
    return pa.table({"id": ids, "ts": t.column("ts"), "tag": [f"t{i % 3}" for i in range(rows)],
                     "f1": t.column("f1"), "f2": t.column("f2"), "f3": t.column("f3")})


def _write(folder, name, table):
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    if name.endswith(".csv"):
        pacsv.write_csv(table, path)
    else:
        pq.write_table(table, path)
    return path


def _ingest(tmp_path, paths, **config):
    # every feature required: a row without a value is invalid (null segment)
    cfg = write_config(tmp_path, passthrough=["id", "ts", "tag"], warmup_rows=400,
                       learning={"min_observed": 3}, **config)
    return main(["ingest", "-c", str(cfg), *map(str, paths)])


def test_csv_and_parquet_drops_share_one_labels_schema(tmp_path, capsys):
    drops = tmp_path / "drops"
    csv_first = _write(drops, "a.csv", _table(0))
    # a CSV with an empty id: null in the labels, not ""
    text = _csv_text(_table(1)).replace("\n300,", "\n,", 1)
    (drops / "b.csv").write_text(text)
    parquet = _write(drops, "c.parquet", _table(2))
    assert _ingest(tmp_path, [csv_first, drops / "b.csv", parquet]) == 0
    outbox = tmp_path / "outbox"
    files = sorted(outbox.glob("*.labels.parquet"))
    schemas = {str(pq.read_schema(f).remove_metadata()) for f in files}
    assert len(files) == 3 and len(schemas) == 1, schemas
    table = ds.dataset(files, format="parquet").to_table()
    assert table.schema.field("id").type == pa.int64()
    assert table.schema.field("tag").type == pa.string()
    assert table.column("id").null_count == 1
    assert sorted(table.column("id").drop_null().to_pylist()) == \
        [i for i in range(900) if i != 300]
    for f in files:
        assert pq.read_schema(f).metadata[b"shoal.labels_schema_version"] == b"1"


def _csv_text(table):
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes().decode()


def test_a_value_that_does_not_fit_the_streams_type_is_quarantined_with_its_line(tmp_path):
    drops = tmp_path / "drops"
    first = _write(drops, "a.parquet", _table(0))
    text = _csv_text(_table(1)).splitlines()
    text[5] = "A-17" + text[5][text[5].index(","):]     # line 6 of the file
    (drops / "b.csv").write_text("\n".join(text) + "\n")
    assert _ingest(tmp_path, [first, drops / "b.csv"]) == 1
    side = json.loads((tmp_path / "state" / "quarantine" / "b.csv.json").read_text())
    assert side["reason"] == "bad_value"
    assert "line 6" in side["detail"] and "'id'" in side["detail"] and "A-17" in side["detail"]


def test_passthrough_types_from_the_config_win_over_the_first_input(tmp_path):
    drops = tmp_path / "drops"
    paths = [_write(drops, "a.parquet", _table(0)), _write(drops, "b.csv", _table(1))]
    assert _ingest(tmp_path, paths, passthrough_types={"id": "string"}) == 0
    table = ds.dataset(sorted((tmp_path / "outbox").glob("*.labels.parquet"))).to_table()
    assert table.schema.field("id").type == pa.string()
    assert "0" in table.column("id").to_pylist()


def test_pandas_parquet_with_the_id_as_index_is_read(tmp_path):
    drops = tmp_path / "drops"
    drops.mkdir()
    frame = _table(0).to_pandas()
    frame.set_index("id").to_parquet(drops / "range.parquet")        # a RangeIndex
    other = _table(1).to_pandas()
    other["id"] = other["id"] * 7 + 3
    other.set_index("id").to_parquet(drops / "ints.parquet")          # an index column
    assert _ingest(tmp_path, [drops / "range.parquet", drops / "ints.parquet"]) == 0
    table = ds.dataset(sorted((tmp_path / "outbox").glob("*.labels.parquet"))).to_table()
    assert sorted(table.column("id").to_pylist()) == sorted(
        list(range(300)) + [i * 7 + 3 for i in range(300, 600)])


def test_nested_passthrough_is_an_unsupported_type_and_a_null_feature_column_is_invalid_rows(
        tmp_path):
    drops = tmp_path / "drops"
    good = _write(drops, "a.parquet", _table(0))
    nested = _table(1).set_column(2, "tag", pa.array([{"x": i} for i in range(300)]))
    nulls = _table(2).set_column(5, "f3", pa.nulls(300))
    paths = [good, _write(drops, "b.parquet", nested), _write(drops, "c.parquet", nulls)]
    assert _ingest(tmp_path, paths) == 1
    side = json.loads((tmp_path / "state" / "quarantine" / "b.parquet.json").read_text())
    assert side["reason"] == "unsupported_type" and "struct<x: int64>" in side["detail"]
    [labels] = (tmp_path / "outbox").glob("c.*.labels.parquet")
    assert pq.read_table(labels).column("segment").null_count == 300
    assert not pd.isna(pq.read_table(labels).column("id").to_pylist()).any()
