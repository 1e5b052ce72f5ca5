"""Files: the bytes on disk, in and out.

Reading an input into a feature matrix and pass-through columns (CSV, TSV, Parquet),
its content digest, row times, which rows count (missing features), the labels files and
their one schema per stream, the service's folders and lock, and quarantine. Knows
nothing of the model's state or of the service loop."""
