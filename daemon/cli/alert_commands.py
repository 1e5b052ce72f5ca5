"""``shoal alerts``, ``shoal rebaseline`` and ``shoal replay``, and how alerts are printed."""
from __future__ import annotations

import contextlib
import json
import sys
import tempfile
from pathlib import Path
from typing import Any, Callable, Iterator

import yaml

from shoal.config import ConfigError, Settings, load_config, parse_config
from shoal.daemon.alerts.delivery import AlertSender
from shoal.daemon.errors import StateError, UsageError
from shoal.daemon.intake.gate import input_kind
from shoal.daemon.model.contract import open_model_store
from shoal.daemon.files.layout import StateLock, open_store, prepare_folders
from shoal.daemon.runtime.logs import setup_logging
from shoal.daemon.ingest.pipeline import Pipeline
from shoal.daemon.runtime.progress import progress
from shoal.daemon.views.alert_text import format_alert
from shoal.daemon.views.report import parse_since

__all__ = ["add_alert_commands", "alert_delivery", "deliver_alerts", "format_alert", "replay",
           "replay_counts"]

# ------------------------------------------------------------------------------ alerts


def _cmd_alerts(args, open_read_store) -> int:
    settings = load_config(args.config)
    setup_logging(settings.log_level)
    since = parse_since(args.since) if args.since else None
    store = open_read_store(settings)   # never writes
    try:
        rows = store.alerts(since=since)
    finally:
        store.close()
    if args.json:
        print(json.dumps(rows, indent=2))
        return 0
    if not rows:
        print("no alerts" + (f" since {args.since}" if args.since else ""))
        return 0
    for r in rows:
        state = "delivered" if r["delivered_at"] else "pending delivery"
        print(format_alert(r["payload"], r["created"]) + f"\n    ({state})")
    return 0


# -------------------------------------------------------------------------- rebaseline


def _cmd_rebaseline(args, open_parts) -> int:
    settings = load_config(args.config)
    setup_logging(settings.log_level)
    try:
        with open_parts(settings) as (layout, store, pipeline):
            request = store.request_rebaseline(args.note)
            try:
                alerts = pipeline.rebaseline_now(request, args.note)
            except StateError:
                store.cancel_rebaseline(request)   # nothing to apply it to
                raise
            rows = max(settings.drift.settle_rows, settings.drift.window_rows)
            print(f"re-baselined at model version {pipeline.state.version} ({args.note!r}): "
                  f"raised alerts are cleared, and the next {rows} rows become the new "
                  "baseline")
            for _, payload in alerts:
                print(format_alert(payload))
            deliver_alerts(settings, layout, timeout=10.0)
    except StateError as exc:
        if "in use by another shoal process" not in str(exc):
            raise
        layout = prepare_folders(settings)
        store = open_store(layout)
        try:
            store.request_rebaseline(args.note)
        finally:
            store.close()
        print(f"re-baseline requested ({args.note!r}); the running service applies it "
              "before it learns its next input")
    return 0


def deliver_alerts(settings: Settings, layout, timeout: float) -> bool:
    """Deliver what waits in the outbox now (one process, no thread); True if all went."""
    sender = AlertSender(settings, layout.db)
    try:
        return sender.drain(timeout)
    finally:
        sender.stop()


@contextlib.contextmanager
def alert_delivery(open_parts: Callable, settings: Settings, *, drain_seconds: float = 0.0,
                   **kwargs) -> Iterator[Any]:
    """``open_parts(settings)`` with an alert sender thread woken after each commit."""
    with open_parts(settings, **kwargs) as parts:
        layout, store, pipeline = parts
        sender = AlertSender(settings, layout.db).start()
        pipeline.alert_listeners.append(sender.wake)
        pipeline.settings_listeners.append(sender.replace_settings)   # SIGHUP: new sinks
        try:
            yield parts
        finally:
            sender.stop()
            if drain_seconds > 0:
                deliver_alerts(settings, layout, drain_seconds)


# ------------------------------------------------------------------------------ replay


def _apply_sets(data: dict, sets: list[str]) -> dict:
    for item in sets:
        key, eq, text = item.partition("=")
        if not eq or not key.strip():
            raise UsageError(f"--set: expected key=value (e.g. drift.bounds.mean_shift=0.8), "
                             f"found {item!r}")
        try:
            value = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            raise UsageError(f"--set {key}: the value is not valid YAML: {exc}") from None
        node = data
        parts = key.strip().split(".")
        for part in parts[:-1]:
            child = node.get(part)
            if not isinstance(child, dict):
                child = node[part] = {}
            node = child
        node[parts[-1]] = value
    return data


def _isolated_folder(settings: Settings, state_dir: str | None) -> Path:
    if state_dir is None:
        return Path(tempfile.mkdtemp(prefix="shoal-replay-"))
    folder = Path(state_dir).resolve()
    for live in (settings.state, settings.inbox, settings.outbox):
        if folder == live or live in folder.parents or folder in live.parents:
            raise UsageError(f"--state-dir {folder} overlaps the live folder {live}; replay "
                             "never touches the live state: choose a separate folder")
    if folder.exists() and any(folder.iterdir()):
        raise UsageError(f"--state-dir {folder} is not empty; replay starts from a fresh "
                         "model in an empty folder")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def replay_settings(config: Path, sets: list[str], folder: Path) -> tuple[Settings, Settings]:
    """(live settings, settings of the isolated run in ``folder``)."""
    live = load_config(config)
    try:
        data = yaml.safe_load(Path(config).read_text("utf-8")) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise ConfigError(f"config file {str(config)!r} cannot be read: {exc}") from exc
    data = _apply_sets(data, sets)
    data.update(inbox=str(folder / "inbox"), outbox=str(folder / "outbox"),
                state=str(folder / "state"))
    alerts = dict(data.get("alerts") or {})
    alerts.update(file=str(folder / "alerts.jsonl"), webhooks=[])
    data["alerts"] = alerts
    trial = parse_config(data, base_dir=Path(config).resolve().parent)
    return live, trial


