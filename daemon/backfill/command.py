"""``shoal backfill``: the command line of a backfill (its arguments and its report)."""
from __future__ import annotations

import threading

from shoal.daemon.backfill.learn import backfill
from shoal.daemon.backfill.plan import DEFAULT_ROUND_ROWS, LABEL_MODES
from shoal.daemon.errors import UsageError

__all__ = ["add_backfill_command"]


def add_backfill_command(cmd, with_config, stop_on_signals) -> None:
    """Add ``backfill`` with the CLI's own ``cmd``/``with_config`` helpers."""
    sp = with_config(cmd("backfill", "learn a history of Parquet/CSV files on a Dask cluster "
                                     "into the state folder, labelling every row",
                         lambda args: _cmd_backfill(args, stop_on_signals)))
    sp.add_argument("sources", nargs="+", metavar="SOURCE",
                    help="files, or folders whose Parquet/CSV files are taken in name order")
    where = sp.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="address of a running Dask scheduler, e.g. tcp://host:8786")
    where.add_argument("--local-workers", type=int, metavar="N",
                       help="start N local worker processes (default: one per core)")
    sp.add_argument("--round-rows", type=int, default=DEFAULT_ROUND_ROWS, metavar="ROWS",
                    help="rows per round: one parameter snapshot per round, rounded up to "
                         f"whole refresh intervals (default {DEFAULT_ROUND_ROWS:,})")
    sp.add_argument("--labels", choices=LABEL_MODES, default="round",
                    help="round: each row labelled by the snapshot that scored it while "
                         "learning (one pass, as the service labels); final: every row "
                         "labelled again by the final model (a second pass)")
    sp.add_argument("--passes", type=int, default=1, metavar="N",
                    help="learn the history N times over (default 1); labels come from the "
                         "last pass")
    sp.add_argument("--connect-timeout", type=float, default=10.0, metavar="SECONDS",
                    help="give up on the scheduler after this long (default 10)")


def _cmd_backfill(args, stop_on_signals) -> int:
    from shoal.config import load_config
    from shoal.daemon.runtime.logs import setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    if args.local_workers is not None and args.local_workers < 1:
        raise UsageError(f"--local-workers should be at least 1, got {args.local_workers}")
    stop = threading.Event()
    with stop_on_signals(stop):
        r = backfill(settings, args.sources, scheduler=args.scheduler,
                     local_workers=args.local_workers, round_rows=args.round_rows,
                     labels=args.labels, passes=args.passes,
                     connect_timeout=args.connect_timeout, stop=stop)
    learned = f"{r.learned} files learned"
    if r.learned:
        learned += (f" ({r.warmup_rows:,} warm-up rows, {r.rows:,} rows in {r.rounds} rounds "
                    f"of {r.round_rows:,})")
    print(f"{learned}, {r.duplicates} duplicates, {r.skipped} already done, {r.quarantined} "
          f"quarantined; {len(r.labels)} labels files; model version {r.model_version}; "
          f"{r.seconds:.1f} s")
    return 1 if r.quarantined else 0
