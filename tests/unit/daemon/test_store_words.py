"""A state store written before the alert words changed opens, is migrated in one
transaction, and its waiting notifications go out in the new words.

``data/store-v2-old-alert-words.db`` was written by shoal itself as it was before the
change (schema version 2), with ``shoal ingest`` of eight drops of the warehouse
scenario (seed 7, 500 rows each) under ``OLD_CONFIG``: the first four with the alert
file as the only sink (delivered), the last four with a webhook on a closed loopback
port (undelivered). Its outbox holds ``<id>.firing`` and ``<id>.resolved`` drift
notifications (severity ``warning``) and ``born`` segment events (severity ``info``);
its checkpoint's drift state holds the snapshot as ``reference`` and two open
``firing`` alerts.
"""
import json
import shutil
import sqlite3
from pathlib import Path

import pytest
import yaml

from shoal.config import load_config
from shoal.daemon.state import store_words
from shoal.daemon.alerts.delivery import AlertSender
from shoal.daemon.state.store import SCHEMA_VERSION, StateStore

from _lively import LIVELY_CONFIG, lively_drops
from _webhook import VerifyingReceiver, log  # noqa: F401 (log)

FIXTURE = Path(__file__).parents[2] / "data" / "store-v2-old-alert-words.db"
OLD_WORDS = ('"firing"', '"resolved"', "resolved_by", "fired_at", '"reference"',
             "reference_mean", "current_mean", "reference_weight", "reference sds",
             '"info"')
# the config the fixture was written under (tests/support/_lively.py)
OLD_CONFIG = LIVELY_CONFIG


def _raw(db: Path) -> dict:
    """The store read with sqlite3 alone (no shoal code)."""
    con = sqlite3.connect(db)
    try:
        return {
            "meta": dict(con.execute("SELECT key, value FROM meta")),
            "outbox": con.execute("SELECT id, payload, delivered_at FROM alert_outbox "
                                  "ORDER BY rowid").fetchall(),
            "delivery": con.execute("SELECT outbox_id, sink, delivered_at FROM alert_delivery "
                                    "ORDER BY rowid").fetchall(),
            "extra": [e for (e,) in con.execute("SELECT extra FROM checkpoints")],
            "orphans": con.execute("PRAGMA foreign_key_check").fetchall(),
        }
    finally:
        con.close()


