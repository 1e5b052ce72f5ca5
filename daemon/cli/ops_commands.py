"""The operators' commands: ``shoal report`` and ``shoal status``, and ``watch``'s
supervised run. Registered on the main parser by :func:`add_operating_commands`;
heavy imports (matplotlib) happen only when a command runs.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path


__all__ = ["add_operating_commands", "run_watch"]


def add_operating_commands(cmd, with_config) -> None:
    """Add ``report`` and ``status`` with the CLI's own ``cmd``/``with_config`` helpers."""
    sp = with_config(cmd("report", "write a self-contained HTML report with plots of the "
                                   "segment history and alerts", _cmd_report))
    sp.add_argument("--out", default="shoal-report.html", metavar="PATH",
                    help="HTML file to write (default: shoal-report.html)")
    sp.add_argument("--since", metavar="WHEN",
                    help="only history from then on, in the plots' x units: with "
                         "drift.time_column a data time (ISO, e.g. 2026-05-01T08:00) or a "
                         "duration back from the newest data (7d, 24h, 30min); without one "
                         "a stream row (250000, 250k, 1.5M)")
    sp.add_argument("--until", metavar="WHEN",
                    help="only history up to then, in the same units as --since")
    sp = with_config(cmd("status", "one-screen summary: segments, alert counts, lag, "
                                   "last error", _cmd_status))
    sp.add_argument("--json", action="store_true", help="print JSON instead of text")


def _settings(args):
    from shoal.config import load_config
    from shoal.daemon.runtime.logs import setup_logging

    settings = load_config(args.config)
    setup_logging(settings.log_level)
    return settings


def _reader(settings):
    from shoal.daemon.files.layout import Layout
    from shoal.daemon.state.readout import StateReader

    layout = Layout.of(settings)
    return layout, StateReader(layout.db)


def _cmd_report(args) -> int:
    from shoal.daemon.views.report import write_report

    settings = _settings(args)
    layout, reader = _reader(settings)
    try:
        out = write_report(reader, settings, layout, Path(args.out), config=str(args.config),
                           since=args.since, until=args.until)
    finally:
        reader.close()
    print(f"report written to {out}")
    return 0


def _cmd_status(args) -> int:
    from shoal.daemon.state.readout import state_snapshot
    from shoal.daemon.views.status_text import format_status

    settings = _settings(args)
    layout, reader = _reader(settings)
    try:
        snap = state_snapshot(reader, settings, layout)
    finally:
        reader.close()
    if args.json:
        print(json.dumps(snap, indent=2, default=str))
    else:
        print(format_status(snap, width=shutil.get_terminal_size((100, 24)).columns))
    return 0


def run_watch(settings, config_path: Path, open_parts, stop_on_signals) -> int:
    """``shoal watch``: the supervised service (systemd notify, HTTP, SIGHUP reload)."""
    from shoal.daemon.runtime.supervise import Supervisor

    with open_parts(settings) as (layout, store, pipeline):
        supervisor = Supervisor(settings, layout, pipeline, config_path=config_path)
        with stop_on_signals(supervisor.stop_event, supervisor.request_stop):
            return supervisor.run()
