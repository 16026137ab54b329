"""The only code that opens files: images, CSV tables and atomic writes."""

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import ImageError

__all__ = [
    "MAX_TILE_PIXELS",
    "read_image",
    "image_size",
    "supported_pixels",
    "write_image",
    "write_json",
    "atomic_path",
    "atomic_dir",
    "current_umask",
]


def current_umask():
    """The process's file-creation mask (read without changing it for good)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


#: Largest tile image read whole, px: a tile-set tile is a few Mpx; a file that would decode
#: to more is refused from its header, before any pixel is decoded (a decompression bomb).
MAX_TILE_PIXELS = 50_000_000


def supported_pixels(array, source, *, valid=None):
    """The pixels of an image in a supported type, converted exactly, or an error.

    Supported: uint8 and uint16 as they are; other integer types when every
    value lies in [0, 65535] (converted to uint16, exactly); float in [0, 1]
    (reflectance-like; NaN is no-data). Anything else would need a stretch
    that only the user can choose, so it is refused.

    Parameters
    ----------
    array : ndarray of shape (M, N)
    source : str
        The file (and window) the pixels come from, for the message.
    valid : ndarray of bool of shape (M, N), optional
        Only these pixels must be in range (no-data may hold any value, e.g.
        -32768); the others become 0 when the type is converted.

    Returns
    -------
    array : ndarray of shape (M, N), dtype uint8, uint16 or float

    Raises
    ------
    ImageError
        Booleans, integers outside [0, 65535], floats outside [0, 1], complex numbers.
    """
    array = np.asarray(array)
    kind = array.dtype.kind
    if array.dtype in (np.uint8, np.uint16):
        return array
    values = array if valid is None else array[np.asarray(valid, dtype=bool)]
    if kind in "iu":
        lo, hi = (int(values.min()), int(values.max())) if values.size else (0, 0)
        if lo < 0 or hi > 65535:
            raise ImageError(
                f"image {source} has {array.dtype} pixels in [{lo}, {hi}]; frostvane reads 8- or 16-bit "
                f"grey levels (0-65535): rescale it to uint8 or uint16 first."
            )
        return (array if valid is None else np.where(valid, array, 0)).astype(np.uint16)
    if kind == "f":
        finite = values[np.isfinite(values)]
        if finite.size and (finite.min() < 0 or finite.max() > 1):
            raise ImageError(
                f"image {source} has {array.dtype} pixels in [{finite.min():g}, {finite.max():g}]; float images "
                f"must be scaled to [0, 1] (or stored as uint8 / uint16)."
            )
        return array
    what = "1-bit (black and white)" if kind == "b" else str(array.dtype)
    raise ImageError(f"image {source} has {what} pixels; expected 8- or 16-bit grey levels or float in [0, 1].")


def read_image(path, *, band=None):
    """Read a single-band PNG or TIFF tile as a 2-D array of a supported type.

    Parameters
    ----------
    path : path-like
        PNG or TIFF file, one band: 8- or 16-bit grey levels, other integer
        types with values in [0, 65535] (converted to uint16 exactly), or float
        in [0, 1] (see :func:`supported_pixels`).
    band : int, optional
        1-based band to take from a multi-band image; without it a multi-band
        image is an error.

    Returns
    -------
    image : ndarray of shape (M, N), dtype uint8, uint16 or float

    Raises
    ------
    ImageError
        The file is missing, unreadable, not single-band, a palette or 1-bit
        image, larger than :data:`MAX_TILE_PIXELS`, or of an unsupported pixel type.
    """
    path = Path(path)
    if not path.is_file():
        raise ImageError(f"image {str(path)!r} does not exist.")
    try:
        if path.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            with tifffile.TiffFile(path) as tif:
                page = tif.pages[0]
                _check_size(path, page.shape)
                if page.photometric == tifffile.PHOTOMETRIC.PALETTE:
                    _refuse_palette(path)
                image = page.asarray()
        else:
            with _pil_open(path) as handle:
                _check_size(path, handle.size[::-1])
                if handle.mode in ("P", "PA"):
                    _refuse_palette(path)
                handle.load()
                if handle.mode in ("I;16", "I;16B", "I;16L"):
                    image = np.array(handle, dtype=np.uint16)
                else:
                    image = np.asarray(handle)
    except ImageError:
        raise
    except Exception as err:  # any decoder failure is a corrupt image to the user
        raise ImageError(f"image {str(path)!r} cannot be read: {str(err).rstrip('.')}.") from err
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
    return supported_pixels(image, repr(str(path)))


@contextlib.contextmanager
def _pil_open(path):
    """Pillow's handle of an image, opened without Pillow's decompression-bomb check.

    Pillow warns on opening an image over about 89 Mpx (and refuses one over twice that) with a raw
    library message; our own limit, :data:`MAX_TILE_PIXELS`, is checked from the header next, before
    any pixel is decoded, and says what to do instead.
    """
    from PIL import Image

    limit = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = None
    try:
        with Image.open(path) as handle:
            yield handle
    finally:
        Image.MAX_IMAGE_PIXELS = limit


def _check_size(path, shape):
    pixels = int(np.prod([int(v) for v in shape[:2]]))
    if pixels > MAX_TILE_PIXELS:
        raise ImageError(
            f"image {str(path)!r} is {shape[1]} x {shape[0]} px ({pixels / 1e6:.0f} Mpx); a tile may have at most "
            f"{MAX_TILE_PIXELS / 1e6:.0f} Mpx: screen it as a whole image (frostvane screen cuts it into tiles)."
        )


def _refuse_palette(path):
    raise ImageError(
        f"image {str(path)!r} is a palette (indexed colour) image; its values are colour indices, not "
        f"brightness: convert it to 8-bit grey first."
    )


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
        with _pil_open(path) as handle:
            return int(handle.width), int(handle.height)
    except Exception as err:  # any decoder failure is a corrupt image to the user
        raise ImageError(f"image {str(path)!r} cannot be read: {str(err).rstrip('.')}.") from err


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
