"""The ``shoal`` command line, one module per command group.

``main`` parses the arguments, runs a command and turns errors into exit codes (the
table in :mod:`shoal.daemon.errors`); the other modules hold the operators' command
groups. The top of the daemon: it may import every other sub-package; only the demo
imports from it (``format_alert``, which :mod:`.alert_commands` re-exports from
:mod:`shoal.daemon.views.alert_text`, where the demo may take it from instead).
"""
