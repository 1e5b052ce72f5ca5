"""A stream as users have it, through a running `shoal watch`: 20 drops of CSV (`;`,
decimal commas, epoch-second times, a few bad lines skipped) and Parquet (some written by
pandas with the id as the index). Every valid row ends labelled, the outbox reads as one
pyarrow dataset of one schema, and each alert's time range is that of the rows of its
windows, in ISO 8601 UTC."""
import datetime as dt
import json
import os
import re

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from drills import (
    MTIME_BASE,
    ServiceProcess,
    ledger_counts,
    synthetic_table,
    wait_until,
    write_config,
)
from shoal.daemon.state.store import StateStore

SEED = 31
DROPS = 20
ROWS = 400
T0 = 1_746_080_776          # epoch seconds of the first row (2025-05-01T06:26:16Z)
ISO = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z$")


def _drop_table(i: int) -> pa.Table:
    """Drop ``i``: ids and epoch-second times running on from the drops before it (times
    shuffled within the drop), three features; from drop 10 on, f1 moves by 3 (drift).
    """
    t = synthetic_table(i, ROWS, SEED)
    rng = np.random.default_rng([SEED, i])
    ts = T0 + 60 * (i * ROWS + rng.permutation(ROWS))
    f1 = t.column("f1").to_numpy() + (3.0 if i >= 10 else 0.0)
    table = pa.table({"id": np.arange(i * ROWS, (i + 1) * ROWS, dtype=np.int64),
                      "ts": ts.astype(np.int64), "f1": f1, "f2": t.column("f2"),
                      "f3": t.column("f3")})
    return table


def _csv(table: pa.Table, i: int) -> tuple[bytes, set[int], set[int]]:
    """``;``-separated, decimal commas; drops with i % 4 == 3 get a line with ERR and a
    line with a field too many (skipped), and one row with an empty value (kept,
    invalid). Returns the bytes, the ids of skipped rows and of rows without a value."""
    cols = [table.column(c).to_pylist() for c in table.column_names]
    lines = [";".join(table.column_names)]
    skipped, empty = set(), set()
    for j, row in enumerate(zip(*cols)):
        cells = [str(v) if isinstance(v, int) else f"{v:.9f}".replace(".", ",") for v in row]
        if i % 4 == 3 and j == 17:
            cells[3] = "ERR"
            skipped.add(row[0])
        elif i % 4 == 3 and j == 101:
            cells.append("1,5")
            skipped.add(row[0])
        elif i % 4 == 3 and j == 202:
            cells[4] = ""
            empty.add(row[0])
        lines.append(";".join(cells))
    return ("\n".join(lines) + "\n").encode(), skipped, empty


def _pandas_parquet(table: pa.Table, path, range_index: bool) -> None:
    frame = table.to_pandas()
    if not range_index:         # ids not consecutive: a stored index column
        frame = frame.iloc[::-1]
    frame.set_index("id").to_parquet(path)


def _write_drops(folder):
    """Write the drops beside the inbox (renamed in later, in order). Returns per drop
    (name, its rows' ids in the order of its labels file, ids skipped, ids without a
    value)."""
    staging = folder / "staging"
    staging.mkdir()
    out = []
    for i in range(DROPS):
        table = _drop_table(i)
        ids = table.column("id").to_pylist()
        skipped, empty = set(), set()
        kind = i % 4
        if kind in (1, 3):
            name = f"drop-{i:02d}.csv"
            data, skipped, empty = _csv(table, i)
            (staging / name).write_bytes(data)
        elif kind == 2:
            name = f"drop-{i:02d}.parquet"
            _pandas_parquet(table, staging / name, range_index=(i % 8 == 2))
            if i % 8 != 2:
                ids = ids[::-1]
        else:
            name = f"drop-{i:02d}.parquet"
            pq.write_table(table, staging / name)
        os.utime(staging / name, ns=((MTIME_BASE + i) * 10**9,) * 2)
        out.append((name, [k for k in ids if k not in skipped], skipped, empty))
    return out


def test_a_mixed_stream_ends_labelled_with_one_schema_and_alert_times_of_their_rows(
        tmp_path):
    cfg = write_config(
        tmp_path, passthrough=["id", "ts"], warmup_rows=1000, learning={"min_observed": 3},
        input={"delimiter": ";", "decimal": ",", "bad_rows": "skip"},
        drift={"time_column": "ts", "time_unit": "s", "settle_rows": 400,
               "window_rows": 200, "noise_multiple": 0.0, "persist": 1,
               "bounds": {"mean_shift": 0.5}})
    drops = _write_drops(tmp_path)
    service = ServiceProcess(cfg, tmp_path / "watch.log").start()
    db = tmp_path / "state" / "state.db"
    try:
        service.wait_event("service_started", 60)
        for name, *_ in drops:
            os.rename(tmp_path / "staging" / name, tmp_path / "inbox" / name)
        wait_until(lambda: sum(ledger_counts(db).values()) >= DROPS, 120,
                   "every drop in the ledger", interval=0.1)
    finally:
        code, _ = service.stop(timeout=30)
    assert code == 0
    store = StateStore(db)
    try:
        ledger = [(e.name, e.outcome, e.labels) for e in store.ledger()]
        alerts = [a["payload"] for a in store.alerts()]
    finally:
        store.close()
    assert [(n, o) for n, o, _ in ledger] == [(d[0], "committed") for d in drops]

    # every valid row labelled; the rows without a value are the only null segments
    outbox = tmp_path / "outbox"
    learned_ts = []
    for (name, ids, skipped, empty), (_, _, labels) in zip(drops, ledger):
        table = pq.read_table(outbox / labels)
        assert table.column("id").to_pylist() == ids, name
        segment = table.column("segment").to_pylist()
        nulls = {k for k, s in zip(ids, segment) if s is None}
        assert nulls == empty, name
        if skipped:
            side = json.loads((outbox / f"_{labels}.bad_rows.json").read_text())
            assert side["rows_skipped"] == len(skipped) == 2
        learned_ts += [t for t, s in zip(table.column("ts").to_pylist(), segment)
                       if s is not None]

    # one labels schema: the outbox read as one dataset, every file the same schema
    dataset = ds.dataset(outbox, format="parquet")
    schemas = {f: pq.read_schema(f).remove_metadata() for f in dataset.files}
    assert len(schemas) == DROPS and len(set(map(str, schemas.values()))) == 1
    table = dataset.to_table()
    assert table.schema.field("id").type == pa.int64() == table.schema.field("ts").type
    assert table.num_rows == sum(len(d[1]) for d in drops)

    # alerts: times in ISO 8601 UTC, the range of the rows of their windows
    raised = [a for a in alerts if a["status"] == "raised" and a["kind"] == "drift"]
    assert raised, "the shift from drop 10 on raises drift alerts"

    def iso(seconds):
        return dt.datetime.fromtimestamp(seconds, dt.timezone.utc).strftime(
            "%Y-%m-%dT%H:%M:%S.000Z")

    for a in alerts:
        if a.get("time") is None:
            continue
        first, last = a["time"]["first"], a["time"]["last"]
        assert ISO.match(first) and ISO.match(last) and first <= last, a["id"]
    for a in raised:
        rows = learned_ts[a["rows"]["first"]:a["rows"]["last"] + 1]
        assert (a["time"]["first"], a["time"]["last"]) == (iso(min(rows)), iso(max(rows))), \
            a["id"]
