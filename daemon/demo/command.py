"""``shoal demo``: the cold-storage warehouse scenario end to end.

Writes a config into the demo folder, starts the service on a worker thread,
drops files of the scenario (CSV and Parquet, invented data) into the inbox
over time, waits until every drop is committed, stops the service, and prints
the segments beside the scenario's true operating states and where the
labels are. The service's JSON log goes to ``DIR/shoal.log``.
"""
from __future__ import annotations

import shutil
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import yaml

from shoal.config import load_config
from shoal.daemon.cli.alert_commands import format_alert
from shoal.daemon.alerts.delivery import AlertSender
from shoal.daemon.errors import UsageError
from shoal.daemon.files.layout import StateLock, open_store, prepare_folders, remove_stale_temps
from shoal.daemon.runtime.logs import setup_logging
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.demo import scenario
from shoal.daemon.demo.scenario import (
    FEATURE_UNITS,
    FEATURES,
    demo_changes,
    demo_dropout,
    describe_states,
)
from shoal.daemon.intake.service import Service
from shoal.daemon.views.summary import format_segments, segment_summary

__all__ = ["run_demo", "DEMO_CONFIG"]

_MARKER = ".shoal-demo"
DEMO_CONFIG = {
    "features": list(FEATURES),
    # seconds the door stood open: about 1 s/min in most rows, 30 in door traffic, never
    # negative (right-skewed, with values at 0)
    "transforms": {"door_open_s": "log1p"},
    "passthrough": ["unit_id", "timestamp"],
    "segments": 4,
    "covariance": "full",
    "warmup_rows": 8000,
    "half_life_rows": 50000,
    "seed": 7,
    "watch": {"settle_seconds": 0.5, "rescan_seconds": 2.0},
    "learning": {"n_init": 3},
    "drift": {"time_column": "timestamp"},
    # a new state shows in many rows at once (ice build-up: 300 of the first 2,500);
    # 100 rows keep the scattered rows of one worn compressor from forming a segment
    "lifecycle": {"birth_rows": 100},
}


def _fresh_folder(folder: Path) -> None:
    if folder.exists() and any(folder.iterdir()):
        if not (folder / _MARKER).exists():
            raise UsageError(f"{folder} is not empty and was not made by `shoal demo`; "
                             "choose another --dir")
        for sub in ("inbox", "outbox", "state", "inbox.staging"):
            shutil.rmtree(folder / sub, ignore_errors=True)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / _MARKER).write_text("made by shoal demo; safe to delete\n")


def _sd(segment: dict, feature: str) -> float:
    """A feature's sd, or for a transformed one half its central 68% interval."""
    if feature in segment.get("interval", {}):
        low, high = segment["interval"][feature]
        return (high - low) / 2.0
    return segment["spread"][feature]


def _true_state_table(summary: dict) -> str:
    """Each segment beside the scenario state whose mean is nearest in the segment's sds."""
    truth = describe_states()
    lines = ["segment -> nearest true state (distance in the segment's own sds)"]
    for s in summary["segments"]:
        best, dist = None, np.inf
        for state, means in truth.items():
            d = float(np.sqrt(np.mean([((s["mean"][f] - means[f]) / max(_sd(s, f), 1e-9))
                                       ** 2 for f in FEATURES])))
            if d < dist:
                best, dist = state, d
        lines.append(f"  {s['id']:>3}  {best:<13} {dist:5.2f}")
    units = ", ".join(f"{f} [{u}]" for f, u in FEATURE_UNITS.items())
    lines.append(f"units: {units}")
    return "\n".join(lines)


def run_demo(folder: Path, drops: int | None = None, rows_per_file: int = 4000,
             pause: float = 0.05, timeout: float = 600.0) -> int:
    n_files = drops or 40
    folder = folder.resolve()
    _fresh_folder(folder)
    cfg = folder / "shoal.yaml"
    cfg.write_text("# written by `shoal demo`\n" + yaml.safe_dump(DEMO_CONFIG, sort_keys=False))
    settings = load_config(cfg)
    log = open(folder / "shoal.log", "a", encoding="utf-8")
    setup_logging(settings.log_level, stream=log)
    layout = prepare_folders(settings)
    print(f"shoal demo: {n_files} drops of {rows_per_file} rows (cold-storage warehouse, "
          f"invented data) into {layout.inbox}")
    with StateLock(layout.lock):
        remove_stale_temps(layout)
        store = open_store(layout)
        try:
            pipeline = Pipeline(settings, layout, store)
            done = []
            service = Service(settings, layout, pipeline, on_result=done.append)
            sender = AlertSender(settings, layout.db).start()
            pipeline.alert_listeners.append(sender.wake)
            worker = threading.Thread(target=service.run, name="shoal-worker")
            worker.start()
            try:
                _feed(layout.inbox, n_files, rows_per_file, settings.seed, pause)
                t0 = time.monotonic()
                while len(done) < n_files and time.monotonic() - t0 < timeout:
                    time.sleep(0.05)
            finally:
                service.request_stop()
                worker.join(30)
                sender.stop()
            summary = segment_summary(store, settings)
            alerts = store.alerts()
        finally:
            store.close()
    log.close()
    outcomes = {}
    for r in done:
        outcomes[r.outcome] = outcomes.get(r.outcome, 0) + 1
    print(f"processed: {outcomes}")
    print(format_segments(summary))
    if summary["segments"]:
        print(_true_state_table(summary))
    _print_alerts(alerts, settings, n_files * rows_per_file)
    print(f"labels files: {layout.outbox}")
    print(f"service log:  {folder / 'shoal.log'}")
    print(f"alerts:       {settings.alerts.file}")
    print(f"config:       {cfg}   (try: shoal segments -c {cfg}; shoal alerts -c {cfg})")
    return 0 if len(done) == n_files else 1


def _print_alerts(alerts: list, settings, total_rows: int) -> None:
    """The drift alerts and segment events (born, retired, merged), with where the
    scenario's changes were injected for comparison."""
    drift, new_state = demo_changes(total_rows)
    rise = drift.amps_per_10k_rows * (total_rows - drift.start_row) / 10_000
    out = demo_dropout(total_rows)
    print(f"injected: {drift.unit}'s compressor current rising from row {drift.start_row} "
          f"(+{rise:.1f} A by row {total_rows}); ice build-up in {new_state.share:.0%} of rows "
          f"from row {new_state.start_row}; {out.feature} not reported by "
          f"{', '.join(out.units)} for rows {out.start_row}-{out.start_row + out.n_rows - 1}")
    print(f"drift alerts and segment events ({len(alerts)}; baseline taken after "
          f"{settings.drift.settle_rows} rows past warm-up):")
    if not alerts:
        print("  none")
    for a in alerts:
        print(format_alert(a["payload"], prefix="  "))


def demo_table(columns: dict) -> pa.Table:
    """A drop's table: a missing reading (NaN) is written as null, as a logger would."""
    return pa.table({name: pa.array(col, mask=np.isnan(col)) if name in FEATURES
                     else col for name, col in columns.items()})


def _feed(inbox: Path, n_files: int, rows_per_file: int, seed: int, pause: float) -> None:
    from shoal.daemon.demo.drops import write_drop

    drift, new_state = demo_changes(n_files * rows_per_file)
    dropout = demo_dropout(n_files * rows_per_file)
    for i, columns in enumerate(scenario.drops(n_files, rows_per_file, seed, drift,
                                                        new_state, dropout=dropout)):
        columns.pop("state")
        name = f"fleet-{i:04d}." + ("csv" if i % 4 == 3 else "parquet")
        write_drop(demo_table(columns), inbox, name)
        time.sleep(pause)
