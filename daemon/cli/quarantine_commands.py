"""``shoal quarantine list | retry | drop``: what was set aside, and what to do with it.

The quarantine folder (``state/quarantine/``) holds each bad input under a free
name with its sidecar ``<name>.json`` (:mod:`shoal.daemon.files.quarantine`). Here:

- ``list``: name, reason, time and size of each quarantined input;
- ``retry NAME...``: the input goes back into the inbox under its original name
  (made under a hidden temporary name in the inbox, which the watcher ignores, then
  renamed: it appears whole or not at all), its sidecar moves to
  ``quarantine/retried/`` with the time of the retry (the history of attempts), and
  its ledger row says it was retried. The service (or the next ``shoal ingest``)
  then takes it like any new drop; if it is still bad it is quarantined again;
- ``drop NAME...``: the input and its sidecar are deleted.

Each works beside a running service: the ledger note is one short write to the
state store. Sidecars are read through
:func:`~shoal.daemon.files.quarantine.read_sidecar` alone (re-exported here).
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import sqlite3
import time
from pathlib import Path
from typing import Any

from shoal.daemon.errors import UsageError
from shoal.daemon.files.layout import Layout
from shoal.daemon.files.quarantine import quarantine_summary, quarantined, read_sidecar
from shoal.daemon.files.writer import atomic_file, fsync_dir
from shoal.daemon.state.ledger import note_quarantined

__all__ = ["read_sidecar", "quarantined", "quarantine_summary", "retry", "drop",
           "RETRIED_FOLDER", "add_quarantine_commands"]

RETRIED_FOLDER = "retried"


def _entry(layout: Layout, name: str) -> dict[str, Any]:
    if not name or "/" in name or name.startswith(".") or name.endswith(".json"):
        raise UsageError(f"expected the name of a quarantined input as `shoal quarantine "
                         f"list` shows it, found {name!r}")
    record = read_sidecar(layout.quarantine / f"{name}.json")
    if record is None:
        raise UsageError(f"no quarantined input named {name!r} in {layout.quarantine} "
                         "(see `shoal quarantine list`)")
    return record


def _note_in_ledger(layout: Layout, record: dict, note: str) -> bool:
    """Append ``note`` to the reason of the input's latest quarantined ledger row."""
    if not layout.db.exists():
        return False
    db = sqlite3.connect(layout.db, timeout=30.0)
    try:
        with db:
            return note_quarantined(db, record["input"], note)
    finally:
        db.close()


def _stamp(now: float) -> str:
    return _dt.datetime.fromtimestamp(now, _dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")


def retry(layout: Layout, name: str, *, now: float | None = None) -> Path:
    """Put a quarantined input back into the inbox; returns its path there."""
    now = time.time() if now is None else now
    record = _entry(layout, name)
    src = record["file"]
    if src is None:
        raise UsageError(f"{name} was not moved into quarantine (it was given on the command "
                         "line, not taken from the inbox): run `shoal ingest` on the file "
                         "again once it is fixed")
    target = layout.inbox / record["input"]
    if os.path.lexists(target):
        raise UsageError(f"{target} already exists in the inbox: move it away, or retry "
                         "later once the service has taken it")
    tmp = layout.inbox / f".{record['input']}.shoal-retry.tmp"   # ignored by the watcher
    try:
        try:
            os.link(src, tmp, follow_symlinks=False)
        except OSError:       # another filesystem: a copy, made durable before it shows
            shutil.copy2(src, tmp)
            with open(tmp, "rb+") as f:
                os.fsync(f.fileno())
        os.rename(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(layout.inbox)
    history = layout.quarantine / RETRIED_FOLDER
    history.mkdir(mode=0o700, exist_ok=True)
    kept = {k: v for k, v in json.loads(record["sidecar"].read_text("utf-8")).items()}
    kept.update(retried_at=_dt.datetime.fromtimestamp(now, _dt.timezone.utc).isoformat(),
                retried_as=str(target))
    with atomic_file(history / f"{name}.{_stamp(now)}.json", mode=0o600) as f:
        f.write(json.dumps(kept, indent=2, ensure_ascii=False, default=str).encode())
    os.unlink(src)
    os.unlink(record["sidecar"])
    fsync_dir(layout.quarantine)
    _note_in_ledger(layout, record, f"retried {_stamp(now)}")
    return target


def drop(layout: Layout, name: str) -> list[Path]:
    """Delete a quarantined input and its sidecar; returns what was deleted."""
    record = _entry(layout, name)
    gone = []
    for path in (record["file"], record["sidecar"]):
        if path is not None:
            path.unlink(missing_ok=True)
            gone.append(path)
    fsync_dir(layout.quarantine)
    return gone


def _size(n: int | None) -> str:
    if n is None:
        return "-"
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return str(n)


def format_list(entries: list[dict[str, Any]]) -> str:
    if not entries:
        return "nothing in quarantine"
    rows = [("name", "reason", "time (UTC)", "size", "detail")]
    for e in entries:
        when = _dt.datetime.fromtimestamp(e["time"], _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
        rows.append((e["name"], e["reason"], when, _size(e["size"]), str(e["detail"])[:60]))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r[:4], widths)) + "  " + r[4]
                     for r in rows)


def add_quarantine_commands(cmd, with_config) -> None:
    sp = with_config(cmd("quarantine", "list quarantined inputs, put them back into the "
                                       "inbox once fixed, or delete them", _cmd_quarantine))
    sp.add_argument("action", choices=("list", "retry", "drop"),
                    help="list: name, reason, time, size; retry NAME...: move back into "
                         "the inbox (the old sidecar is kept in quarantine/retried/); "
                         "drop NAME...: delete the input and its sidecar")
    sp.add_argument("names", nargs="*", metavar="NAME",
                    help="quarantined inputs, as `list` names them")
    sp.add_argument("--json", action="store_true", help="list: print JSON")


def _cmd_quarantine(args) -> int:
    from shoal.config import load_config
    from shoal.daemon.runtime.logs import log_event, setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    layout = Layout.of(settings)
    if args.action == "list":
        if args.names:
            raise UsageError("quarantine list takes no names")
        entries = quarantined(layout)
        if args.json:
            print(json.dumps([{k: v for k, v in e.items() if k not in ("file", "sidecar")}
                              for e in entries], indent=2, default=str))
        else:
            print(format_list(entries))
        return 0
    if not args.names:
        raise UsageError(f"quarantine {args.action}: name at least one input "
                         "(see `shoal quarantine list`)")
    for name in args.names:
        _entry(layout, name)          # every name checked before anything moves
    for name in args.names:
        if args.action == "retry":
            target = retry(layout, name)
            log_event("quarantine_retried", file=name, inbox=str(target))
            print(f"retried {name}: back in the inbox as {target.name}")
        else:
            for path in drop(layout, name):
                print(f"deleted {path}")
            log_event("quarantine_dropped", file=name)
    return 0
