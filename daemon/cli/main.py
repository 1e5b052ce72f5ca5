"""The ``shoal`` command line. Errors become exit codes here and nowhere else.

Exit codes: each error's ``exit_code``; the table is in :mod:`shoal.daemon.errors`
(0 done; 1 an input was quarantined or a model error; 2 usage or configuration
error; 3 the state cannot be used; 4 the Dask scheduler cannot be reached; 130
stopped by a signal; 141 broken pipe).
"""
from __future__ import annotations

import argparse
import contextlib
import gc
import json
import os
import signal
import sqlite3
import stat
import sys
import threading
from importlib import metadata
from pathlib import Path

from shoal.daemon.runtime.allocator import ARROW_PURGE_DELAY, tune_allocator

# One BLAS thread unless the environment says otherwise, set before numpy is loaded:
# the model's matrices are narrow (K*D by D+1), where a second BLAS thread gains
# little, and on a small machine it would fight the reader thread (and the core's own
# workers) for a core, which makes both slower.
for _var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
# Arrow's allocator (mimalloc) keeps the memory it frees instead of handing it back to
# the kernel soon after, set before pyarrow first allocates: each frame's buffers are
# freed and made again many times a second, and memory handed back comes back as fresh
# pages the kernel must zero (page faults and kernel time of the reader thread). See
# shoal.daemon.runtime.allocator.
os.environ.setdefault(ARROW_PURGE_DELAY[0], ARROW_PURGE_DELAY[1])

from shoal.config import ConfigError, Settings, dump_settings, load_config  # noqa: E402
from shoal.core import ShoalError  # noqa: E402
from shoal.daemon.cli.alert_commands import add_alert_commands, alert_delivery  # noqa: E402
from shoal.daemon.backfill.command import add_backfill_command  # noqa: E402
from shoal.daemon.runtime.compiled_switch import apply_environment  # noqa: E402
from shoal.daemon.errors import InputRejected, ServiceError, UsageError  # noqa: E402
from shoal.daemon.model.contract import check_model_contract, open_model_store  # noqa: E402
from shoal.daemon.files.layout import (  # noqa: E402
    Layout,
    StateLock,
    open_store,
    prepare_folders,
    remove_stale_temps,
)
from shoal.daemon.runtime.logs import log_event, setup_logging  # noqa: E402
from shoal.daemon.cli.ops_commands import add_operating_commands, run_watch  # noqa: E402
from shoal.daemon.ingest.pipeline import Pipeline, Result  # noqa: E402
from shoal.daemon.runtime.progress import progress  # noqa: E402
from shoal.daemon.cli.quarantine_commands import add_quarantine_commands  # noqa: E402
from shoal.daemon.state.retention import RetentionKeeper, add_prune_command  # noqa: E402
from shoal.daemon.segments.segment_names import add_name_command  # noqa: E402
from shoal.daemon.state.readout import StateReader  # noqa: E402
from shoal.daemon.cli.transform_commands import add_transform_commands  # noqa: E402
from shoal.daemon.files.writer import display_name  # noqa: E402

__all__ = ["main", "build_parser", "open_service_parts"]


def _version() -> str:
    try:
        return metadata.version("shoal")
    except metadata.PackageNotFoundError:
        return "unknown"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="shoal",
        description="Keep a live Gaussian-mixture picture of a population arriving as "
                    "Parquet/CSV drops; label every row with a stable segment.")
    p.add_argument("--version", action="version", version=f"shoal {_version()}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", required=True)

    def cmd(name, help_, func):
        sp = sub.add_parser(name, help=help_, description=help_)
        sp.set_defaults(func=func)
        return sp

    def with_config(sp):
        sp.add_argument("-c", "--config", required=True, metavar="CONFIG",
                        help="YAML configuration file")
        return sp

    with_config(cmd("watch", "run until SIGTERM/SIGINT: take what waits in the inbox, "
                             "then follow new drops", _cmd_watch))
    sp = with_config(cmd("ingest", "run the pipeline on the named files against the same "
                                   "state, then exit (1 if any was quarantined)", _cmd_ingest))
    sp.add_argument("files", nargs="+", metavar="FILE",
                    help="input files, or folders whose inputs are taken oldest first "
                         "(as the service takes them)")
    sp = with_config(cmd("label", "label a file with the current model, without learning",
                         _cmd_label))
    sp.add_argument("file", metavar="FILE")
    sp.add_argument("--out", required=True, metavar="PATH",
                    help="labels file to write (.csv for CSV, otherwise Parquet)")
    sp = with_config(cmd("segments", "show the current segments", _cmd_segments))
    sp.add_argument("--json", action="store_true", help="print JSON instead of a table")
    sp.add_argument("--all", action="store_true",
                    help="also list the segments that retired or merged away")
    add_operating_commands(cmd, with_config)   # report, status
    add_alert_commands(cmd, with_config, open_service_parts,   # alerts, rebaseline, replay
                       open_read_store)
    add_backfill_command(cmd, with_config, _stop_on_signals)   # backfill (Dask)
    add_transform_commands(cmd, with_config)   # suggest-transforms
    add_prune_command(cmd, with_config, open_service_parts)    # prune (retention)
    add_quarantine_commands(cmd, with_config)                  # quarantine list/retry/drop
    add_name_command(cmd, with_config)                         # name a segment
    with_config(cmd("config", "print the effective configuration (every key, defaults "
                              "filled in); exit 2 if it is not valid", _cmd_config))
    sp = cmd("demo", "run the cold-storage warehouse scenario end to end", _cmd_demo)
    sp.add_argument("--dir", default="demo-run", metavar="DIR",
                    help="folder for the demo's config, inbox, outbox and state "
                         "(default: ./demo-run)")
    sp.add_argument("--drops", type=int, default=None, metavar="N",
                    help="number of drops to generate")
    return p


