"""Runtime: the process around the worker.

Supervision of the worker thread, the service manager's notify protocol, SIGHUP reload,
JSON logs, the read-only HTTP endpoint and its metrics, liveness of a running service,
the compiled-kernel switch, the allocator's thresholds and progress bars."""
