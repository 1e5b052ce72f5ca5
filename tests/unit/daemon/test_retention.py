"""Retention: processed/ emptied as it goes, the alerts file rotated with its kept count,
exactly-once across a restart and past a prune, ``shoal prune --dry-run`` listing exactly
what ``shoal prune`` then removes, and nothing an undelivered or open alert needs."""
import contextlib
import io
import json
import shutil
import sqlite3
import time
from pathlib import Path

import pytest
import yaml

from shoal.config import load_config
from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config, write_drop
from shoal.daemon.files.layout import Layout
from shoal.daemon.state.retention import COMPACTED_KEY, make_plan
from shoal.daemon.state.store import LedgerEntry, StateStore

N_DROPS = 500
ROWS = 20


def _config(folder, **retention):
    # Alerts that fire often (a weight_change bound far below any move, one window), so
    # that the alerts file grows past its rotation size.
    return write_config(folder, warmup_rows=200, lifecycle={"enabled": False},
                        drift={"settle_rows": 200, "window_rows": 100, "noise_multiple": 0.0,
                               "persist": 1, "resolve_persist": 1, "cool_down_windows": 0,
                               "bounds": {"weight_change": 1e-6}},
                        retention=retention)


def _drops(folder, start, stop):
    inbox = folder / "inbox"
    inbox.mkdir(exist_ok=True)
    return [write_drop(synthetic_table(i, ROWS, seed=11), inbox, f"d{i:04d}.csv", index=i)
            for i in range(start, stop)]


def _ingest(cfg, paths) -> dict:
    """`shoal ingest` of ``paths``: input name -> outcome."""
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(["ingest", "-c", str(cfg), *map(str, paths)])
    out = buf.getvalue()
    outcomes = {}
    for line in out.splitlines()[:-1]:
        outcome, name = line.split()[:2]
        outcomes[name] = outcome
    assert code == 0, out[-2000:]
    return outcomes


