#!/usr/bin/env python3
"""End-to-end bench: 1,000,000-row Parquet and CSV drops (D=16, K=8) through `shoal ingest`,
against anchors measured in the same run on the same files: pyarrow's own streaming read
rate and the core-only E+M rate (Mixture.learn on the same rows in batches of 65,536, on
one BLAS thread as `shoal ingest` runs; one anchor pass before each ingest, best of the
same number of runs, so that a quiet or busy moment of a shared machine touches both).
Then the cost of drift and lifecycle (`watch_cost_table`, also alone with `--cost`): the
same Parquet ingest with them off and on, interleaved, the median of the on/off ratios.
Then peak RSS of `shoal ingest` for a 1,000,000-row and a 10,000,000-row Parquet file.

Each `shoal ingest` takes two drops of the same size and format: a lead drop (other rows
of the same mixture), then the measured one. The lead is the process's first input, and
pays the process's cold start: every buffer's memory is new to the process then, and on
a virtual machine fresh pages cost far more than on bare metal (the kernel zeroes each,
and the host may have to back it). The measured drop is an input after another, as a
running service meets its inputs, and as the core anchor (warmed by a pass before it is
timed) meets its rows. Both rates are printed: `e2e` (after another) and `first`.

`e2e_table(...)` prints the tables; run as a script for the same. `--stages` instead
prints where the CPU goes: one `shoal ingest` per format and drift setting, run in a
child process whose stages are timed by the CPU time of the thread running them
(independent of other load on the machine).
"""
from __future__ import annotations

import argparse
import contextlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import yaml

from scripts.bench import BATCH, best_of

N_FEATURES, N_COMPONENTS = 16, 8
FEATURES = [f"x{j:02d}" for j in range(N_FEATURES)]
WARM_ROWS = 20_000
PIECE = 1_000_000   # rows generated (and written as one row group) at a time


def _table(X: np.ndarray, first_id: int) -> pa.Table:
    cols = {"id": pa.array(np.arange(first_id, first_id + len(X), dtype=np.int64))}
    cols.update({name: X[:, j] for j, name in enumerate(FEATURES)})
    return pa.table(cols)


def _mixture(seed: int = 16):
    """A seeded random K=8, D=16 full-covariance mixture (synthetic benchmark data, drawn
    as scripts/bench.py's ``synthetic`` draws its own)."""
    rng = np.random.default_rng(seed)
    weights = rng.dirichlet(np.full(N_COMPONENTS, 5.0))
    means = rng.normal(0.0, 4.0, (N_COMPONENTS, N_FEATURES))
    A = rng.normal(0.0, 0.3, (N_COMPONENTS, N_FEATURES, N_FEATURES))
    covs = A @ np.swapaxes(A, 1, 2) + 0.5 * np.eye(N_FEATURES)
    return weights, means, np.linalg.cholesky(covs)


def mixture_rows(n: int, seed) -> np.ndarray:
    """``n`` rows of the bench's mixture (:func:`_mixture`), drawn with ``seed``."""
    weights, means, chol = _mixture()
    rng = np.random.default_rng(seed)
    labels = rng.choice(N_COMPONENTS, size=n, p=weights)
    return means[labels] + np.einsum("nde,ne->nd", chol[labels],
                                     rng.normal(size=(n, N_FEATURES)))


def write_drop(path: Path, rows: int, seed: int = 0) -> Path:
    """``rows`` rows of one seeded mixture (:func:`_mixture`), written piece by piece."""
    writer = None
    try:
        for start in range(0, rows, PIECE):
            n = min(PIECE, rows - start)
            table = _table(mixture_rows(n, [seed, start]), start)
            if path.suffix == ".parquet":
                writer = writer or pq.ParquetWriter(path, table.schema)
                writer.write_table(table)
            else:
                writer = writer or pacsv.CSVWriter(path, table.schema)
                writer.write_table(table)
    finally:
        if writer is not None:
            writer.close()
    return path


