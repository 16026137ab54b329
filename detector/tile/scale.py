"""Reading a tile at the pixel scale its model learnt from.

A fan's size in pixels is its size on the ground over the image's ground scale: the same fan is
half as many pixels long in an image binned 2 x 2 (0.5 m/px) as at full resolution (0.25 m/px).
The patch windows, the smoothing of the darkness and the least sizes of the object readings are
all in pixels, so a model reads fans well only near the ground scale of its training tiles. A
tile whose ``metres_per_px`` lies outside that range (by more than a tolerance) is resampled to
the training tiles' median scale before detection, and its detections are mapped back to its own
pixels; tiles within the range, or of unknown scale, are read as they are.
"""

from dataclasses import dataclass

import numpy as np

from ..errors import ImageError

__all__ = ["MAX_ZOOM", "SCALE_METHOD", "SCALE_TOLERANCE", "PixelScale", "resample_tile", "frame_factors", "to_read_frame",
           "to_tile_frame"]

#: How much finer or coarser than the training tiles' range a tile may be and still be read as it is
#: (a fraction: 0.5 reads tiles of 0.167-0.375 m/px as they are when the training tiles were all
#: 0.25 m/px, and resamples a tile binned 2 x 2 to 0.5 m/px). Images come binned by factors of two, so
#: a wide tolerance loses little: a change of binning is resampled, while tiles whose metres_per_px
#: varies less than that without their fans' pixel sizes changing (the benchmark's generator draws it
#: at random) are read as they are. On development images copied at
#: other scales, tiles 1.15 times finer or coarser than the training ones scored about as well read as
#: they were as resampled, tiles 1.33 times coarser lost 0.05 of fan F1 read as they were, and tiles
#: binned 2 x 2 lost 0.29.
SCALE_TOLERANCE = 0.5

#: The largest resampling either way: a tile four times finer or coarser than the fitting tiles' median
#: (a 4 x 4 binning) is still read at their scale; one further off (another camera: 6 m/px context
#: images, say) holds nothing the model could read at any scale and is read as it is, rather than
#: blown up to dozens of times its pixels.
MAX_ZOOM = 4.0

#: How a tile is resampled, as recorded in a model card.
SCALE_METHOD = ("scale: a tile whose metres_per_px lies outside the fitting tiles' range by more than the "
                "tolerance, and within 4 times their median, is resampled to the median (skimage.transform.resize, "
                "bilinear; Gaussian anti-aliasing when shrinking) and its detections are mapped back to its own "
                "pixels")


@dataclass(frozen=True)
class PixelScale:
    """The ground scale of the tiles a model learnt from, as its card keeps it.

    Attributes
    ----------
    metres_per_px : float
        The fitting tiles' median ground scale: what a tile outside the range is resampled to.
    lo, hi : float
        The finest and coarsest fitting tile, m/px.
    tolerance : float
        A tile within ``[lo / (1 + tolerance), hi * (1 + tolerance)]`` is read as it is.
    """

    metres_per_px: float
    lo: float
    hi: float
    tolerance: float = SCALE_TOLERANCE

    @classmethod
    def from_card(cls, entry):
        """The scale of a card's ``pixel_scale`` entry; None for a card without one (nothing is resampled)."""
        if not entry:
            return None
        return cls(float(entry["metres_per_px"]), float(entry["min"]), float(entry["max"]),
                   float(entry["tolerance"]))

    @classmethod
    def of_tiles(cls, metres_per_px, tolerance=SCALE_TOLERANCE):
        """The scale of the fitting tiles (values that are not finite and positive are left out);
        None when no tile has one."""
        values = np.asarray(metres_per_px, dtype=np.float64)
        values = values[np.isfinite(values) & (values > 0)]
        if values.size == 0:
            return None
        return cls(float(np.median(values)), float(values.min()), float(values.max()), float(tolerance))

    def to_card(self):
        return {"metres_per_px": self.metres_per_px, "min": self.lo, "max": self.hi, "tolerance": self.tolerance,
                "method": SCALE_METHOD}

    def zoom(self, metres_per_px):
        """How many times larger than its own pixels a tile of this ground scale is read.

        1.0 for a tile within the range (with the tolerance), of unknown scale (None, NaN, or
        not positive) or more than :data:`MAX_ZOOM` times finer or coarser than the median;
        otherwise ``metres_per_px / self.metres_per_px``: 2.0 for a 0.5 m/px tile read by a model
        of 0.25 m/px tiles (each pixel becomes two).
        """
        if metres_per_px is None:
            return 1.0
        s = float(metres_per_px)
        if not np.isfinite(s) or s <= 0:
            return 1.0
        if self.lo / (1.0 + self.tolerance) <= s <= self.hi * (1.0 + self.tolerance):
            return 1.0
        zoom = s / self.metres_per_px
        return zoom if 1.0 / MAX_ZOOM <= zoom <= MAX_ZOOM else 1.0


