"""Property-based fuzzing of the readers and validation.

Generated CSV (column order and extra columns, quoting, UTF-8 with and without a
BOM, Latin-1 and UTF-16, numbers written in many ways, huge and tiny values, empty
cells, CRLF) and Parquet (types, nulls, row groups, compression, dictionaries,
nested extra columns) files go through ``Pipeline.process``, the call the
service's loop makes for every input. Each must come back committed (labels for
every row, a null segment exactly on the rows with an infinite or out-of-range
feature, or with fewer than half their features present (not null, NaN or empty)) or quarantined with a reason and a sidecar; ``process`` never raises,
the outbox only ever holds complete labels files, and the model stays finite.

A generator knows what it made: a well-formed file must be committed, a broken
one quarantined; only a few cases (a flipped byte in a Parquet file) may go either
way. CI runs a bounded number of examples; ``SHOAL_DEEP=1`` runs many more
(``SHOAL_DEEP_EXAMPLES``, default 20,000 per test) for long runs.
"""
import codecs
import itertools
import json
import math
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shoal.daemon.ingest import rows as rows_module
from drills import synthetic_table, write_config

DEEP = os.environ.get("SHOAL_DEEP") == "1"
EXAMPLES = int(os.environ.get("SHOAL_DEEP_EXAMPLES", 20_000)) if DEEP else 60
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=not DEEP,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
REQUIRED = ["key", "ts", "f1", "f2", "f3"]
FEATURES = REQUIRED[2:]


class Harness:
    """One pipeline with a fitted model, fed one generated file after another."""

    def __init__(self, folder):
        from shoal.config import load_config
        from shoal.daemon.files.layout import prepare_folders
        from shoal.daemon.ingest.pipeline import Pipeline
        from shoal.daemon.state.store import StateStore

        cfg = write_config(folder, segments=2, warmup_rows=100,
                           limits={"max_rows": 5000, "max_columns": 40,
                                   "max_file_bytes": 2_000_000})
        self.settings = load_config(cfg)
        self.layout = prepare_folders(self.settings)
        self.store = StateStore(self.layout.db)
        self.pipeline = Pipeline(self.settings, self.layout, self.store)
        self.n = itertools.count()
        seed = self.layout.inbox / "seed.parquet"
        pq.write_table(synthetic_table(0, 200, 1), seed)
        assert self.pipeline.process(seed).outcome == "committed"
        self.outputs = 1

    def run(self, data: bytes, suffix: str):
        name = f"fz-{next(self.n):06d}.{suffix}"
        path = self.layout.inbox / name
        path.write_bytes(data)
        before = self.pipeline.state.version
        result = self.pipeline.process(path)  # must not raise
        assert not path.exists(), "the input stays in the inbox"
        if result.outcome in ("committed", "duplicate"):
            self.outputs += 1
            assert (self.layout.processed / name).exists()
            assert result.model_version == before + (result.outcome == "committed")
        else:
            assert result.outcome == "quarantined", result
            side = json.loads((self.layout.quarantine / f"{name}.json").read_text())
            assert side["reason"] == result.reason and side["reason"] and side["detail"]
            assert (self.layout.quarantine / name).exists()
            assert self.pipeline.state.version == before
        outbox = sorted(p.name for p in self.layout.outbox.iterdir())
        assert len(outbox) == self.outputs, "partial or missing output"
        assert all(n.endswith(".labels.parquet") for n in outbox), outbox
        mixture = self.pipeline.state.mixture
        for arr in (mixture.weights, mixture.means):
            assert np.isfinite(arr).all(), "the model took a non-finite value"
        return result

    def check(self, case, suffix: str) -> None:
        """Run one generated ``(data, expect, keys, valid)`` case; check what came out."""
        data, expect, keys, valid = case
        result = self.run(data, suffix)
        if expect == "quarantine":
            assert result.outcome == "quarantined", result
        elif expect == "commit":
            assert result.outcome in ("committed", "duplicate"), result
        if result.outcome != "quarantined" and expect != "either":
            self.check_labels(result, keys, valid)

    def check_labels(self, result, keys: list, valid: list) -> None:
        """``valid``: per row, None for a row the generator made invalid, else its features."""
        table = pq.read_table(result.labels)
        assert table.num_rows == len(keys)
        # an empty CSV value of a pass-through column is null in the labels
        assert table.column("key").to_pylist() == [None if k == "" else k for k in keys]
        segment = table.column("segment").to_pylist()
        # Once a model exists, rows beyond MODEL_RANGE_SDS warm-up standard deviations
        # of its pivot are invalid too (README, "Running the service").
        mixture = self.pipeline.state.mixture
        reach = rows_module.MODEL_RANGE_SDS * mixture.scale
        expected = [v is not None
                    and bool(np.all((np.abs(np.array(v) - mixture.center) <= reach)
                                    | np.isnan(np.array(v))))
                    for v in valid]
        assert [s is not None for s in segment] == expected
        ids = set(self.pipeline.state.mixture.ids.tolist())
        assert {s for s in segment if s is not None} <= ids
        conf = np.array([c for c in table.column("confidence").to_pylist() if c is not None])
        assert ((conf > 0) & (conf <= 1)).all()


