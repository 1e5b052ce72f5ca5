"""``shoal backfill``: learn a history of files on a Dask cluster into a normal state
folder, with the same maths as ingest.

:mod:`.learn` runs it (survey, warm-up, rounds, labels, one commit) over :mod:`.plan`
(the files' facts and the rounds), :mod:`.tasks` (what the workers run),
:mod:`.cluster` (the Dask client) and :mod:`.commit` (the one transaction);
:mod:`.command` is its command line. The warm-up, the unusual-row memory and the
segment history come from :mod:`shoal.daemon.ingest.learning`, shared with ingest."""
