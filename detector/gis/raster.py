"""Windowed access to large orbital images through rasterio.

Screening never loads a whole image: :func:`plan_windows` cuts it into a
regular grid of tiles, and :class:`RasterSource` reads one tile (plus an
overlap margin) at a time, so memory depends on the tile size, not on the
image size. Any format GDAL reads works (PNG, TIFF / GeoTIFF, JPEG 2000,
planetary formats such as PDS and ISIS cubes).

Pixel coordinates follow :mod:`detector.geometry` (col right, row down); a
window's ``col0`` / ``row0`` are the image coordinates of its top-left pixel.
"""

import contextlib
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DetectorError, ImageError, SpecError, TileSetError
from ..io import atomic_path, image_size, read_image

__all__ = [
    "TileWindow",
    "RasterSource",
    "plan_windows",
    "open_raster",
    "write_geotiff",
    "write_by_windows",
    "mosaic_tiles",
    "nodata_value",
    "check_complete",
]

#: GDAL block cache while reading or writing, MB: bounded so memory does not follow image size.
DEFAULT_CACHE_MB = 64


@dataclass(frozen=True)
class TileWindow:
    """One tile of an image: its core and the larger window read around it.

    Attributes
    ----------
    tile_id : str
        ``f"{image}_r{row0:05d}_c{col0:05d}"``.
    image : str
        Name of the source image (its file stem).
    col0, row0 : int
        Image coordinates of the core's top-left pixel, px.
    width, height : int
        Core size, px. Cores of one plan tile the image exactly once.
    read_col0, read_row0, read_width, read_height : int
        The window actually read: the core grown by ``overlap`` px on every
        side, clipped to the image, px.
    """

    tile_id: str
    image: str
    col0: int
    row0: int
    width: int
    height: int
    read_col0: int
    read_row0: int
    read_width: int
    read_height: int

    @property
    def core_slices(self):
        """``(rows, cols)`` slices that cut the core out of the array read for this window."""
        r = self.row0 - self.read_row0
        c = self.col0 - self.read_col0
        return slice(r, r + self.height), slice(c, c + self.width)

    @property
    def offset(self):
        """``(col0, row0)`` of the read window: add it to in-window px to get image px."""
        return self.read_col0, self.read_row0


def _positive_int(value, name):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise SpecError(f"{name} {value!r} must be a positive whole number of px.")
    return int(value)


def plan_windows(width, height, *, tile=(800, 600), overlap=32, image="image", min_read=0):
    """Cut an image into a regular grid of tiles.

    Parameters
    ----------
    width, height : int
        Image size, px.
    tile : (int, int), optional
        Core size (width, height), px. Cores start at multiples of the tile
        size from the top-left corner; the last column and row of tiles are
        smaller when the image size is not a multiple of the tile size (down
        to 1 px), so no pixel is read as two cores and none is left out.
    overlap : int, optional
        Margin read around every core, px, so that features cut by a tile
        edge are still seen whole from one side; clipped to the image.
    image : str, optional
        Image name used in the tile ids.
    min_read : int, optional
        Smallest read window side, px: a thin last row or column of cores is
        read with more of the image inward, so that it holds at least one
        patch (when the image is that large).

    Returns
    -------
    windows : list of TileWindow
        Row-major order (left to right, then top to bottom).
    """
    width = _positive_int(width, "width")
    height = _positive_int(height, "height")
    try:
        tile_w, tile_h = tile
    except (TypeError, ValueError) as err:
        raise SpecError(f"tile {tile!r} must be a (width, height) pair of px.") from err
    tile_w = _positive_int(tile_w, "tile width")
    tile_h = _positive_int(tile_h, "tile height")
    if isinstance(overlap, bool) or not isinstance(overlap, (int, np.integer)) or overlap < 0:
        raise SpecError(f"overlap {overlap!r} must be a whole number of px >= 0.")
    overlap = int(overlap)
    min_read = int(min_read)

    def grown(lo, hi, size):
        # Grow [lo, hi) to min_read px inside [0, size), inward first.
        if hi - lo >= min_read:
            return lo, hi
        lo = max(0, hi - min_read)
        return lo, min(size, lo + min_read)

    cols = range(0, width, tile_w)
    rows = range(0, height, tile_h)
    windows = []
    for row0 in rows:
        h = min(tile_h, height - row0)
        r0, r1 = grown(max(0, row0 - overlap), min(height, row0 + h + overlap), height)
        for col0 in cols:
            w = min(tile_w, width - col0)
            c0, c1 = grown(max(0, col0 - overlap), min(width, col0 + w + overlap), width)
            windows.append(
                TileWindow(f"{image}_r{row0:05d}_c{col0:05d}", str(image), col0, row0, w, h, c0, r0, c1 - c0, r1 - r0)
            )
    return windows


