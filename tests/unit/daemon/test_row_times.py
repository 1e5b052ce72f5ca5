"""drift.time_column read as UTC instants whatever the input holds, printed in ISO 8601
UTC; a value that cannot be read is a null time and a count, never an error.

The expected instants are computed with Python's own ``datetime`` (an implementation
independent of Arrow's and numpy's parsers)."""
import datetime as dt
import json
import warnings

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config
from shoal.daemon.files.times import iso_utc, row_times

UTC = dt.timezone.utc
# 2025-05-01T06:26:16.250Z and a second instant a day and a bit later
WHEN = [dt.datetime(2025, 5, 1, 6, 26, 16, 250000, tzinfo=UTC),
        dt.datetime(2025, 5, 2, 7, 0, 0, tzinfo=UTC)]
ISO = ["2025-05-01T06:26:16.250Z", "2025-05-02T07:00:00.000Z"]


def _iso(values):
    return [None if np.isnat(v) else iso_utc(v) for v in values]


@pytest.mark.parametrize("unit", ["s", "ms", "us", "ns"])
@pytest.mark.parametrize("tz", [None, "UTC", "Europe/Paris", "America/New_York", "+05:30"])
def test_arrow_timestamps_of_every_unit_and_zone_are_the_same_instants(unit, tz):
    per_second = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}[unit]
    micros = [(w - dt.datetime(1970, 1, 1, tzinfo=UTC)) // dt.timedelta(microseconds=1)
              for w in WHEN]
    epoch = [m * per_second // 10**6 for m in micros]
    column = pa.array(epoch + [None], pa.timestamp(unit, tz=tz))
    got = row_times(column)
    want = ISO if unit != "s" else ["2025-05-01T06:26:16.000Z", ISO[1]]
    assert _iso(got.values) == want + [None]
    assert got.unreadable == 0


@pytest.mark.parametrize("unit", ["s", "ms", "us", "ns"])
def test_epoch_integers_are_read_in_the_configured_unit_or_an_inferred_one(unit):
    per_second = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}[unit]
    seconds = [int(w.timestamp()) for w in WHEN]
    ints = pa.array([s * per_second for s in seconds], pa.int64())
    want = [iso_utc(np.datetime64(dt.datetime.fromtimestamp(s, UTC).replace(tzinfo=None)))
            for s in seconds]
    assert _iso(row_times(ints, unit).values) == want
    inferred = row_times(ints)
    assert (_iso(inferred.values), inferred.inferred_unit) == (want, unit)
    # as CSV passes them: text of digits
    text = pa.array([str(s * per_second) for s in seconds])
    assert _iso(row_times(text, unit).values) == want
    # decimals (Parquet written from a float column)
    assert _iso(row_times(pa.array([float(s) for s in seconds]), "s").values) == want


def test_iso_text_with_and_without_zones_and_a_strptime_format():
    text = pa.array(["2025-05-01T08:26:16.25+02:00", "2025-05-02 07:00:00", None, "",
                     "tomorrow"])
    got = row_times(text)
    assert _iso(got.values) == ISO + [None, None, None]
    assert got.unreadable == 1      # "tomorrow"; a null and an empty value are no time
    us = pa.array(["05/01/2025 06:26:16", "05/02/2025 07:00:00", "13/45/2025 00:00:00"])
    got = row_times(us, fmt="%m/%d/%Y %H:%M:%S")
    assert _iso(got.values) == ["2025-05-01T06:26:16.000Z", ISO[1], None]
    assert got.unreadable == 1


def test_times_beyond_any_calendar_are_unreadable_not_an_error():
    got = row_times(pa.array([2**62, -(2**62), 1_746_080_776], pa.int64()), "s")
    assert _iso(got.values) == [None, None, "2025-05-01T06:26:16.000Z"]
    assert got.unreadable == 2
    assert row_times(pa.array([True, False])).unreadable == 2


def _drift_state(tmp_path, table, name, **drift):
    """Ingest ``table`` (written as ``name``) after a warm-up, with drift windows of 200
    rows; the checkpoint's drift state (its windows' time ranges)."""
    cfg = write_config(tmp_path, warmup_rows=600,
                       drift={"time_column": "ts", "window_rows": 200, **drift})
    drops = tmp_path / "drops"
    drops.mkdir()
    head = drops / "head.parquet"
    pq.write_table(synthetic_table(0, 600, 3).drop_columns(["ts"]).append_column(
        "ts", pa.nulls(600, table.schema.field("ts").type)), head)   # warm-up, no times
    path = drops / name
    (pacsv.write_csv if name.endswith(".csv") else pq.write_table)(table, path)
    assert main(["ingest", "-c", str(cfg), str(head), str(path)]) == 0
    from shoal.daemon.state.store import StateStore

    store = StateStore(tmp_path / "state" / "state.db")
    try:
        extra = store.latest_checkpoint().extra
    finally:
        store.close()
    return extra["drift"]


def test_epoch_seconds_in_a_csv_give_iso_utc_ranges_in_order(tmp_path, capsys):
    t0 = int(WHEN[0].timestamp())
    table = synthetic_table(1, 400, 3).set_column(1, "ts", pa.array(
        np.arange(400, dtype=np.int64) * 60 + t0))
    drift = _drift_state(tmp_path, table, "epoch.csv")
    found = json.dumps(drift)
    assert "2025-05-01T06:26:16.000Z" in found
    assert "2025-05-01T13:05:16.000Z" in found   # t0 + 399 minutes
    err = capsys.readouterr().err
    events = [json.loads(line) for line in err.splitlines() if line.startswith("{")]
    assert [e["unit"] for e in events if e["event"] == "time_unit_inferred"] == ["s"]


def test_zoned_timestamps_need_no_warning_and_warnings_are_named_events(tmp_path, capsys):
    t0 = int(WHEN[0].timestamp())
    table = synthetic_table(1, 400, 3).set_column(1, "ts", pa.array(
        (np.arange(400, dtype=np.int64) * 60 + t0) * 10**3, pa.timestamp("ms", "Asia/Tokyo")))
    with warnings.catch_warnings():
        warnings.simplefilter("error")   # any Python warning on the way fails the test
        drift = _drift_state(tmp_path, table, "zoned.parquet")
    assert "2025-05-01T06:26:16.000Z" in json.dumps(drift)
    from shoal.daemon.runtime.logs import setup_logging

    setup_logging("info")
    warnings.warn("a warning from a library", UserWarning)
    event = json.loads(capsys.readouterr().err.strip().splitlines()[-1])
    assert (event["event"], event["category"], event["message"]) == \
        ("python_warning", "UserWarning", "a warning from a library")
