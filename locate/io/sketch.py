"""What a map is drawn over: a georeferenced site image, outlines, GeoJSON features.

The maths (:class:`Georef`, :func:`shape_outlines`, :func:`geojson_features`) is pure.  The two
readers :func:`read_image` and :func:`read_geojson` are the only file access, kept small and at
the end of the module; :func:`load_sketch` bundles everything a map needs from a site's
``[sketch]`` table.

Pixel convention
----------------
Image pixels are addressed ``(column, row)`` with the row counted **downward** from the top edge,
as image files and image editors do.  Integer coordinates are pixel centres, so an image of
``W x H`` pixels spans ``-0.5 .. W - 0.5`` by ``-0.5 .. H - 0.5``.  Map coordinates are local
metres ``(x east, y north)``; going down the image is usually going south, so a 2-point
(similarity) fit includes the row flip and a scan can never come out mirrored.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from locate.errors import SiteFileError

__all__ = [
    "Georef",
    "SiteSketch",
    "shape_outlines",
    "geojson_features",
    "label_point",
    "read_image",
    "read_geojson",
    "load_sketch",
]

_REFS = "sketch.refs"
# Control points are "on one line" when the spread across the best-fit line is below this
# fraction of the spread along it (smaller singular value / larger, common practice): an affine
# fitted to them would stretch the across direction from almost nothing.
_COLLINEAR_RATIO = 1e-2


def _as_points(a, name, file, field_name):
    try:
        arr = np.asarray(a, dtype=float)
    except (TypeError, ValueError):
        raise SiteFileError(f"{name} must be a list of [x, y] pairs, got {a!r}",
                            file=file, field=field_name) from None
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise SiteFileError(f"{name} must be a list of [x, y] pairs, got shape {arr.shape}",
                            file=file, field=field_name)
    if not np.all(np.isfinite(arr)):
        raise SiteFileError(f"{name} holds a value that is not a finite number",
                            file=file, field=field_name)
    return arr


@dataclass(frozen=True)
class Georef:
    """An affine map from image pixels ``(column, row)`` to local metres ``(x, y)``.

    ``xy_m = matrix @ pixel + offset_m``.  Build it with :meth:`from_control_points`.

    Attributes
    ----------
    matrix : ndarray, shape (2, 2)
        Metres per pixel, including rotation, the row flip and (for affine fits) shear.
    offset_m : ndarray, shape (2,)
        Map position of pixel (0, 0).
    kind : str
        ``"similarity"`` (2 control points, exact) or ``"affine"`` (3 or more, least squares).
    n_points : int
        Number of control points used.
    residual_rms_px, residual_rms_m : float
        Root-mean-square misfit of the control points, in image pixels and in metres
        (0 for an exact fit).
    warnings : tuple of str
        Advice about the fit (large residual).
    """

    matrix: np.ndarray
    offset_m: np.ndarray
    kind: str = "affine"
    n_points: int = 0
    residual_rms_px: float = 0.0
    residual_rms_m: float = 0.0
    warnings: tuple = ()

    @classmethod
    def from_control_points(cls, pixels, at_m, *, image_size_px=None, file=None,
                            field=_REFS, warn_px=2.0, warn_fraction=0.01):
        """Fit the pixel -> map transform to control points.

        Parameters
        ----------
        pixels : array_like, shape (K, 2)
            Control points in the image, ``(column, row)``, row downward.
        at_m : array_like, shape (K, 2)
            The same points on the map, local metres ``(x east, y north)``.
        image_size_px : (int, int), optional
            ``(width, height)`` of the image, for the diagonal-based residual warning.
        file : path, optional
            Site file named in error messages.
        field : str
            Field named in error messages (default ``"sketch.refs"``).
        warn_px, warn_fraction : float
            A warning is added when the RMS residual exceeds ``warn_px`` pixels or
            ``warn_fraction`` of the image diagonal.

        Returns
        -------
        Georef

        Raises
        ------
        locate.errors.SiteFileError
            Fewer than 2 points, coincident points, or (K >= 3) points on one line.

        Notes
        -----
        K = 2: similarity (uniform scale, rotation, translation, row flip), solved exactly in
        complex numbers, z = a q + b with q = column - i row (textbook conformal map).
        K >= 3: general affine by linear least squares (``numpy.linalg.lstsq``).
        """
        px = _as_points(pixels, "control-point pixels", file, field)
        at = _as_points(at_m, "control-point map positions", file, field)
        if len(px) != len(at):
            raise SiteFileError(f"{len(px)} pixel positions but {len(at)} map positions",
                                file=file, field=field)
        k = len(px)
        if k < 2:
            raise SiteFileError(
                f"at least 2 control points are needed to place the image, got {k}: add "
                "{ pixel = [col, row], at = [x, y] } entries", file=file, field=field)
        for arr, what, unit in ((px, "pixel", "px"), (at, "map", "m")):
            gap = np.linalg.norm(arr[:, None, :] - arr[None, :, :], axis=-1)
            gap[np.diag_indices(k)] = np.inf
            i, j = np.unravel_index(np.argmin(gap), gap.shape)
            scale = max(float(np.ptp(arr, axis=0).max()), 1.0)
            if gap[i, j] <= 1e-9 * scale:
                raise SiteFileError(
                    f"control points {i + 1} and {j + 1} are at the same {what} position "
                    f"{arr[i].tolist()!r} {unit}", file=file, field=field)
        if k == 2:
            q = px[:, 0] - 1j * px[:, 1]
            z = at[:, 0] + 1j * at[:, 1]
            a = (z[1] - z[0]) / (q[1] - q[0])
            b = z[0] - a * q[0]
            # z = a q: x + iy = (ar + i ai)(c - i r) -> x = ar c + ai r, y = ai c - ar r
            matrix = np.array([[a.real, a.imag], [a.imag, -a.real]])
            return cls(matrix=matrix, offset_m=np.array([b.real, b.imag]), kind="similarity",
                       n_points=2)
        for arr, what in ((px, "in the image"), (at, "on the map")):
            sv = np.linalg.svd(arr - arr.mean(axis=0), compute_uv=False)
            if sv[1] < _COLLINEAR_RATIO * sv[0]:
                raise SiteFileError(
                    f"the {k} control points lie (nearly) on one line {what}, so the image "
                    "cannot be placed by an affine fit: spread them over the image, or give "
                    "exactly 2 points for a similarity fit", file=file, field=field)
        design = np.column_stack([px, np.ones(k)])
        coef, *_ = np.linalg.lstsq(design, at, rcond=None)
        matrix, offset = coef[:2].T, coef[2]
        resid_m = at - (px @ matrix.T + offset)
        resid_px = resid_m @ np.linalg.inv(matrix).T
        rms_m = float(np.sqrt(np.mean(np.sum(resid_m**2, axis=1))))
        rms_px = float(np.sqrt(np.mean(np.sum(resid_px**2, axis=1))))
        warnings = []
        limit_px = warn_px
        if image_size_px is not None:
            limit_px = min(warn_px, warn_fraction * float(np.hypot(*image_size_px)))
        if rms_px > limit_px:
            worst = int(np.argmax(np.sum(resid_px**2, axis=1)))
            warnings.append(
                f"{field}: the control points disagree with an affine placement by "
                f"{rms_px:.1f} px RMS ({rms_m:.2f} m); point {worst + 1} is the worst - "
                "check its pixel and map positions")
        return cls(matrix=matrix, offset_m=np.asarray(offset), kind="affine", n_points=k,
                   residual_rms_px=rms_px, residual_rms_m=rms_m, warnings=tuple(warnings))

    def to_map(self, pixels):
        """Pixel ``(column, row)`` positions, shape (..., 2) -> map metres, shape (..., 2)."""
        return np.asarray(pixels, dtype=float) @ self.matrix.T + self.offset_m

    def to_pixels(self, xy_m):
        """Map metres, shape (..., 2) -> pixel ``(column, row)`` positions, shape (..., 2)."""
        inv = np.linalg.inv(self.matrix)
        return (np.asarray(xy_m, dtype=float) - self.offset_m) @ inv.T

    @property
    def metres_per_pixel(self) -> float:
        """Mean ground size of one pixel, m (square root of the area scale)."""
        return float(np.sqrt(abs(np.linalg.det(self.matrix))))

    @property
    def axis_aligned(self) -> bool:
        """True when the image needs no rotation or shear (north up, square pixels or not)."""
        m = self.matrix
        return bool(abs(m[0, 1]) <= 1e-9 * abs(m[0, 0]) and abs(m[1, 0]) <= 1e-9 * abs(m[1, 1]))

    def corners_m(self, width_px, height_px):
        """Map positions of the image's outer corners, shape (4, 2): TL, TR, BR, BL."""
        w, h = float(width_px) - 0.5, float(height_px) - 0.5
        return self.to_map(np.array([[-0.5, -0.5], [w, -0.5], [w, h], [-0.5, h]]))

    def extent_m(self, width_px, height_px):
        """``(left, right, bottom, top)`` of the image on the map, metres.

        This is the ``extent`` for ``imshow(image, origin="upper")`` when :attr:`axis_aligned`;
        for a rotated or sheared image it is the bounding box of the corners (use
        :meth:`pixel_to_map_affine` as the image transform instead).
        """
        c = self.corners_m(width_px, height_px)
        if self.axis_aligned:
            # image left/right/top/bottom edges, keeping a flipped image's orientation
            return (float(c[0, 0]), float(c[1, 0]), float(c[3, 1]), float(c[0, 1]))
        return (float(c[:, 0].min()), float(c[:, 0].max()),
                float(c[:, 1].min()), float(c[:, 1].max()))

    def pixel_to_map_affine(self):
        """The transform as a 3 x 3 homogeneous matrix (for ``matplotlib.transforms.Affine2D``)."""
        out = np.eye(3)
        out[:2, :2] = self.matrix
        out[:2, 2] = self.offset_m
        return out


