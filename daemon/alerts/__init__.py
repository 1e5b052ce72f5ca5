"""Alerts after commit: the JSON-lines file and signed webhooks, delivered at least once
from the store's outbox."""