@contextlib.contextmanager
def _quiet_rasterio(cache_mb=DEFAULT_CACHE_MB):
    import rasterio
    from rasterio.errors import NotGeoreferencedWarning

    with warnings.catch_warnings():
        # A plain PNG or TIFF has no georeferencing; that is a normal input here, not a problem.
        warnings.simplefilter("ignore", NotGeoreferencedWarning)
        with rasterio.Env(GDAL_CACHEMAX=int(cache_mb)):
            yield rasterio


class RasterSource:
    """One band of an image opened for windowed reading. Use :func:`open_raster`.

    Attributes
    ----------
    path : Path
    name : str
        File stem, used in tile ids.
    width, height : int
        px.
    count : int
        Bands in the file.
    band : int
        1-based band that is read.
    dtype : numpy.dtype
    crs : rasterio.crs.CRS or None
    transform : affine.Affine
        Pixel-corner to map transform (identity when not georeferenced).
    nodata : float
        Value marking pixels outside the image footprint.
    """

    def __init__(self, path, *, band=None, nodata=None, cache_mb=DEFAULT_CACHE_MB):
        self.path = Path(path)
        self.name = self.path.stem
        if not self.path.is_file():
            raise ImageError(f"image {str(self.path)!r} does not exist.")
        self._cache_mb = int(cache_mb)
        self._stack = contextlib.ExitStack()
        try:
            # The GDAL environment is entered per call, not held, so that sources closed in any order
            # leave the process configuration as it was.
            with _quiet_rasterio(self._cache_mb) as rasterio:
                try:
                    self._dataset = self._stack.enter_context(rasterio.open(self.path))
                except rasterio.errors.RasterioError as err:
                    raise ImageError(f"image {str(self.path)!r} cannot be read: {str(err).rstrip('.')}.") from err
                ds = self._dataset
                self.count = ds.count
                if band is None:
                    if ds.count != 1:
                        raise ImageError(
                            f"image {str(self.path)!r} has {ds.count} bands; choose one with band=1..{ds.count}."
                        )
                    band = 1
                if isinstance(band, bool) or not isinstance(band, (int, np.integer)) or not 1 <= band <= ds.count:
                    raise ImageError(f"image {str(self.path)!r} has {ds.count} bands; band {band!r} does not exist.")
                self.band = int(band)
                self.width, self.height = ds.width, ds.height
                self.dtype = np.dtype(ds.dtypes[self.band - 1])
                self._check_pixel_type(ds)
                self.crs = ds.crs
                self.transform = ds.transform
                self.nodata = nodata_value(nodata, ds.nodatavals[self.band - 1])
        except BaseException:
            self._stack.close()
            raise

    def _check_pixel_type(self, ds):
        """Refuse what cannot be brightness: palette indices, 1-bit masks, complex numbers."""
        from rasterio.enums import ColorInterp

        where = repr(str(self.path))
        if ds.colorinterp[self.band - 1] == ColorInterp.palette:
            raise ImageError(
                f"image {where} is a palette (indexed colour) image; its values are colour indices, not "
                f"brightness: convert it to 8-bit grey first."
            )
        if ds.tags(self.band, "IMAGE_STRUCTURE").get("NBITS") == "1":
            raise ImageError(f"image {where} has 1-bit (black and white) pixels; expected grey levels.")
        if self.dtype.kind not in "uif":
            raise ImageError(f"image {where} has {self.dtype} pixels; expected 8- or 16-bit grey levels or float.")

    # -- context manager -----------------------------------------------------

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        """Close the file."""
        self._stack.close()

    def __repr__(self):
        return f"RasterSource({str(self.path)!r}, {self.width}x{self.height}, band={self.band}, dtype={self.dtype})"

    # -- properties ------------------------------------------------------------

    @property
    def shape(self):
        """(height, width), px."""
        return self.height, self.width

    @property
    def is_georeferenced(self):
        """True when the image has a CRS and a transform other than the identity."""
        from affine import Affine

        return self.crs is not None and not self.transform.almost_equals(Affine.identity())

    def georeferencer(self):
        """A :class:`detector.gis.geo.Georeferencer` for this image."""
        from .geo import Georeferencer

        if not self.is_georeferenced:
            raise ImageError(f"image {str(self.path)!r} is not georeferenced (no CRS or transform).")
        return Georeferencer(self.crs, self.transform)

    def windows(self, *, tile=(800, 600), overlap=32):
        """:func:`plan_windows` for this image."""
        return plan_windows(self.width, self.height, tile=tile, overlap=overlap, image=self.name)

    # -- reading ---------------------------------------------------------------

    def read(self, window=None):
        """Read one window of the band.

        Parameters
        ----------
        window : TileWindow, rasterio.windows.Window or (col0, row0, width, height), optional
            For a :class:`TileWindow`, its read window (core plus overlap).
            Without it, the whole image.

        Returns
        -------
        array : ndarray of shape (height, width)
            The pixels, in the band's dtype.
        nodata_mask : ndarray of bool, same shape
            True where the pixel equals the nodata value (or is not finite).
        """
        from rasterio.windows import Window

        if window is None:
            c0, r0, w, h = 0, 0, self.width, self.height
        elif isinstance(window, TileWindow):
            c0, r0, w, h = window.read_col0, window.read_row0, window.read_width, window.read_height
        elif isinstance(window, Window):
            c0, r0, w, h = (int(round(v)) for v in (window.col_off, window.row_off, window.width, window.height))
        else:
            c0, r0, w, h = (int(v) for v in window)
        if w < 1 or h < 1 or c0 < 0 or r0 < 0 or c0 + w > self.width or r0 + h > self.height:
            raise DetectorError(
                f"window (col0={c0}, row0={r0}, width={w}, height={h}) is outside image {str(self.path)!r} "
                f"of {self.width}x{self.height} px."
            )
        with _quiet_rasterio(self._cache_mb) as rasterio:
            try:
                array = self._dataset.read(self.band, window=Window(c0, r0, w, h))
            except rasterio.errors.RasterioError as err:
                raise ImageError(f"image {str(self.path)!r} cannot be read at window {(c0, r0, w, h)}: {str(err).rstrip('.')}.") from err
        if np.issubdtype(array.dtype, np.floating):
            mask = ~np.isfinite(array)
            if np.isfinite(self.nodata):
                mask |= array == self.nodata
        else:
            mask = array == self.nodata
        from ..io import supported_pixels

        array = supported_pixels(array, f"{str(self.path)!r} (window {c0}, {r0}, {w} x {h} px)", valid=~mask)
        return array, mask


