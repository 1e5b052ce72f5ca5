"""`shoal quarantine list | retry | drop`: a bad CSV is quarantined, listed, fixed,
retried and committed; status and the metric count it while it is there."""
import json
import sqlite3

import pytest
from prometheus_client.parser import text_string_to_metric_families

from shoal.config import load_config
from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config, write_drop
from shoal.daemon.files.layout import Layout
from shoal.daemon.runtime.metrics import build_registry, render_metrics
from shoal.daemon.state.readout import StateReader


def _run(capsys, *argv) -> tuple[int, str]:
    capsys.readouterr()
    code = main(list(argv))
    return code, capsys.readouterr().out


def _quarantine_metric(settings) -> dict:
    layout = Layout.of(settings)
    reader = StateReader(layout.db)
    try:
        text = render_metrics(build_registry(reader, layout=layout)).decode()
    finally:
        reader.close()
    fams = {f.name: f for f in text_string_to_metric_families(text)}
    held = {s.labels["reason"]: s.value for s in fams["shoal_quarantined_inputs"].samples}
    ledger = {s.labels["outcome"]: s.value for s in fams["shoal_inputs"].samples
              if s.name == "shoal_inputs_total"}
    return {"held": held, "quarantined_total": ledger.get("quarantined", 0)}


@pytest.fixture()
def setup(tmp_path):
    cfg = write_config(tmp_path)
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    good = synthetic_table(0, 700, seed=5)
    write_drop(good, inbox, "good.csv", index=0)
    bad = inbox / "sensor-7.csv"
    bad.write_text("key,ts,f1,f2,f3\nk1,1,0.5,oops,1.0\n")   # a text value in a feature
    return cfg, inbox, bad, good


def test_quarantine_list_retry_after_a_fix_and_commit(setup, capsys, tmp_path):
    cfg, inbox, bad, good = setup
    settings = load_config(cfg)
    code, out = _run(capsys, "ingest", "-c", str(cfg), str(inbox / "good.csv"), str(bad))
    assert code == 1 and "quarantined  sensor-7.csv (non_numeric_feature" in out
    code, listing = _run(capsys, "quarantine", "-c", str(cfg), "list")
    assert code == 0
    head, row = listing.splitlines()
    assert head.split()[:4] == ["name", "reason", "time", "(UTC)"]
    name, reason = row.split()[:2]
    assert name == "sensor-7.csv" and reason != "unknown"
    assert name == "sensor-7.csv" and reason == "non_numeric_feature"
    size = (tmp_path / "state" / "quarantine" / "sensor-7.csv").stat().st_size
    assert f" {size} B " in row                                 # the file's size
    code, status = _run(capsys, "status", "-c", str(cfg))
    assert f"quarantine: 1 input(s); latest sensor-7.csv: {reason}" in status
    metric = _quarantine_metric(settings)
    assert metric == {"held": {reason: 1.0}, "quarantined_total": 1.0}

    # fixed in place, then retried
    quarantined = tmp_path / "state" / "quarantine" / "sensor-7.csv"
    rows = "\n".join(f"k{i},{i},{i % 7 * 0.1},{i % 5 * 0.2},{i % 3 * 0.3}" for i in range(50))
    quarantined.write_text("key,ts,f1,f2,f3\n" + rows + "\n")
    code, out = _run(capsys, "quarantine", "-c", str(cfg), "retry", "sensor-7.csv")
    assert code == 0 and out.strip() == "retried sensor-7.csv: back in the inbox as sensor-7.csv"
    assert bad.exists() and not quarantined.exists()
    history = list((tmp_path / "state" / "quarantine" / "retried").glob("sensor-7.csv.*.json"))
    assert len(history) == 1
    old = json.loads(history[0].read_text())
    assert old["reason"] == reason and old["retried_as"] == str(bad) and old["retried_at"]
    code, listing = _run(capsys, "quarantine", "-c", str(cfg), "list")
    assert listing.strip() == "nothing in quarantine"
    code, out = _run(capsys, "ingest", "-c", str(cfg), str(bad))
    assert code == 0 and out.startswith("committed    sensor-7.csv")
    con = sqlite3.connect(tmp_path / "state" / "state.db")
    try:
        attempts = con.execute("SELECT outcome, reason FROM ledger WHERE name = ? ORDER BY id",
                               ("sensor-7.csv",)).fetchall()
    finally:
        con.close()
    assert [o for o, _ in attempts] == ["quarantined", "committed"]
    assert " · retried " in attempts[0][1]                      # the ledger shows the attempt
    code, status = _run(capsys, "status", "-c", str(cfg))
    assert "quarantine: 0 input(s)" in status
    assert _quarantine_metric(settings) == {"held": {}, "quarantined_total": 1.0}


def test_quarantine_drop_and_refusals(setup, capsys, tmp_path):
    cfg, inbox, bad, _ = setup
    assert main(["ingest", "-c", str(cfg), str(bad)]) == 1
    folder = tmp_path / "state" / "quarantine"
    assert sorted(p.name for p in folder.iterdir()) == ["sensor-7.csv", "sensor-7.csv.json"]
    code, _ = _run(capsys, "quarantine", "-c", str(cfg), "retry", "nothing.csv")
    assert code == 2
    code, _ = _run(capsys, "quarantine", "-c", str(cfg), "drop", "../state.db")
    assert code == 2
    (inbox / "sensor-7.csv").write_text("already here\n")         # the inbox name is taken
    code, _ = _run(capsys, "quarantine", "-c", str(cfg), "retry", "sensor-7.csv")
    assert code == 2 and (folder / "sensor-7.csv").exists()
    code, out = _run(capsys, "quarantine", "-c", str(cfg), "drop", "sensor-7.csv")
    assert code == 0 and out.count("deleted ") == 2
    assert [p.name for p in folder.iterdir()] == []
    # an input given on the command line is not moved: only its sidecar is there
    outside = tmp_path / "outside.csv"
    outside.write_text("key,ts,f1,f2,f3\nk,1,x,1,1\n")
    assert main(["ingest", "-c", str(cfg), str(outside)]) == 1
    code, _ = _run(capsys, "quarantine", "-c", str(cfg), "retry", "outside.csv")
    assert code == 2 and outside.exists()
