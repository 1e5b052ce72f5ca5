"""`shoal name`: an operator's name for a segment id, shown by every view and alert
payload, following the id through merges; labels carry `segment_name` only when
configured."""
import json
import sqlite3

import pyarrow.parquet as pq
import yaml

from shoal.config import load_config
from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config, write_drop
from shoal.daemon.files.layout import Layout
from shoal.daemon.state.readout import StateReader
from shoal.daemon.views.report import build_report, render_figures, render_plots, report_data
from shoal.daemon.segments.segment_names import name_history


def _cfg(folder, names: bool):
    (folder / "inbox").mkdir(parents=True)
    # alerts on every window (a weight_change bound far below any move), no merges yet
    return write_config(folder, output={"segment_names": names},
                        lifecycle={"merge_distance": None, "check_rows": 400},
                        drift={"settle_rows": 400, "window_rows": 200, "noise_multiple": 0.0,
                               "persist": 1, "bounds": {"weight_change": 1e-6}})


def _ingest(cfg, folder, indices, prefix):
    paths = [write_drop(synthetic_table(i, 400, seed=5), folder / "inbox",
                        f"{prefix}{i}.parquet", index=i) for i in indices]
    assert main(["ingest", "-c", str(cfg), *map(str, paths)]) == 0
    return paths


def _run(capsys, *argv):
    capsys.readouterr()
    code = main(list(argv))
    return code, capsys.readouterr().out


def _payloads(folder, after_row=0):
    """Alert payloads of the outbox rows after row ``after_row``, and the last row."""
    con = sqlite3.connect(folder / "state" / "state.db")
    try:
        rows = con.execute("SELECT rowid, payload FROM alert_outbox WHERE rowid > ? "
                           "ORDER BY rowid", (after_row,)).fetchall()
    finally:
        con.close()
    return [json.loads(p) for _, p in rows], max([after_row] + [r for r, _ in rows])


def _labels(folder, name):
    path = next((folder / "outbox").glob(f"{name}.*.labels.parquet"))
    return pq.read_table(path)


def test_names_in_every_view_payload_and_labels_through_a_merge(tmp_path, capsys):
    cfg = _cfg(tmp_path, names=True)
    _ingest(cfg, tmp_path, range(4), "a")
    code, out = _run(capsys, "name", "-c", str(cfg), "1", "door traffic", "--note",
                     "seen on site", "--by", "alice")
    assert code == 0 and out.strip() == "segment 1: named 'door traffic'"
    assert _run(capsys, "name", "-c", str(cfg), "0", "base load")[0] == 0
    assert _run(capsys, "name", "-c", str(cfg), "2", "door traffic")[0] == 2   # taken
    assert _run(capsys, "name", "-c", str(cfg), "9", "x")[0] == 2              # no such id
    assert _run(capsys, "name", "-c", str(cfg), "2", "defrost")[0] == 0
    assert _run(capsys, "name", "-c", str(cfg), "2", "--clear")[0] == 0

    def views():
        code, seg = _run(capsys, "segments", "-c", str(cfg), "--json", "--all")
        seg = json.loads(seg)
        code, status = _run(capsys, "status", "-c", str(cfg))
        settings = load_config(cfg)
        layout = Layout.of(settings)
        reader = StateReader(layout.db)
        try:
            data = report_data(reader, settings, layout)
            page = build_report(data, render_plots(data, which=["weights"]), "c")
            weights = render_figures(data, which=["weights"])["weights"]
            legend = [t.get_text() for t in weights.axes[0].get_legend().get_texts()]
        finally:
            reader.close()
        return seg, status, page, legend

    seg, status, page, legend = views()
    by_id = {s["id"]: s.get("name") for s in seg["segments"]}
    assert by_id == {0: "base load", 1: "door traffic", 2: None}
    assert "door traffic" in status and "base load" in status
    assert '<td class="l name">door traffic</td>' in page
    assert "segment 1 (door traffic)" in legend and "segment 2" in legend
    history = name_history(sqlite3.connect(tmp_path / "state" / "state.db"))
    assert [(h["segment"], h["name"]) for h in history] == [
        (1, "door traffic"), (0, "base load"), (2, "defrost"), (2, None)]
    assert history[0]["by"] == "alice" and history[0]["note"] == "seen on site"

    # the next input: labels and alert payloads carry the names (a re-baseline clears
    # the alerts raised so far, one notification per segment)
    _, seen = _payloads(tmp_path)
    assert _run(capsys, "rebaseline", "-c", str(cfg), "--note", "names")[0] == 0
    _ingest(cfg, tmp_path, [4], "b")
    labels = _labels(tmp_path, "b4")
    seg_col = labels.column("segment").to_pylist()
    name_col = labels.column("segment_name").to_pylist()
    assert labels.column_names.index("segment_name") == labels.column_names.index("segment") + 1
    expect = {0: "base load", 1: "door traffic", 2: None, None: None}
    assert name_col == [expect[s] for s in seg_col] and 1 in seg_col and 2 in seg_col
    new = [p for p in _payloads(tmp_path, seen)[0] if isinstance(p.get("segment"), int)]
    assert {p["segment"] for p in new} >= {1, 2}
    assert all(p["segment_name"] == expect[p["segment"]] for p in new)
    code, shown = _run(capsys, "alerts", "-c", str(cfg))
    assert code == 0 and "segment 1 (door traffic)" in shown

    # merges: the surviving id keeps its name; the absorbed ones keep theirs in history
    c = yaml.safe_load(cfg.read_text())
    c["lifecycle"] = {"merge_distance": 1e6, "merge_measure": "bhattacharyya",
                      "check_rows": 400}
    cfg.write_text(yaml.safe_dump(c))
    _, seen = _payloads(tmp_path)
    _ingest(cfg, tmp_path, range(5, 9), "c")
    seg, status, page, legend = views()
    assert [(s["id"], s["name"]) for s in seg["segments"]] == [(0, "base load")]
    assert {g["id"]: g["name"] for g in seg["gone"]} == {1: "door traffic", 2: None}
    merged = [p for p in _payloads(tmp_path, seen)[0] if p.get("status") == "merged"]
    assert {p["segment"]: p["segment_name"] for p in merged} == {1: "door traffic", 2: None}
    assert "base load" in status and '<td class="l name">base load</td>' in page
    assert _labels(tmp_path, "c8").column("segment_name").to_pylist() == \
        ["base load"] * 400