@pytest.fixture
def old_store(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    db = state / "state.db"
    shutil.copyfile(FIXTURE, db)
    return db


def test_the_fixture_is_a_store_in_the_old_words(old_store):
    raw = _raw(old_store)
    assert raw["meta"]["schema_version"] == "2"
    ids = [i for i, _, _ in raw["outbox"]]
    assert any(i.endswith(".firing") for i in ids) and any(i.endswith(".resolved") for i in ids)
    text = " ".join(p for _, p, _ in raw["outbox"]) + " ".join(raw["extra"])
    for word in ('"firing"', '"resolved"', "fired_at", "reference_mean", "current_mean"):
        assert word in text, word
    assert sum(d is None for _, _, d in raw["outbox"]) == 6     # waiting for the webhook


def test_an_old_store_is_migrated_in_one_transaction(old_store, log):
    before = _raw(old_store)
    StateStore(old_store).close()
    after = _raw(old_store)
    assert after["meta"]["schema_version"] == str(SCHEMA_VERSION)
    assert json.loads(next(x for x in log.getvalue().splitlines()
                           if "state_store_migrated" in x))["from_version"] == 2
    # every notification kept, in order, delivered as before, in the new words
    assert len(after["outbox"]) == len(before["outbox"]) == 7
    assert [d for _, _, d in after["outbox"]] == [d for _, _, d in before["outbox"]]
    renamed = {".firing": ".raised", ".resolved": ".cleared"}
    for (old_id, old_text, _), (new_id, new_text, _) in zip(before["outbox"], after["outbox"]):
        head, _, state = old_id.rpartition(".")
        assert new_id == head + renamed.get("." + state, "." + state)
        old, new = json.loads(old_text), json.loads(new_text)
        assert new["status"] == {"firing": "raised", "resolved": "cleared"}.get(
            old["status"], old["status"])
        assert new["severity"] == {"warning": "major", "info": "warning"}[old["severity"]]
        assert new["schema_version"] == store_words.PAYLOAD_SCHEMA_VERSION
        if old["kind"] == "drift":
            assert new["baseline"] == old["reference"]
            assert new["unit"] == "baseline sds" or old["unit"] != "reference sds"
            for was, now in zip(old["explanation"]["features"], new["explanation"]["features"]):
                assert (now["baseline_mean"], now["window_mean"]) == (
                    was["reference_mean"], was["current_mean"])
        for word in OLD_WORDS:
            assert word not in new_text, (word, new_text)
    # the delivery rows follow their notifications; no dangling reference
    assert [(renamed.get("." + i.rpartition(".")[2], "." + i.rpartition(".")[2]), s, d)
            for i, s, d in before["delivery"]] == [
        ("." + i.rpartition(".")[2], s, d) for i, s, d in after["delivery"]]
    assert after["orphans"] == []
    # the drift state of the checkpoint: the baseline and its open alerts, renamed
    drift = json.loads(after["extra"][0])["drift"]
    assert drift["baseline"] == json.loads(before["extra"][0])["drift"]["reference"]
    assert set(drift) >= {"baseline", "baseline_number", "baseline_info"}
    assert [a["payload"]["status"] for a in drift["open"].values()] == ["raised", "raised"]
    entries = [e for stats in drift["bounds"]["entries"].values() for e in stats.values()]
    assert entries and all(e["status"] == "raised" and "raised_at" in e for e in entries)
    for word in OLD_WORDS:
        assert word not in after["extra"][0], word


def test_a_failed_migration_leaves_the_old_store_as_it_was(old_store, monkeypatch):
    before = _raw(old_store)

    def broken(state):
        raise RuntimeError("disk went away half-way")

    monkeypatch.setattr(store_words, "_drift_state", broken)   # after the outbox rewrite
    with pytest.raises(RuntimeError, match="half-way"):
        StateStore(old_store)
    assert _raw(old_store) == before
    monkeypatch.undo()
    StateStore(old_store).close()                # and it migrates once the fault is gone
    assert _raw(old_store)["meta"]["schema_version"] == str(SCHEMA_VERSION)


def test_waiting_notifications_of_an_old_store_go_out_in_the_new_words(tmp_path, old_store,
                                                                        monkeypatch):
    secret = "the old raw secret"
    monkeypatch.setenv("HOOK_SECRET", secret)
    with VerifyingReceiver(secret.encode()) as receiver:
        cfg = tmp_path / "shoal.yaml"
        cfg.write_text(yaml.safe_dump({**OLD_CONFIG, "alerts": {
            "allow_hosts": ["127.0.0.1"],
            "webhooks": [{"url": receiver.url, "secret_env": "HOOK_SECRET"}]}}))
        settings = load_config(cfg)
        sender = AlertSender(settings, old_store)
        try:
            assert sender.drain(timeout=30)
        finally:
            sender.stop()
        taken = receiver.taken()
    assert [t[0] for t in taken] == [204] * 6       # the six that waited, verified
    payloads = [json.loads(body) for _, _, _, body in taken]
    assert [p["status"] for p in payloads] == ["raised"] * 3 + ["born"] * 2 + ["cleared"]
    assert {p["severity"] for p in payloads} == {"major", "warning"}
    assert [h["webhook-id"] for _, _, h, _ in taken] == [
        f"{p['id']}.{p['status']}" for p in payloads]
    for _, _, _, body in taken:
        for word in OLD_WORDS:
            assert word.encode() not in body, word


def test_a_migrated_store_learns_on_and_clears_its_open_alerts_in_the_new_words(tmp_path,
                                                                              old_store):
    from shoal.daemon.cli.main import main

    outbox = _raw(old_store)["outbox"]
    open_before = ({json.loads(p)["id"] for i, p, _ in outbox if i.endswith(".firing")}
                   - {json.loads(p)["id"] for i, p, _ in outbox if i.endswith(".resolved")})
    assert len(open_before) == 2
    cfg = tmp_path / "shoal.yaml"
    cfg.write_text(yaml.safe_dump(OLD_CONFIG))
    paths = lively_drops(tmp_path / "more", 8, 14)        # the drops after the first 8
    assert main(["ingest", "-c", str(cfg), *map(str, paths)]) == 0
    lines = [json.loads(x) for x in (tmp_path / "state" / "alerts.jsonl").read_text()
             .splitlines()]
    cleared = [a for a in lines if a["status"] == "cleared"]
    assert open_before & {a["id"] for a in cleared}, (open_before, cleared)
    assert {a["status"] for a in lines} <= {"raised", "cleared", "born", "retired", "merged"}
    assert all(a["schema_version"] == 1 and "baseline" in a for a in lines
               if a["kind"] == "drift")


def test_status_and_report_readers_show_an_unmigrated_store_in_the_new_words(tmp_path,
                                                                           old_store):
    # shoal status, the status page and shoal report open the store read-only, so they
    # may see a store no writer has migrated yet: they read it in the new words.
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.state.readout import StateReader, read_alerts, state_snapshot
    from shoal.daemon.views.status_text import format_status

    cfg = tmp_path / "shoal.yaml"
    cfg.write_text(yaml.safe_dump(OLD_CONFIG))
    settings = load_config(cfg)
    before = _raw(old_store)
    reader = StateReader(old_store)
    try:
        alerts = read_alerts(reader)
        text = format_status(state_snapshot(reader, settings, prepare_folders(settings)))
        drift = reader.latest_checkpoint().extra["drift"]
    finally:
        reader.close()
    assert _raw(old_store) == before                # read, not written
    assert sorted(a["status"] for a in alerts) == ["born"] * 3 + ["cleared"] + ["raised"] * 3
    assert {a["notification"].rpartition(".")[2] for a in alerts} == {"born", "raised",
                                                                       "cleared"}
    assert "alerts: 2 active now" in text, text
    assert "baseline" in drift and "reference" not in drift
    for word in ("firing", "resolved", "reference", " info "):
        assert word not in text and word not in json.dumps(alerts), word
