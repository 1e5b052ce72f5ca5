"""Watching: incomplete files are not read, lost events do not lose
files, a dead observer is rebuilt, ready files go oldest first."""
import os
import threading
import time

import pyarrow as pa
import pyarrow.csv as pacsv

from drills import InProcessService, synthetic_table, wait_until, write_drop

SEED = 11


def _csv_bytes(table):
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


def test_slow_writer_is_not_read_before_it_finishes_and_renamed_file_is_read_at_once(tmp_path):
    with InProcessService(tmp_path, warmup_rows=200, watch={"settle_seconds": 1.0}) as svc:
        data = _csv_bytes(synthetic_table(0, 600, SEED))
        lines = data.splitlines(keepends=True)
        path = svc.layout.inbox / "growing.csv"
        t0 = time.monotonic()
        with open(path, "wb") as f:                # appends for 3 s, never renamed
            chunks = [lines[0]] + [b"".join(lines[i:i + 20]) for i in range(1, len(lines), 20)]
            pause = 3.0 / len(chunks)
            for chunk in chunks:
                f.write(chunk)
                f.flush()
                time.sleep(pause)
                assert not svc.results, "read before the writer finished"
        finished = time.monotonic()
        r = svc.wait_results(1)
        assert finished - t0 >= 2.9
        assert r.outcome == "committed" and r.rows == 600   # the whole file, once
        # a file renamed in is read at once, well before the settle time
        t1 = time.monotonic()
        write_drop(synthetic_table(1, 100, SEED), svc.layout.inbox, "renamed.csv")
        r2 = svc.wait_results(2)
        assert r2.name == "renamed.csv" and r2.outcome == "committed"
        assert time.monotonic() - t1 < 0.9


class DeafObserver(threading.Thread):
    """An observer whose events never arrive (as when the OS drops them)."""

    def __init__(self):
        super().__init__(daemon=True)
        self._stop_event = threading.Event()

    def schedule(self, *args, **kwargs):
        pass

    def run(self):
        self._stop_event.wait(30)

    def stop(self):
        self._stop_event.set()


def test_lost_events_are_made_good_by_the_rescan(tmp_path):
    with InProcessService(tmp_path, observer_factory=DeafObserver, warmup_rows=200,
                          watch={"rescan_seconds": 0.3}) as svc:
        for i in range(5):
            write_drop(synthetic_table(i, 100, SEED), svc.layout.inbox, f"d{i}.csv", index=i)
        svc.wait_results(5)
        assert [r.name for r in svc.results] == [f"d{i}.csv" for i in range(5)]
        assert all(r.outcome == "committed" for r in svc.results)
        assert svc.service.watcher.handler.events.qsize() == 0  # nothing came by events


def test_a_dead_observer_is_rebuilt(tmp_path):
    with InProcessService(tmp_path, warmup_rows=200, watch={"rescan_seconds": 60}) as svc:
        write_drop(synthetic_table(0, 100, SEED), svc.layout.inbox, "a.csv")
        svc.wait_results(1)
        observer = svc.service.watcher._observer
        observer.stop()                               # the observer thread dies
        observer.join(5)
        wait_until(lambda: svc.service.watcher.rebuilds >= 1, 10, "observer rebuilt")
        write_drop(synthetic_table(1, 100, SEED), svc.layout.inbox, "b.csv")
        assert svc.wait_results(2).name == "b.csv"


def test_waiting_files_are_taken_oldest_first_and_kept_inputs_not_redone(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    # names in the opposite order of their modification times
    for i, name in enumerate(["z.csv", "m.parquet", "a.csv"]):
        write_drop(synthetic_table(i, 150, SEED), inbox, name, index=i)
    with InProcessService(tmp_path, warmup_rows=200, watch={"rescan_seconds": 0.2},
                          output={"keep_inputs": True}) as svc:
        svc.wait_results(3)
        assert [r.name for r in svc.results] == ["z.csv", "m.parquet", "a.csv"]
        time.sleep(0.8)                                # several rescans
        assert len(svc.results) == 3
        assert sorted(os.listdir(inbox)) == ["a.csv", "m.parquet", "z.csv"]
    # a restart sees them in the ledger: already done, not learned again
    with InProcessService(tmp_path, warmup_rows=200, output={"keep_inputs": True}) as svc:
        svc.wait_results(3)
        assert {r.outcome for r in svc.results} == {"already_done"}
        assert svc.pipeline.state.version == 3


def test_the_observer_is_not_woken_by_the_workers_own_reads_and_deletions(tmp_path):
    from shoal.daemon.intake.watcher import InboxWatcher

    inbox = tmp_path / "inbox"
    inbox.mkdir()
    watcher = InboxWatcher(inbox)
    seen = []
    real = watcher.handler.on_any_event
    watcher.handler.on_any_event = lambda event: (seen.append(type(event).__name__),
                                                  real(event))
    watcher.start()
    try:
        (tmp_path / "a.csv").write_bytes(b"key,f1\nk,1\n")
        os.rename(tmp_path / "a.csv", inbox / "a.csv")
        assert watcher.events.get(timeout=10) == (str(inbox / "a.csv"), True)
        for _ in range(3):                          # what the gate and the worker do
            with open(inbox / "a.csv", "rb") as f:
                f.read()
        os.unlink(inbox / "a.csv")
        (tmp_path / "b.csv").write_bytes(b"key,f1\nk,2\n")
        os.rename(tmp_path / "b.csv", inbox / "b.csv")  # an event after them, to wait for
        assert watcher.events.get(timeout=10) == (str(inbox / "b.csv"), True)
    finally:
        watcher.stop()
    assert seen == ["FileMovedEvent", "FileMovedEvent"], seen