def _config(folder: Path, covariance: str, watch_drift: bool) -> Path:
    cfg = {"inbox": "inbox", "outbox": "outbox", "state": "state", "features": FEATURES,
           "passthrough": ["id"], "segments": N_COMPONENTS, "covariance": covariance,
           "warmup_rows": WARM_ROWS, "learning": {"n_init": 1}}
    if not watch_drift:
        cfg["drift"] = {"enabled": False}
        cfg["lifecycle"] = {"enabled": False}
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "shoal.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def _peak_rss_mb(pid: int) -> float | None:
    """VmHWM (peak RSS) of a running process, from /proc (Linux)."""
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        return None
    return None


def _ingest(cfg: Path, drop: Path, lead: Path | None = None) -> dict:
    """Run `shoal ingest` in a child process: wall seconds, the input's own seconds (from
    its `input_committed` log line: claim to commit, without interpreter start-up and
    imports) and the child's peak RSS (its VmHWM, read every 20 ms while it runs: the
    rusage of a forked child would count the bench process's own pages). With ``lead``,
    that file is ingested first in the same process and its own seconds are ``first``."""
    log = cfg.parent / "ingest.log"
    files = [str(lead), str(drop)] if lead is not None else [str(drop)]
    with open(log, "wb") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-m", "shoal.daemon.cli.main", "ingest", "-c",
                                 str(cfg), *files], stdout=subprocess.DEVNULL, stderr=err)
        peak = 0.0
        while proc.poll() is None:
            peak = max(peak, _peak_rss_mb(proc.pid) or 0.0)
            time.sleep(0.02)
        wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"shoal ingest {drop.name} exited {proc.returncode}: "
                           f"{log.read_text()[-2000:]}")
    seconds = [float(rec["duration"]) for rec in map(json.loads, log.read_text().splitlines())
               if rec.get("event") == "input_committed"]
    if len(seconds) != len(files):
        raise RuntimeError(f"shoal ingest committed {len(seconds)} of {len(files)} inputs: "
                           f"{log.read_text()[-2000:]}")
    return {"wall": wall, "input": seconds[-1], "first": seconds[0], "rss_mb": peak}


def _fresh_state(template: Path, run: Path) -> Path:
    """A copy of the warmed-up state folder and config, so every run starts the same."""
    if run.exists():
        shutil.rmtree(run)
    shutil.copytree(template, run)
    return run / "shoal.yaml"


def warmed_state(folder: Path, covariance: str, watch_drift: bool, warm: Path) -> Path:
    """A state folder in ``folder`` whose model was warmed up on the drop ``warm`` by
    `shoal ingest` (its config beside it), the outbox emptied."""
    cfg = _config(folder, covariance, watch_drift)
    _ingest(cfg, warm)
    (folder / "ingest.log").unlink()
    for name in os.listdir(folder / "outbox"):
        os.unlink(folder / "outbox" / name)
    return folder


def ingest_rate(template: Path, drop: Path, rows: int, repeats: int, anchor=None,
                lead: Path | None = None, beside=None) -> dict:
    """Best of ``repeats`` runs of `shoal ingest` (of ``lead`` then ``drop`` when a lead is
    given: ``input`` is the drop's rate, ``first`` the lead's, ``wall`` all the rows over
    the whole process); with ``anchor`` (a callable giving one core-only rate), an anchor
    run before each ingest, so both see the same moments of a shared machine, and the
    best anchor under ``"core"``; with ``beside`` (:func:`beside_reading`), that anchor
    too, best under ``"beside"``."""
    runs, cores, besides = [], [], []
    for _ in range(repeats):
        if anchor is not None:
            cores.append(anchor())
        if beside is not None:
            besides.append(beside())
        runs.append(_ingest(_fresh_state(template, template.with_name(template.name + "-run")),
                            drop, lead))
    out = {"input": rows / min(r["input"] for r in runs),
           "first": rows / min(r["first"] for r in runs),
           "wall": (2 if lead is not None else 1) * rows / min(r["wall"] for r in runs),
           "rss_mb": max(r["rss_mb"] for r in runs)}
    if cores:
        out["core"] = max(cores)
    if besides:
        out["beside"] = max(besides)
    return out


def parquet_read_rate(path: Path, rows: int) -> float:
    def run():
        pf = pq.ParquetFile(path)
        for _ in pf.iter_batches(batch_size=BATCH, columns=["id"] + FEATURES):
            pass
    return rows / best_of(run)


def csv_read_rate(path: Path, rows: int) -> float:
    def run():
        for _ in pacsv.open_csv(path):   # pyarrow's defaults
            pass
    return rows / best_of(run)


