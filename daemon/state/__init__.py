"""State: the SQLite store and what reads it.

Owns ``state.db`` and everything about it: the store (:mod:`.store`, which owns the
transactions) with one module per part it keeps (:mod:`.schema` and its migrations,
:mod:`.ledger`, :mod:`.checkpoints`, :mod:`.warmup_buffer`, :mod:`.segment_history`,
:mod:`.outbox`, :mod:`.rebaselines`, the :mod:`.records` and :mod:`.blobs` they share),
the folder's :mod:`.marker`, retention and pruning, and :mod:`.readout`, the read-only
side that returns plain data for status, report and metrics (it reads; the views
draw). May import config, core, errors and the lower parts of the daemon it reads
through (files' digest, layout and quarantine; model's contract and transforms;
segment names; runtime's logs and liveness; intake's readiness gate, to count the
inbox's backlog); never ingest, intake's service, the views or the command line.
"""
