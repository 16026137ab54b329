"""Reaching a Dask scheduler: one clear error for a scheduler that is not there or has no worker."""

import socket

import pytest

from detector.cluster import connect, worker_count
from detector.errors import DetectorError


def _closed_port():
    """A local TCP port nothing listens on (bound, then released)."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_unreachable_scheduler_is_one_line_naming_the_address():
    address = f"tcp://127.0.0.1:{_closed_port()}"
    with pytest.raises(DetectorError, match="cannot be reached") as err:
        connect(address, timeout=1)
    assert repr(address) in str(err.value) and "\n" not in str(err.value)


def test_malformed_address_is_refused():
    with pytest.raises(DetectorError, match=r"'nonsense::' cannot be reached: invalid address"):
        connect("nonsense::", timeout=1)


def test_scheduler_without_workers_is_refused():
    from distributed import LocalCluster

    with LocalCluster(n_workers=0, processes=False, dashboard_address=None) as cluster:
        with pytest.raises(DetectorError, match="has no worker after 1 s"):
            connect(cluster.scheduler_address, timeout=1)


def test_worker_count_is_the_clusters():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, processes=False, threads_per_worker=1, dashboard_address=None) as cluster:
        with connect(cluster.scheduler_address) as client:
            assert worker_count(client) == 2


def test_a_malformed_address_leaves_the_process_able_to_start_a_cluster():
    # A client that fails on a malformed address used to leave its event loop half started, and the
    # next cluster of the process failed to start its own ("assert loop is not None") or hung.
    from distributed import LocalCluster

    with pytest.raises(DetectorError, match="invalid address"):
        connect("nonsense::", timeout=1)
    with pytest.raises(DetectorError, match="missing port number"):
        connect("tcp://127.0.0.1", timeout=1)
    with LocalCluster(n_workers=1, processes=False, threads_per_worker=1, dashboard_address=None) as cluster:
        with connect(cluster.scheduler_address, timeout=10) as client:
            assert worker_count(client) == 1
