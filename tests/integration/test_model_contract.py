"""The model's contract (feature names in order, covariance, segments, schedule) is kept
with the model: a config that differs is refused by name where it would change what the
model means, taken going forward where that is safe, and shown by status and report."""
import json
import sqlite3
import subprocess
import sys

import pytest
import yaml

from _ops import parquet_drops
from shoal.daemon.cli.main import main
from drills import write_config

SEED = 13


def _drops(folder, first, n):
    return parquet_drops(folder, first, n, SEED)


def _with(cfg, **changes):
    data = yaml.safe_load(cfg.read_text())
    data.update(changes)
    cfg.write_text(yaml.safe_dump(data))


def _ledger(db):
    con = sqlite3.connect(db)
    try:
        return con.execute("SELECT COUNT(*), MAX(model_version) FROM ledger").fetchone()
    finally:
        con.close()


def _events(text, name):
    return [json.loads(line) for line in text.splitlines()
            if line.startswith("{") and json.loads(line).get("event") == name]


@pytest.fixture
def learned(tmp_path, capsys):
    """A state folder whose model learned three drops with features [f1, f2, f3]."""
    cfg = write_config(tmp_path, half_life_rows=5000)
    assert main(["ingest", "-c", str(cfg), *map(str, _drops(tmp_path, 0, 3))]) == 0
    capsys.readouterr()
    return cfg


def test_a_config_that_redefines_the_model_is_refused_naming_each_key(learned, tmp_path,
                                                                      capsys):
    db = tmp_path / "state" / "state.db"
    before = _ledger(db)
    _with(learned, features=["f3", "f2", "f1"], covariance="diag", segments=4)
    new = _drops(tmp_path, 3, 1)
    for argv in (["ingest", "-c", str(learned), str(new[0])], ["config", "-c", str(learned)],
                 ["label", "-c", str(learned), str(new[0]), "--out", str(tmp_path / "l.parquet")]):
        assert main(argv) == 2, argv
        err = capsys.readouterr().err
        for needle in ("features: stored ['f1', 'f2', 'f3'], configured ['f3', 'f2', 'f1']",
                       "covariance: stored 'full', configured 'diag'",
                       "segments: stored 3, configured 4"):
            assert needle in err, (argv, err)
        assert "Traceback" not in err
    _with(learned, features=["f1", "f2", "temperature"], covariance="full", segments=3)
    r = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "watch", "-c", str(learned)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "features: stored ['f1', 'f2', 'f3'], configured ['f1', 'f2', 'temperature']" \
        in r.stderr
    assert _ledger(db) == before           # nothing was taken under the wrong contract


def test_a_new_half_life_is_taken_going_forward_and_logged(learned, tmp_path, capsys):
    _with(learned, half_life_rows=2000)
    assert main(["config", "-c", str(learned)]) == 0
    assert "taken going forward: half_life_rows 5000 -> 2000" in capsys.readouterr().out
    assert main(["ingest", "-c", str(learned), str(_drops(tmp_path, 3, 1)[0])]) == 0
    changed = _events(capsys.readouterr().err, "model_contract_changed")
    assert [(e["key"], e["stored"], e["configured"]) for e in changed] == [
        ("half_life_rows", 5000, 2000)]
    con = sqlite3.connect(tmp_path / "state" / "state.db")
    meta = json.loads(con.execute("SELECT meta FROM checkpoints ORDER BY version DESC "
                                  "LIMIT 1").fetchone()[0])
    contract = json.loads(con.execute("SELECT value FROM meta WHERE key = "
                                      "'model_contract'").fetchone()[0])
    con.close()
    assert meta["schedule"]["half_life_rows"] == 2000 and contract["half_life_rows"] == 2000
    _with(learned, half_life_rows=None)   # forgetting switched off: the model converges
    assert main(["ingest", "-c", str(learned), str(_drops(tmp_path, 4, 1)[0])]) == 2
    assert "half_life_rows: stored 2000, configured None" in capsys.readouterr().err


