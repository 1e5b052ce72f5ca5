"""CSV as it comes: bad rows skipped or quarantined, delimiters, decimal commas, files
without a header, .tsv; an empty feature value is a missing value, never a bad row."""
import json

import pyarrow.parquet as pq

from shoal.daemon.cli.main import main
from drills import synthetic_table, write_config

SEED = 23
HEADER = "key,ts,f1,f2,f3"


def _rows(index, n=300):
    t = synthetic_table(index, n, SEED)
    cols = [t.column(c).to_pylist() for c in ("key", "ts", "f1", "f2", "f3")]
    return [list(r) for r in zip(*cols)]


def _text(rows, sep=",", decimal=".", header=HEADER):
    def cell(v):
        return f"{v:.6f}".replace(".", decimal) if isinstance(v, float) else str(v)
    lines = ([header.replace(",", sep)] if header else []) + \
        [sep.join(cell(v) for v in r) for r in rows]
    return "\n".join(lines) + "\n"


def _ingest(tmp_path, files, **config):
    # every feature required: a row with an empty value is invalid (null segment)
    cfg = write_config(tmp_path, warmup_rows=250, learning={"min_observed": 3}, **config)
    drops = tmp_path / "drops"
    drops.mkdir(exist_ok=True)
    paths = []
    for name, text in files:
        (drops / name).write_text(text)
        paths.append(drops / name)
    return main(["ingest", "-c", str(cfg), *map(str, paths)])


def _labels(tmp_path, stem):
    [path] = (tmp_path / "outbox").glob(f"{stem}.*.labels.parquet")
    return path, pq.read_table(path)


def test_bad_rows_are_skipped_with_their_lines_in_a_sidecar(tmp_path, capsys):
    rows = _rows(0)
    text = _text(rows).splitlines()
    text[4] = text[4].rsplit(",", 1)[0] + ",ERR"        # line 5: a token that is no number
    text[9] = text[9] + ",7"                             # line 10: one field too many
    text[14] = text[14].rsplit(",", 2)[0] + ",,"         # line 15: empty values: missing
    assert _ingest(tmp_path, [("a.csv", "\n".join(text) + "\n")],
                   input={"bad_rows": "skip"}) == 0
    path, table = _labels(tmp_path, "a")
    assert table.num_rows == 298
    skipped_keys = {rows[3][0], rows[8][0]}
    assert not skipped_keys & set(table.column("key").to_pylist())
    side = json.loads(path.with_name(f"_{path.name}.bad_rows.json").read_text())
    assert (side["rows_skipped"], side["lines"]) == (2, [5, 10])
    # the row with empty values is kept, invalid (null segment)
    keys = table.column("key").to_pylist()
    assert table.column("segment")[keys.index(rows[13][0])].as_py() is None
    events = [json.loads(line) for line in capsys.readouterr().err.splitlines()
              if line.startswith("{")]
    [skipped] = [e for e in events if e["event"] == "rows_skipped"]
    assert (skipped["rows"], skipped["lines"]) == (2, [5, 10])


def test_by_default_a_bad_token_quarantines_but_an_empty_value_does_not(tmp_path):
    text = _text(_rows(0)).splitlines()
    text[20] = text[20].rsplit(",", 1)[0] + ","
    good = "\n".join(text) + "\n"
    text[30] = text[30].rsplit(",", 1)[0] + ",ERR"
    assert _ingest(tmp_path, [("a.csv", good), ("b.csv", "\n".join(text) + "\n")]) == 1
    side = json.loads((tmp_path / "state" / "quarantine" / "b.csv.json").read_text())
    assert "line 31" in side["detail"]
    _, table = _labels(tmp_path, "a")
    assert table.column("segment").null_count == 1


def test_semicolons_decimal_commas_tabs_and_headerless_files(tmp_path):
    rows = [_rows(i) for i in range(4)]
    files = [("semi.csv", _text(rows[0], sep=";", decimal=",")),
             ("tabs.tsv", _text(rows[1], sep="\t", decimal=",")),
             ("more.csv", _text(rows[2], sep=";", decimal=","))]
    assert _ingest(tmp_path, files, input={"delimiter": ";", "decimal": ","}) == 0
    for (name, _), want in zip(files, rows):
        _, table = _labels(tmp_path, name.split(".")[0])
        assert table.column("key").to_pylist() == [r[0] for r in want]
        assert table.column("segment").null_count == 0
    headless = tmp_path / "headless"
    assert _ingest(headless, [("nohead.csv", _text(rows[3], header=None))],
                   input={"columns": ["key", "ts", "f1", "f2", "f3"]}) == 0
    _, table = _labels(headless, "nohead")
    assert table.column("key").to_pylist() == [r[0] for r in rows[3]]   # no row lost


def test_every_ignored_name_is_logged_once(tmp_path, caplog):
    import logging

    from shoal.daemon.intake.gate import ReadinessGate, input_kind

    gate = ReadinessGate(0.0, ["*.tmp", ".*"])
    for name in ("..csv", ".hidden.parquet", "..csv", "part.tmp"):
        (tmp_path / name).write_text("x")
    with caplog.at_level(logging.INFO, logger="shoal"):
        for name in ("..csv", ".hidden.parquet", "..csv", "part.tmp", "..csv"):
            assert gate.check(tmp_path / name).verdict.value == "ignore"
    told = [(r.fields["file"], r.fields["pattern"]) for r in caplog.records
            if getattr(r, "event", None) == "input_ignored"]
    assert told == [("..csv", ".*"), (".hidden.parquet", ".*"), ("part.tmp", "*.tmp")]
    assert (input_kind("a.tsv"), input_kind("a.TSV.gz")) == ("tsv", "tsv.gz")
