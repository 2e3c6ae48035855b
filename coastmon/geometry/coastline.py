"""Coastline extraction: land-sea boundary polylines from a gridded mask.

The boundary is traced by marching squares (contourpy) on the mask in index space, mapped to
longitude and latitude by bilinear interpolation of the coordinate arrays, projected to
kilometres in a local azimuthal equidistant projection centred on the domain, and resampled
to uniform arclength.
"""

from __future__ import annotations

from dataclasses import dataclass

import contourpy
import geopandas as gpd
import numpy as np
import pyproj
from scipy import ndimage
from shapely.geometry import LineString

from coastmon.config import CoastSettings
from coastmon.errors import GeometryError

__all__ = [
    "Coastline",
    "Segment",
    "coastline_layer",
    "extract_coastline",
    "local_projection",
    "wrap_longitude",
]


@dataclass(frozen=True)
class Segment:
    """One coast polyline, resampled to uniform arclength, sea on the right.

    Attributes
    ----------
    segment_id : int
        1 for the longest segment, then in order of decreasing length.
    lon, lat : numpy.ndarray
        Vertex positions in degrees (longitude in the convention of the input grid).
    x_km, y_km : numpy.ndarray
        Vertex positions in the local azimuthal equidistant projection of the coastline (km).
    alongshore_km : numpy.ndarray
        Arclength from the first vertex (km), uniformly spaced.
    closed : bool
        True for a closed ring (the last vertex joins the first; it is not repeated).
    island : bool
        True for a closed ring with land inside (wound anticlockwise).
    """

    segment_id: int
    lon: np.ndarray
    lat: np.ndarray
    x_km: np.ndarray
    y_km: np.ndarray
    alongshore_km: np.ndarray
    closed: bool
    island: bool

    @property
    def spacing_km(self) -> float:
        """Arclength between consecutive vertices (km)."""
        if self.closed:
            return float(self.length_km / self.x_km.size)
        return float(self.alongshore_km[1] - self.alongshore_km[0])

    @property
    def length_km(self) -> float:
        """Length of the polyline (km), including the closing edge of a ring."""
        if self.closed:
            closing = np.hypot(self.x_km[0] - self.x_km[-1], self.y_km[0] - self.y_km[-1])
            return float(self.alongshore_km[-1] + closing)
        return float(self.alongshore_km[-1])


