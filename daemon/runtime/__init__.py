"""Runtime: the process around the worker.

Supervision of the worker thread, the service manager's notify protocol, SIGHUP reload,
JSON logs, the read-only HTTP endpoint and its metrics, liveness of a running service,
the compiled-kernel switch, the allocator's thresholds and progress bars. The endpoint
serves what :mod:`shoal.daemon.state.readout` reads and the views draw. May import
config, core, errors, and every stage below it (files, model, state, ingest, intake,
views); the logs, progress, liveness, allocator and compiled-switch modules import
nothing of the daemon outside themselves, so every stage may use them.
"""
