"""Georeferencing: image pixels to map coordinates, longitude/latitude and azimuths.

Pixel coordinates follow :mod:`detector.geometry`: column ``col`` to the right,
row ``row`` down, origin at the *centre* of the top-left pixel. A raster's
affine ``transform`` maps pixel *corners* (GDAL convention), so the map
coordinates of the centre of pixel (col, row) are ``transform * (col + 0.5,
row + 0.5)``.

Directions measured on an image are degrees clockwise from image up. On a map
they become azimuths, degrees clockwise from true north at the feature; the two
differ by the meridian convergence of the projection, by any rotation of the
raster grid, and (for non-conformal projections) by the local distortion.
:meth:`Georeferencer.grid_to_azimuth` handles all of these by following the
direction a short step on the ground and measuring the geodesic azimuth on the
body's ellipsoid, so it works for any CRS and any (flipped, rotated) transform.

Mars coordinate reference systems are built on the IAU 2015 Mars sphere of
radius 3 396 190 m (ocentric latitude, east-positive longitude).

Longitude and latitude written for GIS (``lon_deg``, ``lat_deg``, the GeoJSON
coordinates) are *planetocentric*: latitude is the angle at the body's centre
(the same on every Mars sphere or ellipsoid, and equal to the latitude on the
IAU 2015 Mars sphere), longitude is east-positive in [-180, 180)
(:meth:`Georeferencer.pixel_to_planetocentric`). A raster whose CRS is not on
Mars is refused unless asked for (:func:`check_mars_crs`).
"""

import numpy as np
import pyproj
from affine import Affine
from pyproj.crs import GeographicCRS, PrimeMeridian, ProjectedCRS
from pyproj.crs.coordinate_operation import EquidistantCylindricalConversion, PolarStereographicAConversion
from pyproj.crs.datum import CustomDatum, CustomEllipsoid

from ..errors import DetectorError, SpecError
from ..geometry import unit_vector

__all__ = [
    "MARS_RADIUS_M",
    "MARS_GEOGRAPHIC",
    "MARS_SOUTH_POLAR_STEREO",
    "MARS_EQUIRECTANGULAR",
    "Georeferencer",
    "wind_from_deg",
    "length_m",
    "metres_per_px",
    "is_mars_crs",
    "check_mars_crs",
    "polygon_ground_area_m2",
]

#: Semi-major axes, m, that count as Mars: every Mars reference body in use lies within
#: 3 370-3 410 km (IAU 2000 / 2015 sphere and ellipsoid 3 396 190 m, older ones 3 393 400 and
#: 3 397 000 m; from memory), and no other body of the solar system comes near it.
MARS_RADIUS_RANGE_M = (3.37e6, 3.41e6)

#: Radius of the IAU 2015 Mars sphere, m.
MARS_RADIUS_M = 3396190.0

_MARS_ELLIPSOID = CustomEllipsoid(
    name="Mars (2015) - Sphere", semi_major_axis=MARS_RADIUS_M, semi_minor_axis=MARS_RADIUS_M
)
_MARS_PRIME_MERIDIAN = PrimeMeridian.from_json_dict(
    {"type": "PrimeMeridian", "name": "Reference Meridian", "longitude": 0.0}
)
_MARS_DATUM = CustomDatum(
    name="Mars (2015) - Sphere", ellipsoid=_MARS_ELLIPSOID, prime_meridian=_MARS_PRIME_MERIDIAN
)

#: Mars geographic CRS (ocentric latitude, east longitude, degrees) on the sphere.
MARS_GEOGRAPHIC = GeographicCRS(name="Mars (2015) - Sphere / Ocentric", datum=_MARS_DATUM)

#: Mars south polar stereographic, true scale at the pole, central meridian 0 E, metres.
MARS_SOUTH_POLAR_STEREO = ProjectedCRS(
    name="Mars (2015) - Sphere / South Polar Stereographic",
    conversion=PolarStereographicAConversion(latitude_natural_origin=-90.0, longitude_natural_origin=0.0),
    geodetic_crs=MARS_GEOGRAPHIC,
)

#: Mars equirectangular (equidistant cylindrical), standard parallel 0, central meridian 0 E, metres.
MARS_EQUIRECTANGULAR = ProjectedCRS(
    name="Mars (2015) - Sphere / Equirectangular",
    conversion=EquidistantCylindricalConversion(latitude_first_parallel=0.0, longitude_natural_origin=0.0),
    geodetic_crs=MARS_GEOGRAPHIC,
)


