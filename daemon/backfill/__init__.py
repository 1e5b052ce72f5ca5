"""``shoal backfill``: learn a history of files on a Dask cluster into a normal state
folder, the same maths as ingest."""
