"""Session fixtures shared by the test modules: a tiny synthetic tile set and a model trained on it."""

import pandas as pd
import pytest
from threadpoolctl import threadpool_limits

from training.synth import synthesize_tileset
from training.fitting.train import TrainConfig, train_model

#: Small enough that training takes seconds; three images allow the grouped fit / calibration / hold-out split.
TINY_IMAGES = 3
TINY_TILES_PER_IMAGE = 1
TINY_SEED = 3
TINY_CONFIG = TrainConfig(seed=1, rotations=(0,), max_patches=5000, max_iter=60)


def _quiet(_line):
    pass


@pytest.fixture(scope="session")
def tiny_tileset(tmp_path_factory):
    """Root of a synthetic tile set of 3 images x 1 tile (tiles.csv, consensus.csv, truth.csv, images/)."""
    root = tmp_path_factory.mktemp("tiny") / "tileset"
    synthesize_tileset(root, n_images=TINY_IMAGES, tiles_per_image=TINY_TILES_PER_IMAGE, seed=TINY_SEED)
    # The generator draws each image's metres_per_px at random but its fans in pixels; here the tiles share
    # one ground scale, as a real catalog's do, so that no tile is read at another scale than its own
    # (tests of reading tiles at the model's scale set their scales themselves).
    tiles = pd.read_csv(root / "tiles.csv")
    tiles.assign(metres_per_px=0.25).to_csv(root / "tiles.csv", index=False)
    return root


@pytest.fixture(scope="session")
def tiny_model(tiny_tileset, tmp_path_factory):
    """Folder of a model trained on :func:`tiny_tileset`, and its card: ``(folder, card)``."""
    out = tmp_path_factory.mktemp("tiny_model") / "model"
    # One OpenMP thread: the gradient boosting is tiny, and on a shared two-core machine
    # oversubscribed threads make it several times slower. The OpenMP runtime loads with
    # the estimator module, so import it before limiting.
    import sklearn.ensemble  # noqa: F401

    with threadpool_limits(limits=1):
        card = train_model(tiny_tileset, out, TINY_CONFIG, force=True, log=_quiet)
    return out, card
