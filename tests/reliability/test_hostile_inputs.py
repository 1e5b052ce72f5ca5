"""Hostile resources: each is refused by its limit, and the
process that refuses it never holds more than 300 MB.

Every case is ingested by its own ``shoal ingest`` subprocess (its own state folder);
the peak resident set of that process since its exec is read from /proc (VmHWM). The limits are the defaults except ``max_data_bytes``, lowered to 64 MiB
so that the uncompressed-bytes files stay cheap to make here.
"""
import gzip
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import yaml

RSS_BOUND = 300 * 2**20
DATA_LIMIT = 64 * 2**20
HEADER = ["key", "ts", "f1", "f2", "f3"]


def _numbers(rows: int) -> dict:
    return {"ts": pa.array(np.zeros(rows, dtype=np.int64)),
            **{f: pa.array(np.zeros(rows)) for f in HEADER[2:]}}


def parquet_declaring_rows(path: Path, row_groups: int = 21, rows: int = 1_000_000) -> None:
    """21 million rows (default max_rows is 20 million), a few hundred KB on disk."""
    key = pa.DictionaryArray.from_arrays(pa.array(np.zeros(rows, dtype=np.int32)), ["k"])
    table = pa.table({"key": key, **_numbers(rows)})
    with pq.ParquetWriter(path, table.schema, compression="zstd") as w:
        for _ in range(row_groups):
            w.write_table(table)


def parquet_declaring_bytes(path: Path, row_groups: int = 8, rows: int = 32) -> None:
    """A plain-encoded 1 MiB string per row: the footer declares 256 MiB uncompressed."""
    key = pa.array(["x" * 2**20] * rows)
    table = pa.table({"key": key, **_numbers(rows)})
    with pq.ParquetWriter(path, table.schema, compression="zstd", use_dictionary=False) as w:
        for _ in range(row_groups):
            w.write_table(table)


def parquet_dictionary_bomb(path: Path, rows: int = 1000) -> None:
    """One 1 MiB dictionary value used by every row: small as declared, 1 GiB decoded."""
    key = pa.DictionaryArray.from_arrays(pa.array(np.zeros(rows, dtype=np.int32)),
                                         ["y" * 2**20])
    pq.write_table(pa.table({"key": key, **_numbers(rows)}), path, compression="zstd")


def csv_wide(path: Path, columns: int = 100_000) -> None:
    names = HEADER + [f"c{i}" for i in range(columns - len(HEADER))]
    values = ["k", "1", "0.5", "0.5", "0.5"] + ["0"] * (columns - len(HEADER))
    path.write_text(",".join(names) + "\n" + ",".join(values) + "\n")


def gzip_bomb(path: Path, inflated: int = 4 * 2**30) -> None:
    """4 GiB of valid CSV rows in ~8 MB: one 1 MiB gzip member repeated (members concatenate)."""
    block = b"k,1,0,0,0\n" * (2**20 // 10)
    member = gzip.compress(block, 9)
    with open(path, "wb") as f:
        f.write(gzip.compress((",".join(HEADER) + "\n").encode()))
        for _ in range(inflated // len(block)):
            f.write(member)


def sparse_file(path: Path, size: int = 5 * 2**30) -> None:
    """5 GiB apparent size, one block on disk."""
    with open(path, "wb") as f:
        f.write((",".join(HEADER) + "\n").encode())
        f.truncate(size)


CASES = {
    "rows.parquet": (parquet_declaring_rows, "too_many_rows"),
    "bytes.parquet": (parquet_declaring_bytes, "too_much_data"),
    "dictionary.parquet": (parquet_dictionary_bomb, "too_much_data"),
    "wide.csv": (csv_wide, "too_many_columns"),
    "bomb.csv.gz": (gzip_bomb, "decompression_bomb"),
    "sparse.csv": (sparse_file, "too_large"),
}


def _config(folder: Path) -> Path:
    folder.mkdir(parents=True)
    cfg = {"features": HEADER[2:], "passthrough": HEADER[:2], "segments": 2,
           "warmup_rows": 100, "limits": {"max_data_bytes": DATA_LIMIT}}
    path = folder / "shoal.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def _quarantine_reason(folder: Path, name: str) -> str:
    import json
    return json.loads((folder / "state" / "quarantine" / f"{name}.json").read_text())["reason"]


# Runs its arguments as a Python snippet or the shoal CLI, then prints the peak resident
# set of this process since its exec (VmHWM in /proc/self/status, proc(5)). ru_maxrss
# of a child would also count the pytest process it was forked from.
_MEASURED = """
import sys
def peak():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
if sys.argv[1] == "-c":
    exec(sys.argv[2]); code = 0
else:
    from shoal.daemon.cli.main import main
    code = main(sys.argv[1:])
print(peak())
sys.exit(code)
"""


def _start(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", _MEASURED, *args], stdout=subprocess.PIPE,
                            stderr=subprocess.DEVNULL, text=True)


def _peak(proc: subprocess.Popen, timeout: float) -> int:
    """Wait for a :func:`_start` process; return its peak resident set in bytes."""
    try:
        out, _ = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate(timeout=30)
        raise
    return int(out.strip().splitlines()[-1])


def test_hostile_inputs_are_refused_within_the_memory_bound(tmp_path):
    files = tmp_path / "files"
    files.mkdir()
    peaks, codes, reasons = {}, {}, {}
    names = list(CASES)
    for pair in (names[i:i + 2] for i in range(0, len(names), 2)):  # two cores
        procs = {}
        for name in pair:
            CASES[name][0](files / name)
            folder = tmp_path / name.replace(".", "-")
            procs[name] = _start("ingest", "-c", str(_config(folder)), str(files / name))
        for name, proc in procs.items():
            peaks[name] = _peak(proc, timeout=120)
            codes[name] = proc.returncode
            reasons[name] = _quarantine_reason(tmp_path / name.replace(".", "-"), name)
            (files / name).unlink()
    print("\npeak RSS per hostile input (MiB):",
          {n: round(b / 2**20) for n, b in peaks.items()})
    assert reasons == {name: reason for name, (_, reason) in CASES.items()}
    assert codes == {name: 1 for name in CASES}  # ingest: 1 = quarantined
    assert all(b < RSS_BOUND for b in peaks.values()), peaks
    assert all(b > 10 * 2**20 for b in peaks.values()), peaks  # a real measurement


def test_memory_measurement_sees_a_large_child():
    code = "import numpy as np; a = np.ones(400 * 2**20 // 8); a.sum()"
    assert _peak(_start("-c", code), timeout=60) > RSS_BOUND