def label_point(outline_m):
    """A point to write an outline's label at: the area centroid, shape (2,).

    Parameters
    ----------
    outline_m : array_like, shape (K, 2)
        Polygon vertices (closing vertex optional) or a polyline.

    Notes
    -----
    Shoelace-formula centroid (textbook); falls back to the vertex mean for a degenerate
    (zero-area) outline such as a line.
    """
    p = np.asarray(outline_m, dtype=float)
    x, y = p[:, 0], p[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    area = cross.sum() / 2.0
    if abs(area) <= 1e-12 * max(float(np.ptp(p, axis=0).max()) ** 2, 1e-300):
        return p.mean(axis=0)
    return np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * area)


def shape_outlines(shapes, *, file=None, field="sketch.shapes"):
    """Validate site-file outlines.

    Parameters
    ----------
    shapes : iterable of dict
        Each ``{"label": str, "outline": [[x, y], ...]}`` in local metres.

    Returns
    -------
    list of dict
        ``{"label": str, "outline_m": ndarray (K, 2), "closed": bool}``; an outline of 3 or
        more vertices is a closed polygon, one of 2 a line.
    """
    out = []
    for n, shape in enumerate(shapes or ()):
        where = f"{field}[{n}]"
        if not isinstance(shape, dict) or "outline" not in shape:
            raise SiteFileError("a shape needs an 'outline' list of [x, y] points",
                                file=file, field=where)
        pts = _as_points(shape["outline"], "outline", file, f"{where}.outline")
        if len(pts) < 2:
            raise SiteFileError(f"an outline needs at least 2 points, got {len(pts)}",
                                file=file, field=f"{where}.outline")
        out.append({"label": str(shape.get("label", "") or ""), "outline_m": pts,
                    "closed": len(pts) >= 3})
    return out