def replay(config: Path, folder_in: Path, *, state_dir: str | None = None,
           sets: list[str] = (), out=sys.stdout) -> dict:
    """Backtest the drops in ``folder_in`` (name order) from a fresh model in an isolated
    state folder; print each alert as it would have been raised. Returns a summary."""
    folder_in = Path(folder_in)
    if not folder_in.is_dir():
        raise UsageError(f"no such folder: {folder_in}")
    live = load_config(config)
    iso = _isolated_folder(live, state_dir)
    try:
        _, settings = replay_settings(config, list(sets), iso)
        files = sorted(p for p in folder_in.iterdir()
                       if p.is_file() and not p.is_symlink() and input_kind(p.name) is not None)
        if not files:
            raise UsageError(f"{folder_in} holds no .parquet, .pq, .csv, .csv.gz, .tsv or "
                             ".tsv.gz files")
    except BaseException:
        with contextlib.suppress(OSError):   # nothing was run: no empty folder is left
            iso.rmdir()
        raise
    layout = prepare_folders(settings)
    print(f"replay: {len(files)} inputs from {folder_in} in name order, fresh model, isolated "
          f"state in {iso}", file=out)
    summary = {"inputs": len(files), "rows": 0, "alerts": [], "state": str(iso),
               "outcomes": {}}
    with StateLock(layout.lock):
        store = open_model_store(layout, settings, write=True)
        try:
            pipeline = Pipeline(settings, layout, store)
            for path in progress(files, total=len(files), desc="replay", unit="file"):
                r = pipeline.process(path, in_inbox=False)
                summary["outcomes"][r.outcome] = summary["outcomes"].get(r.outcome, 0) + 1
                summary["rows"] += r.rows
                if r.outcome != "committed":
                    print(f"  {path.name}: {r.outcome} {r.reason or ''} {r.detail or ''}",
                          file=out)
                    continue
                for a in store.alerts(version=r.model_version):
                    summary["alerts"].append({"input": path.name, **a["payload"]})
                    print(format_alert(a["payload"], prefix=f"{path.name}: "), file=out)
        finally:
            store.close()
        sender = AlertSender(settings, layout.db, webhooks=False)
        try:
            sender.deliver_due()
        finally:
            sender.stop()
    summary["counts"] = replay_counts(summary["alerts"])
    c = summary["counts"]
    print(f"replay done: {summary['rows']} rows in {len(files)} inputs {summary['outcomes']}; "
          f"{c['raised']} alerts raised, {c['cleared']} cleared, {c['lifecycle']} segment "
          f"events; alerts in {settings.alerts.file}", file=out)
    return summary


def replay_counts(alerts: list[dict]) -> dict[str, int]:
    """Drift alerts raised, drift alerts cleared and segment events (born, retired,
    merged), each counted under its own word."""
    counts = {"raised": 0, "cleared": 0, "lifecycle": 0}
    for a in alerts:
        if a.get("kind") == "lifecycle":
            counts["lifecycle"] += 1
        elif a.get("status") in ("raised", "cleared"):
            counts[a["status"]] += 1
    return counts


def _cmd_replay(args) -> int:
    setup_logging("error")   # the alerts are printed; the run's log lines would repeat them
    replay(Path(args.config), Path(args.dir), state_dir=args.state_dir, sets=args.set or [])
    return 0


# ---------------------------------------------------------------------------- commands


def add_alert_commands(cmd, with_config, open_parts, open_read_store) -> None:
    """Register ``alerts``, ``rebaseline`` and ``replay`` on the ``shoal`` parser."""
    sp = with_config(cmd("alerts", "list drift alerts (raised and cleared), oldest first",
                         lambda args: _cmd_alerts(args, open_read_store)))
    sp.add_argument("--since", metavar="WHEN",
                    help="only alerts raised since WHEN: 30m, 2h, 7d or an ISO date/time")
    sp.add_argument("--json", action="store_true", help="print JSON instead of text")
    sp = with_config(cmd("rebaseline", "accept the present segments as the new normal: "
                                       "they become the drift baseline",
                         lambda args: _cmd_rebaseline(args, open_parts)))
    sp.add_argument("--note", required=True, metavar="TEXT",
                    help="why (recorded with the re-baseline and in cleared alerts)")
    sp = with_config(cmd("replay", "backtest a folder of drops from a fresh model in an "
                                   "isolated state folder and print the alerts that would "
                                   "have been raised", _cmd_replay))
    sp.add_argument("dir", metavar="DIR", help="folder of historical drops (name order)")
    sp.add_argument("--state-dir", metavar="TMP",
                    help="empty folder for the isolated state (default: a new temp folder)")
    sp.add_argument("--set", action="append", metavar="KEY=VALUE",
                    help="override a setting for this replay, e.g. "
                         "drift.bounds.mean_shift=0.8 (repeatable)")
