"""The report's plots on the data's own time (or on stream rows), the fit panel, series
told apart without colour, and re-baselines and lifecycle events marked on every time
axis; checked from the drawn figures (their axes and lines), not from the PNG."""
import datetime as dt
import math

import matplotlib.dates as mdates
import numpy as np
import pytest

from _replay import DAYS, FIRST_DAY, REBASELINE_AFTER, ROWS, replay
from shoal.daemon.errors import UsageError
from shoal.daemon.state.readout import StateReader
from shoal.daemon.views.report import build_report, render_figures, render_plots, report_data
from shoal.daemon.views.timeline import Axis, axis_events, event_kind, parse_bound

TIME_PLOTS = ("weights", "means", "drift", "fit")
FIRST = FIRST_DAY.astype("datetime64[s]").astype(int)            # 2026-01-01 00:00 UTC
LAST = FIRST + (DAYS - 1) * 86400 + (ROWS - 1) * 180                 # day 30, 19:57 UTC


def _replayed(folder, **kw):
    settings, layout, names = replay(folder, **kw)
    reader = StateReader(layout.db)
    try:
        data = report_data(reader, settings, layout)
        yield {"settings": settings, "layout": layout, "names": names, "data": data,
               "figures": render_figures(data), "reader": reader}
    finally:
        reader.close()


@pytest.fixture(scope="module")
def on_time(tmp_path_factory):
    yield from _replayed(tmp_path_factory.mktemp("days"))


@pytest.fixture(scope="module")
def on_rows(tmp_path_factory):
    yield from _replayed(tmp_path_factory.mktemp("rows"), time_column=False)


def _seconds(x) -> float:
    return mdates.num2date(x, tz=dt.timezone.utc).timestamp()


def _time_axes(figures):
    for name in TIME_PLOTS:
        for ax in figures[name].axes:
            if ax.get_visible() and ax.get_lines():
                yield name, ax


def test_plots_span_the_thirty_days_of_data_time(on_time):
    assert on_time["data"]["axis"].kind == "time"
    checked = 0
    for name, ax in _time_axes(on_time["figures"]):
        lo, hi = (_seconds(x) for x in ax.get_xlim())
        assert lo <= FIRST + 1 and hi >= LAST - 1, (name, lo, hi)
        assert hi - lo < (DAYS + 1) * 86400, name      # not padded out to commit time
        for line in ax.get_lines():
            if (line.get_gid() or "").startswith("segment:"):
                xs = [_seconds(x) for x in line.get_xdata()
                      if not math.isnan(x)]
                assert min(xs) >= FIRST and max(xs) <= LAST, name
        checked += 1
    assert checked >= len(TIME_PLOTS)
    weights = on_time["figures"]["weights"].axes[0]
    xs = [x for line in weights.get_lines() if line.get_gid() == "segment:0"
          for x in line.get_xdata()]
    # one point per committed input after warm-up, at the newest time of its day
    assert _seconds(max(xs)) == LAST
    assert (_seconds(max(xs)) - _seconds(min(xs))) / 86400 > 20


def test_without_a_time_column_the_plots_are_on_stream_rows(on_rows):
    data = on_rows["data"]
    assert data["axis"].kind == "rows"
    for name, ax in _time_axes(on_rows["figures"]):
        lo, hi = ax.get_xlim()
        assert lo <= 0 + ROWS and hi >= DAYS * ROWS, (name, lo, hi)
        assert hi <= DAYS * ROWS * 1.05
    weights = on_rows["figures"]["weights"].axes[0]
    seg0 = next(line for line in weights.get_lines() if line.get_gid() == "segment:0")
    assert max(seg0.get_xdata()) == DAYS * ROWS
    assert weights.get_xlabel().startswith("stream rows")   # 30 inputs: too many to name


