"""One order, oldest first (modification time, then name), however a file was found.

Files waiting at start-up (written in place, still settling) are not overtaken by a
newer file renamed in after start-up, which the gate would pass at once: the ledger
and the model are those of ``shoal ingest`` of the same files oldest first.
"""
import os

import pyarrow as pa
import pyarrow.csv as pacsv

from drills import (
    InProcessService,
    final_arrays,
    ingest_in_order,
    ledger_rows,
    same_arrays,
    synthetic_table,
    wait_until,
    write_config,
)

SEED = 17


def _csv(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


def test_files_waiting_at_start_up_are_not_overtaken_by_newer_ones(tmp_path):
    run = tmp_path / "run"
    svc = InProcessService(run, warmup_rows=600, watch={"settle_seconds": 1.0})
    waiting = ["a.csv", "b.csv", "c.csv"]
    for i, name in enumerate(waiting):            # written in place just before start-up
        (svc.layout.inbox / name).write_bytes(_csv(synthetic_table(i, 400, SEED)))
    newest = max(os.stat(svc.layout.inbox / n).st_mtime_ns for n in waiting)
    with svc:
        wait_until(lambda: str(svc.layout.inbox / "c.csv") in svc.service.gate._seen, 10,
                   "the start-up scan")
        # renamed in after start-up, newer than the three; its change time later than its
        # modification time marks it complete, so the gate passes it at once
        staging = tmp_path / "staging"
        staging.mkdir()
        pacsv.write_csv(synthetic_table(3, 400, SEED), staging / "d.csv")
        os.utime(staging / "d.csv", ns=(newest + 10**6,) * 2)
        os.rename(staging / "d.csv", svc.layout.inbox / "d.csv")
        results = [svc.wait_results(n) for n in range(1, 5)]
    assert [r.name for r in results] == ["a.csv", "b.csv", "c.csv", "d.csv"]
    mtimes = [os.stat(svc.layout.processed / r.name).st_mtime_ns for r in results]
    assert mtimes == sorted(mtimes)
    ref = tmp_path / "reference"
    (ref / "files").mkdir(parents=True)
    files = []
    for name, mtime in zip("abcd", mtimes):       # the same bytes and times, ingested
        target = ref / "files" / f"{name}.csv"
        target.write_bytes((svc.layout.processed / f"{name}.csv").read_bytes())
        os.utime(target, ns=(mtime, mtime))
        files.append(target)
    ingest_in_order(write_config(ref, warmup_rows=600), files, timeout=120)
    assert ledger_rows(run / "state" / "state.db") == ledger_rows(ref / "state" / "state.db")
    version, arrays = final_arrays(run / "state" / "state.db")
    ref_version, ref_arrays = final_arrays(ref / "state" / "state.db")
    assert version == ref_version == 4 and same_arrays(arrays, ref_arrays)
