"""Ingest: one input start to finish.

Claim (content digest against the ledger), read, score, learn, watch the segments,
write the labels file, commit one state transaction. One thread owns the model."""
