"""The status endpoint and the report against a real `shoal watch` process fed 20 demo drops:
/metrics against the ledger, the status page and the report in headless Chromium, and the
endpoint's rules
(read-only, health, readiness)."""
import json
import os
import sqlite3
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from _browser import PNG_SIGNATURE, check_images, chromium, console_errors
from _ops import Watch, demo_config, demo_drops, get
from drills import ledger_counts, wait_until

N_DROPS = 20
ROWS = 500


@pytest.fixture(scope="module")
def running(tmp_path_factory):
    """A watch process with the endpoint on a free loopback port, 20 drops committed."""
    folder = tmp_path_factory.mktemp("ops")
    # Drift watching starts early and a weight_change bound far below any real move fires
    # alerts, so that the page, the metrics and the report have alerts to show.
    cfg = demo_config(folder, http={"port": 0},
                      drift={"time_column": "timestamp", "settle_rows": 2000,
                             "window_rows": 1000, "noise_multiple": 0.0, "persist": 1,
                             "bounds": {"weight_change": 1e-6}})
    watch = Watch(cfg, folder / "watch.log")
    try:
        started = watch.wait_event("http_started", timeout=60)
        assert started["address"] == "127.0.0.1"   # loopback by default
        names = demo_drops(folder / "inbox", N_DROPS, ROWS)
        db = folder / "state" / "state.db"
        wait_until(lambda: ledger_counts(db).get("committed", 0) >= N_DROPS, 120,
                   f"{N_DROPS} commits", interval=0.1)
        yield {"folder": folder, "config": cfg, "db": db, "url": started["url"],
               "names": names, "watch": watch}
    finally:
        code = watch.stop()
        assert code == 0, watch.log.read_text()[-3000:]


def _ledger(db: Path) -> dict:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        by = {o: (n, rows) for o, n, rows in con.execute(
            "SELECT outcome, COUNT(*), COALESCE(SUM(rows), 0) FROM ledger GROUP BY outcome")}
        version = int(con.execute("SELECT value FROM meta WHERE key = 'model_version'")
                      .fetchone()[0])
        segments = sorted(s for (s,) in con.execute(
            "SELECT segment FROM segment_history WHERE version = "
            "(SELECT MAX(version) FROM segment_history)"))
        alerts = [json.loads(p) for (p,) in con.execute("SELECT payload FROM alert_outbox")]
    finally:
        con.close()
    return {"by": by, "version": version, "segments": segments, "alerts": alerts}


def test_metrics_parse_and_counters_match_the_ledger(running):
    status, headers, body = get(running["url"] + "metrics")
    assert status == 200 and headers["Content-Type"].startswith("text/plain")
    families = {f.name: f for f in text_string_to_metric_families(body.decode())}
    ledger = _ledger(running["db"])
    assert ledger["by"]["committed"][0] == N_DROPS
    inputs = {s.labels["outcome"]: s.value for s in families["shoal_inputs"].samples
              if s.name == "shoal_inputs_total"}
    assert families["shoal_inputs"].type == "counter"
    assert inputs == {"committed": N_DROPS, "duplicate": 0, "quarantined": 0}
    rows = {s.labels["outcome"]: s.value for s in families["shoal_rows"].samples
            if s.name == "shoal_rows_total"}
    assert rows["committed"] == ledger["by"]["committed"][1] == N_DROPS * ROWS
    hist = {s.name: s for s in families["shoal_input_processing_seconds"].samples
            if not s.labels.get("le")}
    assert hist["shoal_input_processing_seconds_count"].value == N_DROPS
    version = families["shoal_model_version"].samples[0].value
    assert version == ledger["version"] == N_DROPS
    weights = {s.labels["segment"]: s.value for s in families["shoal_segment_weight"].samples}
    assert sorted(int(k) for k in weights) == ledger["segments"]
    assert sum(weights.values()) == pytest.approx(1.0, abs=1e-6)
    assert families["shoal_queue_depth"].samples[0].value == 0
    notes = sum(s.value for s in families["shoal_alert_notifications"].samples
                if s.name.endswith("_total"))
    assert notes == len(ledger["alerts"]) > 0
    drift = {(s.labels["segment"], s.labels["statistic"])
             for s in families["shoal_segment_drift"].samples}
    assert {(str(i), "weight_change") for i in ledger["segments"]} <= drift
    assert families["shoal_worker_healthy"].samples[0].value == 1.0
    for name in families:                       # conventions: prefix; no file names
        assert name.startswith("shoal_"), name
        for s in families[name].samples:
            assert not any(n in v for v in s.labels.values() for n in running["names"])


