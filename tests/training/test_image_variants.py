"""The image-variants script: what its perturbations do to a tile set, checked against the noise
estimate's own theory."""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage as ndi
from skimage import io as skio

from detector.tile.noise import noise_sigma
from tests.benchmarks import image_variants as script


def test_correlated_noise_reads_as_little_white_noise():
    # Immerkaer's estimate (Computer Vision and Image Understanding 64(2), 1996) is calibrated on
    # white noise: the mask's response has standard deviation 6 sigma. Noise correlated by a Gaussian
    # of width s passes the mask as white noise filtered by (mask * Gaussian), whose response has the
    # standard deviation ||mask * g||_2 times the white noise's; the estimate is that over 6 (a normal
    # variable's mean absolute value is sqrt(2 / pi) of its standard deviation).
    rng = np.random.default_rng(0)
    flat = np.full((400, 400), 128.0)
    white = script.IMAGE_VARIANTS["white, 3 grey levels"][1](flat, rng) - flat
    assert abs(noise_sigma(white) - 3.0) < 0.1
    sigma = 1.2
    field = ndi.gaussian_filter(rng.normal(size=(400, 400)), sigma)
    correlated = 3.0 * field / field.std()
    impulse = np.zeros((41, 41))
    impulse[20, 20] = 1.0
    g = ndi.gaussian_filter(impulse, sigma)
    mask = np.array([[1.0, -2.0, 1.0], [-2.0, 4.0, -2.0], [1.0, -2.0, 1.0]])
    response_gain = np.sqrt((ndi.convolve(g, mask) ** 2).sum())  # response std per unit of white noise
    expected = 3.0 / np.sqrt((g ** 2).sum()) * response_gain / 6.0
    assert abs(noise_sigma(correlated) - expected) < 0.05 * expected
    assert noise_sigma(correlated) < 0.5  # std 3, read as under half a grey level: never smoothed


def test_perturbed_copy_keeps_labels_types_and_no_data(tmp_path):
    src = tmp_path / "src"
    (src / "images").mkdir(parents=True)
    rng = np.random.default_rng(1)
    tile = rng.integers(60, 200, size=(64, 80)).astype(np.uint8)
    tile[:, :5] = 0  # no data
    skio.imsave(src / "images" / "T0.png", tile, check_contrast=False)
    pd.DataFrame({"tile_id": ["T0"]}).to_csv(src / "tiles.csv", index=False)
    (src / "consensus.csv").write_text("tile_id,kind\nT0,fan\n")
    for name in script.IMAGE_VARIANTS:
        dst = tmp_path / name.replace(" ", "_").replace(",", "")
        script.perturb_tileset(src, dst, name, seed=3)
        out = skio.imread(dst / "images" / "T0.png")
        assert out.dtype == np.uint8 and out.shape == tile.shape
        assert (out[:, :5] == 0).all() and (out[:, 5:] >= 1).all()
        assert (dst / "consensus.csv").read_text() == (src / "consensus.csv").read_text()
    stripes = skio.imread(tmp_path / "column_stripes_2.5_grey_levels" / "images" / "T0.png").astype(float)
    offsets = (stripes - tile)[:, 5:]
    # One offset per column (rounding aside), varying across columns.
    assert np.abs(offsets - np.median(offsets, axis=0)).max() <= 1.0 and np.median(offsets, axis=0).std() > 1.0


def test_a_model_that_cannot_be_read_stops_before_rendering(tmp_path, capsys):
    with pytest.raises(SystemExit) as stop:
        script.main([str(tmp_path / "no_model"), "--out", str(tmp_path / "out")])
    assert stop.value.code == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("image_variants: ") and "no_model" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "out").exists()