def _as_crs(crs):
    if crs is None:
        raise DetectorError("a georeferencer needs a CRS; the raster has none.")
    try:
        # pyproj accepts its own CRS, WKT, PROJ strings, "AUTH:CODE" and any object with to_wkt() (rasterio).
        return pyproj.CRS.from_user_input(crs)
    except pyproj.exceptions.CRSError as err:
        raise DetectorError(f"CRS {str(crs)[:80]!r} is not understood: {err}.") from err


def is_mars_crs(crs):
    """Whether a CRS is defined on a Mars sphere or ellipsoid.

    Parameters
    ----------
    crs : pyproj.CRS, rasterio.crs.CRS or str

    Returns
    -------
    mars : bool
        True when the CRS's ellipsoid has a semi-major axis within
        :data:`MARS_RADIUS_RANGE_M`.
    """
    ellipsoid = _as_crs(crs).ellipsoid
    if ellipsoid is None:
        return False
    lo, hi = MARS_RADIUS_RANGE_M
    return bool(lo <= ellipsoid.semi_major_metre <= hi)


def check_mars_crs(crs, source, *, any_body=False):
    """Refuse a CRS that is not on Mars, unless ``any_body``.

    Parameters
    ----------
    crs : pyproj.CRS, rasterio.crs.CRS or str
    source : str
        What the CRS belongs to (a file name), for the message.
    any_body : bool, default=False
        Accept a CRS of any body (e.g. an Earth CRS in a test product).

    Raises
    ------
    DetectorError
        The CRS's ellipsoid is not a Mars one.
    """
    if any_body or is_mars_crs(crs):
        return
    parsed = _as_crs(crs)
    ellipsoid = parsed.ellipsoid
    radius = f"{ellipsoid.semi_major_metre:.0f} m" if ellipsoid is not None else "none"
    raise DetectorError(
        f"image {str(source)!r} has CRS {parsed.name!r} whose reference body (semi-major axis {radius}) "
        f"is not Mars; reproject it to a Mars CRS, or pass --any-body to screen it anyway."
    )


def polygon_ground_area_m2(lon_deg, lat_deg, crs):
    """Geodesic area on a CRS's body of a polygon given by its vertices.

    Parameters
    ----------
    lon_deg, lat_deg : ndarray of shape (n,)
        Vertices in the longitude / latitude of ``crs``'s own geodetic CRS
        (as :meth:`Georeferencer.pixel_to_lonlat` returns them), degrees.
    crs : pyproj.CRS

    Returns
    -------
    area : float
        m^2, positive whatever the ring's orientation.

    References
    ----------
    Karney, C. F. F. (2013). Algorithms for geodesics. Journal of Geodesy 87, 43-55
    (the method of :meth:`pyproj.Geod.polygon_area_perimeter`).
    """
    area, _ = _as_crs(crs).get_geod().polygon_area_perimeter(np.asarray(lon_deg, float), np.asarray(lat_deg, float))
    return abs(float(area))


def _as_affine(transform):
    if isinstance(transform, Affine):
        return transform
    values = tuple(transform)
    if len(values) not in (6, 9):
        raise DetectorError(f"transform {values!r} must have 6 (a, b, c, d, e, f) or 9 coefficients.")
    return Affine(*values[:6])


def metres_per_px(transform):
    """Ground size of one pixel from an affine transform in metres, m/px.

    The geometric mean of the two pixel sides, ``sqrt(|a e - b d|)``, so
    rotated and flipped transforms give the same size.

    Parameters
    ----------
    transform : affine.Affine or sequence of 6 floats
        Pixel-to-map transform whose map units are metres.

    Returns
    -------
    scale : float
        m/px.
    """
    t = _as_affine(transform)
    scale = float(np.sqrt(abs(t.a * t.e - t.b * t.d)))
    if not np.isfinite(scale) or scale <= 0:
        raise DetectorError(f"transform {tuple(t)[:6]!r} is singular; it has no pixel size.")
    return scale


def length_m(length_px, scale):
    """Convert lengths from pixels to metres.

    Parameters
    ----------
    length_px : float or ndarray
        Lengths, px.
    scale : float or affine.Affine
        Metres per pixel, or a pixel-to-map transform in metres (see
        :func:`metres_per_px`).

    Returns
    -------
    length : float or ndarray
        Lengths, m. This is the map (grid) length; for the ground length
        including the projection's scale factor use
        :meth:`Georeferencer.ground_length_m`.
    """
    if isinstance(scale, (Affine, tuple, list)):
        scale = metres_per_px(scale)
    scale = float(scale)
    if not np.isfinite(scale) or scale <= 0:
        raise DetectorError(f"metres_per_px {scale!r} must be a positive number.")
    return np.asarray(length_px, dtype=float) * scale if np.ndim(length_px) else float(length_px) * scale