def test_health_readiness_status_and_read_only(running):
    url = running["url"]
    status, _, body = get(url + "healthz")
    assert status == 200 and json.loads(body)["checks"]["worker_alive"] is True
    status, _, body = get(url + "readyz")
    checks = json.loads(body)["checks"]
    assert status == 200 and checks["observer_alive"] and checks["outbox_writable"]
    status, headers, body = get(url + "status")
    snap = json.loads(body)
    assert status == 200 and headers["Content-Type"] == "application/json"
    assert snap["model_version"] == N_DROPS
    assert snap["last_input"]["name"] == running["names"][-1]
    assert snap["backlog"]["files"] == 0
    for method in ("POST", "PUT", "DELETE"):
        status, headers, _ = get(url + "status", method=method)
        assert status == 405 and headers["Allow"] == "GET, HEAD"
    assert get(url + "nothing-here")[0] == 404


def _artefacts() -> Path:
    """Where screenshots go: $SHOAL_TEST_ARTEFACTS if set, else a fresh temp folder."""
    given = os.environ.get("SHOAL_TEST_ARTEFACTS")
    if given:
        Path(given).mkdir(parents=True, exist_ok=True)
        return Path(given)
    return Path(tempfile.mkdtemp(prefix="shoal-artefacts-"))


def test_status_page_in_headless_chromium(running):
    ledger = _ledger(running["db"])
    artefacts = _artefacts()
    with chromium() as driver:
        driver.get(running["url"])
        assert driver.title == "shoal status"
        facts = {r.find_element("css selector", "th").text: r.find_element("css selector",
                                                                           "td").text
                 for r in driver.find_elements("css selector", "table#facts tr")}
        assert facts["service"].startswith(f"running, pid {running['watch'].proc.pid}")
        assert facts["quarantine"] == "0 input(s)"
        rows = driver.find_elements("css selector", "table#segments tbody tr")
        listed = sorted(int(r.get_attribute("data-segment")) for r in rows)
        first_cells = sorted(int(r.find_element("css selector", "td").text) for r in rows)
        assert listed == first_cells == ledger["segments"] and len(listed) >= 2
        check_images(driver, ["weights", "drift", "fit", "pca"])
        assert driver.find_elements("css selector", "table#alerts tbody tr")
        assert console_errors(driver) == []
        shot = artefacts / "status-page.png"
        assert driver.save_screenshot(str(shot))
    print(f"screenshot: {shot}")
    assert shot.read_bytes()[:8] == PNG_SIGNATURE and shot.stat().st_size > 10_000


def test_report_of_the_demo_run_in_headless_chromium(running, tmp_path):
    out = tmp_path / "report.html"
    # Made beside the running service: the report only reads the state.
    done = subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", "report", "-c",
                           str(running["config"]), "--out", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    text = out.read_text()
    assert "http://" not in text and "https://" not in text and "<script" not in text
    artefacts = _artefacts()
    with chromium() as driver:
        driver.get(out.as_uri())
        assert driver.title == "shoal report"
        # The plots: weights, means with baseline bands, drift against bounds, the
        # model's fit (fit_drop), recent rows by PCA; and the two tables.
        check_images(driver, ["weights", "means", "drift", "fit", "pca"])
        ids = sorted(int(r.get_attribute("data-segment")) for r in
                     driver.find_elements("css selector", "table#segments tbody tr"))
        assert ids == _ledger(running["db"])["segments"]
        alert_rows = driver.find_elements("css selector", "table#alerts tbody tr")
        assert len(alert_rows) == len(_ledger(running["db"])["alerts"]) > 0
        assert console_errors(driver) == []
        assert driver.save_screenshot(str(artefacts / "report.png"))
    print(f"screenshot: {artefacts / 'report.png'}")


def test_status_command_one_screen(running, capsys):
    from shoal.daemon.cli.main import main

    assert main(["status", "-c", str(running["config"])]) == 0
    out = capsys.readouterr().out
    ledger = _ledger(running["db"])
    lines = out.splitlines()
    assert lines[0].startswith(f"service: running, pid {running['watch'].proc.pid}, "
                               "last progress "), lines[0]
    assert lines[1].startswith(f"model version {N_DROPS},")
    assert f"inputs: {N_DROPS} committed" in out
    assert f"last input: {running['names'][-1]} (committed" in out
    listed = [int(line.split()[0]) for line in out.splitlines()
              if line.strip() and line.split()[0].isdigit()]
    assert listed == ledger["segments"]
    raised = {a["id"] for a in ledger["alerts"] if a["status"] == "raised"} - {
        a["id"] for a in ledger["alerts"] if a["status"] == "cleared"}
    assert f"alerts: {len(raised)} active now" in out, out
    assert "last error: none" in out
    assert len(out.splitlines()) <= 24                     # one terminal screen
    assert main(["status", "-c", str(running["config"]), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["model_version"] == N_DROPS
