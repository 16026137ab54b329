"""Where the tile loops run: local processes, or the Dask cluster of an enclosing on_cluster."""

import numpy as np
import pytest
from joblib import delayed

from training.fitting.dataset import build_patch_set
from training.parallel import current_cluster, on_cluster, tile_parallel


def _where(index):
    from distributed import get_worker

    return index, get_worker().address


def _backend_name(parallel):
    return type(parallel._backend).__name__


def test_outside_a_cluster_the_loops_are_local():
    assert current_cluster() is None
    assert _backend_name(tile_parallel(1)) == "SequentialBackend"
    two = tile_parallel(2)
    assert _backend_name(two) == "LokyBackend" and two.n_jobs == 2


def test_inside_a_cluster_the_jobs_run_on_its_workers_in_job_order():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, processes=False, threads_per_worker=1, dashboard_address=None) as cluster:
        with on_cluster(cluster.scheduler_address) as info:
            assert info == {"scheduler": cluster.scheduler_address, "workers": 2, "threads": 2}
            assert current_cluster() is info
            # workers=1 would be serial locally; on a cluster the cluster decides
            results = tile_parallel(1)(delayed(_where)(i) for i in range(40))
        workers = set(cluster.scheduler.workers)
    assert current_cluster() is None
    assert [i for i, _ in results] == list(range(40))
    assert {address for _, address in results} <= workers


def test_features_on_a_cluster_equal_the_local_ones(tiny_tileset):
    from distributed import LocalCluster

    from detector.tile.spec import FeatureSpec
    from detector.tileset import load_tileset

    tileset = load_tileset(tiny_tileset)
    ids = tileset.tiles["tile_id"].tolist()
    spec = FeatureSpec()
    # Two turns per tile: six jobs, each sampling background with its own seed.
    options = dict(tau=0.05, rotations=(0, 1), seed=4, max_patches=None, degrade=True)
    local, _, local_summaries, local_noise = build_patch_set(tileset, ids, spec, workers=1, **options)
    with LocalCluster(n_workers=2, processes=False, threads_per_worker=1, dashboard_address=None) as cluster:
        with on_cluster(cluster.scheduler_address):
            remote, _, remote_summaries, remote_noise = build_patch_set(tileset, ids, spec, workers=1, **options)
        prefixes = set(cluster.scheduler.task_prefixes)
    assert any("_extract_one" in p for p in prefixes), prefixes  # the extraction ran on the cluster
    assert len(remote) == len(local) > 0
    for name in ("X", "cls", "fan_direction_deg", "axis_deg", "fan_cover_share", "image_id", "tile_id", "weight"):
        np.testing.assert_array_equal(getattr(remote, name), getattr(local, name), err_msg=name)
    np.testing.assert_array_equal(remote_summaries, local_summaries)
    np.testing.assert_array_equal(remote_noise, local_noise)


@pytest.mark.parametrize("workers", [1, 2])
def test_workers_are_ignored_inside_a_cluster(workers):
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, processes=False, threads_per_worker=2, dashboard_address=None) as cluster:
        with on_cluster(cluster.scheduler_address) as info:
            parallel = tile_parallel(workers)
            assert _backend_name(parallel) == "DaskDistributedBackend"
            assert info["workers"] == 1 and info["threads"] == 2