def geojson_features(obj, *, to_local=None, file=None):
    """Turn a parsed GeoJSON object into outlines on the local map.

    Parameters
    ----------
    obj : dict
        A GeoJSON ``FeatureCollection``, ``Feature`` or bare geometry.
    to_local : callable, optional
        ``to_local(lon_deg, lat_deg) -> (x_m, y_m)`` on arrays, for a ``wgs84`` site (RFC 7946
        order: longitude first).  ``None``: the coordinates are already local metres
        ``(x east, y north)``.
    file : path, optional
        The GeoJSON file, for error messages.

    Returns
    -------
    list of dict
        ``{"label": str, "kind": "point"|"line"|"polygon", "outline_m": ndarray (K, 2)}``,
        one per ring/line/point (multi-part geometries are split; polygon holes are kept as
        their own rings).  The label is the feature's ``name`` or ``label`` property.
    """
    if not isinstance(obj, dict) or "type" not in obj:
        raise SiteFileError("not a GeoJSON object (no 'type')", file=file, field="sketch.geojson")
    if obj["type"] == "FeatureCollection":
        feats = obj.get("features") or []
    elif obj["type"] == "Feature":
        feats = [obj]
    else:
        feats = [{"type": "Feature", "geometry": obj, "properties": {}}]
    out = []

    def add(kind, coords, label, where):
        pts = np.asarray(coords, dtype=float).reshape(-1, np.shape(coords)[-1])[:, :2]
        if not np.all(np.isfinite(pts)) or len(pts) == 0:
            raise SiteFileError("a coordinate is not a finite number", file=file, field=where)
        if to_local is not None:
            x, y = to_local(pts[:, 0], pts[:, 1])
            pts = np.column_stack([x, y]).astype(float)
        out.append({"label": label, "kind": kind, "outline_m": pts})

    for n, feat in enumerate(feats):
        where = f"features[{n}]"
        geom = (feat or {}).get("geometry") or {}
        props = (feat or {}).get("properties") or {}
        label = str(props.get("name", props.get("label", "")) or "")
        gtype, coords = geom.get("type"), geom.get("coordinates")
        try:
            if gtype == "Point":
                add("point", [coords], label, where)
            elif gtype == "MultiPoint":
                for c in coords:
                    add("point", [c], label, where)
            elif gtype == "LineString":
                add("line", coords, label, where)
            elif gtype == "MultiLineString":
                for c in coords:
                    add("line", c, label, where)
            elif gtype == "Polygon":
                for ring in coords:
                    add("polygon", ring, label, where)
            elif gtype == "MultiPolygon":
                for poly in coords:
                    for ring in poly:
                        add("polygon", ring, label, where)
            # other geometry types (GeometryCollection, null) carry nothing to draw
        except (TypeError, ValueError, IndexError) as exc:
            if isinstance(exc, SiteFileError):
                raise
            raise SiteFileError(f"malformed {gtype} coordinates", file=file,
                                field=where) from None
    return out


