#!/usr/bin/env python3
"""Two trees of shoal in one process: what drift and lifecycle cost the learning loop in
each, interleaved, so that a change of about a millisecond per 1,000,000 rows shows where
runs in separate processes move by ten.

    python -m scripts.compare_trees BASE [--repeats 8] [--covariance full]

``BASE`` is a git revision; the work tree is compared against it. The base tree is
exported (``git archive``) into a temporary folder as the package ``shoalbase``, its
imports of ``shoal.`` rewritten, with this tree's compiled kernels copied in (so a change
to ``core/_kernels.c`` is not what this compares). Each tree warms a model up on the
same 20,000 rows, learns the same 1,000,000-row lead with the watches on, then learns the
same 1,000,000 measured rows, in the pipeline's frames of 65,536 rows, with them off and
on; the four runs are interleaved ``--repeats`` times and each is timed by the thread's
CPU. The table gives each tree's least run off and on, what the watches add (least on
minus least off), and whether both trees ended on the same model and alerts (a change
meant to leave the results alone must say yes).
"""
from __future__ import annotations

import argparse
import importlib
import importlib.util
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # as the shoal command runs

from scripts.bench_e2e import FEATURES, N_COMPONENTS, WARM_ROWS, mixture_rows  # noqa: E402
from shoal.daemon.runtime.allocator import tune_allocator  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
FRAME_ROWS = 65_536   # the pipeline's frames (learn_chunks is called once per frame)
_IMPORTS = re.compile(r"\bshoal\.(core|daemon|config)\b")


def export_base(revision: str, into: Path) -> str:
    """The tree at ``revision`` as the package ``shoalbase`` under ``into`` (its imports
    rewritten, this tree's compiled kernels copied in); returns the package name."""
    target = into / "shoalbase"
    target.mkdir(parents=True)
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", "--format=tar", revision],
                             check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(target)], input=archive, check=True)
    for path in target.rglob("*.py"):
        text = path.read_text(encoding="utf-8")
        new = _IMPORTS.sub(r"shoalbase.\1", text).replace("from shoal import",
                                                          "from shoalbase import")
        if new != text:
            path.write_text(new, encoding="utf-8")
    for kernel in (ROOT / "core").glob("_kernels*.so"):
        shutil.copy2(kernel, target / "core" / kernel.name)
    # importable as a package from where it lies (its submodules found from its path)
    (target / "__init__.py").touch()
    spec = importlib.util.spec_from_file_location(
        "shoalbase", target / "__init__.py", submodule_search_locations=[str(target)])
    package = importlib.util.module_from_spec(spec)
    sys.modules["shoalbase"] = package
    spec.loader.exec_module(package)
    return "shoalbase"


def tree_runner(package: str, covariance: str, warm, lead, X):
    """A callable ``run(on) -> (thread CPU seconds, model, alerts)`` of the tree
    ``package``: the measured rows learned from the state after the warm-up and lead."""
    mod = lambda name: importlib.import_module(f"{package}.{name}")   # noqa: E731
    config = {"features": FEATURES, "segments": N_COMPONENTS, "covariance": covariance,
              "warmup_rows": WARM_ROWS, "learning": {"n_init": 1}}
    settings = mod("config").parse_config(config, Path("."))
    learning = mod("daemon.ingest.learning")
    DriftMonitor = mod("daemon.segments.monitor").DriftMonitor
    LifeWatch = mod("daemon.segments.segment_life").LifeWatch
    watch = DriftMonitor(settings).begin(None, version=1, file="warm")
    life = LifeWatch(settings, None, version=1, file="warm")
    mixture, _, _, extra = learning.warm_up(settings, warm, None, watch=watch, life=life)
    for lo in range(0, len(lead), FRAME_ROWS):
        mixture, _ = learning.learn_chunks(settings, mixture, lead[lo:lo + FRAME_ROWS],
                                           watch, life)
    # the committed state, as the next input reads it
    extra = json.loads(json.dumps(dict(extra, drift=watch.state,
                                       lifecycle=life.final_state())))
    start = mixture

    def run(on: bool):
        m, watch, life = start, None, None
        if on:
            watch = DriftMonitor(settings).begin(extra["drift"], version=2, file="measured",
                                                 unusual_below=extra.get("unusual_below"))
            life = LifeWatch(settings, extra["lifecycle"], version=2, file="measured")
        t0 = time.thread_time()
        for lo in range(0, len(X), FRAME_ROWS):
            m, _ = learning.learn_chunks(settings, m, X[lo:lo + FRAME_ROWS], watch, life)
        alerts = None
        if on:
            alerts = watch.alerts
            watch.state, life.final_state()
        return time.thread_time() - t0, m, alerts
    return run


def compare(revision: str, repeats: int = 8, covariance: str = "full",
            rows: int = 1_000_000) -> dict:
    """Print the comparison table of the work tree against ``revision``; returns it."""
    warm, lead, X = (mixture_rows(WARM_ROWS, [1, 0]), mixture_rows(rows, [3, 0]),
                     mixture_rows(rows, [0, 0]))
    with tempfile.TemporaryDirectory(prefix="shoal-trees-") as tmp:
        base = export_base(revision, Path(tmp))
        runners = {revision: tree_runner(base, covariance, warm, lead, X),
                   "work tree": tree_runner("shoal", covariance, warm, lead, X)}
        times = {(tree, on): [] for tree in runners for on in (False, True)}
        ends = {}
        for _ in range(repeats):
            for tree, run in runners.items():
                for on in (False, True):
                    seconds, model, alerts = run(on)
                    times[(tree, on)].append(seconds)
                    if on:
                        ends[tree] = (model.means.tobytes(), model.ids.tobytes(),
                                      json.dumps(alerts, sort_keys=True, default=str))
    print(f"\nThe learning loop over {rows:,} rows (D={len(FEATURES)}, K={N_COMPONENTS}, "
          f"{covariance}) after a {rows:,}-row lead, drift and lifecycle off and on, two "
          f"trees in one process interleaved {repeats} times; thread CPU seconds, least of "
          f"each")
    print(f"{'tree':>14} | {'off':>7} {'on':>7} {'added':>7} {'/ off':>6}")
    out = {}
    for tree in runners:
        off, on = min(times[(tree, False)]), min(times[(tree, True)])
        out[tree] = {"off": off, "on": on, "added": on - off}
        print(f"{tree[:14]:>14} | {off:7.4f} {on:7.4f} {on - off:7.4f} {(on - off) / off:6.2f}")
    work, was = out["work tree"], out[revision]
    print(f"work tree - {revision}: on {work['on'] - was['on']:+.4f}, added "
          f"{work['added'] - was['added']:+.4f} CPU-s per {rows:,} rows")
    same = ends[revision] == ends["work tree"]
    print(f"same model and alerts at the end: {'yes' if same else 'no'}")
    out["same"] = same
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("base", help="the git revision to compare the work tree against")
    p.add_argument("--repeats", type=int, default=8)
    p.add_argument("--covariance", choices=("full", "diag"), default="full")
    p.add_argument("--rows", type=int, default=1_000_000)
    a = p.parse_args()
    tune_allocator()   # malloc's thresholds as the shoal command sets them
    compare(a.base, a.repeats, a.covariance, a.rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