def core_anchor(X: np.ndarray, covariance: str):
    """One core-only E+M pass over ``X`` (Mixture.learn in batches of 65,536 rows) as a
    callable returning rows/s: on one BLAS thread, as `shoal ingest` runs, and from a
    model fitted on the first rows of the same data."""
    from shoal.core import initialise

    model = initialise(X[:WARM_ROWS], N_COMPONENTS, covariance, seed=0, n_init=1, max_iter=20)
    model, _ = model.learn(X[:BATCH])   # warm caches
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        threadpool_limits = None

    def once() -> float:
        limit = threadpool_limits(1, user_api="blas") if threadpool_limits else \
            contextlib.nullcontext()
        with limit:
            m, t = model, time.perf_counter()
            for start in range(0, len(X), BATCH):
                m, _ = m.learn(X[start:start + BATCH])
            return len(X) / (time.perf_counter() - t)
    return once


def beside_reading(once, cfg: Path, drop: Path):
    """``once`` (a core anchor) with a second thread reading ``drop`` the way `shoal ingest`
    does (its frames: pyarrow's decode, the checks and the row-major copy) and hashing it,
    over and over: the model's rate while the other core does the input's other stages.
    On a machine of two cores these share the memory system and (on a virtual machine)
    perhaps the physical core: this rate is what the model thread can reach beside them."""
    import threading

    from shoal.config.loading import load_config
    from shoal.daemon.files.digest import NEW_STORE_ALGORITHM, digest_file
    from shoal.daemon.errors import Interrupted
    from shoal.daemon.files.readers import iter_frames

    settings = load_config(cfg)
    stop = threading.Event()

    def neighbour():
        while not stop.is_set():
            with open(drop, "rb") as f, contextlib.suppress(Interrupted):
                for _ in iter_frames(f, "parquet", settings, stop.is_set):
                    pass
            with open(drop, "rb") as f:
                digest_file(f, NEW_STORE_ALGORITHM)   # the hash a new state store uses

    def run() -> float:
        stop.clear()
        t = threading.Thread(target=neighbour, daemon=True)
        t.start()
        try:
            time.sleep(0.1)   # the neighbour is under way
            return once()
        finally:
            stop.set()
            t.join()
    return run