@contextlib.contextmanager
def open_service_parts(settings: Settings, *, lock: bool = True):
    """Folders checked, state locked, store and pipeline opened; closed on exit."""
    layout = prepare_folders(settings)
    state_lock = StateLock(layout.lock).acquire() if lock else None
    store = None
    try:
        if lock:
            remove_stale_temps(layout)
        store = open_model_store(layout, settings, write=lock)
        pipeline = Pipeline(settings, layout, store)
        yield layout, store, pipeline
    finally:
        if store is not None:
            store.close()
        if state_lock is not None:
            state_lock.release()


def open_read_store(settings: Settings):
    """The state store opened read-only (no folder made, no lock, no write: a read-only
    state folder works), for the commands that only read; a state folder with no store
    yet is prepared as the service would prepare it."""
    layout = Layout.of(settings)
    if not layout.db.exists():
        return open_store(prepare_folders(settings))
    return StateReader(layout.db)


@contextlib.contextmanager
def open_read_parts(settings: Settings):
    """:func:`open_read_store` with its contract checked against the config and a pipeline
    on it (``shoal label``)."""
    store = open_read_store(settings)
    try:
        check_model_contract(store, settings, write=False)
        yield Layout.of(settings), store, Pipeline(settings, Layout.of(settings), store)
    finally:
        store.close()