def test_since_and_until_in_the_axis_units(on_time, on_rows):
    s, lay, rd = on_time["settings"], on_time["layout"], on_time["reader"]
    data = report_data(rd, s, lay, since="2026-01-10", until="2026-01-19T23:00")
    assert {h["version"] for h in data["history"]} <= set(range(10, 20))
    lo, hi = data["view"]
    assert lo == dt.datetime(2026, 1, 10, tzinfo=dt.timezone.utc).timestamp()
    assert hi == FIRST + 18 * 86400 + (ROWS - 1) * 180             # day 19's last row
    last_week = report_data(rd, s, lay, since="7d")
    assert last_week["shown_inputs"] == 8        # newest 30th 19:57 - 7 days: days 23-30
    rows = report_data(on_rows["reader"], on_rows["settings"], on_rows["layout"],
                       since="4k", until="6000")
    assert rows["shown_inputs"] == 6                             # inputs ending at rows 4000..6000
    figs = render_figures(rows, which=["weights"])
    ax = figs["weights"].axes[0]
    assert ax.get_xlim() == (4000.0, 6000.0)
    names = [t.get_text() for t in ax.get_xticklabels()]
    assert names == on_rows["names"][9:15]                       # few inputs: their names
    with pytest.raises(UsageError, match="stream row"):
        report_data(on_rows["reader"], on_rows["settings"], on_rows["layout"], since="7d")
    with pytest.raises(UsageError, match="data time"):
        report_data(rd, s, lay, since="row 7")
    with pytest.raises(UsageError, match="before"):
        report_data(rd, s, lay, since="2026-01-20", until="2026-01-10")


def test_fit_panel_draws_fit_drop_against_the_labels(on_time):
    fig = on_time["figures"]["fit"]
    ax = fig.axes[0]
    line = next(l for l in ax.get_lines() if l.get_gid() == "fit_drop")
    ys = np.asarray(line.get_ydata(), float)
    assert np.isfinite(ys).sum() >= 15
    bound = on_time["settings"].drift.bounds.fit_drop
    assert any(l.get_label() == "bound" and l.get_ydata()[0] == bound for l in ax.get_lines())
    # Independent recomputation for the last input: the baseline's mean log-density per
    # row (latest checkpoint) minus the mean of the labels file's log_density column.
    import json

    import pyarrow.parquet as pq

    rd = on_time["reader"]
    extra = json.loads(rd.db.execute("SELECT extra FROM checkpoints ORDER BY version DESC "
                                     "LIMIT 1").fetchone()[0])
    last = rd.ledger("committed")[-1]
    ld = pq.read_table(on_time["layout"].outbox / last.labels,
                       columns=["log_density"]).column(0).to_numpy()
    expected = extra["drift"]["baseline"]["log_density"] - float(np.nanmean(ld))
    assert ys[np.isfinite(ys)][-1] == pytest.approx(expected, rel=1e-12)


def test_every_series_has_its_own_line_style_and_marker(on_time):
    seen = 0
    for name, ax in _time_axes(on_time["figures"]):
        pairs = {}
        for line in ax.get_lines():
            gid = line.get_gid() or ""
            if gid.startswith("segment:"):
                pairs[gid] = (line.get_linestyle(), line.get_marker())
        assert len(set(pairs.values())) == len(pairs), (name, pairs)
        seen = max(seen, len(pairs))
    assert seen >= 6          # the replay's births give more segments than colours differ by
    from shoal.daemon.views.plots import segment_style

    styles = {(segment_style(i)["linestyle"], segment_style(i)["marker"]) for i in range(48)}
    assert len(styles) == 48


def test_rebaseline_and_lifecycle_events_marked_on_every_time_axis(on_time):
    data = on_time["data"]
    kinds = {e["kind"] for e in data["events"]}
    assert {"rebaseline", "born", "retired"} <= kinds
    axis = data["axis"]
    rebaseline_x = {e["x"] for e in data["events"] if e["kind"] == "rebaseline"}
    assert rebaseline_x == {axis.x[REBASELINE_AFTER + 1]}   # applied with the next input
    for name, ax in _time_axes(on_time["figures"]):
        marks = {}
        for line in ax.get_lines():
            gid = line.get_gid() or ""
            if gid.startswith("event:"):
                assert line.get_linestyle() == "None" and line.get_marker() not in ("", "None")
                marks[gid[6:]] = {_seconds(x) for x in line.get_xdata()}
        assert set(marks) == kinds, name
        assert marks["rebaseline"] == rebaseline_x
        for kind in kinds:
            assert marks[kind] == {e["x"] for e in data["events"] if e["kind"] == kind}
    legend = on_time["figures"]["weights"].axes[0].get_legend()
    assert {"re-baseline", "segment born", "segment retired"} <= \
        {t.get_text() for t in legend.get_texts()}
    # Drift lines do not join values measured against different baselines.
    drift_ax = on_time["figures"]["drift"].axes[0]
    seg = next(l for l in drift_ax.get_lines() if l.get_gid() == "segment:0")
    xs = np.asarray(seg.get_xdata(), float)
    gap = [i for i, x in enumerate(xs) if math.isnan(x)]
    assert gap, "no break at the re-baseline"
    assert _seconds(xs[gap[0] - 1]) <= min(rebaseline_x) < _seconds(xs[gap[0] + 1])


