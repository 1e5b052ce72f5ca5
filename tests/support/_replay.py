"""A 30-day replay of the warehouse scenario (invented data), committed in-process:
30 drops, drop i holding day i of January 2026 in its ``timestamp`` column, with the
scenario's drift and new state, a re-baseline requested half way, and lifecycle
bounds loose enough that segments are born and merge. Used by the report tests."""
from pathlib import Path

import numpy as np
import pyarrow as pa

from _ops import demo_config
from shoal.config import load_config
from drills import write_drop
from shoal.daemon.files.layout import prepare_folders
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.demo.scenario import demo_changes, drops
from shoal.daemon.state.store import StateStore

DAYS = 30
ROWS = 400
FIRST_DAY = np.datetime64("2026-01-01T00:00", "ms")
REBASELINE_AFTER = 18          # the re-baseline request is made after this many drops


def replay(folder: Path, *, time_column: bool = True, rebaseline: bool = True):
    """Commit the 30 drops; returns (settings, layout, names)."""
    drift = {"settle_rows": 2000, "window_rows": 1000}
    if time_column:
        drift["time_column"] = "timestamp"
    cfg = demo_config(folder, drift=drift,
                      lifecycle={"check_rows": 400, "birth_rows": 30, "merge_distance": 0.9,
                                 "retire_weight": 0.09, "retire_rows": 1200,
                                 "settle_rows": 1000})
    settings = load_config(cfg)
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    pipeline = Pipeline(settings, layout, store)
    change, new_state = demo_changes(DAYS * ROWS)
    names = []
    try:
        for i, cols in enumerate(drops(DAYS, ROWS, seed=7, drift=change, new_state=new_state)):
            cols.pop("state")
            # day i: rows every 3 minutes from midnight (400 rows: 00:00 to 19:57)
            cols["timestamp"] = FIRST_DAY + np.timedelta64(i, "D") + \
                np.arange(ROWS) * np.timedelta64(3, "m")
            name = f"day-{i + 1:02d}." + ("parquet" if i % 2 else "csv")
            path = write_drop(pa.table(cols), layout.inbox, name, index=i)
            result = pipeline.process(path, in_inbox=True)
            assert result.outcome == "committed", result
            names.append(name)
            if rebaseline and i + 1 == REBASELINE_AFTER:
                store.request_rebaseline("after the compressor service")
    finally:
        store.close()
    return settings, layout, names
