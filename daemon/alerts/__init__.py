"""Alerts after commit: the JSON-lines file and signed webhooks, delivered at least once
from the store's outbox.

Owns delivery only: which notifications exist is decided by the segment watch and
committed with the model; this package reads the outbox, sends, and records each
sink's delivery. May import config, errors, the logs and the state store.
"""