def resample_tile(tile, nodata_mask, zoom):
    """A tile and its no-data mask resampled ``zoom`` times (2.0: twice as many rows and columns).

    Bilinear (:func:`skimage.transform.resize`, ``order=1``, ``mode="reflect"``), with Gaussian
    anti-aliasing when shrinking. No-data pixels are filled with the median of the valid ones
    first, so they do not darken their neighbours; a resampled pixel is no-data when most of what
    it is drawn from is. Integer tiles keep their dtype (rounded; valid pixels never take the
    no-data value 0), float tiles stay float in [0, 1] with NaN for no-data.

    Returns
    -------
    tile : ndarray of shape (round(M * zoom), round(N * zoom))
    nodata_mask : ndarray of the same shape, bool
    """
    from skimage.transform import resize

    tile = np.asarray(tile)
    nodata = np.asarray(nodata_mask, dtype=bool)
    if tile.ndim != 2 or nodata.shape != tile.shape:
        raise ImageError(f"resample_tile takes a 2-D tile and a mask of its shape, not {tile.shape} and {nodata.shape}.")
    if not np.isfinite(zoom) or zoom <= 0:
        raise ImageError(f"zoom {zoom!r} must be a positive number.")
    shape = (max(1, int(round(tile.shape[0] * zoom))), max(1, int(round(tile.shape[1] * zoom))))
    image = tile.astype(np.float64)
    valid = ~nodata
    if tile.dtype.kind == "f":
        valid &= np.isfinite(image)
    fill = float(np.median(image[valid])) if valid.any() else 0.0
    image = np.where(valid, image, fill)
    shrink = zoom < 1.0
    out = resize(image, shape, order=1, mode="reflect", anti_aliasing=shrink, preserve_range=True)
    out_valid = resize(valid.astype(np.float64), shape, order=1, mode="reflect", anti_aliasing=shrink,
                       preserve_range=True) >= 0.5
    if tile.dtype.kind == "f":
        out = np.where(out_valid, np.clip(out, 0.0, 1.0), np.nan).astype(tile.dtype)
    else:
        top = np.iinfo(tile.dtype).max
        out = np.clip(np.round(out), 1, top).astype(tile.dtype)
        out[~out_valid] = 0
    return out, ~out_valid


def frame_factors(tile_shape, read_shape):
    """Column and row factors from a tile's own pixels to the frame it was read in (``read / own``)."""
    return read_shape[1] / tile_shape[1], read_shape[0] / tile_shape[0]


_POSITION = ("x_px", "y_px")
_LENGTHS = ("length_px", "semi_major_px", "semi_minor_px")


def _scaled(frame, fx, fy, inverse):
    out = frame.copy()
    if out.empty:
        return out
    # Pixel centres are at integer px: a position maps through its pixel's edges, (x + 0.5) * f - 0.5.
    for col, f in zip(_POSITION, (fx, fy)):
        if col in out:
            x = out[col].to_numpy(dtype=float)
            out[col] = (x + 0.5) / f - 0.5 if inverse else (x + 0.5) * f - 0.5
    g = float(np.sqrt(fx * fy))
    for col in _LENGTHS:
        if col in out:
            x = out[col].to_numpy(dtype=float)
            out[col] = x / g if inverse else x * g
    return out


def to_tile_frame(objects, fx, fy):
    """Objects read in a resampled frame, in the tile's own pixels (directions and openings unchanged)."""
    return _scaled(objects, fx, fy, inverse=True)


def to_read_frame(objects, fx, fy):
    """Objects (e.g. consensus features) in a tile's own pixels, in the frame it was read in."""
    return _scaled(objects, fx, fy, inverse=False)