def test_labels_have_no_segment_name_unless_configured(tmp_path, capsys):
    cfg = _cfg(tmp_path, names=False)
    _ingest(cfg, tmp_path, range(4), "a")
    assert _run(capsys, "name", "-c", str(cfg), "1", "door traffic")[0] == 0
    _ingest(cfg, tmp_path, [4], "b")
    assert "segment_name" not in _labels(tmp_path, "b4").column_names


def test_a_name_follows_its_id_through_a_split(tmp_path):
    # A segment over two real groups (the model started from a warm-up fit with one
    # component fewer, as in tests/support/_scenarios.py) is named, then splits: the older id
    # keeps its name on the larger part, the new id has none until someone names it;
    # the split event's payload, the summary and the labels say so.
    import numpy as np

    import _scenarios
    from shoal.core import StepSchedule, initialise
    from dataclasses import replace
    from shoal.daemon.segments.segment_names import set_segment_name
    from shoal.daemon.views.summary import segment_summary

    truth = _scenarios.Truth(0)
    run = _scenarios.Run(tmp_path / "run", truth, output={"segment_names": True})
    try:
        warm = truth.rows(_scenarios.SETTINGS["warmup_rows"])
        run.feed(warm)
        st, s = run.pipeline.state, run.settings
        fewer = initialise(warm, truth.K - 1, s.covariance, seed=s.seed,
                           n_init=s.learning.n_init,
                           schedule=StepSchedule(alpha=s.learning.step_exponent,
                                                 half_life_rows=s.half_life_rows),
                           reg_covar=s.learning.reg_covar,
                           refresh_rows=s.learning.refresh_rows)
        run.pipeline.state = replace(st, mixture=fewer, warmup=None)
        owner = fewer.score(truth.means).segment
        ids, counts = np.unique(owner, return_counts=True)
        assert counts.max() == 2, "seed 0 lumps two groups into one segment"
        lumped = int(ids[np.argmax(counts)])
        set_segment_name(run.layout.db, lumped, "two in one", by="test")
        run.feed(truth.rows(60_000))
        splits = [e for e in run.events("split") if e["segment"] == lumped]
        assert len(splits) == 1, run.events()
        new = splits[0]["explanation"]["new"]
        assert splits[0]["segment_name"] == "two in one"
        summary = {x["id"]: x for x in segment_summary(run.store, run.settings)["segments"]}
        assert summary[lumped]["name"] == "two in one"
        assert summary[new]["name"] is None
        # the newest labels file: rows of the older id carry its name, the new id's none
        newest = max(run.layout.outbox.glob("*.labels.parquet"), key=lambda p: p.stat().st_mtime_ns)
        labels = pq.read_table(newest).to_pydict()
        pairs = set(zip(labels["segment"], labels["segment_name"]))
        assert (lumped, "two in one") in pairs and (new, None) in pairs, pairs
        assert all(name is None for seg, name in pairs if seg != lumped)
    finally:
        run.close()
