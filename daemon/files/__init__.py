"""Files: the bytes on disk, in and out.

Reading an input into frames (:mod:`.readers` over :mod:`.csv_input` and
:mod:`.parquet_input`, with :mod:`.frame` for the feature matrix and its checks and
:mod:`.refusals` for the reason codes), its content digest, row times, which rows
count (missing features), the labels files and their one schema per stream, the
service's folders and lock, and quarantine (moving inputs aside and reading back what
is there). Knows nothing of the model's state or of the service loop. May import
config, core and errors, and the state store only to open it for the layout.
"""
