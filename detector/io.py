"""The only code that opens files: images, CSV tables and atomic writes."""

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import ImageError

__all__ = ["read_image", "image_size", "write_image", "write_json", "atomic_path", "atomic_dir", "current_umask"]


def current_umask():
    """The process's file-creation mask (read without changing it for good)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def read_image(path, *, band=None):
    """Read a single-band PNG or TIFF tile as a 2-D array of its own dtype.

    Parameters
    ----------
    path : path-like
        PNG or TIFF file, 8- or 16-bit, one band.
    band : int, optional
        1-based band to take from a multi-band image; without it a multi-band
        image is an error.

    Returns
    -------
    image : ndarray of shape (M, N), dtype uint8, uint16 or float

    Raises
    ------
    ImageError
        The file is missing, unreadable or not single-band.
    """
    path = Path(path)
    if not path.is_file():
        raise ImageError(f"image {str(path)!r} does not exist.")
    try:
        if path.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            image = tifffile.imread(path)
        else:
            from PIL import Image

            with Image.open(path) as handle:
                handle.load()
                if handle.mode in ("I;16", "I;16B", "I;16L"):
                    image = np.array(handle, dtype=np.uint16)
                else:
                    image = np.asarray(handle)
    except Exception as err:  # any decoder failure is a corrupt image to the user
        raise ImageError(f"image {str(path)!r} cannot be read: {err}.") from err
    image = np.asarray(image)
    if image.ndim == 3:
        # Channels last (PIL) or first (tifffile, planar): the smaller axis is the band axis.
        axis = 2 if image.shape[2] <= image.shape[0] else 0
        if band is None:
            raise ImageError(
                f"image {str(path)!r} has shape {image.shape}; expected a single-band (M, N) image "
                f"(choose a band)."
            )
        if not 1 <= band <= image.shape[axis]:
            raise ImageError(f"image {str(path)!r} has {image.shape[axis]} bands; band {band!r} does not exist.")
        image = np.take(image, band - 1, axis=axis)
    if image.ndim != 2 or image.size == 0:
        raise ImageError(f"image {str(path)!r} has shape {image.shape}; expected a single-band (M, N) image.")
    if image.dtype == np.int32 or image.dtype == np.int64:
        image = image.astype(np.uint16)
    return image


def image_size(path):
    """Width and height of a PNG or TIFF image in px, from its header (the pixels are not decoded).

    Raises
    ------
    ImageError
        The file is missing or not a readable image.
    """
    path = Path(path)
    if not path.is_file():
        raise ImageError(f"image {str(path)!r} does not exist.")
    try:
        if path.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            with tifffile.TiffFile(path) as handle:
                shape = handle.pages[0].shape
            return int(shape[1]), int(shape[0])
        from PIL import Image

        with Image.open(path) as handle:
            return int(handle.width), int(handle.height)
    except Exception as err:  # any decoder failure is a corrupt image to the user
        raise ImageError(f"image {str(path)!r} cannot be read: {err}.") from err


def write_image(path, image):
    """Write a 2-D uint8 or uint16 array as PNG (or TIFF by suffix), atomically."""
    path = Path(path)
    image = np.asarray(image)
    with atomic_path(path) as tmp:
        if path.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            tifffile.imwrite(tmp, image)
        else:
            from PIL import Image

            Image.fromarray(image).save(tmp, format="PNG")


def write_json(path, obj, *, indent=2, end=""):
    """Write ``obj`` as JSON (no NaN or infinity allowed), atomically; ``end`` follows the text."""
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(obj, indent=indent, allow_nan=False) + end, encoding="utf-8")


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary file name beside ``path``; rename it to ``path`` on success.

    On any exception the temporary file is removed, so no half-written output is left.
    The file gets the permissions a plain ``open`` would give it (0666 less the
    umask), not the private 0600 of a temporary file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp" + path.suffix, dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        if os.path.exists(tmp):
            os.chmod(tmp, 0o666 & ~current_umask())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_dir(path, *, replace=False):
    """Yield a temporary folder beside ``path``; move it to ``path`` on success.

    Parameters
    ----------
    path : path-like
        Final folder. It must not exist or be empty, unless ``replace``.
    replace : bool, default=False
        Replace an existing folder: the old one is moved aside and deleted only
        after the new one is in place.

    On any exception the temporary folder is removed and ``path`` is untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    try:
        os.chmod(tmp, 0o777 & ~current_umask())  # as mkdir would make it, not mkdtemp's private 0700
        yield tmp
        old = None
        if path.exists():
            if replace:
                old = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".old", dir=path.parent))
                os.replace(path, old / path.name)
            else:
                path.rmdir()  # only an empty folder may be replaced
        os.replace(tmp, path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
