"""Intake: which files in the inbox are read, and when.

The watcher turns file events and full listings into paths on a bounded queue; the
readiness gate decides whether a path may be read now (complete, a regular file, within
limits); the service loop takes ready files oldest first (modification time, then name)
and hands each to ingest. Imports files, ingest, model, state and runtime; nothing here
learns or writes."""