@pytest.fixture(scope="module")
def long_run(tmp_path_factory):
    """500 drops through `shoal ingest` in two runs (a restart between), processed_days 0,
    the alerts file rotated at 4 kB keeping 2; one drop of the first run redelivered in
    the second."""
    folder = tmp_path_factory.mktemp("retention")
    cfg = _config(folder, processed_days=0, alerts_file_bytes=4096, alerts_files_kept=2,
                  check_seconds=0)
    copies = folder / "copies"
    copies.mkdir()
    first = _drops(folder, 0, N_DROPS // 2)
    shutil.copy2(first[7], copies / first[7].name)
    out1 = _ingest(cfg, first)
    second = _drops(folder, N_DROPS // 2, N_DROPS)
    again = folder / "inbox" / "redelivered.csv"
    shutil.copy2(copies / first[7].name, again)
    out2 = _ingest(cfg, second + [again])
    return {"folder": folder, "cfg": cfg, "out1": out1, "out2": out2}


def test_processed_is_kept_empty(long_run):
    assert sum(o == "committed" for o in long_run["out1"].values()) == N_DROPS // 2
    assert list((long_run["folder"] / "state" / "processed").iterdir()) == []


def test_alerts_file_rotated_keeping_the_configured_count(long_run):
    state = long_run["folder"] / "state"
    rotated = sorted(p.name for p in state.glob("alerts.jsonl.*"))
    assert rotated == ["alerts.jsonl.1", "alerts.jsonl.2"]
    lines = [json.loads(l) for p in [state / "alerts.jsonl", *state.glob("alerts.jsonl.*")]
             if p.exists() for l in p.read_text().splitlines()]
    con = sqlite3.connect(state / "state.db")
    try:
        delivered = con.execute("SELECT COUNT(*) FROM alert_outbox WHERE delivered_at IS NOT "
                                "NULL").fetchone()[0]
    finally:
        con.close()
    # more alerts were delivered than the three files hold: the oldest went with rotation
    assert 0 < len(lines) < delivered
    for p in state.glob("alerts.jsonl.*"):
        assert p.stat().st_size >= 4096        # rotated only once past the size


def test_exactly_once_across_a_restart(long_run):
    assert long_run["out2"]["redelivered.csv"] == "duplicate"
    assert sum(o == "committed" for o in long_run["out2"].values()) == N_DROPS // 2


def test_prune_dry_run_lists_exactly_what_prune_removes(tmp_path, capsys):
    cfg = _config(tmp_path, processed_days=None, quarantine_days=None, history_days=None)
    drops = _drops(tmp_path, 0, 40)
    (tmp_path / "keep").mkdir()
    shutil.copy2(drops[3], tmp_path / "keep" / drops[3].name)
    bad = tmp_path / "inbox" / "broken.csv"
    bad.write_text("f1,f2,f3\n1,2\n")
    code = main(["ingest", "-c", str(cfg), *map(str, drops), str(bad)])
    assert code == 1                            # the broken one was quarantined
    capsys.readouterr()
    # An input already committed is offered again (waiting in the inbox): its ledger row
    # must outlive any pruning, or it would be learned twice.
    shutil.copy2(tmp_path / "keep" / drops[3].name, tmp_path / "inbox" / drops[3].name)
    tight = yaml.safe_load(cfg.read_text())
    tight["retention"] = {"processed_days": 0, "quarantine_days": 0, "history_days": 0,
                          "alerts_file_bytes": 1, "alerts_files_kept": 1}
    cfg.write_text(yaml.safe_dump(tight))

    def snapshot():
        files = sorted(str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*")
                       if p.is_file() and "state.db" not in p.name)
        con = sqlite3.connect(tmp_path / "state" / "state.db")
        try:
            rows = {t: con.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0]
                    for t in ("ledger", "segment_history", "alert_outbox")}
        finally:
            con.close()
        return files, rows

    before = snapshot()
    assert main(["prune", "-c", str(cfg), "--dry-run"]) == 0
    listed = capsys.readouterr().out.splitlines()
    assert snapshot() == before                 # the dry run removed nothing
    assert main(["prune", "-c", str(cfg)]) == 0
    done = capsys.readouterr().out.splitlines()
    assert listed[:-1] == done[:-1] and len(listed) > 3
    assert listed[-1] == f"would remove: {len(listed) - 1} item(s)"
    assert done[-1] == f"removed: {len(done) - 1} item(s)"
    after = snapshot()
    gone = set(before[0]) - set(after[0])
    made = set(after[0]) - set(before[0])

    def rel(path):
        return str(Path(path).relative_to(tmp_path))

    named = {rel(line.split()[-3]) for line in listed if line.startswith("delete ")}
    moved = [(rel(line.split()[1]), rel(line.split()[3])) for line in listed
             if line.startswith("rotate ")]
    assert gone == named | {a for a, _ in moved} - {b for _, b in moved}
    assert made == {b for _, b in moved} - set(before[0])
    assert any("processed/" in d for d in gone) and any("quarantine/" in d for d in gone)
    ledger_line = next(line for line in listed if line.startswith("remove ") and "ledger" in line)
    assert after[1]["ledger"] == before[1]["ledger"] - int(ledger_line.split()[1])
    history_line = next(line for line in listed if "segment history" in line)
    assert after[1]["segment_history"] < before[1]["segment_history"]
    assert "model versions" in history_line
    con = sqlite3.connect(tmp_path / "state" / "state.db")
    try:   # the ledger row of the input waiting in the inbox is still there
        assert con.execute("SELECT COUNT(*) FROM ledger WHERE name = ?",
                           (drops[3].name,)).fetchone()[0] == 1
    finally:
        con.close()
    assert main(["prune", "-c", str(cfg), "--dry-run"]) == 0
    assert capsys.readouterr().out.strip() == "nothing to remove"
    # the input waiting in the inbox is still recognised as done
    out = main(["ingest", "-c", str(cfg), str(tmp_path / "inbox" / drops[3].name)])
    assert out == 0 and capsys.readouterr().out.split()[0] in ("duplicate", "already_done")
    # status still counts what the ledger no longer lists
    assert main(["status", "-c", str(cfg)]) == 0
    text = capsys.readouterr().out
    assert "inputs: 40 committed, 1 quarantined" in text, text


def test_undelivered_and_open_alerts_are_kept(tmp_path):
    cfg = load_config(_config(tmp_path, history_days=1))
    layout = Layout.of(cfg)
    layout.state.mkdir(parents=True)
    (tmp_path / "inbox").mkdir()
    store = StateStore(layout.db)
    old = time.time() - 3 * 86400
    store.clock = lambda: old
    try:
        for name in ("x.csv", "y.csv"):   # the newest ledger row is always kept
            store.record_quarantine(LedgerEntry(digest="a" * 64, name=name, size=1,
                                                outcome="quarantined", reason="schema"))
        with store._transaction():
            store._insert_alerts([
                ("a1.raised", {"id": "a1", "status": "raised"}),     # open, delivered
                ("a2.raised", {"id": "a2", "status": "raised"}),     # closed, delivered
                ("a2.cleared", {"id": "a2", "status": "cleared"}),
                ("a3.raised", {"id": "a3", "status": "raised"}),     # closed, undelivered
                ("a3.cleared", {"id": "a3", "status": "cleared"}),
            ], version=1, now=old)
            store.db.execute("UPDATE alert_outbox SET delivered_at = ? WHERE id NOT LIKE 'a3%'",
                             (old,))
        plan = make_plan(cfg, layout, store.db)
        assert sorted(plan.notification_ids) == sorted(["a2.raised", "a2.cleared"])
        assert len(plan.ledger_ids) == 1
        from shoal.daemon.state.retention import apply_plan

        apply_plan(plan, store)
        totals = json.loads(store.db.execute("SELECT value FROM meta WHERE key = ?",
                                             (COMPACTED_KEY,)).fetchone()[0])
        assert totals == {"quarantined": {"inputs": 1, "rows": 0, "rows_invalid": 0}}
        left = {i for (i,) in store.db.execute("SELECT id FROM alert_outbox")}
        assert left == {"a1.raised", "a3.raised", "a3.cleared"}
    finally:
        store.close()


def test_the_running_service_applies_retention_between_inputs(tmp_path):
    from drills import wait_until
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.runtime.notify import Notifier
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.runtime.supervise import Supervisor

    settings = load_config(_config(tmp_path, processed_days=0, check_seconds=0))
    layout = prepare_folders(settings)
    store = StateStore(layout.db)
    pipeline = Pipeline(settings, layout, store)
    done = []
    sup = Supervisor(settings, layout, pipeline, notifier=Notifier({}), on_result=done.append)
    sup.start()
    try:
        _drops(tmp_path, 0, 12)
        wait_until(lambda: len(done) >= 12, 60, "12 inputs", interval=0.05)
        # the pass after the last input removed what it had moved to processed/
        wait_until(lambda: not any(layout.processed.iterdir()), 10, "processed/ emptied",
                   interval=0.05)
    finally:
        sup.shutdown(timeout=30)
        store.close()
    assert [r.outcome for r in done] == ["committed"] * 12