def test_event_kinds_and_merges():
    assert event_kind("merged into 2 at row 400") == "merged"
    assert event_kind(" absorbed 5 at row 400") is None          # the merge is marked once
    assert event_kind("split from 3 at row 9") == "split"
    axis = Axis("rows", "stream rows", x={1: 100.0, 2: 200.0})
    events = axis_events(axis, [{"version": 2, "segment": 5, "event": "merged into 2 at row 150"},
                                {"version": 2, "segment": 2, "event": "absorbed 5 at row 150"}],
                         [{"model_version": 1, "applied": 1.0, "note": "n"},
                          {"model_version": 2, "applied": None, "note": "pending"}])
    assert [(e["kind"], e["x"]) for e in events] == [("rebaseline", 100.0), ("merged", 200.0)]
    with pytest.raises(UsageError):
        parse_bound("yesterday", Axis("time", "t", x={1: 0.0}))


def test_meta_line_says_what_the_history_covers(on_time):
    data = on_time["data"]
    text = build_report(data, render_plots(data, which=["weights"]), "shoal.yaml")
    meta = text.split('<p class="meta">', 1)[1].split("</p>", 1)[0]
    assert not meta.rstrip().endswith("history")
    assert "history: all 30 inputs, 2026-01-01 00:00 UTC to 2026-01-30 19:57 UTC" in meta
    assert "column timestamp" in meta


def test_thirty_day_report_in_headless_chromium(on_time, tmp_path):
    from _browser import check_images, chromium, console_errors
    from shoal.daemon.views.report import REPORT_PLOTS, write_report

    out = write_report(on_time["reader"], on_time["settings"], on_time["layout"],
                       tmp_path / "report.html", config="shoal.yaml")
    with chromium() as driver:
        driver.get(out.as_uri())
        assert driver.title == "shoal report"
        check_images(driver, list(REPORT_PLOTS))
        assert len(driver.find_elements("css selector", "figure img")) == len(REPORT_PLOTS)
        assert console_errors(driver) == []


def _report_of_csv_drops(tmp_path, drift: dict, n: int, **bounds) -> dict:
    """The report's data after ``shoal ingest`` of ``n`` CSV drops of 300 rows whose
    ``ts`` counts rows from 0."""
    from shoal.config import load_config
    from shoal.daemon.cli.main import main
    from drills import synthetic_table, write_config, write_drop
    from shoal.daemon.files.layout import Layout

    cfg = write_config(tmp_path, drift={"time_column": "ts", **drift})
    (tmp_path / "inbox").mkdir()
    paths = [write_drop(synthetic_table(i, 300, seed=2), tmp_path / "inbox", f"n{i}.csv",
                        index=i) for i in range(n)]
    assert main(["ingest", "-c", str(cfg), *map(str, paths)]) == 0
    settings = load_config(cfg)
    reader = StateReader(Layout.of(settings).db)
    try:
        return report_data(reader, settings, Layout.of(settings), **bounds)
    finally:
        reader.close()


def test_a_numeric_time_column_is_drawn_in_its_own_units(tmp_path, capsys):
    data = _report_of_csv_drops(tmp_path, {"settle_rows": 400, "window_rows": 200}, 6,
                                since="900")
    axis = data["axis"]
    assert axis.kind == "number" and axis.x[6] == 6 * 300 - 1    # ts counts rows from 0
    assert data["view"] == (900.0, 1799.0) and data["shown_inputs"] == 3
    ax = render_figures(data, which=["weights"])["weights"].axes[0]
    assert ax.get_xlim() == (900.0, 1799.0) and ax.get_xlabel().startswith("ts")


def test_epoch_numbers_with_a_time_unit_put_the_report_on_data_time(tmp_path):
    """With drift.time_unit the report reads a numeric time column as the alerts do:
    epoch times, drawn as UTC dates (without it: the column's own units, above)."""
    axis = _report_of_csv_drops(tmp_path, {"time_unit": "ms"}, 3)["axis"]
    # ts counts rows from 0: the last row of the third input, 899, is 0.899 s after 1970
    assert axis.kind == "time" and axis.x[3] == 0.899
    assert axis.describe(axis.x[3]) == "1970-01-01 00:00 UTC"
