"""Tests of detector.io: atomic writes leave nothing behind and honour the umask."""

import os
import re
import stat

import pytest

from detector.io import atomic_dir, atomic_path, write_json


@pytest.fixture
def umask_022():
    old = os.umask(0o022)
    yield
    os.umask(old)


def _mode(path):
    return stat.S_IMODE(path.stat().st_mode)


def test_atomic_files_and_folders_get_the_umask_permissions(tmp_path, umask_022):
    # POSIX open(2) / mkdir(2): the mode asked for (0666 files, 0777 folders) less the umask.
    write_json(tmp_path / "a.json", {"x": 1})
    assert _mode(tmp_path / "a.json") == 0o644
    with atomic_dir(tmp_path / "folder") as tmp:
        (tmp / "inner.txt").write_text("x")
    assert _mode(tmp_path / "folder") == 0o755
    os.umask(0o077)
    with atomic_path(tmp_path / "private.txt") as tmp:
        tmp.write_text("x")
    assert _mode(tmp_path / "private.txt") == 0o600


def test_a_failed_write_leaves_nothing(tmp_path):
    with pytest.raises(RuntimeError), atomic_path(tmp_path / "b.txt") as tmp:
        tmp.write_text("half")
        raise RuntimeError("stop")
    assert list(tmp_path.iterdir()) == []


def test_image_over_the_size_limit_is_refused_from_its_header(tmp_path, monkeypatch):
    import warnings

    import numpy as np
    import tifffile
    from PIL import Image

    import detector.io as io_module
    from detector.errors import ImageError
    from detector.io import read_image

    png, tif = tmp_path / "big.png", tmp_path / "big.tif"
    Image.fromarray(np.zeros((120, 100), np.uint8)).save(png)
    tifffile.imwrite(tif, np.zeros((120, 100), np.uint8), compression="zlib")
    monkeypatch.setattr(io_module, "MAX_TILE_PIXELS", 10_000)
    # Our limit lies below Pillow's decompression-bomb warning (about 89 Mpx), so Pillow never
    # prints its raw warning first: the limit is ours, scaled down here.
    assert io_module.MAX_TILE_PIXELS < Image.MAX_IMAGE_PIXELS and 50_000_000 < Image.MAX_IMAGE_PIXELS
    for path in (png, tif):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            with pytest.raises(ImageError, match=rf"{path.name}' is 100 x 120 px .*at most 0 Mpx"):
                read_image(path)


@pytest.mark.parametrize(("array", "expected"), [
    ("int16_in_range", "uint16"),
    ("int32_in_range", "uint16"),
    ("float_01", "float32"),
    ("int32_too_big", "pixels in [0, 70000]"),
    ("int16_negative", "pixels in [-5, 9]"),
    ("float_255", "float images must be scaled to [0, 1]"),
    ("bool", "1-bit"),
])
def test_pixel_types_supported_exactly_or_refused(tmp_path, array, expected):
    import numpy as np
    import tifffile

    from detector.errors import ImageError
    from detector.io import read_image

    values = {
        "int16_in_range": np.arange(64 * 64, dtype=np.int16).reshape(64, 64) % 300,
        "int32_in_range": np.arange(64 * 64, dtype=np.int32).reshape(64, 64) * 16,
        "float_01": np.linspace(0, 1, 64 * 64, dtype=np.float32).reshape(64, 64),
        "int32_too_big": np.linspace(0, 70000, 64 * 64).astype(np.int32).reshape(64, 64),
        "int16_negative": np.linspace(-5, 9, 64 * 64).astype(np.int16).reshape(64, 64),
        "float_255": np.linspace(0, 255, 64 * 64, dtype=np.float32).reshape(64, 64),
        "bool": (np.arange(64 * 64).reshape(64, 64) % 2).astype(bool),
    }[array]
    path = tmp_path / f"{array}.tif"
    tifffile.imwrite(path, values)
    if expected in ("uint16", "float32"):
        image = read_image(path)
        assert image.dtype == expected
        np.testing.assert_array_equal(image, values)  # exact: the same numbers
    else:
        with pytest.raises(ImageError, match=rf"{array}\.tif.*{re.escape(expected)}"):
            read_image(path)


def test_palette_image_is_refused(tmp_path):
    import numpy as np
    from PIL import Image

    from detector.errors import ImageError
    from detector.io import read_image

    path = tmp_path / "indexed.png"
    Image.fromarray(np.zeros((64, 64), np.uint8)).convert("P").save(path)
    with pytest.raises(ImageError, match="indexed.png' is a palette"):
        read_image(path)


def _png_header(path, width, height):
    """A grey 8-bit PNG that declares ``width`` x ``height`` px and holds one row: what a
    decompression bomb shows before decoding (PNG chunk layout: W3C PNG specification, 2nd ed., 5.3)."""
    import struct
    import zlib

    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0))
                     + chunk(b"IDAT", zlib.compress(b"\x00" * (width + 1))) + chunk(b"IEND", b""))


@pytest.mark.parametrize("side", [12_000, 20_000])  # above Pillow's warning (89 Mpx) and its refusal (179 Mpx)
def test_decompression_bomb_png_gets_our_message_not_pillows(tmp_path, side):
    import warnings

    from detector.errors import ImageError
    from detector.io import image_size, read_image

    path = tmp_path / "bomb.png"
    _png_header(path, side, side)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # Pillow's DecompressionBombWarning would fail here
        assert image_size(path) == (side, side)
        with pytest.raises(ImageError, match=rf"bomb\.png' is {side} x {side} px .*at most 50 Mpx"):
            read_image(path)