@pytest.fixture(scope="module")
def harness(tmp_path_factory):
    h = Harness(tmp_path_factory.mktemp("fuzz"))
    yield h
    h.store.close()


# -- CSV ---------------------------------------------------------------------------
# Numbers as people and programs write them; the value (or None for an empty cell)
# is what Python's float() makes of the text (pyarrow's parser agrees on these).
_ODD = ["+1.5", "007.5", ".5", "5.", "1E3", "1e+3", "-0", "0.0", "5e-324", "-1e-400",
        "1.7976931348623157e308", "1e400", "-1e400", " 2.5", "2.5 ", "nan", "NaN", "-nan",
        "inf", "-Infinity", "Inf", ""]
numbers = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.floats(-1e6, 1e6).map(lambda v: f"{v:.3e}"),
    st.integers(-10**20, 10**20).map(str),
    st.sampled_from(_ODD))
not_numbers = st.sampled_from(["abc", "0x10", "--1", "1.2.3", "1_000", "one", "1e", "+-2"])
key_text = st.text(st.characters(blacklist_categories=("Cs", "Cc")), max_size=12)
extra_names = st.text("abcdefgh_", min_size=1, max_size=6).filter(lambda s: s not in REQUIRED)


def _usable(value) -> bool:
    """A feature value that is learned from: not null, finite, within +-1e50 (readers'
    FEATURE_BOUND, past which squares overflow)."""
    return value is not None and abs(float(value)) <= 1e50


def _missing(value) -> bool:
    return value is None or math.isnan(float(value))


def _row(values):
    """A row's features if it is learned from, else None: every present value usable
    and at least half the features (rounded up, the default min_observed) present;
    missing values (null, NaN, empty) as NaN."""
    present = [v for v in values if not _missing(v)]
    if len(present) < (len(values) + 1) // 2 or not all(_usable(v) for v in present):
        return None
    return tuple(np.nan if _missing(v) else float(v) for v in values)


def _value(token: str) -> float | None:
    t = token.strip()
    return None if t == "" else float(t)


def _quote(text: str, always: bool) -> str:
    if always or any(c in text for c in ',"') or text != text.strip():
        return '"' + text.replace('"', '""') + '"'
    return text


@st.composite
def csv_files(draw):
    """(bytes, expected outcome, keys, valid) of one generated CSV input; ``valid`` holds
    per row None (an invalid row) or the row's feature values."""
    extras = draw(st.lists(extra_names, max_size=4, unique=True))
    header = draw(st.permutations(REQUIRED + extras))
    n_rows = draw(st.integers(1, 25))
    quote_all = draw(st.booleans())
    rows, keys, valid = [], [], []
    for i in range(n_rows):
        cells = {"key": draw(key_text), "ts": str(i)}
        values = {f: draw(numbers) for f in FEATURES}
        cells.update(values)
        cells.update({e: draw(st.sampled_from(["", "x", "1", "a b", "q,r", 'say "hi"']))
                      for e in extras})
        rows.append([_quote(cells[c], quote_all) for c in header])
        keys.append(cells["key"])
        floats = [_value(v) for v in values.values()]
        valid.append(_row(floats))
    expect = "commit"
    broken = draw(st.sampled_from(["none"] * 6 + ["text", "width", "missing"]))
    if broken == "text":
        row, col = draw(st.integers(0, n_rows - 1)), draw(st.sampled_from(FEATURES))
        rows[row][header.index(col)] = draw(not_numbers)
        expect = "quarantine"
    elif broken == "width":
        rows[draw(st.integers(0, n_rows - 1))].append("extra")
        expect = "quarantine"
    elif broken == "missing":
        gone = draw(st.sampled_from(REQUIRED))
        header = [c if c != gone else c + "_x" for c in header]
        expect = "quarantine"
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    text = newline.join(",".join(r) for r in [[_quote(h, quote_all) for h in header]] + rows)
    text += newline if draw(st.booleans()) else ""
    encoding = draw(st.sampled_from(["utf-8", "utf-8", "utf-8-sig", "latin-1", "utf-16"]))
    if encoding == "latin-1":
        try:
            data = text.encode("latin-1")
            if expect != "quarantine" and any(ord(c) > 127 for c in text):
                expect = "quarantine"  # Latin-1 bytes above 127 are not UTF-8
        except UnicodeEncodeError:
            data = text.encode("utf-8")
    elif encoding == "utf-16":
        data, expect = text.encode("utf-16"), "quarantine"
    else:
        data = text.encode(encoding)
    return data, expect, keys, valid


