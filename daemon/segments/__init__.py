"""The watch over segments: drift and lifecycle decisions.

Window by window, each segment against its baseline (drift alerts with hysteresis),
the share of rows missing each feature, segments born, retired, merged and split, and
operators' names for segments. The numbers come from core; this package keeps the
bookkeeping and turns decisions into alerts."""
