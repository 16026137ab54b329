"""Where training's tile loops run: local worker processes, or a Dask cluster.

Feature extraction (:func:`training.fitting.dataset.build_patch_set`), candidate readings and
the runs of a model over labelled tiles (:func:`training.evaluation.evaluate.run_on_tiles`) are
loops over tiles. Each takes its joblib ``Parallel`` from :func:`tile_parallel`: outside
:func:`on_cluster` that is ``workers`` local processes (joblib's loky backend; serial for
one); inside it, every such loop goes to the Dask cluster through joblib's Dask backend,
one job per thread of the cluster, whatever ``workers`` says. joblib returns the results
in the order of the jobs either way, and every job draws from its own seed, so a
training run gives the same model on a cluster as in local processes.

Files sent to the workers must be named by absolute path (see :mod:`detector.cluster`).
"""

import contextlib
import contextvars

from joblib import Parallel

__all__ = ["on_cluster", "current_cluster", "tile_parallel"]

_CLUSTER = contextvars.ContextVar("frostvane_cluster", default=None)


@contextlib.contextmanager
def on_cluster(scheduler):
    """Run the tile loops of the enclosed code on the Dask cluster of a running scheduler.

    Parameters
    ----------
    scheduler : str
        The scheduler's address, e.g. ``"tcp://10.0.0.5:8786"``.

    Yields
    ------
    cluster : dict
        ``scheduler`` (the address), ``workers`` (workers connected when the
        connection was made) and ``threads`` (their threads in all: the jobs run at once).

    Raises
    ------
    DetectorError
        The scheduler cannot be reached, or has no worker (:func:`detector.cluster.connect`).
    """
    from joblib import parallel_config

    from detector.cluster import connect, worker_count

    with connect(scheduler) as client:
        cluster = {"scheduler": scheduler, "workers": worker_count(client),
                   "threads": int(sum(client.nthreads().values()))}
        token = _CLUSTER.set(cluster)
        try:
            # joblib's Dask backend submits through the default client, which connect() just made
            with parallel_config(backend="dask"):
                yield cluster
        finally:
            _CLUSTER.reset(token)


def current_cluster():
    """The cluster of the enclosing :func:`on_cluster` (its dict), or None when work runs locally."""
    return _CLUSTER.get()


def tile_parallel(workers, **kwargs):
    """The joblib ``Parallel`` a tile loop runs in.

    Parameters
    ----------
    workers : int
        Local worker processes (loky) when above 1, serial for 1; ignored
        inside :func:`on_cluster`, where the cluster's threads run the jobs.
    **kwargs
        Passed to ``joblib.Parallel`` (not ``n_jobs`` nor ``backend``).

    Returns
    -------
    joblib.Parallel
    """
    if _CLUSTER.get() is not None:
        return Parallel(**kwargs)  # backend and job count from the enclosing parallel_config
    return Parallel(n_jobs=workers, backend="loky" if workers > 1 else "sequential", **kwargs)