def e2e_table(rows: int = 1_000_000, big_rows: int = 10_000_000, repeats: int = 3,
              workdir: Path | None = None, covariances=("full", "diag"),
              memory: bool = True) -> dict:
    with tempfile.TemporaryDirectory(prefix="shoal-e2e-", dir=workdir) as tmp:
        tmp = Path(tmp)
        data = tmp / "data"
        data.mkdir()
        warm = write_drop(data / "warm.parquet", WARM_ROWS, seed=1)
        drops = {"parquet": write_drop(data / "drop.parquet", rows),
                 "csv": write_drop(data / "drop.csv", rows)}
        leads = {fmt: write_drop(data / f"lead.{fmt}", rows, seed=3) for fmt in drops}
        table = pq.read_table(drops["parquet"], columns=FEATURES)
        X = np.column_stack([table.column(c).to_numpy() for c in FEATURES])
        del table
        anchors_read = {"parquet": parquet_read_rate(drops["parquet"], rows),
                        "csv": csv_read_rate(drops["csv"], rows)}
        print(f"\nEnd to end: `shoal ingest` of one {rows:,}-row drop, D={N_FEATURES}, "
              f"K={N_COMPONENTS}, into a state warmed on {WARM_ROWS:,} rows "
              f"(best of {repeats}); anchors on the same rows in the same run")
        print("  each `shoal ingest` takes a lead drop of the same size and format first; "
              "e2e: rows / the measured drop's own seconds (claim to commit), an input after "
              "another as a running service meets it; first: the same for the lead, the "
              "process's first input (its cold start); wall: 2 x rows / the whole process "
              "(start-up and imports too)")
        print("  read: pyarrow streaming read of the file (ParquetFile.iter_batches / "
              "csv.open_csv, defaults); core: Mixture.learn in batches of 65,536 rows on one "
              "BLAS thread (as `shoal ingest` runs), one pass before each ingest, best of "
              f"{repeats} like the ingests; beside (Parquet): the same core pass while a "
              "second thread reads the drop as `shoal ingest` does (frames) and hashes it, "
              "over and over: the model's rate with the other core busy with the input's "
              "other stages")
        print(f"{'format':>8} {'cov':>5} {'drift+life':>10} | {'e2e rows/s':>11} "
              f"{'first rows/s':>12} {'wall rows/s':>11} {'read rows/s':>11} "
              f"{'core rows/s':>11} {'beside':>11} | {'e2e/core':>8} {'first/core':>10} "
              f"{'e2e/beside':>10} {'e2e/read':>8} {'first/read':>10} {'peak RSS':>9}")
        results = {}
        for cov in covariances:
            anchor = core_anchor(X, cov)
            for watch_drift in (False, True):
                folder = tmp / f"state-{cov}-{int(watch_drift)}"
                warmed_state(folder, cov, watch_drift, warm)
                for fmt in ("parquet", "csv"):
                    beside = beside_reading(anchor, folder / "shoal.yaml", drops[fmt]) \
                        if fmt == "parquet" else None
                    r = ingest_rate(folder, drops[fmt], rows, repeats, anchor, leads[fmt],
                                    beside)
                    read, core = anchors_read[fmt], r["core"]
                    results[(fmt, cov, watch_drift)] = dict(r, read=read)
                    near = (f"{r['beside']:>11,.0f}", f"{r['input'] / r['beside']:>10.2f}") \
                        if "beside" in r else (f"{'-':>11}", f"{'-':>10}")
                    print(f"{fmt:>8} {cov:>5} {'on' if watch_drift else 'off':>10} | "
                          f"{r['input']:>11,.0f} {r['first']:>12,.0f} {r['wall']:>11,.0f} "
                          f"{read:>11,.0f} {core:>11,.0f} {near[0]} | "
                          f"{r['input'] / core:>8.2f} {r['first'] / core:>10.2f} {near[1]} "
                          f"{r['input'] / read:>8.2f} {r['first'] / read:>10.2f} "
                          f"{r['rss_mb']:>6.0f} MB")
        print("targets: Parquet full e2e >= 0.60 x core; CSV e2e >= 0.50 x read")
        del X
        cost = watch_cost_table(rows, repeats, covariances=covariances,
                                drops={"warm": warm, "drop": drops["parquet"],
                                       "lead": leads["parquet"]}, workdir=tmp)
        peaks = memory_table(tmp, warm, drops["parquet"], rows, big_rows) if memory else None
    return {"rates": results, "cost": cost, "memory": peaks}


def watch_cost_table(rows: int = 1_000_000, repeats: int = 3, workdir: Path | None = None,
                     covariances=("full", "diag"), drops: dict | None = None) -> dict:
    """What drift and lifecycle cost end to end: Parquet `shoal ingest` (lead drop, then the
    measured one) with them off and on, interleaved ``repeats`` times (off, on, off, on,
    ...) so both see the same moments of a shared machine; the on/off ratio of each pair
    and their median, per covariance type."""
    with tempfile.TemporaryDirectory(prefix="shoal-cost-", dir=workdir) as tmp:
        tmp = Path(tmp)
        if drops is None:
            (tmp / "data").mkdir()
            drops = {"warm": write_drop(tmp / "data" / "warm.parquet", WARM_ROWS, seed=1),
                     "drop": write_drop(tmp / "data" / "drop.parquet", rows),
                     "lead": write_drop(tmp / "data" / "lead.parquet", rows, seed=3)}
        print(f"\nCost of drift and lifecycle: `shoal ingest` of a {rows:,}-row Parquet drop "
              f"(after a lead drop), D={N_FEATURES}, K={N_COMPONENTS}; off and on interleaved "
              f"{repeats} times; ratio = e2e rate on / off of each pair, and the median")
        print(f"{'cov':>5} {'run':>4} | {'off rows/s':>11} {'on rows/s':>11} {'on/off':>7}")
        out = {}
        for cov in covariances:
            folders = {on: warmed_state(tmp / f"cost-{cov}-{int(on)}", cov, on, drops["warm"])
                       for on in (False, True)}
            ratios, rates = [], {False: [], True: []}
            for i in range(repeats):
                for on in (False, True):
                    run = _fresh_state(folders[on], folders[on].with_name(
                        folders[on].name + "-run"))
                    rates[on].append(rows / _ingest(run, drops["drop"], drops["lead"])["input"])
                ratios.append(rates[True][-1] / rates[False][-1])
                print(f"{cov:>5} {i + 1:>4} | {rates[False][-1]:>11,.0f} "
                      f"{rates[True][-1]:>11,.0f} {ratios[-1]:>7.2f}")
            med = float(np.median(ratios))
            out[cov] = {"ratio": med, "off": float(np.median(rates[False])),
                        "on": float(np.median(rates[True]))}
            print(f"{cov:>5} {'med':>4} | {out[cov]['off']:>11,.0f} {out[cov]['on']:>11,.0f} "
                  f"{med:>7.2f}")
        print("targets: on/off >= 0.75 (full), >= 0.60 (diag)")
    return out