@dataclass
class SiteSketch:
    """Everything drawn under the map: image (optional), its georef, outlines, features.

    Attributes
    ----------
    image : ndarray, shape (H, W) or (H, W, 3|4), or None
    georef : Georef or None
    outlines : list of dict
        From :func:`shape_outlines`.
    features : list of dict
        From :func:`geojson_features`.
    warnings : list of str
    """

    image: np.ndarray | None = None
    georef: Georef | None = None
    outlines: list = field(default_factory=list)
    features: list = field(default_factory=list)
    warnings: list = field(default_factory=list)


# --------------------------------------------------------------------------------------------
# File access (the edge): image and GeoJSON readers, and the bundle for a site's [sketch].

def read_image(path, *, file=None, field="sketch.image"):
    """Read a PNG or JPEG site image with ``matplotlib.image.imread``.

    Returns
    -------
    ndarray, shape (H, W) or (H, W, 3|4)

    Raises
    ------
    locate.errors.SiteFileError
        The image is missing or cannot be decoded (``file`` is the site file that names it).
    """
    import matplotlib.image as mpimg

    p = Path(path)
    if not p.is_file():
        what = "is not a regular file (a pipe or device)" if p.exists() else "does not exist"
        raise SiteFileError(f"site image {str(p)!r} {what}", file=file, field=field)
    try:
        img = mpimg.imread(p)
    except Exception as exc:  # decoders raise many kinds (OSError, ValueError, SyntaxError)
        raise SiteFileError(f"cannot read site image {str(p)!r} as PNG/JPEG: {exc}",
                            file=file, field=field) from None
    if img.ndim not in (2, 3) or min(img.shape[:2]) < 1:
        raise SiteFileError(f"site image {str(p)!r} has no pixels (shape {img.shape})",
                            file=file, field=field)
    return img


def read_geojson(path, *, to_local=None, file=None, field="sketch.geojson"):
    """Read a GeoJSON file of site features; see :func:`geojson_features`."""
    p = Path(path)
    if p.exists() and not p.is_file():  # a FIFO would wait for a writer forever
        raise SiteFileError(f"GeoJSON file {str(p)!r} is not a regular file (a pipe or device)",
                            file=file, field=field)
    try:
        obj = json.loads(p.read_text(encoding="utf-8"))
    except RecursionError:
        raise SiteFileError(f"GeoJSON file {str(p)!r} is nested too deeply to read", file=file,
                            field=field) from None
    except FileNotFoundError:
        raise SiteFileError(f"GeoJSON file {str(p)!r} does not exist", file=file,
                            field=field) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SiteFileError(f"cannot read GeoJSON file {str(p)!r}: {exc}", file=file,
                            field=field) from None
    return geojson_features(obj, to_local=to_local, file=p)


def load_sketch(sketch, *, file=None, to_local=None):
    """Bundle a site's ``[sketch]`` table (a :class:`locate.io.site.Sketch`) for drawing.

    Parameters
    ----------
    sketch : locate.io.site.Sketch or None
        Read by attribute: ``image`` (Path or None), ``refs`` (tuple of (pixel, at)),
        ``shapes`` (tuple of dict(label, outline)), ``geojson`` (Path or None).
    file : path, optional
        The site file, named in errors.
    to_local : callable, optional
        ``(lon, lat) -> (x, y)`` for GeoJSON on a ``wgs84`` site (see :func:`geojson_features`).

    Returns
    -------
    SiteSketch
    """
    out = SiteSketch()
    if sketch is None:
        return out
    image_path = getattr(sketch, "image", None)
    refs = tuple(getattr(sketch, "refs", ()) or ())
    if image_path is not None:
        out.image = read_image(image_path, file=file)
        h, w = out.image.shape[:2]
        if not refs:
            raise SiteFileError("an image needs control points to be placed on the map",
                                file=file, field=_REFS)
        pix = [r["pixel"] if isinstance(r, dict) else r[0] for r in refs]
        at = [r["at"] if isinstance(r, dict) else r[1] for r in refs]
        out.georef = Georef.from_control_points(pix, at, image_size_px=(w, h), file=file)
        out.warnings.extend(out.georef.warnings)
    out.outlines = shape_outlines(getattr(sketch, "shapes", ()) or (), file=file)
    gj = getattr(sketch, "geojson", None)
    if gj is not None:
        out.features = read_geojson(gj, to_local=to_local, file=file)
    return out
