"""watch.recursive: inputs in sub-folders of the inbox are taken, oldest first with the
others, named by their path relative to the inbox; ignored sub-folders are passed over."""
import os

import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from drills import MTIME_BASE, InProcessService, synthetic_table, wait_until

SEED = 37


def _place(folder, name, index, order):
    """Write drop ``index`` as ``name`` beside the inbox, give it modification time
    ``order`` and move it (with its sub-folder, if new) into place."""
    staging = folder.parent / "staging"
    staging.mkdir(exist_ok=True)
    tmp = staging / os.path.basename(name)
    table = synthetic_table(index, 300, SEED)
    (pacsv.write_csv if name.endswith(".csv") else pq.write_table)(table, tmp)
    os.utime(tmp, ns=((MTIME_BASE + order) * 10**9,) * 2)
    return tmp


def test_inputs_in_sub_folders_are_taken_in_order_under_their_relative_names(tmp_path):
    svc = InProcessService(tmp_path, warmup_rows=500, watch={"recursive": True})
    inbox = svc.layout.inbox
    # waiting at start: a sub-folder, a file at the top level, a hidden sub-folder
    (inbox / "2025-05").mkdir()
    for name, index, order in (("a.csv", 0, 3), ("b.parquet", 1, 1)):
        os.rename(_place(inbox, name, index, order), inbox / "2025-05" / name)
    (inbox / ".staging").mkdir()
    os.rename(_place(inbox, "hidden.csv", 5, 0), inbox / ".staging" / "hidden.csv")
    os.rename(_place(inbox, "top.csv", 2, 2), inbox / "top.csv")
    with svc:
        wait_until(lambda: len(svc.results) >= 3, 30, "three inputs")
        # a sub-folder moved in whole while watching (no event for its files)
        batch = tmp_path / "batch"
        batch.mkdir()
        os.rename(_place(inbox, "a.csv", 3, 4), batch / "a.csv")
        os.rename(batch, inbox / "other")
        wait_until(lambda: len(svc.results) >= 4, 30, "four inputs")
        names = [(r.name, r.outcome) for r in svc.results]
    # oldest first whatever folder they are in; two a.csv told apart by their folders
    assert names == [("2025-05/b.parquet", "committed"), ("top.csv", "committed"),
                     ("2025-05/a.csv", "committed"), ("other/a.csv", "committed")]
    assert (tmp_path / "inbox" / ".staging" / "hidden.csv").exists()   # not taken
    labels = sorted(p.name for p in (tmp_path / "outbox").iterdir())
    assert len(labels) == 4 and len({n.split(".")[0] for n in labels}) == 4
    metas = {pq.read_schema(tmp_path / "outbox" / n).metadata[b"shoal.input_name"]
             for n in labels}
    assert metas == {b"2025-05/b.parquet", b"top.csv", b"2025-05/a.csv", b"other/a.csv"}
