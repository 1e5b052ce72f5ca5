"""The ``shoal`` command line, one module per command group.

``main`` parses the arguments, runs a command and turns errors into exit codes (the
table in :mod:`shoal.daemon.errors`); the other modules hold the operators' command
groups."""
