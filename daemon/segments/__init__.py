"""The watch over segments: drift and lifecycle decisions.

Window by window, each segment against its baseline (``monitor``: the window flow;
``window_sums``: the window records and their per-segment sums; ``window_values``:
a window's statistics keyed for the bounds; ``drift_alerts``: payloads and
explanations), the share of rows missing each feature (``missing_drift``), segments
born, retired, merged and split (``segment_life``, with ``life_rows`` for the samples
and the pool of unexplained rows it decides on and ``life_events`` for their history
and alerts), and operators' names for segments (``segment_names``). The
numbers come from core; this package keeps the bookkeeping and turns decisions into
alerts."""
