#!/usr/bin/env python3
"""What drift and lifecycle cost the thread that learns, measured alone: the ingest's
learning loop (``learn_chunks``) over the same rows with them off and on, in one process,
with no reading, writing or other threads to disturb it.

A state warmed up on 20,000 rows (as ``scripts/bench_e2e.py`` makes it: D=16, K=8), then
a 1,000,000-row lead learned with the watches on, so that the measured rows meet a model
at work (its split tests backed off, its drift baseline taken), then 1,000,000 measured
rows of the same mixture in the pipeline's frames of 65,536 rows, off and on interleaved
``--repeats`` times, each run timed by the thread's CPU. The least of each is the run
the machine disturbed least: ``added = min(on) - min(off)``, and ``added / min(off)`` is
the watch's cost relative to what learning costs without it (the model's E+M and the
loop around it). Without the other threads of an ingest it is steadier than the
whole-process figures of ``bench_e2e.py --stages`` and ``--cost``, but on a shared
virtual machine the least of seven runs still moves with the machine's slow spells:
compare two trees by interleaving runs of both, several times. Medians are printed
beside it.

Then the same for small inputs, where what an input costs once (the watches made from
the committed state, their states taken for the commit) weighs most: 10,000-row Parquet
drops through the real pipeline in this process (``Pipeline.process``: read, learn,
labels, commit), after a warm-up and 20 such inputs, the thread CPU of each of the next
40, with the watches off and on; the median per input.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # as the shoal command runs

from scripts.bench_e2e import WARM_ROWS, mixture_rows, warmed_state, write_drop  # noqa: E402
from shoal.daemon.runtime.allocator import tune_allocator  # noqa: E402

FRAME_ROWS = 65_536   # the pipeline's frames (learn_chunks is called once per frame)

def _learned(settings, mixture, X, extra, on: bool, version: int):
    """Learn ``X`` frame by frame with the watches on or off; the mixture, the watches'
    states (``extra`` updated) and the thread CPU seconds it took."""
    from shoal.daemon.ingest.learning import learn_chunks
    from shoal.daemon.segments.monitor import DriftMonitor
    from shoal.daemon.segments.segment_life import LifeWatch

    watch = life = None
    if on:
        watch = DriftMonitor(settings).begin(extra.get("drift"), version=version, file="bench",
                                             unusual_below=extra.get("unusual_below"))
        life = LifeWatch(settings, extra.get("lifecycle"), version=version, file="bench")
    t0 = time.thread_time()
    for lo in range(0, len(X), FRAME_ROWS):
        mixture, _ = learn_chunks(settings, mixture, X[lo:lo + FRAME_ROWS], watch, life)
    if on:
        extra = dict(extra, drift=watch.state, lifecycle=life.final_state())
        watch.alerts   # every closed window evaluated, as the commit asks
    return mixture, extra, time.thread_time() - t0

def watch_cpu_table(rows: int = 1_000_000, repeats: int = 7,
                    covariances=("full", "diag")) -> dict:
    from shoal.config.loading import load_config
    from shoal.core import Mixture
    from shoal.daemon.state.store import StateStore

    print(f"\nWhat drift and lifecycle add to the learning thread: learn_chunks over {rows:,} "
          f"rows (D=16, K=8) after a {rows:,}-row lead, off and on interleaved {repeats} "
          f"times, thread CPU seconds; added = least on - least off")
    print(f"{'cov':>5} | {'off min':>8} {'on min':>8} {'added':>7} {'/ off':>6} | "
          f"{'off med':>8} {'on med':>8}")
    out = {}
    with tempfile.TemporaryDirectory(prefix="shoal-watch-") as tmp:
        tmp = Path(tmp)
        (tmp / "data").mkdir()
        warm = write_drop(tmp / "data" / "warm.parquet", WARM_ROWS, seed=1)
        lead, measured = mixture_rows(rows, [3, 0]), mixture_rows(rows, [0, 0])
        for cov in covariances:
            folder = warmed_state(tmp / f"state-{cov}", cov, True, warm)
            settings = load_config(folder / "shoal.yaml")
            store = StateStore(folder / "state" / "state.db")
            try:
                cp = store.latest_checkpoint()
            finally:
                store.close()
            mixture = Mixture.from_state(cp.arrays, cp.meta)
            mixture, extra, _ = _learned(settings, mixture, lead, dict(cp.extra), True,
                                         cp.version + 1)
            extra = json.loads(json.dumps(extra))   # as the checkpoint keeps it
            cpu = {False: [], True: []}
            for _ in range(repeats):
                for on in (False, True):
                    cpu[on].append(_learned(settings, mixture, measured, extra, on,
                                            cp.version + 2)[2])
            off, on = min(cpu[False]), min(cpu[True])
            out[cov] = {"off": off, "on": on, "added": on - off, "ratio": (on - off) / off}
            print(f"{cov:>5} | {off:>8.3f} {on:>8.3f} {on - off:>7.3f} {(on - off) / off:>6.2f} | "
                  f"{statistics.median(cpu[False]):>8.3f} {statistics.median(cpu[True]):>8.3f}")
    return out

def small_inputs_table(rows: int = 10_000, inputs: int = 40) -> dict:
    """Thread CPU per ``rows``-row input through the real pipeline, in this process,
    drift and lifecycle off and on (the median over ``inputs`` inputs, after a warm-up
    of 20,000 rows and 20 inputs)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from scripts.bench_e2e import FEATURES
    from shoal.config import parse_config
    from shoal.daemon.files.layout import prepare_folders
    from shoal.daemon.ingest.pipeline import Pipeline
    from shoal.daemon.state.store import StateStore

    warm, settle = WARM_ROWS, 20
    X = mixture_rows(warm + (settle + inputs) * rows, [5, 0])
    print(f"\nSmall inputs: {rows:,}-row Parquet drops through the pipeline in one process "
          f"(D=16, K=8, full), thread CPU per input, median of {inputs} after {settle}")
    print(f"{'watches':>8} | {'median ms':>9} {'least ms':>9}")
    out = {}
    for on in (False, True):
        cfg = {"features": FEATURES, "segments": 8, "warmup_rows": warm,
               "learning": {"n_init": 1}}
        if not on:
            cfg.update(drift={"enabled": False}, lifecycle={"enabled": False})
        with tempfile.TemporaryDirectory(prefix="shoal-small-") as tmp:
            tmp = Path(tmp)
            settings = parse_config(cfg, tmp)
            layout = prepare_folders(settings)
            store = StateStore(layout.db)
            try:
                pipeline = Pipeline(settings, layout, store)
                cpu = []
                starts = [0] + list(range(warm, len(X), rows))
                for i, (lo, hi) in enumerate(zip(starts, starts[1:] + [len(X)])):
                    path = tmp / f"drop-{i:04d}.parquet"
                    pq.write_table(pa.table({f: X[lo:hi, j] for j, f in enumerate(FEATURES)}),
                                   path)
                    t0 = time.thread_time()
                    result = pipeline.process(path, in_inbox=False)
                    cpu.append(time.thread_time() - t0)
                    if result.outcome != "committed":
                        raise RuntimeError(f"input {i} was {result.outcome}: {result}")
            finally:
                store.close()
        kept = cpu[-inputs:]
        out[on] = statistics.median(kept)
        print(f"{'on' if on else 'off':>8} | {1e3 * out[on]:>9.1f} {1e3 * min(kept):>9.1f}")
    print(f"{'added':>8} | {1e3 * (out[True] - out[False]):>9.1f}")
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--repeats", type=int, default=7)
    p.add_argument("--covariance", choices=("full", "diag"), action="append",
                   help="only this covariance type (repeatable; default: both)")
    p.add_argument("--no-small", action="store_true", help="skip the small-inputs table")
    a = p.parse_args()
    tune_allocator()   # malloc's thresholds as the shoal command sets them
    watch_cpu_table(a.rows, a.repeats, tuple(a.covariance or ("full", "diag")))
    if not a.no_small:
        small_inputs_table()
    return 0

if __name__ == "__main__":
    sys.exit(main())
