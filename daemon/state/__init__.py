"""State: the SQLite store and what reads it.

The store (ledger, model checkpoints, alert outbox and history, segment history) with
its schema and migrations, the state folder's marker, retention and pruning, and the
read-only views of the state that status, report and metrics use."""
