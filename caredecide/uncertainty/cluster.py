"""Run the chunks of a probabilistic analysis on a Dask distributed cluster.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice.

Needs the ``cluster`` extra (``pip install "caredecide[cluster]"``: dask.distributed).
Each chunk is one task ``solve_chunk(context, start, stop)``; the context (model,
objective, sampler, candidate policies) is scattered to the workers once. Tasks carry
their draw range and the draws depend only on the seed and the draw number, so the
results equal a serial run's exactly. Results are taken back in draw order, with at
most ``max_in_flight`` chunks submitted and not yet collected, so neither the client nor
the workers hold more than a few chunks at once.

The pilot block (the first 1,000 draws, which picks the most frequent optimal policies
as candidates) runs in the client process; every later chunk runs on the cluster.

Typical use::

    with dask_client(workers=2) as client:            # a local cluster of 2 processes
        result = analyse_uncertainty(model, 100_000, seed=1, map_chunks=dask_map(client))

    with dask_client(scheduler="tcp://scheduler-host:8786") as client:   # an existing cluster
        ...

On a real cluster every worker needs the same versions of caredecide, numpy and scipy
installed (``pip install "caredecide[cluster]"``); the model travels with the task, so
workers need no access to the model file. See docs/methods-uncertainty.md.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from caredecide.chunks import dask_map
from caredecide.errors import CaredecideError
from caredecide.options import check_scalar

__all__ = ["ClusterError", "dask_client", "dask_map"]


class ClusterError(CaredecideError, RuntimeError):
    """Dask is missing, or the cluster could not be reached or started."""


def _distributed():
    try:
        import distributed
    except ImportError as error:  # the optional extra is not installed
        raise ClusterError(
            'running on a cluster needs dask.distributed: pip install "caredecide[cluster]"'
        ) from error
    return distributed


@contextmanager
def dask_client(
    scheduler: str | None = None,
    workers: int | None = None,
    *,
    processes: bool = True,
    threads_per_worker: int = 1,
    connect_timeout: str = "20s",
) -> Iterator[object]:
    """A ``distributed.Client`` for an existing scheduler, or for a new local cluster.

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler, e.g. ``"tcp://127.0.0.1:8786"``.
    workers : int, optional
        Start a local cluster with this many workers (>= 1) when no scheduler is given.
    processes : bool
        Local cluster: workers in separate processes (true parallelism) or threads.
    threads_per_worker : int
        Local cluster: threads per worker.
    connect_timeout : str
        How long to try reaching ``scheduler`` (Dask time string, e.g. ``"20s"``).

    Raises
    ------
    ClusterError
        Neither or both of ``scheduler`` and ``workers``; a bad count; an unreachable
        scheduler; dask.distributed not installed.
    """
    if (scheduler is None) == (workers is None):
        raise ClusterError(
            "give exactly one of a scheduler address or a number of workers; "
            f"got scheduler={scheduler!r}, workers={workers!r}"
        )
    distributed = _distributed()
    if scheduler is not None:
        _check_timeout(connect_timeout)
        try:
            client = distributed.Client(scheduler, timeout=connect_timeout)
        except (OSError, TimeoutError) as error:
            raise ClusterError(
                f"could not reach the Dask scheduler at {scheduler!r}: {error}. "
                "Expected an address such as tcp://HOST:8786 of a running "
                "scheduler"
            ) from None
        with client:
            yield client
        return
    check_scalar(workers, "workers", int, min_val=1)
    check_scalar(threads_per_worker, "threads_per_worker", int, min_val=1)
    # Worker processes listen on loopback only; threads talk in-process.
    where = {"host": "127.0.0.1"} if processes else {}
    with (
        distributed.LocalCluster(
            n_workers=workers,
            threads_per_worker=threads_per_worker,
            processes=processes,
            dashboard_address=None,
            **where,
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        yield client


def _check_timeout(timeout: str) -> None:
    """A ClusterError naming ``timeout`` unless it is a positive Dask time string."""
    from dask.utils import parse_timedelta

    try:
        seconds = parse_timedelta(timeout)
    except (KeyError, ValueError, TypeError):
        seconds = None
    if seconds is None or not seconds > 0:
        raise ClusterError(
            f"connect timeout {timeout!r}; expected a positive duration such as '20s' or '2m'"
        )