@contextlib.contextmanager
def _stop_on_signals(stop: threading.Event, wake=None):
    """SIGTERM/SIGINT set ``stop``; a second signal exits at once (nothing committed)."""
    def handler(signum, frame):
        if stop.is_set():
            raise SystemExit(130)
        log_event("signal_received", signal=signal.Signals(signum).name)
        stop.set()
        if wake is not None:
            wake()

    old = {s: signal.signal(s, handler) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def _load(args) -> Settings:
    settings = load_config(args.config)
    setup_logging(settings.log_level)
    return settings


def _cmd_watch(args) -> int:
    settings = _load(args)
    return run_watch(settings, Path(args.config),
                     lambda s: alert_delivery(open_service_parts, s), _stop_on_signals)


def _cmd_ingest(args) -> int:
    settings = _load(args)
    paths = []
    for f in args.files:
        p = Path(f)
        if not p.exists() and not p.is_symlink():
            raise UsageError(f"no such file: {p}")
        paths += _folder_inputs(p, settings) if p.is_dir() and not p.is_symlink() else [p]
    results = []
    with alert_delivery(open_service_parts, settings, drain_seconds=10.0) as (
            layout, store, pipeline):
        retention = RetentionKeeper(pipeline)
        with _stop_on_signals(pipeline.stop):
            for p in progress(paths, total=len(paths), desc="inputs", unit="file"):
                in_inbox = p.resolve().parent == layout.inbox
                try:
                    results.append(pipeline.process(p, in_inbox=in_inbox))
                except (OSError, sqlite3.Error) as exc:
                    # a fault of the machine, not of the input (disk full, unwritable
                    # outbox): nothing of it was kept; the rest wait, in order, for a rerun
                    results.append(Result("failed", display_name(p.name),
                                          detail=f"{type(exc).__name__}: {exc}"))
                    break
                retention.between_inputs()
        retention.run()
    bad = [r for r in results if r.outcome not in ("committed", "duplicate", "already_done")]
    for r in results:   # one line per input, whatever became of it
        extra = f" ({r.reason}: {r.detail})" if r.reason else \
            (f" ({r.detail})" if r.detail else "")
        print(f"{r.outcome:12s} {r.name}{extra}")
    left = len(paths) - len(results)
    count = {o: sum(r.outcome == o for r in results)
             for o in ("committed", "duplicate", "already_done")}
    print(f"{count['committed']} of {len(paths)} inputs committed"
          + (f", {count['duplicate']} duplicate" if count["duplicate"] else "")
          + (f", {count['already_done']} already done" if count["already_done"] else "")
          + f", {len(bad)} not" + (f", {left} not tried" if left else ""))
    return 1 if bad or left else 0


def _folder_inputs(folder: Path, settings: Settings) -> list[Path]:
    """The inputs in ``folder`` in the service's order (oldest modification first, then
    name): regular files of a known kind whose names ``watch.ignore`` does not match."""
    from shoal.daemon.intake.gate import ReadinessGate, input_kind

    gate = ReadinessGate(0.0, settings.watch.ignore)
    found = []
    for p in folder.iterdir():
        if gate.ignored(p.name) or input_kind(p.name) is None:
            continue
        try:
            st = p.lstat()
        except OSError:
            continue
        if stat.S_ISREG(st.st_mode):
            found.append((st.st_mtime_ns, str(p), p))
    return [p for _, _, p in sorted(found)]


def _cmd_label(args) -> int:
    settings = _load(args)
    src, out = Path(args.file), Path(args.out)
    if not src.exists():
        raise UsageError(f"no such file: {src}")
    if not out.parent.is_dir():
        raise UsageError(f"--out {out}: no such folder {out.parent}")
    with open_read_parts(settings) as (layout, store, pipeline):
        with _stop_on_signals(pipeline.stop):
            try:
                r = pipeline.label_only(src, out)
            except InputRejected as exc:
                print(f"shoal: {src} cannot be labelled: {exc}", file=sys.stderr)
                return 1
    print(f"labelled {r.rows} rows ({r.rows_invalid} without a segment) with model version "
          f"{r.model_version} into {out}")
    return 0


def _cmd_segments(args) -> int:
    from shoal.daemon.views.summary import format_segments, segment_summary

    settings = _load(args)
    store = open_read_store(settings)
    try:   # the stored model as it is, whatever the config says (it says how it differs)
        summary = segment_summary(store, settings, include_gone=args.all)
    finally:
        store.close()
    print(json.dumps(summary, indent=2) if args.json else format_segments(summary))
    return 0


def contract_note(settings: Settings) -> str | None:
    """Everything ``shoal config`` checks beyond loading: the model's contract in an
    existing state store (:mod:`shoal.daemon.model.contract`), read-only. ConfigError (exit 2)
    names each key that differs; returns a line saying what was compared, or None."""
    from shoal.daemon.state.readout import StateReader

    layout = Layout.of(settings)
    if not layout.db.is_file() or layout.db.stat().st_size == 0:
        return None
    reader = StateReader(layout.db)
    try:
        adopted = check_model_contract(reader, settings, write=False)
    finally:
        reader.close()
    note = f"# the model's contract in {layout.db} matches"
    if adopted:
        note += " (taken going forward: " + ", ".join(
            f"{d['key']} {d['stored']!r} -> {d['configured']!r}" for d in adopted) + ")"
    return note


def _cmd_config(args) -> int:
    settings = load_config(args.config)
    note = contract_note(settings)
    print(f"# {args.config}: valid. Effective configuration:")
    if note:
        print(note)
    print(dump_settings(settings), end="")
    return 0


def _cmd_demo(args) -> int:
    from shoal.daemon.demo.command import run_demo

    return run_demo(Path(args.dir), drops=args.drops)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)  # usage errors: argparse prints and exits 2
    apply_environment()   # SHOAL_COMPILED=0: core's numpy path (shoal.daemon.runtime.compiled_switch)
    tune_allocator()   # frames' buffers reused, not fresh pages each (shoal.daemon.runtime.allocator)
    # The tens of thousands of objects of the imports (modules, functions, classes) live as
    # long as the process: moved out of the cyclic collector's view, a full collection no
    # longer walks them (a pause holding the interpreter lock, so every thread of an input's
    # pipeline waits meanwhile). Objects made later are collected as usual. Once a
    # process (main is called many times over in the tests).
    if not gc.get_freeze_count():
        gc.freeze()
    try:
        return int(args.func(args) or 0)
    except ConfigError as exc:
        print(f"shoal: configuration error: {exc}", file=sys.stderr)
        return exc.exit_code
    except ServiceError as exc:
        print(f"shoal: {exc}", file=sys.stderr)
        return exc.exit_code
    except ShoalError as exc:  # the numeric core refused: a model problem
        print(f"shoal: model error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # The reader of our output went away (`shoal alerts | head`): not an error of
        # ours. Point stdout at /dev/null so the interpreter's final flush does not
        # fail again, and exit as a process killed by SIGPIPE would (128 + 13).
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 141


if __name__ == "__main__":
    sys.exit(main())