def memory_table(tmp: Path, warm: Path, small: Path, rows: int, big_rows: int) -> dict:
    big = write_drop(tmp / "data" / "big.parquet", big_rows, seed=2)
    folder = warmed_state(tmp / "state-memory", "full", True, warm)
    out = {}
    print(f"\nPeak RSS of `shoal ingest` (full, drift and lifecycle on), row groups of "
          f"{PIECE:,} rows")
    print(f"{'rows':>12} {'file MB':>8} {'peak RSS MB':>12} {'rows/s':>11}")
    for n, drop in ((rows, small), (big_rows, big)):
        r = _ingest(_fresh_state(folder, folder.with_name("memory-run")), drop)
        out[n] = r["rss_mb"]
        print(f"{n:>12,} {drop.stat().st_size / 2**20:>8.0f} {r['rss_mb']:>12.0f} "
              f"{n / r['input']:>11,.0f}")
    print(f"ratio {out[big_rows] / out[rows]:.2f}; targets: 10M within 20% of 1M "
          "(ratio <= 1.20) and under 500 MB")
    return out


# -- CPU seconds per stage ---------------------------------------------------------
# (stage, module, owner, attribute): the time of the calls is charged to the stage, in
# the thread that made them; nested calls of timed functions count once. A module is
# patched before the modules that import names from it (learning before stages).
STAGES = [
    ("hash (BLAKE3 of the file)", "shoal.daemon.files.readers", "file_digest", "_run"),
    ("frame build (float64 rows, checks)", "shoal.daemon.files.readers", None, "build_frame"),
    ("model E+M (Mixture.learn)", "shoal.core.mixture", "Mixture", "learn"),
    ("drift (window sums, evaluation)", "shoal.daemon.segments.monitor", "InputWatch", "observe"),
    ("drift (window sums, evaluation)", "shoal.daemon.segments.monitor", "InputWatch",
     "_evaluate_waiting"),
    ("lifecycle decision points", "shoal.daemon.segments.segment_life", "LifeWatch", "at_boundary"),
    ("lifecycle unexplained rows", "shoal.daemon.segments.segment_life", "LifeWatch", "observe"),
    ("far-row bound (model thread)", "shoal.daemon.ingest.rows", None, "mark_beyond_model"),
    ("unusual threshold, counts", "shoal.daemon.ingest.learning", None, "after_scoring"),
    ("labels tables", "shoal.daemon.ingest.stages", None, "frame_labels"),
    ("labels encode + write", "pyarrow.parquet", "ParquetWriter", "write_table"),
    ("labels encode + write", "pyarrow.parquet", "ParquetWriter", "close"),
    ("commit (one transaction)", "shoal.daemon.state.store", "StateStore", "commit_inputs"),
]


WATCH_STAGES = ("drift (window sums, evaluation)", "lifecycle decision points",
                "lifecycle unexplained rows")


def _one_blas_thread() -> dict:
    """The environment with one BLAS thread unless it says otherwise, as the shoal command
    sets it: in the child's environment, since it must hold before numpy is loaded (this
    module loads numpy before it could set it)."""
    env = dict(os.environ)
    for var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        env.setdefault(var, "1")
    return env