def check_complete(path):
    """Refuse a PNG whose data stops early or fails its checksums.

    GDAL's PNG driver returns the missing rows of a truncated file as zeros
    without an error, which would be screened as no-data; Pillow's ``verify``
    reads every chunk and checks its CRC (PNG specification, section 5.3)
    without decoding pixels. Other formats report such damage when read.

    Raises
    ------
    ImageError
    """
    path = Path(path)
    if path.suffix.lower() != ".png":
        return
    from PIL import Image

    limit = Image.MAX_IMAGE_PIXELS
    try:
        # verify() decodes nothing, so Pillow's decompression-bomb limit (meant for decoding) is
        # lifted; screening reads large images by windows.
        Image.MAX_IMAGE_PIXELS = None
        with Image.open(path) as handle:
            handle.verify()
    except Exception as err:  # any decoder failure is a corrupt image to the user
        raise ImageError(f"image {str(path)!r} is damaged or truncated: {str(err).rstrip('.')}.") from err
    finally:
        Image.MAX_IMAGE_PIXELS = limit


def nodata_value(nodata, own=None):
    """The pixel value that marks no data, as a float (NaN: no value does).

    Parameters
    ----------
    nodata : float, str or None
        A number; ``"none"`` or ``"nan"`` (or NaN) for no value (every pixel
        is data; NaN pixels of a float image are always no-data); None for the
        raster's own no-data value, else 0.
    own : float or None, optional
        The raster's declared no-data value.

    Returns
    -------
    value : float

    Raises
    ------
    SpecError
        ``nodata`` is neither a number nor one of the words above.

    Notes
    -----
    The default 0 is the fill of map-projected orbital products outside their
    footprint. Products whose darkest pixels are clipped to 0 (the cores of
    dark fans in some 8-bit products) must say ``"none"`` (or their real fill
    value), or those pixels are dropped as no-data.
    """
    if nodata is None:
        return float(own) if own is not None else 0.0
    if isinstance(nodata, str):
        word = nodata.strip().lower()
        if word in ("none", "nan"):
            return float("nan")
        try:
            nodata = float(word)
        except ValueError:
            raise SpecError(f"nodata {nodata!r} is not a number, 'none' or 'nan'.") from None
    if isinstance(nodata, bool) or not isinstance(nodata, (int, float, np.integer, np.floating)):
        raise SpecError(f"nodata {nodata!r} is not a number, 'none' or 'nan'.")
    value = float(nodata)
    if np.isinf(value):
        raise SpecError(f"nodata {nodata!r} must be a finite number, 'none' or 'nan'.")
    return value