def wind_from_deg(azimuth_deg):
    """Direction the wind came from, degrees clockwise from north, in [0, 360).

    A fan runs downwind from its apex, so the wind blew from the opposite way
    (meteorological convention: a wind is named by where it comes from).

    Parameters
    ----------
    azimuth_deg : float or ndarray
        Fan azimuth, degrees clockwise from north.

    Returns
    -------
    wind_from : float or ndarray
        ``(azimuth + 180) % 360``.
    """
    return (np.asarray(azimuth_deg, dtype=float) + 180.0) % 360.0


class Georeferencer:
    """Pixel, map and longitude/latitude coordinates of one raster.

    Parameters
    ----------
    crs : pyproj.CRS, rasterio.crs.CRS, str
        The raster's CRS (projected or geographic).
    transform : affine.Affine or sequence of 6 floats
        Pixel-corner to map transform (GDAL / rasterio convention).

    Notes
    -----
    Every method is vectorised: coordinates may be scalars or arrays of one
    shape (broadcast together).
    """

    def __init__(self, crs, transform):
        self.crs = _as_crs(crs)
        self.transform = _as_affine(transform)
        if abs(self.transform.determinant) == 0 or not np.isfinite(self.transform.determinant):
            raise DetectorError(f"transform {tuple(self.transform)[:6]!r} is singular.")
        self._inverse = ~self.transform
        geodetic = self.crs.geodetic_crs
        if geodetic is None:
            raise DetectorError(f"CRS {self.crs.name!r} has no geodetic CRS; longitudes cannot be computed.")
        self._to_lonlat = pyproj.Transformer.from_crs(self.crs, geodetic, always_xy=True)
        # Geodetic CRSs may count longitude westward (IAU ographic Mars CRSs do) and give
        # geodetic (ographic) latitude; these turn them into planetocentric, east-positive values.
        axes = geodetic.axis_info
        lon_axis = next((a for a in axes if "longitude" in a.name.lower()), None)
        lat_axis = next((a for a in axes if "latitude" in a.name.lower()), None)
        self._lon_sign = -1.0 if lon_axis is not None and lon_axis.direction.lower() == "west" else 1.0
        ellipsoid = geodetic.ellipsoid
        ocentric = lat_axis is not None and "planetocentric" in lat_axis.name.lower()
        ratio = 1.0 if ellipsoid is None else ellipsoid.semi_minor_metre / ellipsoid.semi_major_metre
        self._ocentric_factor = 1.0 if ocentric else ratio**2
        self._from_lonlat = pyproj.Transformer.from_crs(geodetic, self.crs, always_xy=True)
        self._geod = self.crs.get_geod()

    @classmethod
    def from_raster(cls, source):
        """Georeferencer of an open raster (anything with ``crs`` and ``transform``)."""
        return cls(source.crs, source.transform)

    def __repr__(self):
        return f"Georeferencer(crs={self.crs.name!r}, transform={tuple(self.transform)[:6]!r})"

    # -- coordinates ---------------------------------------------------------

    def pixel_to_map(self, col, row):
        """Map coordinates of pixel centres.

        Parameters
        ----------
        col, row : float or ndarray
            Pixel coordinates, px (origin at the centre of the top-left pixel).

        Returns
        -------
        x, y : float or ndarray
            Map coordinates in the CRS's units.
        """
        c = np.asarray(col, dtype=float) + 0.5
        r = np.asarray(row, dtype=float) + 0.5
        t = self.transform
        return _out(t.a * c + t.b * r + t.c), _out(t.d * c + t.e * r + t.f)

    def map_to_pixel(self, x, y):
        """Pixel coordinates (centre convention, px) of map coordinates; inverse of :meth:`pixel_to_map`."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        t = self._inverse
        return _out(t.a * x + t.b * y + t.c - 0.5), _out(t.d * x + t.e * y + t.f - 0.5)

    def map_to_lonlat(self, x, y):
        """Longitude and latitude (degrees, east-positive) of map coordinates."""
        lon, lat = self._to_lonlat.transform(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
        return _out(lon), _out(lat)

    def pixel_to_planetocentric(self, col, row):
        """Planetocentric longitude and latitude of pixel centres, degrees.

        Parameters
        ----------
        col, row : float or ndarray
            Pixel coordinates, px.

        Returns
        -------
        lon, lat : float or ndarray
            Longitude east-positive in [-180, 180); latitude the angle at the
            body's centre, so ``tan(lat) = (b / a)**2 tan(geodetic lat)`` on an
            ellipsoid of semi-axes a, b (equal to the geodetic latitude on a
            sphere such as the IAU 2015 Mars sphere).
        """
        lon, lat = self.pixel_to_lonlat(col, row)
        lon = (self._lon_sign * np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0
        lat = np.asarray(lat, dtype=float)
        if self._ocentric_factor != 1.0:
            lat = np.degrees(np.arctan(self._ocentric_factor * np.tan(np.radians(lat))))
        return _out(lon), _out(lat)

    def lonlat_to_map(self, lon, lat):
        """Map coordinates of longitude and latitude (degrees)."""
        x, y = self._from_lonlat.transform(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
        return _out(x), _out(y)

    def pixel_to_lonlat(self, col, row):
        """Longitude and latitude (degrees) of pixel centres (col, row in px)."""
        return self.map_to_lonlat(*self.pixel_to_map(col, row))

    def lonlat_to_pixel(self, lon, lat):
        """Pixel coordinates (px) of longitude and latitude (degrees)."""
        return self.map_to_pixel(*self.lonlat_to_map(lon, lat))

    # -- directions and lengths ---------------------------------------------

    def _step_ends(self, direction_deg, col, row, step_px):
        d_col, d_row = unit_vector(np.asarray(direction_deg, dtype=float))
        col = np.asarray(col, dtype=float)
        row = np.asarray(row, dtype=float)
        half = 0.5 * step_px
        lon0, lat0 = self.pixel_to_lonlat(col - half * d_col, row - half * d_row)
        lon1, lat1 = self.pixel_to_lonlat(col + half * d_col, row + half * d_row)
        return np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (lon0, lat0, lon1, lat1)))

    def grid_to_azimuth(self, direction_deg, col, row, *, step_px=1.0):
        """Azimuth on the ground of a direction measured on the image.

        Parameters
        ----------
        direction_deg : float or ndarray
            Direction in the image, degrees clockwise from image up.
        col, row : float or ndarray
            Where it is measured (e.g. a fan's apex), px.
        step_px : float, optional
            Length of the short segment, centred on (col, row), that is
            followed on the ground, px.

        Returns
        -------
        azimuth : float or ndarray
            Degrees clockwise from true north at (col, row), in [0, 360).
            Undefined exactly at a pole.

        Notes
        -----
        The azimuth is that of the geodesic between the two ends of the
        segment, averaged between its start (forward azimuth) and its end
        (back azimuth + 180 degrees), which makes the estimate centred on
        (col, row) and insensitive to the segment's own length.
        """
        if not step_px > 0:
            raise SpecError(f"step_px {step_px!r} must be positive.")
        lon0, lat0, lon1, lat1 = self._step_ends(direction_deg, col, row, step_px)
        forward, back, _ = self._geod.inv(lon0, lat0, lon1, lat1)
        at_end = np.asarray(back, dtype=float) + 180.0
        forward = np.asarray(forward, dtype=float)
        turn = (at_end - forward + 180.0) % 360.0 - 180.0
        return _out((forward + 0.5 * turn) % 360.0)

    def ground_length_m(self, length_px, direction_deg, col, row):
        """Geodesic ground length, m, of image lengths (px) along a direction at (col, row).

        Includes the projection's local scale factor, unlike :func:`length_m`.
        """
        length_px = np.asarray(length_px, dtype=float)
        lon0, lat0, lon1, lat1 = self._step_ends(direction_deg, col, row, 1.0)
        _, _, dist = self._geod.inv(lon0, lat0, lon1, lat1)
        return _out(length_px * np.asarray(dist, dtype=float))

    @property
    def metres_per_px(self):
        """Map size of one pixel, m/px (the CRS must be projected in metres)."""
        unit = self.crs.axis_info[0].unit_name if self.crs.axis_info else ""
        if self.crs.is_geographic or unit not in ("metre", "meter"):
            raise DetectorError(f"CRS {self.crs.name!r} is not in metres (unit {unit!r}); use ground_length_m.")
        return metres_per_px(self.transform)


def _out(value):
    value = np.asarray(value, dtype=float)
    return float(value) if value.ndim == 0 else value
