"""Ingest: one input start to finish, in a straight line, by the thread that owns the model.

:mod:`.pipeline` (:class:`Pipeline`) takes each input through :mod:`.claim` (open,
pin, content digest against the ledger: new, duplicate or already done),
:mod:`.stages` (read -> claimed -> check -> score and learn -> label, iterators of
frames pulled into the labels writer), :mod:`.learned` (the checkpoint, history and
alerts of the new model version; :mod:`.warmup_labels` labels the warm-up's inputs
once the first model exists) and :mod:`.commit` (one state transaction per input or
group, then the move to ``processed/``); :mod:`.endings` quarantines a failed input,
:mod:`.attempts` remembers inputs a process died on, :mod:`.label_only` labels with
the model as it stands. :mod:`.learning` and :mod:`.rows` (the warm-up, the stepwise
steps, the row checks) are shared with backfill; :mod:`.results` holds the types
handed back. Ingest imports files, model, state and segments; nothing downstream
calls back into it."""