def open_raster(path, *, band=None, nodata=None, cache_mb=DEFAULT_CACHE_MB):
    """Open one band of an image for windowed reading.

    Parameters
    ----------
    path : path-like
        Any raster GDAL reads.
    band : int, optional
        1-based band; required when the image has more than one.
    nodata : float or str, optional
        No-data value to use instead of the raster's own; ``"none"`` for no
        value. Without either, 0 (the fill of map-projected orbital images
        outside their footprint); see :func:`nodata_value`.
    cache_mb : int, optional
        GDAL block cache, MB.

    Returns
    -------
    source : RasterSource
        Also a context manager that closes the file.

    Raises
    ------
    ImageError
        The file is missing, unreadable or corrupt, or has several bands and
        none was chosen.
    """
    return RasterSource(path, band=band, nodata=nodata, cache_mb=cache_mb)


def _rasterio_crs(crs):
    if crs is None:
        return None
    from rasterio.crs import CRS

    try:
        if isinstance(crs, CRS):
            return crs
        if hasattr(crs, "to_wkt"):
            return CRS.from_wkt(crs.to_wkt())
        return CRS.from_user_input(crs)
    except Exception as err:  # rasterio raises several CRS error types
        raise DetectorError(f"CRS {str(crs)[:80]!r} cannot be written to a GeoTIFF: {str(err).rstrip('.')}.") from err


def _profile(width, height, dtype, *, crs, transform, nodata, tiled, blocksize, compress):
    from affine import Affine

    blocksize = _positive_int(blocksize, "blocksize")
    if blocksize % 16:
        raise SpecError(f"blocksize {blocksize!r} must be a multiple of 16 px (TIFF tiles).")
    profile = {
        "driver": "GTiff",
        "width": int(width),
        "height": int(height),
        "count": 1,
        "dtype": np.dtype(dtype).name,
        "crs": _rasterio_crs(crs),
        "transform": Affine.identity() if transform is None else transform,
        "nodata": nodata,
        "BIGTIFF": "IF_SAFER",
    }
    if compress:
        profile["compress"] = compress
    if tiled:
        profile.update(tiled=True, blockxsize=blocksize, blockysize=blocksize)
    return profile


def write_geotiff(
    path, array, *, crs=None, transform=None, nodata=0, tiled=True, blocksize=256, compress="deflate"
):
    """Write a 2-D array as a single-band GeoTIFF, atomically.

    Parameters
    ----------
    path : path-like
    array : ndarray of shape (height, width)
    crs : pyproj.CRS, rasterio.crs.CRS or str, optional
    transform : affine.Affine, optional
        Pixel-corner to map transform; identity when omitted.
    nodata : float or None, optional
    tiled : bool, optional
        Write square internal tiles of ``blocksize`` px, so that reading a
        window touches only the blocks under it.
    blocksize : int, optional
        Internal tile side, px (a multiple of 16).
    compress : str or None, optional
        GDAL compression ("deflate", "lzw", None).
    """
    array = np.asarray(array)
    if array.ndim != 2 or array.size == 0:
        raise ImageError(f"image for {str(path)!r} has shape {array.shape}; expected a single-band (M, N) array.")
    profile = _profile(
        array.shape[1], array.shape[0], array.dtype, crs=crs, transform=transform, nodata=nodata,
        tiled=tiled, blocksize=blocksize, compress=compress,
    )
    with atomic_path(path) as tmp, _quiet_rasterio() as rasterio:
        with rasterio.open(tmp, "w", **profile) as dst:
            dst.write(array, 1)