@dataclass
class Coastline:
    """All coast segments of a domain and the local projection they are measured in.

    Attributes
    ----------
    segments : list of Segment
        Ordered by decreasing length.
    crs : pyproj.CRS
        Azimuthal equidistant projection (km) centred on the domain.
    forward, inverse : pyproj.Transformer
        lon/lat (degrees) -> x/y (km), and back.
    lon_ref, lat_ref : float
        Centre of the projection; output longitudes lie within 180 degrees of ``lon_ref``.
    boundary : str
        ``"mask"`` or ``"isobath"``.
    """

    segments: list[Segment]
    crs: pyproj.CRS
    forward: pyproj.Transformer
    inverse: pyproj.Transformer
    lon_ref: float
    lat_ref: float
    boundary: str

    def to_km(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Project longitude/latitude (degrees) to the local x/y (km)."""
        x, y = self.forward.transform(np.asarray(lon, float), np.asarray(lat, float))
        return np.asarray(x, float), np.asarray(y, float)

    def to_lonlat(self, x_km: np.ndarray, y_km: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Local x/y (km) back to longitude/latitude, longitude near ``lon_ref``."""
        lon, lat = self.inverse.transform(np.asarray(x_km, float), np.asarray(y_km, float))
        return wrap_longitude(np.asarray(lon, float), self.lon_ref), np.asarray(lat, float)


def wrap_longitude(lon: np.ndarray, lon_ref: float) -> np.ndarray:
    """Longitudes shifted by multiples of 360 degrees into [lon_ref - 180, lon_ref + 180)."""
    return lon_ref + np.mod(np.asarray(lon, float) - lon_ref + 180.0, 360.0) - 180.0


def local_projection(
    lon_ref: float, lat_ref: float
) -> tuple[pyproj.CRS, pyproj.Transformer, pyproj.Transformer]:
    """Azimuthal equidistant projection in km centred on (lon_ref, lat_ref), WGS84.

    Distances and azimuths from the centre are exact; elsewhere the scale error grows as
    about (d/R)^2/6 (Snyder 1987, Map Projections - A Working Manual, USGS PP 1395, p. 195),
    0.4 % at 1000 km. The projection is continuous across the antimeridian.
    """
    lon0 = float(np.mod(lon_ref + 180.0, 360.0) - 180.0)
    crs = pyproj.CRS.from_proj4(
        f"+proj=aeqd +lat_0={lat_ref:.10f} +lon_0={lon0:.10f} +datum=WGS84 +units=km +no_defs"
    )
    geographic = pyproj.CRS.from_epsg(4326)
    forward = pyproj.Transformer.from_crs(geographic, crs, always_xy=True)
    inverse = pyproj.Transformer.from_crs(crs, geographic, always_xy=True)
    return crs, forward, inverse


def _check_inputs(lon: np.ndarray, lat: np.ndarray, mask: np.ndarray) -> None:
    if lon.ndim != 2 or lon.shape != lat.shape or lon.shape != mask.shape:
        raise GeometryError(
            f"The longitude {lon.shape}, latitude {lat.shape} and mask {mask.shape} arrays must "
            "be 2-D with the same (y, x) shape",
            where="coastline extraction",
            todo="Pass 2-D lon(y, x), lat(y, x) and mask(y, x); expand 1-D coordinates with "
            "numpy.meshgrid",
        )
    if min(mask.shape) < 3:
        raise GeometryError(
            f"The grid {mask.shape} is too small to hold a coastline",
            where="coastline extraction",
            todo="Use a grid of at least 3 x 3 points",
        )
    if not (np.all(np.isfinite(lon)) and np.all(np.isfinite(lat))):
        raise GeometryError(
            "The longitude or latitude array holds missing values",
            where="coastline extraction",
            todo="Fill the coordinates everywhere, also on land",
        )
    if not np.all(np.isin(mask, (0, 1))):
        raise GeometryError(
            "The mask must hold only 1 (sea) and 0 (land)",
            where="coastline extraction",
            todo="Convert the mask to 1 = sea, 0 = land before calling",
        )
    if np.all(mask == 1):
        raise GeometryError(
            "The mask has no land, so there is no coastline",
            where="coastline extraction",
            todo="Check the land/sea mask (1 = sea, 0 = land) or name the right mask variable "
            "with ingest.mask_var",
        )
    if np.all(mask == 0):
        raise GeometryError(
            "The mask has no sea, so there is no coastline",
            where="coastline extraction",
            todo="Check the land/sea mask (1 = sea, 0 = land); an inverted mask is a common cause",
        )


def _boundary_field(
    mask: np.ndarray, settings: CoastSettings, bathymetry: np.ndarray | None
) -> tuple[np.ndarray, float]:
    """Field to contour and its level; the sea side is where the field exceeds the level."""
    if settings.boundary == "mask":
        return mask.astype(float), 0.5
    if bathymetry is None:
        raise GeometryError(
            "coast.boundary is 'isobath' but no bathymetry was given",
            where="coastline extraction",
            todo="Name the bathymetry variable with ingest.bathymetry_var, or set "
            "coast.boundary = 'mask'",
        )
    depth = np.asarray(bathymetry, float)
    if depth.shape != mask.shape:
        raise GeometryError(
            f"The bathymetry shape {depth.shape} differs from the mask shape {mask.shape}",
            where="coastline extraction",
            todo="Give the bathymetry on the same (y, x) grid as the velocity",
        )
    field = np.where((mask == 1) & np.isfinite(depth), depth, 0.0)
    if not (np.any(field > settings.isobath_m) and np.any(field < settings.isobath_m)):
        raise GeometryError(
            f"The {settings.isobath_m:g} m isobath does not occur in the bathymetry",
            where="coastline extraction",
            todo="Choose coast.isobath_m between the shallowest and deepest sea depth, or set "
            "coast.boundary = 'mask'",
        )
    return field, float(settings.isobath_m)


def _index_handedness(
    lon_u: np.ndarray, lat: np.ndarray, forward: pyproj.Transformer
) -> float:
    """+1 if (column, row) index axes have the handedness of (east, north), else -1."""
    ny, nx = lon_u.shape
    i, j = min(max(ny // 2, 0), ny - 2), min(max(nx // 2, 0), nx - 2)
    x, y = forward.transform(
        lon_u[[i, i, i + 1], [j, j + 1, j]], lat[[i, i, i + 1], [j, j + 1, j]]
    )
    det = (x[1] - x[0]) * (y[2] - y[0]) - (y[1] - y[0]) * (x[2] - x[0])
    return 1.0 if det > 0 else -1.0


def _orient(line: np.ndarray, field: np.ndarray, level: float, handedness: float) -> np.ndarray:
    """Reverse ``line`` (index x, y columns) unless the high side lies on its right."""
    mid = 0.5 * (line[1:] + line[:-1])
    tangent = line[1:] - line[:-1]
    norm = np.hypot(tangent[:, 0], tangent[:, 1])
    keep = norm > 0
    if not np.any(keep):
        return line
    right = np.column_stack([tangent[keep, 1], -tangent[keep, 0]]) / norm[keep, None]
    plus = mid[keep] + 0.3 * right
    minus = mid[keep] - 0.3 * right
    f_plus = ndimage.map_coordinates(field, [plus[:, 1], plus[:, 0]], order=1, mode="nearest")
    f_minus = ndimage.map_coordinates(field, [minus[:, 1], minus[:, 0]], order=1, mode="nearest")
    score = handedness * float(np.sum(np.sign(f_plus - level) - np.sign(f_minus - level)))
    return line if score >= 0 else line[::-1].copy()


def _cut_edge_band(line: np.ndarray, closed: bool, shape: tuple[int, int]) -> list[tuple]:
    """Pieces of a line that lie off the outermost cell ring of the array.

    Returns (vertices, closed) tuples; a closed ring that touches the ring becomes open pieces.
    """
    ny, nx = shape
    x, y = line[:, 0], line[:, 1]
    keep = (x >= 1.0) & (x <= nx - 2.0) & (y >= 1.0) & (y <= ny - 2.0)
    if np.all(keep):
        return [(line, closed)]
    if closed:
        first_cut = int(np.argmin(keep))
        line = np.roll(line, -first_cut, axis=0)
        keep = np.roll(keep, -first_cut)
    edges = np.diff(np.concatenate([[0], keep.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)
    return [(line[a:b], False) for a, b in zip(starts, stops, strict=True) if b - a >= 2]


def _smooth_steps(line: np.ndarray, closed: bool) -> np.ndarray:
    """Round the grid-scale steps of a traced line: Gaussian of one vertex along the line.

    Marching-squares vertices lie on cell edges, less than one cell apart, so this removes
    the staircase of a binary mask without moving features larger than a cell. Open ends
    are extended by point reflection, rings periodically.
    """
    if line.shape[0] < 3:
        return line
    mode = "wrap" if closed else "reflect"
    extra = {} if closed else {"reflect_type": "odd"}
    pad = 4
    padded = np.pad(line, ((pad, pad), (0, 0)), mode=mode, **extra)
    smooth = ndimage.gaussian_filter1d(padded, 1.0, axis=0, mode="nearest", truncate=4.0)
    return smooth[pad:pad + line.shape[0]]


def _resample(x: np.ndarray, y: np.ndarray, closed: bool, step_km: float):
    """Uniform-arclength resampling of a polyline; returns x, y, s and the total length.

    Chords of the resampled line cut the corners of the traced one, so resampling is
    repeated on its own output until the spacing is uniform in its own chord length (three
    passes bring the spread below a few percent of the step).
    """
    for _ in range(3):
        xx = np.append(x, x[0]) if closed else x
        yy = np.append(y, y[0]) if closed else y
        s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(xx), np.diff(yy)))])
        length = float(s[-1])
        if closed:
            n = max(int(round(length / step_km)), 8)
            s_new = np.arange(n) * (length / n)
        else:
            n = max(int(round(length / step_km)), 1) + 1
            s_new = np.linspace(0.0, length, n)
        x, y = np.interp(s_new, s, xx), np.interp(s_new, s, yy)
    xx = np.append(x, x[0]) if closed else x
    yy = np.append(y, y[0]) if closed else y
    s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(xx), np.diff(yy)))])
    length = float(s[-1])
    return x, y, s[:x.size], length