def _stage_child(cfg: str, drop: str) -> int:
    """Run `shoal ingest` in this process with the stages timed; print them as JSON."""
    import functools
    import importlib
    import resource
    import threading

    cpu: dict[str, float] = {}
    local = threading.local()

    def timed(fn, stage):
        @functools.wraps(fn)
        def run(*a, **k):
            if getattr(local, "inside", False):
                return fn(*a, **k)
            local.inside, t = True, time.thread_time()
            try:
                return fn(*a, **k)
            finally:
                local.inside = False
                cpu[stage] = cpu.get(stage, 0.0) + time.thread_time() - t
        return run

    for stage, module, owner, attr in STAGES:
        target = importlib.import_module(module)
        target = getattr(target, owner) if owner else target
        setattr(target, attr, timed(getattr(target, attr), stage))
    from shoal.daemon.ingest import stages
    frames = stages.iter_frames

    def reading(*a, **k):   # the reader thread's time outside the frame build
        it, total = frames(*a, **k), 0.0
        while True:
            t = time.thread_time()
            try:
                item = next(it)
            except StopIteration:
                cpu["read + decode (pyarrow)"] = total
                return
            finally:
                total += time.thread_time() - t
            yield item
    stages.iter_frames = reading
    from shoal.daemon.ingest.pipeline import Pipeline
    process, ingest_thread = Pipeline.process, []

    def whole(*a, **k):   # the ingest thread's CPU over the input, everything included
        t = time.thread_time()
        try:
            return process(*a, **k)
        finally:
            ingest_thread.append(time.thread_time() - t)
    Pipeline.process = whole
    from shoal.daemon.cli.main import main as shoal_main

    before = resource.getrusage(resource.RUSAGE_SELF)
    t0 = time.perf_counter()
    with open(os.devnull, "w") as out, contextlib.redirect_stdout(out):
        code = shoal_main(["ingest", "-c", cfg, drop])
    after = resource.getrusage(resource.RUSAGE_SELF)
    if "read + decode (pyarrow)" in cpu:
        cpu["read + decode (pyarrow)"] -= cpu.get("frame build (float64 rows, checks)", 0.0)
    total = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    print(json.dumps({"code": code, "cpu": cpu, "total": total, "ingest": sum(ingest_thread),
                      "wall": time.perf_counter() - t0}))
    return 0


def _compiled_bytecode() -> None:
    """Byte-compile shoal's modules, as an installed package is: a checkout run with
    PYTHONDONTWRITEBYTECODE would otherwise compile every module it imports from source
    in each run, and the watch's modules would charge their compilation to the rest."""
    import compileall
    import shoal.config
    import shoal.core
    import shoal.daemon
    for package in (shoal.core, shoal.daemon, shoal.config):
        for folder in package.__path__:
            compileall.compile_dir(folder, quiet=1)


