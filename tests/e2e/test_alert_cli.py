"""The alert commands as a user runs them (subprocesses): replay, demo, alerts, rebaseline.

``shoal replay`` on the demo scenario prints the compressor-drift alert at the right
place and leaves the live state untouched; the demo prints the drift alert and the
new-state alert with their explanations.
"""
import hashlib
import json
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from shoal.daemon.demo import scenario
from shoal.daemon.cli.alert_commands import replay_settings
from shoal.daemon.demo.command import DEMO_CONFIG
from drills import write_drop
from shoal.daemon.errors import UsageError

N_FILES, ROWS = 40, 4000      # the demo's defaults
TOTAL = N_FILES * ROWS
DRIFT, NEW_STATE = scenario.demo_changes(TOTAL)


def shoal(*args, timeout=300):
    return subprocess.run([sys.executable, "-m", "shoal.daemon.cli.main", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout)


def _demo_drops(folder: Path) -> list[Path]:
    """The demo's drops (same seed, changes, names and formats as ``shoal demo``)."""
    folder.mkdir(parents=True)
    out = []
    for i, columns in enumerate(scenario.drops(N_FILES, ROWS, DEMO_CONFIG["seed"], DRIFT,
                                               NEW_STATE)):
        columns.pop("state")
        name = f"fleet-{i:04d}." + ("csv" if i % 4 == 3 else "parquet")
        out.append(write_drop(pa.table(columns), folder, name))
    return out


def _snapshot(folder: Path) -> dict:
    """Every file under ``folder``: size, modification time and content hash."""
    out = {}
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            st = p.stat()
            out[str(p.relative_to(folder))] = (st.st_size, st.st_mtime_ns,
                                               hashlib.sha256(p.read_bytes()).hexdigest())
    return out


def test_replay_of_the_demo_prints_the_compressor_alert_and_leaves_live_state_alone(tmp_path):
    drops = _demo_drops(tmp_path / "history")
    live = tmp_path / "live"
    live.mkdir()
    cfg = live / "shoal.yaml"
    cfg.write_text(yaml.safe_dump({**DEMO_CONFIG, "passthrough": ["unit_id", "timestamp"],
                                   "drift": {"time_column": "timestamp"}}))
    r = shoal("ingest", "-c", cfg, *drops[:3])          # a live state with a model in it
    assert r.returncode == 0, r.stderr
    before = _snapshot(live)
    assert any(name.startswith("state/state.db") for name in before)

    replay_dir = tmp_path / "trial"
    r = shoal("replay", "-c", cfg, tmp_path / "history", "--state-dir", replay_dir)
    assert r.returncode == 0, r.stderr
    assert _snapshot(live) == before                     # the live state is untouched

    alerts = [json.loads(x) for x in (replay_dir / "alerts.jsonl").read_text().splitlines()]
    compressor = [a for a in alerts if a["status"] == "raised"
                  and a["statistic"] == "mean_shift"
                  and a["explanation"]["features"][0]["feature"] == "compressor_a"]
    assert compressor, r.stdout
    first = compressor[0]
    # at the right place: after the compressor starts to wear, before ice build-up begins
    assert DRIFT.start_row <= first["rows"]["first"] and \
        first["rows"]["last"] < NEW_STATE.start_row, first["rows"]
    assert first["explanation"]["features"][0]["shift_sd"] > 0     # current rises
    # time range from the timestamp column: one fleet minute per 8 rows
    start = scenario.START_TIME + (first["rows"]["first"] // 8) * 60_000
    assert first["time"]["first"].startswith(str(start)[:16])
    # printed with its input, id and explanation
    line = next(x for x in r.stdout.splitlines() if first["id"] in x)
    assert line.split(":")[0] in first["inputs"]
    assert f"segment {first['segment']} moved: compressor_a" in r.stdout
    # the new state shows as a fit drop explained by the fan slowing down
    fit = [a for a in alerts if a["status"] == "raised" and a["statistic"] == "fit_drop"]
    # (its first crossing window may fall in the compressor's wear, which a model with
    # the configured 50,000-row memory follows with a lag; it fires once ice builds up)
    assert fit and fit[0]["rows"]["first"] >= DRIFT.start_row
    assert fit[0]["rows"]["last"] >= NEW_STATE.start_row
    assert "fan_rpm" in fit[0]["explanation"]["summary"]
    assert "replay done" in r.stdout

    # an isolated folder that overlaps the live one is refused
    r = shoal("replay", "-c", cfg, tmp_path / "history", "--state-dir", live / "state" / "x")
    assert r.returncode == 2 and "overlaps the live folder" in r.stderr
    r = shoal("replay", "-c", cfg, tmp_path / "history", "--state-dir", replay_dir)
    assert r.returncode == 2 and "not empty" in r.stderr
    assert _snapshot(live) == before


def test_replay_settings_apply_sets_and_never_page_anyone(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({
        "features": ["a", "b"],
        "alerts": {"webhooks": [{"url": "https://hooks.example.org/x", "secret_env": "S"}],
                   "allow_hosts": ["hooks.example.org"]}}))
    live, trial = replay_settings(cfg, ["drift.bounds.mean_shift=0.8", "drift.persist=5",
                                        "segments={min: 2, max: 4}"], tmp_path / "iso")
    assert live.drift.bounds.mean_shift == 0.3 and trial.drift.bounds.mean_shift == 0.8
    assert trial.drift.persist == 5 and trial.segments.max == 4
    assert live.alerts.webhooks and trial.alerts.webhooks == ()
    assert trial.state == tmp_path / "iso" / "state" and trial.state != live.state
    assert trial.alerts.file == tmp_path / "iso" / "alerts.jsonl"
    with pytest.raises(UsageError, match="key=value"):
        replay_settings(cfg, ["drift.persist"], tmp_path / "iso")


def test_demo_prints_the_drift_and_new_state_alerts_with_explanations(tmp_path):
    r = shoal("demo", "--dir", tmp_path / "demo", timeout=600)
    assert r.returncode == 0, r.stdout + r.stderr
    out = r.stdout
    assert "drift alerts and segment events (" in out
    lines = out.splitlines()
    # the compressor drift: a segment's mean moved, compressor_a first
    at = [i for i, x in enumerate(lines) if "RAISED" in x and "mean_shift" in x]
    assert any("moved: compressor_a" in lines[i + 2] for i in at), out
    # the new state: the fit drops, the unusual rows explained by the fan slowing down
    at = [i for i, x in enumerate(lines) if "RAISED" in x and "fit_drop" in x]
    assert at and "unusual" in lines[at[0] + 2] and "fan_rpm" in lines[at[0] + 2], out
    # ice build-up is born as a new segment, announced with its
    # summary in data units, and listed among the segments nearest the ice state
    born_lines = [i for i, x in enumerate(lines) if x.strip().startswith("BORN")]
    at = [i for i in born_lines if "fan_rpm 11" in lines[i + 2]]
    assert len(at) == 1, out
    # the only other birth allowed is the worn compressor's rows (RU-03 drawing several
    # amperes more than the holding state) while the model's 50,000-row memory follows
    # the wear: never a segment of another state
    for i in born_lines:
        if i != at[0]:
            current = float(lines[i + 2].split("compressor_a ")[1].split("±")[0])
            assert current > 20.0 and "fan_rpm 14" in lines[i + 2], out
    born = int(lines[at[0]].split("segment ")[1].split()[0])
    first_row = int(lines[at[0] + 1].split("rows ")[1].split("-")[0])
    print(f"ice build-up born as segment {born} {first_row - NEW_STATE.start_row} rows after "
          "it began")
    assert 0 < first_row - NEW_STATE.start_row <= 20_000
    assert f"segment {born} born from" in lines[at[0] + 2] and "fan_rpm 11" in lines[at[0] + 2]
    assert any(x.split() == [str(born), scenario.NEW_STATE, x.split()[-1]] for x in lines), out
    # the fan-speed probes of half the fleet drop out for a while: the missing-share
    # alert names fan_rpm, and every row with min_observed (3 of 5) features has a segment
    at = [i for i, x in enumerate(lines) if "RAISED" in x and "missing_share" in x]
    assert at and all("feature fan_rpm missing from" in lines[i + 2] for i in at), out
    gappy = 0
    for path in sorted((tmp_path / "demo" / "outbox").iterdir()):
        labels = pq.read_table(path)
        observed = labels.column("observed").to_numpy()
        if (observed == 5).all():
            continue                         # not one of the drops with the outage
        segment = labels.column("segment").to_pylist()
        assert [s is not None for s in segment] == (observed >= 3).tolist(), path.name
        gappy += int((observed == 4).sum())
    assert gappy > 4000                      # a quarter of 16,000 rows: 4 units of 8, half

    cfg = tmp_path / "demo" / "shoal.yaml"
    r = shoal("alerts", "-c", cfg, "--json")
    assert r.returncode == 0, r.stderr
    listed = json.loads(r.stdout)
    assert listed and all(a["delivered_at"] for a in listed)      # the JSON-lines sink
    assert sum(x.strip().startswith(("RAISED", "CLEARED", "BORN", "RETIRED", "MERGED"))
               for x in lines) == len(listed)
    r = shoal("alerts", "-c", cfg, "--since", "1h")
    assert r.returncode == 0 and listed[0]["payload"]["id"] in r.stdout
    r = shoal("alerts", "-c", cfg, "--since", "soonish")
    assert r.returncode == 2 and "--since" in r.stderr

    # accepting the present clears every raised alert, with the reason recorded
    r = shoal("rebaseline", "-c", cfg, "--note", "ice build-up is the new normal")
    assert r.returncode == 0, r.stderr
    assert "re-baselined" in r.stdout
    after = json.loads(shoal("alerts", "-c", cfg, "--json").stdout)
    by_rebaseline = [a["payload"] for a in after if a["payload"].get("cleared_by")]
    still_raised = {a["payload"]["id"] for a in listed if a["payload"]["kind"] == "drift"} - {
        a["payload"]["id"] for a in listed if a["payload"]["status"] == "cleared"}
    assert {a["id"] for a in by_rebaseline} == still_raised
    assert all(a["note"] == "ice build-up is the new normal" for a in by_rebaseline)


def test_replay_counts_raised_cleared_and_segment_events_each_under_its_own_word(tmp_path):
    # Under the lively config eight warehouse drops raise and clear drift alerts and
    # give birth to segments; the summary line counts each kind apart, as the alert
    # file (read here) has them.
    import io
    import re

    from shoal.daemon.cli.alert_commands import replay

    from _lively import LIVELY_CONFIG, lively_drops

    lively_drops(tmp_path / "history", 0, 8)
    cfg = tmp_path / "live" / "shoal.yaml"
    cfg.parent.mkdir()
    cfg.write_text(yaml.safe_dump(LIVELY_CONFIG))
    out = io.StringIO()
    replay(cfg, tmp_path / "history", state_dir=str(tmp_path / "trial"), out=out)
    alerts = [json.loads(x) for x in (tmp_path / "trial" / "alerts.jsonl").read_text()
              .splitlines()]
    want = (sum(a["kind"] == "drift" and a["status"] == "raised" for a in alerts),
            sum(a["kind"] == "drift" and a["status"] == "cleared" for a in alerts),
            sum(a["kind"] == "lifecycle" for a in alerts))
    assert all(want), want                         # each kind happened at least once
    line = out.getvalue().splitlines()[-1]
    found = re.search(r"(\d+) alerts raised, (\d+) cleared, (\d+) segment events", line)
    assert found and tuple(map(int, found.groups())) == want, line