def test_status_report_and_segments_show_the_stored_model_when_the_config_differs(
        learned, tmp_path, capsys):
    assert main(["segments", "-c", str(learned), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    means = {s["id"]: s["mean"] for s in shown["segments"]}
    _with(learned, features=["f3", "f2", "f1"])
    assert main(["status", "-c", str(learned)]) == 0
    out = capsys.readouterr().out
    assert "the config differs from the stored model" in out
    assert "features: stored ['f1', 'f2', 'f3'], configured ['f3', 'f2', 'f1']" in out
    assert main(["segments", "-c", str(learned), "--json"]) == 0
    again = json.loads(capsys.readouterr().out)
    assert {s["id"]: s["mean"] for s in again["segments"]} == means   # under the right names
    _with(learned, features=["f1", "f2", "f3", "f4"])                 # one more feature
    report = tmp_path / "r.html"
    assert main(["report", "-c", str(learned), "--out", str(report)]) == 0
    capsys.readouterr()
    assert "configured [&#x27;f1&#x27;, &#x27;f2&#x27;, &#x27;f3&#x27;, &#x27;f4&#x27;]" \
        in report.read_text()
    assert main(["status", "-c", str(learned), "--json"]) == 0
    snap = json.loads(capsys.readouterr().out)
    assert snap["features"] == ["f1", "f2", "f3"]
    assert [d["key"] for d in snap["config_differs"]] == ["features"]


def test_a_store_without_a_contract_adopts_a_consistent_config_and_refuses_another(
        learned, tmp_path, capsys):
    db = tmp_path / "state" / "state.db"
    con = sqlite3.connect(db)
    with con:                              # as a store made before the contract was kept
        con.execute("DELETE FROM meta WHERE key = 'model_contract'")
    con.close()
    _with(learned, features=["f1", "f2", "f3", "f4"])
    assert main(["ingest", "-c", str(learned), str(_drops(tmp_path, 3, 1)[0])]) == 2
    assert "features: stored '3 features (names not recorded)'" in capsys.readouterr().err
    _with(learned, features=["f1", "f2", "f3"])
    assert main(["ingest", "-c", str(learned), str(_drops(tmp_path, 4, 1)[0])]) == 0
    recorded = _events(capsys.readouterr().err, "model_contract_recorded")
    assert len(recorded) == 1 and recorded[0]["contract"]["features"] == ["f1", "f2", "f3"]
    _with(learned, features=["f3", "f2", "f1"])   # from now on the names are known
    assert main(["ingest", "-c", str(learned), str(_drops(tmp_path, 5, 1)[0])]) == 2


def test_while_the_warm_up_fills_only_the_features_are_fixed(tmp_path, capsys):
    cfg = write_config(tmp_path, warmup_rows=5000)
    assert main(["ingest", "-c", str(cfg), str(_drops(tmp_path, 0, 1)[0])]) == 0
    _with(cfg, features=["f3", "f2", "f1"])   # the buffered rows are in the stored order
    assert main(["ingest", "-c", str(cfg), str(_drops(tmp_path, 1, 1)[0])]) == 2
    assert "features: stored ['f1', 'f2', 'f3']" in capsys.readouterr().err
    _with(cfg, features=["f1", "f2", "f3"], covariance="diag", segments=4, warmup_rows=600)
    assert main(["ingest", "-c", str(cfg), str(_drops(tmp_path, 1, 1)[0])]) == 0
    changed = {e["key"] for e in _events(capsys.readouterr().err, "model_contract_changed")}
    assert changed == {"covariance", "segments", "warmup_rows"}
    con = sqlite3.connect(tmp_path / "state" / "state.db")
    meta = json.loads(con.execute("SELECT meta FROM checkpoints").fetchone()[0])
    con.close()
    assert meta["covariance"] == "diag"    # the first model is fitted as now configured
    _with(cfg, covariance="full")
    assert main(["ingest", "-c", str(cfg), str(_drops(tmp_path, 2, 1)[0])]) == 2
    assert "covariance: stored 'diag', configured 'full'" in capsys.readouterr().err


def test_a_long_feature_list_is_cut_in_the_refusal_with_its_first_difference(tmp_path):
    from shoal.config import ConfigError, parse_config
    from shoal.daemon.model.contract import check_model_contract, model_contract
    from shoal.daemon.state.store import LedgerEntry, StateStore

    names = [f"sensor_{i:03d}" for i in range(400)]
    stored = parse_config({"features": names, "warmup_rows": 1000}, base_dir=tmp_path)
    store = StateStore(tmp_path / "state.db")
    try:
        store.set_model_contract(model_contract(stored))
        store.commit_input(LedgerEntry("d", "a.csv", 1, "committed"), learned=True)
        moved = names[:200] + ["sensor_x"] + names[201:]
        configured = parse_config({"features": moved, "warmup_rows": 1000}, base_dir=tmp_path)
        with pytest.raises(ConfigError) as caught:
            check_model_contract(store, configured, write=False)
    finally:
        store.close()
    message = str(caught.value)
    assert "(400 items)" in message and len(message) < 800, message
    assert "first difference at position 201: stored 'sensor_200', configured 'sensor_x'" \
        in message