def stages_table(rows: int = 1_000_000, workdir: Path | None = None, repeats: int = 3) -> dict:
    """CPU seconds per stage of `shoal ingest` of one drop (full covariance), Parquet and
    CSV, drift and lifecycle off and on (each the median of ``repeats`` runs, off and on
    interleaved); the rest is start-up, imports and glue. The last lines give what the
    watch adds: its stages, and what the rest and the model's own stage grow by with it
    on (the model's learning then also hands the watch its moments)."""
    _compiled_bytecode()
    with tempfile.TemporaryDirectory(prefix="shoal-stages-", dir=workdir) as tmp:
        tmp = Path(tmp)
        (tmp / "data").mkdir()
        warm = write_drop(tmp / "data" / "warm.parquet", WARM_ROWS, seed=1)
        drops = {"parquet": write_drop(tmp / "data" / "drop.parquet", rows),
                 "csv": write_drop(tmp / "data" / "drop.csv", rows)}
        folders = {on: warmed_state(tmp / f"state-{int(on)}", "full", on, warm)
                   for on in (False, True)}
        samples: dict = {}
        for _ in range(repeats):
            for fmt, drop in drops.items():
                for watch_drift in (False, True):
                    folder = folders[watch_drift]
                    cfg = _fresh_state(folder, folder.with_name(folder.name + "-run"))
                    with open(drop, "rb") as f:   # in the page cache for every run alike
                        while f.read(1 << 24):
                            pass
                    out = subprocess.run([sys.executable, "-m", "scripts.bench_e2e",
                                          "--stage-child", str(cfg), str(drop)],
                                         capture_output=True, text=True,
                                         cwd=Path(__file__).resolve().parent.parent,
                                         env=_one_blas_thread())
                    if out.returncode != 0 or not out.stdout.strip():
                        raise RuntimeError(f"shoal ingest {drop.name} (stages) exited "
                                           f"{out.returncode}: {out.stderr[-2000:]}")
                    samples.setdefault((fmt, watch_drift), []).append(
                        json.loads(out.stdout.strip().splitlines()[-1]))
        names = list(dict.fromkeys([s[0] for s in STAGES] + ["read + decode (pyarrow)"]))
        runs = {key: {"cpu": {n: float(np.median([r["cpu"].get(n, 0.0) for r in got]))
                              for n in names},
                      "total": float(np.median([r["total"] for r in got])),
                      "wall": float(np.median([r["wall"] for r in got])),
                      "ingest": float(np.median([r["ingest"] for r in got])),
                      "rest": float(np.median([r["total"] - sum(r["cpu"].values())
                                               for r in got]))}
                for key, got in samples.items()}
        keys = [(fmt, on) for fmt in drops for on in (False, True)]
        heads = [f"{fmt} {'on' if on else 'off'}" for fmt, on in keys]
        print(f"\nCPU seconds per stage of `shoal ingest`, {rows:,} rows, D={N_FEATURES}, "
              f"K={N_COMPONENTS}, full; drift and lifecycle off/on (thread CPU time of "
              f"each stage's calls; median of {repeats} runs, off and on interleaved)")
        print(f"{'stage':36} " + " ".join(f"{h:>12}" for h in heads))
        for name in sorted(names, key=lambda n: -runs[("parquet", True)]["cpu"].get(n, 0.0)):
            print(f"{name:36} " + " ".join(f"{runs[k]['cpu'].get(name, 0.0):>12.3f}"
                                           for k in keys))
        print(f"{'rest (start-up, imports, glue)':36} " + " ".join(
            f"{runs[k]['rest']:>12.3f}" for k in keys))
        print(f"{'process CPU':36} " + " ".join(f"{runs[k]['total']:>12.3f}" for k in keys))
        print(f"{'process wall':36} " + " ".join(f"{runs[k]['wall']:>12.3f}" for k in keys))
        print(f"{'ingest thread (the input, all of it)':36} " + " ".join(
            f"{runs[k]['ingest']:>12.3f}" for k in keys))
        model = "model E+M (Mixture.learn)"
        for fmt in drops:
            off, on = runs[(fmt, False)], runs[(fmt, True)]
            watch = sum(on["cpu"][n] for n in WATCH_STAGES)
            grown = watch + max(on["rest"] - off["rest"], 0.0)
            added = on["ingest"] - off["ingest"]
            e_m = off["cpu"][model]
            print(f"{fmt}: the watch's stages {watch:.3f} CPU-s ({watch / e_m:.2f} x the "
                  f"model's E+M with it off); with the growth of the rest {grown:.3f} "
                  f"({grown / e_m:.2f} x; target <= 0.5); all it adds to the ingest thread "
                  f"(its stages, the moments the model's learning hands it, glue) "
                  f"{added:.3f} ({added / e_m:.2f} x)")
    return runs


def main() -> int:
    if len(sys.argv) == 4 and sys.argv[1] == "--stage-child":
        return _stage_child(sys.argv[2], sys.argv[3])
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--big-rows", type=int, default=10_000_000)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--covariance", choices=("full", "diag"), action="append",
                   help="only this covariance type (repeatable; default: both)")
    p.add_argument("--no-memory", action="store_true", help="skip the peak RSS table")
    p.add_argument("--stages", action="store_true",
                   help="CPU seconds per stage instead of the rate and memory tables")
    p.add_argument("--cost", action="store_true",
                   help="only the cost of drift and lifecycle (on/off, interleaved)")
    a = p.parse_args()
    if a.stages:
        stages_table(a.rows, repeats=a.repeats)
        return 0
    if a.cost:
        watch_cost_table(a.rows, a.repeats, covariances=tuple(a.covariance or ("full", "diag")))
        return 0
    e2e_table(a.rows, a.big_rows, a.repeats, memory=not a.no_memory,
              covariances=tuple(a.covariance or ("full", "diag")))
    return 0


if __name__ == "__main__":
    sys.exit(main())
