"""The Dask cluster the backfill runs on: a running scheduler, or local worker processes.

Dask's ``distributed`` is imported only here, when a backfill starts
(``pip install 'shoal[cluster]'``); without it, or without a scheduler to reach,
:class:`ClusterUnavailable` says so.
"""
from __future__ import annotations

import contextlib
import os
from typing import Iterator

from shoal.daemon.backfill.plan import ClusterUnavailable

__all__ = ["cluster_client", "INSTALL_HINT"]

INSTALL_HINT = "pip install 'shoal[cluster]'"


def _distributed():
    try:
        import distributed
    except ImportError as exc:
        raise ClusterUnavailable(f"shoal backfill needs Dask's distributed scheduler, which "
                                 f"is not installed: {INSTALL_HINT}") from exc
    return distributed


@contextlib.contextmanager
def cluster_client(scheduler: str | None = None, local_workers: int | None = None,
                   connect_timeout: float = 10.0) -> Iterator:
    """A Dask client: connected to ``scheduler``, or to a local cluster of worker processes."""
    distributed = _distributed()
    if scheduler is not None:
        try:
            client = distributed.Client(scheduler, timeout=connect_timeout,
                                        set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise ClusterUnavailable(f"the Dask scheduler at {scheduler} cannot be reached "
                                     f"within {connect_timeout:g} s: {exc}") from exc
        with contextlib.closing(client):
            yield client
        return
    workers = local_workers or os.cpu_count() or 1
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster, set_as_default=False) as client:
            yield client