def extract_coastline(
    lon: np.ndarray,
    lat: np.ndarray,
    mask: np.ndarray,
    settings: CoastSettings,
    bathymetry: np.ndarray | None = None,
) -> Coastline:
    """Trace the land-sea boundary of a gridded mask as polylines in km.

    Parameters
    ----------
    lon, lat : numpy.ndarray
        2-D (y, x) coordinates in degrees; regular or curvilinear; longitude in
        [-180, 180) or continuous beyond 180 across the antimeridian.
    mask : numpy.ndarray
        2-D (y, x), 1 = sea, 0 = land.
    settings : CoastSettings
        ``boundary``, ``isobath_m``, ``resample_km``, ``min_segment_km``, ``scales_km``.
    bathymetry : numpy.ndarray, optional
        2-D (y, x) depth in m, positive down; needed when ``settings.boundary == "isobath"``.

    Returns
    -------
    Coastline
        Segments ordered by decreasing length, each resampled to ``settings.resample_km``.

    Raises
    ------
    GeometryError
        If the mask has no land or no sea, the inputs do not match, or no segment is at least
        ``settings.min_segment_km`` long and ``settings.scales_km[0]`` long.

    Notes
    -----
    The boundary is the 0.5 level of the mask (or the ``isobath_m`` level of the bathymetry,
    land counted as depth 0) traced by marching squares in index space with linear
    interpolation along cell edges, then mapped to lon/lat by bilinear interpolation of the
    coordinate arrays.

    *Orientation.* Every segment is oriented so that, walking from its first vertex to its
    last, the **sea is on the right** and land on the left. Islands (closed rings with land
    inside) therefore wind **anticlockwise** seen from above in the local projection; a
    ring of sea enclosed by land (a lake or lagoon) winds clockwise. The offshore unit normal
    is the tangent turned 90 degrees clockwise: (t_y, -t_x). With this orientation the
    signed curvature kappa = (x'y'' - y'x'') / (x'^2 + y'^2)^{3/2} is positive where the
    coast is convex toward the sea (a cape) and negative in bays.

    *Domain edges.* The edge of the grid is never coastline. Contour vertices that lie in
    the outermost ring of cells (index < 1 or > n - 2 along either axis) are removed; a coast
    that runs off the domain is an open segment whose ends lie within one cell of the edge,
    and a land border one cell wide (a closed wall) yields no coastline.

    *Lengths.* x_km, y_km are in an azimuthal equidistant projection (WGS84) centred on the
    centre of the grid; segments shorter than ``settings.min_segment_km`` are dropped.

    Examples
    --------
    >>> import numpy as np
    >>> from coastmon.config import CoastSettings
    >>> lon, lat = np.meshgrid(np.linspace(-1, 1, 81), np.linspace(-1, 1, 81))
    >>> mask = (np.hypot(lon, lat) > 0.5).astype(int)
    >>> coast = extract_coastline(lon, lat, mask, CoastSettings())
    >>> seg = coast.segments[0]
    >>> seg.closed, seg.island, round(seg.length_km / 10)
    (True, True, 35)
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    mask = np.asarray(mask)
    _check_inputs(lon, lat, mask)
    field, level = _boundary_field(mask, settings, bathymetry)

    ny, nx = mask.shape
    lon_ref = float(lon[ny // 2, nx // 2])
    lon_u = wrap_longitude(lon, lon_ref)
    lon_ref = float(0.5 * (lon_u.min() + lon_u.max()))
    lat_ref = float(0.5 * (lat.min() + lat.max()))
    lon_u = wrap_longitude(lon, lon_ref)
    crs, forward, inverse = local_projection(lon_ref, lat_ref)
    handedness = _index_handedness(lon_u, lat, forward)

    generator = contourpy.contour_generator(
        z=field, line_type=contourpy.LineType.Separate, name="serial"
    )
    pieces: list[tuple[np.ndarray, bool]] = []
    for line in generator.lines(level):
        if line.shape[0] < 2:
            continue
        closed = line.shape[0] >= 4 and np.allclose(line[0], line[-1])
        if closed:
            line = line[:-1]
        line = _orient(line, field, level, handedness)
        pieces.extend(_cut_edge_band(line, closed, mask.shape))

    segments_raw = []
    for line, closed in pieces:
        line = _smooth_steps(line, closed)
        lon_v = ndimage.map_coordinates(lon_u, [line[:, 1], line[:, 0]], order=1, mode="nearest")
        lat_v = ndimage.map_coordinates(lat, [line[:, 1], line[:, 0]], order=1, mode="nearest")
        x, y = forward.transform(lon_v, lat_v)
        xr, yr, s, length = _resample(np.asarray(x), np.asarray(y), closed, settings.resample_km)
        if length < settings.min_segment_km:
            continue
        segments_raw.append((length, xr, yr, s, closed))

    if not segments_raw:
        raise GeometryError(
            f"No coastline segment is at least coast.min_segment_km = "
            f"{settings.min_segment_km:g} km long (the edge of the domain does not count)",
            where="coastline extraction",
            todo="Check that the mask holds a coast inside the domain, or lower "
            "coast.min_segment_km",
        )
    longest = max(item[0] for item in segments_raw)
    if longest < settings.scales_km[0]:
        raise GeometryError(
            f"The longest coastline segment ({longest:.1f} km) is shorter than the smallest "
            f"smoothing scale coast.scales_km[0] = {settings.scales_km[0]:g} km",
            where="coastline extraction",
            todo="Use a larger domain or smaller coast.scales_km",
        )

    segments_raw.sort(key=lambda item: -item[0])
    segments = []
    for k, (_, xr, yr, s, closed) in enumerate(segments_raw, start=1):
        lon_r, lat_r = inverse.transform(xr, yr)
        area2 = float(np.sum(xr * np.roll(yr, -1) - np.roll(xr, -1) * yr)) if closed else 0.0
        segments.append(
            Segment(
                segment_id=k,
                lon=wrap_longitude(np.asarray(lon_r), lon_ref),
                lat=np.asarray(lat_r, float),
                x_km=xr,
                y_km=yr,
                alongshore_km=s,
                closed=closed,
                island=closed and area2 > 0,
            )
        )
    return Coastline(
        segments=segments,
        crs=crs,
        forward=forward,
        inverse=inverse,
        lon_ref=lon_ref,
        lat_ref=lat_ref,
        boundary=settings.boundary,
    )


def coastline_layer(coastline: Coastline) -> gpd.GeoDataFrame:
    """The ``coastline`` GIS layer: one LineString per segment, EPSG:4326.

    Columns: ``segment_id``, ``length_km`` (geodesic length on WGS84), ``closed``, ``island``.
    Rings are closed by repeating the first vertex.
    """
    geod = pyproj.Geod(ellps="WGS84")
    rows = {"segment_id": [], "length_km": [], "closed": [], "island": []}
    geometry = []
    for seg in coastline.segments:
        lon, lat = seg.lon, seg.lat
        if seg.closed:
            lon, lat = np.append(lon, lon[0]), np.append(lat, lat[0])
        geometry.append(LineString(np.column_stack([lon, lat])))
        rows["segment_id"].append(seg.segment_id)
        rows["length_km"].append(geod.line_length(lon, lat) / 1000.0)
        rows["closed"].append(seg.closed)
        rows["island"].append(seg.island)
    return gpd.GeoDataFrame(rows, geometry=geometry, crs="EPSG:4326")
