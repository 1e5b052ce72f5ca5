"""The model as the service feeds and keeps it, beyond core's numbers.

The model's contract (the settings that define what a stored model means, checked
against the config by name) and the configured per-feature transforms between the
reader and the model. Shared by ingest, backfill, the segment watch and the views.
May import config, core, errors, the state store, the layout and the logs.
"""