@FUZZ
@given(case=csv_files())
def test_generated_csv_is_committed_or_quarantined(harness, case):
    harness.check(case, "csv")


# -- Parquet -------------------------------------------------------------------------
FEATURE_TYPES = [pa.float64(), pa.float32(), pa.float16(), pa.int8(), pa.int16(), pa.int32(),
                 pa.int64(), pa.uint8(), pa.uint32(), pa.uint64(), pa.decimal128(12, 3)]
COMPRESSION = ["NONE", "SNAPPY", "GZIP", "ZSTD", "LZ4", "BROTLI"]


def _feature_values(draw, t: pa.DataType, n: int) -> list:
    if pa.types.is_floating(t):
        width = {16: 16, 32: 32, 64: 64}[t.bit_width]
        value = st.floats(width=width)
    elif pa.types.is_decimal(t):
        value = st.decimals(-10**8, 10**8, places=3, allow_nan=False, allow_infinity=False)
    else:
        info = np.iinfo(t.to_pandas_dtype())
        value = st.integers(int(info.min), int(info.max))
    return draw(st.lists(st.none() | value, min_size=n, max_size=n))


@st.composite
def parquet_files(draw):
    n = draw(st.integers(0, 30))
    columns, row_values = {}, [[] for _ in range(n)]
    for f in FEATURES:
        t = draw(st.sampled_from(FEATURE_TYPES))
        values = _feature_values(draw, t, n)
        if t == pa.float16():
            columns[f] = pa.array(np.array([np.nan if v is None else v for v in values],
                                           dtype=np.float16),
                                  mask=np.array([v is None for v in values], dtype=bool))
        else:
            columns[f] = pa.array(values, type=t)
        for row, v in zip(row_values, values):
            row.append(v)
    valid = [_row(r) for r in row_values]
    keys = [f"k{i}" for i in range(n)]
    key_type = draw(st.sampled_from(["string", "large_string", "dictionary"]))
    columns["key"] = (pa.array(keys).dictionary_encode() if key_type == "dictionary"
                      else pa.array(keys, type=getattr(pa, key_type)()))
    columns["ts"] = pa.array(np.arange(n, dtype=np.int64) * 1000).cast(
        draw(st.sampled_from([pa.int64(), pa.timestamp("ms")])))
    if draw(st.booleans()):
        columns["tags"] = pa.array([[i, i + 1] for i in range(n)], type=pa.list_(pa.int32()))
    if draw(st.booleans()):
        columns["where"] = pa.array([{"x": float(i), "y": "s"} for i in range(n)])
    order = draw(st.permutations(list(columns)))
    table = pa.table({c: columns[c] for c in order})
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression=draw(st.sampled_from(COMPRESSION)),
                   row_group_size=draw(st.integers(1, 32)),
                   use_dictionary=draw(st.booleans()), write_statistics=draw(st.booleans()),
                   data_page_size=draw(st.sampled_from([64, 1024, 1 << 20])))
    data = sink.getvalue().to_pybytes()
    expect = "commit" if n else "quarantine"
    damage = draw(st.sampled_from(["none"] * 6 + ["truncate", "flip"]))
    if damage == "truncate":
        data, expect = data[:draw(st.integers(0, len(data) - 1))], "quarantine"
    elif damage == "flip":
        at = draw(st.integers(0, len(data) - 1))
        data = data[:at] + bytes([data[at] ^ draw(st.integers(1, 255))]) + data[at + 1:]
        expect = "either"
    return data, expect, keys, valid


@FUZZ
@given(case=parquet_files())
def test_generated_parquet_is_committed_or_quarantined(harness, case):
    harness.check(case, "parquet")


def test_the_csv_generator_makes_each_kind(harness):
    """The generators reach every kind of case (so the properties above are not vacuous)."""
    seen = set()

    @settings(max_examples=150, deadline=None, derandomize=True, database=None)
    @given(case=csv_files())
    def look(case):
        data, expect, _, valid = case
        seen.add(expect)
        seen.add("bom" if data.startswith(codecs.BOM_UTF8) else "")
        seen.add("crlf" if b"\r\n" in data else "")
        seen.add("invalid row" if any(v is None for v in valid) else "")

    look()
    assert {"commit", "quarantine", "bom", "crlf", "invalid row"} <= seen