def write_by_windows(
    path, width, height, fill_fn, *, dtype="uint8", crs=None, transform=None, nodata=0,
    window=1024, blocksize=256, compress="deflate", cache_mb=DEFAULT_CACHE_MB,
):
    """Write a large single-band GeoTIFF one window at a time, atomically.

    Only one window of pixels is in memory at once, so e.g. a 20000 x 20000
    image can be written on a small machine.

    Parameters
    ----------
    path : path-like
    width, height : int
        Image size, px.
    fill_fn : callable
        ``fill_fn(col0, row0, width, height) -> ndarray of shape (height, width)``:
        the pixels of one window (image px of its top-left corner and its size).
    dtype : dtype, optional
    crs, transform, nodata, blocksize, compress
        As for :func:`write_geotiff`.
    window : int, optional
        Side of the windows asked of ``fill_fn``, px (a multiple of ``blocksize``
        keeps writes block-aligned).
    cache_mb : int, optional
        GDAL block cache, MB.
    """
    from rasterio.windows import Window

    width = _positive_int(width, "width")
    height = _positive_int(height, "height")
    window = _positive_int(window, "window")
    profile = _profile(
        width, height, dtype, crs=crs, transform=transform, nodata=nodata,
        tiled=True, blocksize=blocksize, compress=compress,
    )
    with atomic_path(path) as tmp, _quiet_rasterio(cache_mb) as rasterio:
        with rasterio.open(tmp, "w", **profile) as dst:
            for row0 in range(0, height, window):
                h = min(window, height - row0)
                for col0 in range(0, width, window):
                    w = min(window, width - col0)
                    block = np.asarray(fill_fn(col0, row0, w, h))
                    if block.shape != (h, w):
                        raise DetectorError(
                            f"fill_fn returned shape {block.shape} for window (col0={col0}, row0={row0}); "
                            f"expected {(h, w)}."
                        )
                    dst.write(block.astype(profile["dtype"], copy=False), 1, window=Window(col0, row0, w, h))


def mosaic_tiles(tiles_df, root, image_id, out_path, *, crs=None, transform=None, nodata=0):
    """Stitch the tiles of one source image back into a single GeoTIFF.

    Parameters
    ----------
    tiles_df : DataFrame
        Tile table with ``tile_id``, ``image_id``, ``path`` (relative to
        ``root``), ``col0`` and ``row0`` (px of the tile's top-left pixel in
        its source image).
    root : path-like
        Folder the tile paths are relative to.
    image_id : str
        Which source image to rebuild.
    out_path : path-like
        GeoTIFF to write (atomically).
    crs, transform : optional
        Georeferencing of the whole source image (transform of its top-left
        corner).
    nodata : float, optional
        Fill of pixels no tile covers.

    Returns
    -------
    shape : (int, int)
        (height, width) of the mosaic, px: the extent of its tiles.

    Notes
    -----
    Where tiles overlap, the one later in ``tiles_df`` wins. Tiles are read
    and written one at a time.
    """
    from rasterio.windows import Window

    root = Path(root)
    missing = [c for c in ("tile_id", "image_id", "path", "col0", "row0") if c not in tiles_df.columns]
    if missing:
        raise TileSetError(f"tile table lacks column(s) {', '.join(missing)} needed to mosaic image {image_id!r}.")
    rows = tiles_df.loc[tiles_df["image_id"].astype(str) == str(image_id)]
    if rows.empty:
        raise TileSetError(f"tile table has no tile of image_id {image_id!r}.")
    offsets = rows[["col0", "row0"]].apply(pd.to_numeric, errors="coerce")
    bad = offsets.isna().any(axis=1) | (offsets < 0).any(axis=1) | (offsets % 1 != 0).any(axis=1)
    if bad.any():
        problems = [
            f"tile {t!r}: col0/row0 ({c!r}, {r!r}) must be whole numbers of px >= 0 to mosaic image {image_id!r}."
            for t, c, r in zip(rows["tile_id"][bad], rows["col0"][bad], rows["row0"][bad], strict=True)
        ]
        raise TileSetError(problems)
    col0 = offsets["col0"].to_numpy(dtype=np.int64)
    row0 = offsets["row0"].to_numpy(dtype=np.int64)
    paths = [root / p for p in rows["path"].astype(str)]

    # Sizes come from the file headers, so the first pass does not decode pixels.
    sizes = np.array([image_size(p) for p in paths], dtype=np.int64).reshape(-1, 2)
    width = int((col0 + sizes[:, 0]).max())
    height = int((row0 + sizes[:, 1]).max())
    first = read_image(paths[0])
    profile = _profile(
        width, height, first.dtype, crs=crs, transform=transform, nodata=nodata,
        tiled=True, blocksize=256, compress="deflate",
    )
    with atomic_path(out_path) as tmp, _quiet_rasterio() as rasterio:
        with rasterio.open(tmp, "w", **profile) as dst:
            for path, c, r in zip(paths, col0, row0, strict=True):
                tile = first if path == paths[0] else read_image(path)
                if tile.dtype != first.dtype:
                    raise ImageError(
                        f"image {str(path)!r} has dtype {tile.dtype}; the other tiles of {image_id!r} are {first.dtype}."
                    )
                h, w = tile.shape
                dst.write(tile, 1, window=Window(int(c), int(r), w, h))
    return height, width
