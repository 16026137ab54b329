"""Dask distributed: reaching a running scheduler and counting its workers.

Screening (:func:`detector.screening.run.screen`) and training (``training.parallel``) both
run on a cluster given by its scheduler's address; this module is where they connect,
so that both fail the same way. What runs on the workers belongs to the caller, and
every file it names must be given by absolute path: a worker may run in another folder,
or on another machine that mounts the same files.
"""

from .errors import DetectorError

__all__ = ["CONNECT_TIMEOUT_S", "connect", "worker_count"]

#: Seconds to wait for a scheduler to answer, and then for its first worker to join.
CONNECT_TIMEOUT_S = 30.0


def connect(scheduler, *, timeout=None):
    """A client of a running Dask distributed scheduler that has at least one worker.

    Parameters
    ----------
    scheduler : str
        The scheduler's address, e.g. ``"tcp://10.0.0.5:8786"``.
    timeout : float, optional
        Seconds to wait for the scheduler, then for a worker; default
        :data:`CONNECT_TIMEOUT_S` (read at each call).

    Returns
    -------
    client : distributed.Client
        The process's default client from now on; close it (``with client:``)
        when the work is done.

    Raises
    ------
    DetectorError
        The address is malformed, the scheduler does not answer within
        ``timeout``, or no worker joins it within ``timeout``.
    """
    from distributed import Client
    from distributed.comm import parse_address
    from distributed.comm.addressing import parse_host_port

    timeout = CONNECT_TIMEOUT_S if timeout is None else float(timeout)
    try:
        # A malformed host:port is refused before a client exists: a client that fails on one leaves its
        # event loop half started, and the next cluster or client of the process can then hang.
        scheme, location = parse_address(scheduler)
        if scheme in ("tcp", "tls"):
            parse_host_port(location)
        client = Client(scheduler, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as err:
        raise DetectorError(f"Dask scheduler {scheduler!r} cannot be reached: {_one_line(err)}.") from err
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError) as err:
        client.close()
        raise DetectorError(
            f"Dask scheduler {scheduler!r} has no worker after {timeout:g} s; start workers for it "
            f"('dask worker {scheduler}') or give another scheduler."
        ) from err
    return client


def worker_count(client):
    """Number of workers connected to a client's scheduler now (each may run several threads)."""
    return len(client.nthreads())


def _one_line(err):
    """An exception's message as one line without a closing full stop (it goes inside a sentence)."""
    return " ".join(str(err).split()).rstrip(".") or type(err).__name__
