"""Spots: detection on a projection, spot files, weight cutouts, background annuli, drift.

Coordinates
-----------
Pixel ``(row i, column j)`` has its centre at ``x = j``, ``y = i`` and covers
``[j - 0.5, j + 0.5] x [i - 0.5, i + 0.5]`` (origin at the top-left pixel, after the
recording's rotation is applied). Spot coordinates refer to the *reference* frame of the
recording (the first frame); when drift registration is on, the masks follow the
measured shift of each later frame.

Masks
-----
Each spot is stored once as a small weight cutout plus the position of its top-left
pixel (:class:`Cutout`), the way aperture photometry stores aperture masks: the weight
of a pixel is the fraction of its area inside the shape (estimated on a sub-pixel grid).
Background annuli are 0/1 cutouts with the other spots masked out.

References
----------
Stetson, P. B. (1987), DAOPHOT: a computer program for crowded-field stellar photometry,
PASP 99, 191 (aperture photometry with a sky annulus and a robust sky estimate).
Lindeberg, T. (1998), Feature detection with automatic scale selection, IJCV 30, 79
(scale-normalised Laplacian of Gaussian).
Kuglin, C. D. and Hines, D. C. (1975), The phase correlation image alignment method,
Proc. IEEE Int. Conf. Cybernetics and Society, 163.
"""

from __future__ import annotations

import copy
import ctypes
import json
import math
import warnings
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any, Literal

import cv2
import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import fft as sp_fft
from scipy import ndimage

from . import _jit
from ._io import write_json_atomic
from .errors import InputFormatError, NoSpotsWarning, SpotError

__all__ = [
    "SPOTS_FORMAT",
    "SPOTS_VERSION",
    "Spot",
    "BackgroundRegion",
    "SpotSet",
    "Cutout",
    "make_spot",
    "load_spots",
    "save_spots",
    "spots_to_dict",
    "spots_from_dict",
    "spot_cutout",
    "region_cutout",
    "annulus_cutout",
    "order_row_major",
    "background_surface",
    "log_blobs",
    "detect_spots",
    "ProjectionAccumulator",
    "isolated_pixels",
    "drift_plane",
    "downscale_for_drift",
    "estimate_shift",
    "DriftTracker",
]

SPOTS_FORMAT = "ecl-quant-spots"
SPOTS_VERSION = 1

ShapeName = Literal["circle", "rect", "polygon"]
_SHAPES = ("circle", "rect", "polygon")
_MAD_TO_SD = 1.482602218505602  # 1 / Phi^-1(3/4): MAD -> SD for a normal distribution


# ---------------------------------------------------------------- geometry


def _shape_geometry(shape: str, params: tuple[float, ...]) -> tuple[float, float, float, float]:
    """(x_px, y_px, area_px, extent_px) of a shape: centroid, area, max centroid distance."""
    if shape == "circle":
        x, y, r = params
        return float(x), float(y), math.pi * r * r, float(r)
    if shape == "rect":
        x0, y0, x1, y1 = params
        cx, cy = (x0 + x1) / 2.0, (y0 + y1) / 2.0
        return cx, cy, (x1 - x0) * (y1 - y0), math.hypot(x1 - x0, y1 - y0) / 2.0
    pts = np.asarray(params, dtype=np.float64).reshape(-1, 2)
    x, y = pts[:, 0], pts[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    cross = x * yn - xn * y
    a2 = float(cross.sum())  # twice the signed area (shoelace)
    if abs(a2) < 1e-12:
        return float(x.mean()), float(y.mean()), 0.0, 0.0
    cx = float(((x + xn) * cross).sum() / (3.0 * a2))
    cy = float(((y + yn) * cross).sum() / (3.0 * a2))
    extent = float(np.hypot(x - cx, y - cy).max())
    return cx, cy, abs(a2) / 2.0, extent


def _shape_bounds(shape: str, params: tuple[float, ...]) -> tuple[float, float, float, float]:
    """(x_min, y_min, x_max, y_max) of a shape in continuous pixel coordinates."""
    if shape == "circle":
        x, y, r = params
        return x - r, y - r, x + r, y + r
    if shape == "rect":
        return params[0], params[1], params[2], params[3]
    pts = np.asarray(params, dtype=np.float64).reshape(-1, 2)
    return (float(pts[:, 0].min()), float(pts[:, 1].min()),
            float(pts[:, 0].max()), float(pts[:, 1].max()))


def _check_params(shape: str, params: tuple[float, ...], what: str) -> None:
    if shape not in _SHAPES:
        raise SpotError(f"{what}: shape {shape!r} is not one of circle, rect, polygon")
    if not all(math.isfinite(p) for p in params):
        raise SpotError(f"{what}: coordinates must be finite numbers, got {params}")
    if shape == "circle":
        if len(params) != 3 or params[2] <= 0:
            raise SpotError(f"{what}: a circle needs x, y and a radius > 0")
    elif shape == "rect":
        if len(params) != 4 or params[2] <= params[0] or params[3] <= params[1]:
            raise SpotError(f"{what}: a rect needs x0 < x1 and y0 < y1")
    else:
        if len(params) < 6 or len(params) % 2:
            raise SpotError(f"{what}: a polygon needs at least 3 points")
        if _shape_geometry(shape, params)[2] <= 0:
            raise SpotError(f"{what}: the polygon encloses no area")


# ---------------------------------------------------------------- spot types


@dataclass(frozen=True)
class Spot:
    """One region of interest (an electrode spot).

    Attributes
    ----------
    number : int
        1-based number, row-major over the card for detected spots.
    shape : {"circle", "rect", "polygon"}
    params : tuple of float
        circle ``(x, y, radius)``; rect ``(x0, y0, x1, y1)`` (edges); polygon
        ``(x0, y0, x1, y1, ...)`` (vertices), all in pixels.
    x_px, y_px : float
        Centroid of the shape in pixels.
    radius_px : float
        Circle radius, or the radius of the circle of equal area for other shapes.
    area_px : float
        Geometric area of the shape in pixels.
    label : str
        Optional free text (for example a well name).
    """

    number: int
    shape: ShapeName
    params: tuple[float, ...]
    x_px: float
    y_px: float
    radius_px: float
    area_px: float
    label: str = ""

    def __post_init__(self) -> None:
        if int(self.number) != self.number or self.number < 1:
            raise SpotError(f"spot numbers must be integers >= 1, got {self.number!r}")
        _check_params(self.shape, self.params, f"spot {self.number}")

    @property
    def extent_px(self) -> float:
        """Largest distance from the centroid to the outline, in pixels."""
        return _shape_geometry(self.shape, self.params)[3]

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(x_min, y_min, x_max, y_max) in pixels."""
        return _shape_bounds(self.shape, self.params)


def make_spot(number: int, shape: ShapeName, params: Sequence[float], *, label: str = "") -> Spot:
    """Build a :class:`Spot`, computing its centroid, radius and area from ``params``.

    Parameters
    ----------
    number : int
        1-based spot number.
    shape : {"circle", "rect", "polygon"}
    params : sequence of float
        See :class:`Spot`.
    label : str, optional

    Raises
    ------
    SpotError
        If the shape is unknown or degenerate.
    """
    p = tuple(float(v) for v in params)
    _check_params(shape, p, f"spot {number}")
    x, y, area, _ = _shape_geometry(shape, p)
    radius = p[2] if shape == "circle" else math.sqrt(area / math.pi)
    return Spot(int(number), shape, p, x, y, float(radius), float(area), label)


@dataclass(frozen=True)
class BackgroundRegion:
    """A user-given background region.

    Attributes
    ----------
    shape : {"circle", "rect", "polygon"}
    params : tuple of float
        As for :class:`Spot`.
    spots : tuple of int
        Numbers of the spots that use this region; empty means every spot that has no
        region of its own.
    """

    shape: ShapeName
    params: tuple[float, ...]
    spots: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        _check_params(self.shape, self.params, "background region")


@dataclass(frozen=True, eq=False)
class SpotSet:
    """A validated, frozen set of spots (and optional background regions).

    Attributes
    ----------
    spots : tuple of Spot
        In numbering order.
    frame_shape : (int, int) or None
        (H, W) of the frames the spots were defined on, when known.
    backgrounds : tuple of BackgroundRegion
    provenance : dict
        How the spots were obtained (detection method and parameters, or the file).
    """

    spots: tuple[Spot, ...]
    frame_shape: tuple[int, int] | None = None
    backgrounds: tuple[BackgroundRegion, ...] = ()
    provenance: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        numbers = [s.number for s in self.spots]
        if len(set(numbers)) != len(numbers):
            dup = sorted({n for n in numbers if numbers.count(n) > 1})
            raise SpotError(f"spot numbers must be unique; repeated: {dup}")
        known = set(numbers)
        for bg in self.backgrounds:
            missing = [n for n in bg.spots if n not in known]
            if missing:
                raise SpotError(f"background region refers to unknown spot(s) {missing}")

    def __len__(self) -> int:
        return len(self.spots)

    def __iter__(self) -> Iterator[Spot]:
        return iter(self.spots)

    def __getitem__(self, i: int) -> Spot:
        return self.spots[i]

    @property
    def numbers(self) -> list[int]:
        """Spot numbers in order."""
        return [s.number for s in self.spots]

    def check_fits(self, shape: tuple[int, int], *, path: str | Path | None = None) -> None:
        """Raise :class:`SpotError` unless every spot and region lies inside the frame.

        Parameters
        ----------
        shape : (int, int)
            (H, W) of the recording.
        path : str or Path, optional
            Spot file to name in the error.
        """
        h, w = shape
        items: list[tuple[str, str, tuple[float, ...]]] = [
            (f"spot {s.number}", s.shape, s.params) for s in self.spots]
        items += [(f"background region {i + 1}", b.shape, b.params)
                  for i, b in enumerate(self.backgrounds)]
        for what, shp, params in items:
            x0, y0, x1, y1 = _shape_bounds(shp, params)
            if x0 < -0.5 or y0 < -0.5 or x1 > w - 0.5 or y1 > h - 0.5:
                raise SpotError(
                    f"{what} ({shp} spanning x {x0:g}..{x1:g}, y {y0:g}..{y1:g} px) is not "
                    f"inside the {w}x{h} frame; spot coordinates are pixels of the recording "
                    "after rotation: move or shrink it", path=path)

    def to_frame(self) -> pd.DataFrame:
        """One row per spot: number, shape, x_px, y_px, radius_px, area_px, label."""
        return pd.DataFrame(
            {"spot": [s.number for s in self.spots],
             "shape": [s.shape for s in self.spots],
             "x_px": [s.x_px for s in self.spots],
             "y_px": [s.y_px for s in self.spots],
             "radius_px": [s.radius_px for s in self.spots],
             "area_px": [s.area_px for s in self.spots],
             "label": [s.label for s in self.spots]},
            columns=["spot", "shape", "x_px", "y_px", "radius_px", "area_px", "label"])


# ---------------------------------------------------------------- spot files


@lru_cache(maxsize=1)
def _schema() -> dict[str, Any]:
    text = resources.files("ecl_quant").joinpath("schemas/spots.schema.json").read_text("utf-8")
    return json.loads(text)  # type: ignore[no-any-return]


def _shape_to_json(shape: str, params: tuple[float, ...]) -> dict[str, Any]:
    if shape == "circle":
        return {"shape": "circle", "x": params[0], "y": params[1], "radius": params[2]}
    if shape == "rect":
        return {"shape": "rect", "x0": params[0], "y0": params[1], "x1": params[2], "y1": params[3]}
    pts = [[params[i], params[i + 1]] for i in range(0, len(params), 2)]
    return {"shape": "polygon", "points": pts}


def _shape_from_json(obj: Mapping[str, Any]) -> tuple[ShapeName, tuple[float, ...]]:
    shape = obj["shape"]
    if shape == "circle":
        return "circle", (float(obj["x"]), float(obj["y"]), float(obj["radius"]))
    if shape == "rect":
        return "rect", tuple(float(obj[k]) for k in ("x0", "y0", "x1", "y1"))
    return "polygon", tuple(float(v) for pt in obj["points"] for v in pt)


def spots_to_dict(spot_set: SpotSet) -> dict[str, Any]:
    """The JSON document (a dict) for ``spot_set``; see ``schemas/spots.schema.json``."""
    doc: dict[str, Any] = {"format": SPOTS_FORMAT, "version": SPOTS_VERSION}
    if spot_set.frame_shape is not None:
        doc["frame_width_px"] = int(spot_set.frame_shape[1])
        doc["frame_height_px"] = int(spot_set.frame_shape[0])
    doc["coordinates"] = ("pixels; x = column, y = row, pixel centres at integers, origin at "
                          "the top-left pixel of the first frame")
    doc["spots"] = []
    for s in spot_set.spots:
        item: dict[str, Any] = {"number": s.number, **_shape_to_json(s.shape, s.params)}
        if s.label:
            item["label"] = s.label
        doc["spots"].append(item)
    if spot_set.backgrounds:
        doc["background"] = []
        for b in spot_set.backgrounds:
            item = _shape_to_json(b.shape, b.params)
            if b.spots:
                item["spots"] = list(b.spots)
            doc["background"].append(item)
    if spot_set.provenance:
        doc["provenance"] = dict(spot_set.provenance)
    return doc


def spots_from_dict(doc: Any, *, path: str | Path | None = None) -> SpotSet:
    """Validate a spot document against the schema and build a :class:`SpotSet`.

    Raises
    ------
    SpotError
        With a one-line message naming the offending entry.
    """
    import jsonschema

    validator = jsonschema.Draft202012Validator(_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: (len(e.absolute_path), str(e.path)))
    if errors:
        err = jsonschema.exceptions.best_match(errors)
        where = "/".join(str(p) for p in err.absolute_path) or "top level"
        raise SpotError(f"malformed spot file at {where}: {err.message}; see "
                        f"schemas/spots.schema.json or a spots.json written by measure",
                        path=path)
    if doc.get("version", SPOTS_VERSION) > SPOTS_VERSION:
        raise SpotError(f"spot file version {doc['version']} is newer than this ecl-quant "
                        f"understands ({SPOTS_VERSION}); upgrade ecl-quant", path=path)
    try:
        spots = []
        for i, item in enumerate(doc["spots"]):
            shape, params = _shape_from_json(item)
            spots.append(make_spot(item.get("number", i + 1), shape, params,
                                   label=str(item.get("label", ""))))
        backgrounds = []
        for item in doc.get("background", []):
            shape, params = _shape_from_json(item)
            backgrounds.append(BackgroundRegion(shape, params, tuple(int(n) for n in item.get("spots", []))))
        frame_shape = None
        if "frame_width_px" in doc and "frame_height_px" in doc:
            frame_shape = (int(doc["frame_height_px"]), int(doc["frame_width_px"]))
        return SpotSet(tuple(spots), frame_shape, tuple(backgrounds),
                       dict(doc.get("provenance", {})))
    except SpotError as err:
        raise SpotError(err.reason, path=path) from err


def load_spots(path: str | Path) -> SpotSet:
    """Read a spot file (JSON; circles, rects and polygons).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    SpotSet

    Raises
    ------
    InputFormatError
        If the file is missing or is not JSON.
    SpotError
        If it does not follow the spot schema.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as err:
        raise InputFormatError("spot file not found; check the --spots path", path=path) from err
    except (OSError, UnicodeDecodeError) as err:
        raise InputFormatError(f"cannot read the spot file ({err})", path=path) from err
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as err:
        raise SpotError(f"spot file is not valid JSON (line {err.lineno}, column {err.colno}: "
                        f"{err.msg}); fix it, or leave out the spot file to detect the spots "
                        "(measure writes them to spots.json)", path=path) from err
    spot_set = spots_from_dict(doc, path=path)
    return SpotSet(spot_set.spots, spot_set.frame_shape, spot_set.backgrounds,
                   {**spot_set.provenance, "file": str(path)})


def save_spots(spot_set: SpotSet, path: str | Path) -> None:
    """Write ``spot_set`` as a spot file (atomically), readable by :func:`load_spots`."""
    write_json_atomic(path, spots_to_dict(spot_set))


# ---------------------------------------------------------------- cutouts


@dataclass(frozen=True, eq=False)
class Cutout:
    """A small weight image placed in the frame.

    Attributes
    ----------
    y0, x0 : int
        Frame pixel index of the cutout's top-left pixel (may be negative before clipping).
    weights : (h, w) ndarray of float32
        Fraction of each pixel inside the region (0..1).
    """

    y0: int
    x0: int
    weights: NDArray[np.float32]

    @property
    def slices(self) -> tuple[slice, slice]:
        """(row slice, column slice) of the cutout in frame pixels."""
        h, w = self.weights.shape
        return slice(self.y0, self.y0 + h), slice(self.x0, self.x0 + w)

    @property
    def area_px(self) -> float:
        """Sum of the weights (effective area in pixels)."""
        return float(self.weights.sum(dtype=np.float64))

    def clipped(self, shape: tuple[int, int]) -> Cutout:
        """The part of the cutout inside a frame of ``shape`` (H, W)."""
        h, w = self.weights.shape
        ya, xa = max(self.y0, 0), max(self.x0, 0)
        yb, xb = min(self.y0 + h, shape[0]), min(self.x0 + w, shape[1])
        if yb <= ya or xb <= xa:
            return Cutout(ya, xa, np.zeros((0, 0), np.float32))
        return Cutout(ya, xa, self.weights[ya - self.y0:yb - self.y0, xa - self.x0:xb - self.x0])


def _coverage(shape: str, params: tuple[float, ...], subsample: int) -> Cutout:
    bx0, by0, bx1, by1 = _shape_bounds(shape, params)
    j0, i0 = math.floor(bx0 + 0.5), math.floor(by0 + 0.5)
    j1, i1 = math.floor(bx1 + 0.5) + 1, math.floor(by1 + 0.5) + 1
    cols = np.arange(j0, j1, dtype=np.float64)
    rows = np.arange(i0, i1, dtype=np.float64)
    if shape == "rect":
        x0, y0, x1, y1 = params
        wx = np.clip(np.minimum(cols + 0.5, x1) - np.maximum(cols - 0.5, x0), 0.0, 1.0)
        wy = np.clip(np.minimum(rows + 0.5, y1) - np.maximum(rows - 0.5, y0), 0.0, 1.0)
        return Cutout(i0, j0, np.outer(wy, wx).astype(np.float32))
    n = subsample
    off = (np.arange(n) + 0.5) / n - 0.5
    xs = (cols[:, None] + off[None, :]).ravel()  # (W*n,)
    ys = (rows[:, None] + off[None, :]).ravel()  # (H*n,)
    if shape == "circle":
        x, y, r = params
        inside = ((ys[:, None] - y) ** 2 + (xs[None, :] - x) ** 2) <= r * r
    else:
        from matplotlib.path import Path as MplPath

        verts = np.asarray(params, dtype=np.float64).reshape(-1, 2)
        gx, gy = np.meshgrid(xs, ys)
        inside = MplPath(verts).contains_points(np.column_stack([gx.ravel(), gy.ravel()]))
        inside = inside.reshape(len(ys), len(xs))
    cov = inside.reshape(len(rows), n, len(cols), n).mean(axis=(1, 3))
    return Cutout(i0, j0, cov.astype(np.float32))


def spot_cutout(spot: Spot, *, subsample: int | None = None) -> Cutout:
    """Weight cutout of a spot: fraction of each pixel's area inside the shape.

    Rectangles are exact; circles and polygons are sampled on a ``subsample`` x
    ``subsample`` grid per pixel.

    Parameters
    ----------
    spot : Spot
    subsample : int, optional
        Sub-pixel samples per axis; default 8, finer for small shapes (``64 / radius``,
        at most 32) so that the relative area error stays about the same.

    Returns
    -------
    Cutout
        Not clipped to any frame.
    """
    if subsample is None:
        subsample = int(min(32, max(8, math.ceil(64.0 / max(spot.radius_px, 1e-3)))))
    return _coverage(spot.shape, spot.params, int(subsample))


def region_cutout(region: BackgroundRegion, *, shape: tuple[int, int]) -> Cutout:
    """0/1 cutout of a background region (pixel centres inside), clipped to ``shape``."""
    cov = _coverage(region.shape, region.params, 4).clipped(shape)
    return Cutout(cov.y0, cov.x0, (cov.weights >= 0.5).astype(np.float32))


def annulus_cutout(x_px: float, y_px: float, inner_px: float, outer_px: float, *,
                   shape: tuple[int, int],
                   exclude: Iterable[tuple[float, float, float]] = ()) -> Cutout:
    """0/1 cutout of an annulus, other spots masked out, clipped to the frame.

    A pixel belongs to the annulus when its centre lies at a distance d with
    ``inner_px <= d < outer_px`` from ``(x_px, y_px)`` and outside every circle
    ``(x, y, r)`` in ``exclude``.

    Parameters
    ----------
    x_px, y_px : float
        Centre in pixels.
    inner_px, outer_px : float
        Radii in pixels, ``0 <= inner_px < outer_px``.
    shape : (int, int)
        (H, W) of the frame.
    exclude : iterable of (x, y, r)
        Circles to mask out (the other spots).
    """
    if not (0 <= inner_px < outer_px):
        raise SpotError(f"annulus radii must satisfy 0 <= inner < outer, got {inner_px}, {outer_px}")
    j0, i0 = math.floor(x_px - outer_px), math.floor(y_px - outer_px)
    j1, i1 = math.ceil(x_px + outer_px) + 1, math.ceil(y_px + outer_px) + 1
    cols = np.arange(j0, j1, dtype=np.float64)
    rows = np.arange(i0, i1, dtype=np.float64)
    d2 = (rows[:, None] - y_px) ** 2 + (cols[None, :] - x_px) ** 2
    m = (d2 >= inner_px**2) & (d2 < outer_px**2)
    for ex, ey, er in exclude:
        m &= ((rows[:, None] - ey) ** 2 + (cols[None, :] - ex) ** 2) > er * er
    return Cutout(i0, j0, m.astype(np.float32)).clipped(shape)


# ---------------------------------------------------------------- detection


def order_row_major(x_px: Sequence[float], y_px: Sequence[float]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Order points row-major into a grid: rows by clustering y, then x within a row.

    A new row starts where the gap between consecutive sorted y centres exceeds half
    the median nearest-neighbour distance.

    Returns
    -------
    order : (n,) ndarray of int
        Indices of the points in reading order.
    row : (n,) ndarray of int
        0-based row of each point (in input order).
    """
    x = np.asarray(x_px, dtype=np.float64)
    y = np.asarray(y_px, dtype=np.float64)
    n = len(x)
    if n == 0:
        return np.zeros(0, np.intp), np.zeros(0, np.intp)
    if n == 1:
        return np.zeros(1, np.intp), np.zeros(1, np.intp)
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    np.fill_diagonal(d, np.inf)
    tol = 0.5 * float(np.median(d.min(axis=1)))
    by_y = np.argsort(y, kind="stable")
    row = np.zeros(n, np.intp)
    gaps = np.diff(y[by_y]) > tol
    row[by_y] = np.concatenate([[0], np.cumsum(gaps)])
    order = np.lexsort((x, row))
    return order.astype(np.intp), row


def background_surface(image: NDArray[np.floating], *, box_px: int | None = None,
                       clip_sigma: float = 3.0) -> NDArray[np.float32]:
    """Smooth background of an image from sigma-clipped tile medians.

    The image is cut into ``box_px`` tiles; each tile's median after clipping values
    beyond ``clip_sigma`` robust SDs is taken; tiles that differ from the 3 x 3 median of
    their neighbours by more than 3 robust SDs (of those differences, or the typical
    within-tile SD when larger) are replaced by it; the grid is
    interpolated back to full size (bilinear, extrapolated linearly at the edges).

    Parameters
    ----------
    image : (H, W) ndarray of float
    box_px : int, optional
        Tile size; default ``max(32, min(H, W) // 4)`` (several spot diameters).
    clip_sigma : float, optional

    Returns
    -------
    (H, W) ndarray of float32
    """
    img = np.asarray(image, dtype=np.float32)
    h, w = img.shape
    box = int(box_px or max(32, min(h, w) // 4))
    ny, nx = max(1, round(h / box)), max(1, round(w / box))
    ys = np.linspace(0, h, ny + 1).astype(int)
    xs = np.linspace(0, w, nx + 1).astype(int)
    grid = np.empty((ny, nx), np.float32)
    tile_sd = np.zeros((ny, nx), np.float64)
    for a in range(ny):
        for b in range(nx):
            tile = img[ys[a]:ys[a + 1], xs[b]:xs[b + 1]].ravel()
            tile = tile[np.isfinite(tile)]
            if tile.size == 0:
                grid[a, b] = np.nan
                continue
            med = np.median(tile)
            for _ in range(3):
                sd = _MAD_TO_SD * np.median(np.abs(tile - med))
                if sd <= 0:
                    break
                keep = np.abs(tile - med) <= clip_sigma * sd
                if keep.all():
                    break
                tile = tile[keep]
                med = np.median(tile)
            grid[a, b] = med
            tile_sd[a, b] = _MAD_TO_SD * float(np.median(np.abs(tile - med)))
    if np.isnan(grid).all():
        return np.zeros_like(img)
    grid = np.where(np.isnan(grid), np.nanmedian(grid), grid).astype(np.float32)
    if min(ny, nx) >= 3:
        # Tiles dominated by spots stand out from their neighbours: replace only those
        # (more than 3 robust SDs from the 3 x 3 median), so that smooth gradients
        # towards the edges are kept.
        filt = ndimage.median_filter(grid, size=3, mode="nearest")
        diff = grid - filt
        spread = max(_robust_sd(diff), float(np.median(tile_sd)))
        outlier = np.abs(diff) > 3.0 * spread
        grid = np.where(outlier, filt, grid).astype(np.float32)
    # Bilinear between tile centres, extrapolated linearly beyond the outer centres (a
    # glow rising towards a corner keeps rising there instead of levelling off).
    yc = (ys[:-1] + ys[1:] - 1) / 2.0
    xc = (xs[:-1] + xs[1:] - 1) / 2.0
    rows = _interp_extrapolate(np.arange(w, dtype=np.float64), xc, grid.astype(np.float64), axis=1)
    full = _interp_extrapolate(np.arange(h, dtype=np.float64), yc, rows, axis=0)
    return full.astype(np.float32)


def _interp_extrapolate(x: NDArray[np.float64], xp: NDArray[np.float64], fp: NDArray[np.float64],
                        axis: int) -> NDArray[np.float64]:
    """Piecewise-linear interpolation of ``fp`` (sampled at ``xp`` along ``axis``) at ``x``,
    extended linearly beyond both ends."""
    f = np.moveaxis(fp, axis, -1)
    if xp.size == 1:
        out = np.repeat(f, x.size, axis=-1)
        return np.moveaxis(out, -1, axis)
    idx = np.clip(np.searchsorted(xp, x) - 1, 0, xp.size - 2)
    x0, x1 = xp[idx], xp[idx + 1]
    t = (x - x0) / (x1 - x0)
    out = f[..., idx] * (1.0 - t) + f[..., idx + 1] * t
    return np.moveaxis(out, -1, axis)


def _robust_sd(values: NDArray[np.floating]) -> float:
    v = values[np.isfinite(values)]
    if v.size == 0:
        return 0.0
    return float(_MAD_TO_SD * np.median(np.abs(v - np.median(v))))


def log_blobs(image: NDArray[np.floating], *, min_sigma: float = 1.5, max_sigma: float = 20.0,
              num_sigma: int = 12, k_sigma: float = 6.0) -> NDArray[np.float64]:
    """Blobs as maxima of the scale-normalised Laplacian of Gaussian.

    For each scale sigma the response ``-sigma**2 * LoG_sigma(image)`` is computed; a
    blob is a local maximum over 3 x 3 pixels and the neighbouring scales whose response
    exceeds ``k_sigma`` times the response's noise SD at that scale (the image's robust
    pixel noise times ``sigma**2`` times the L2 norm of the LoG kernel, as for white
    noise). Overlapping blobs (centre distance below the larger radius) keep the
    stronger one.

    Parameters
    ----------
    image : (H, W) ndarray of float
        Background-subtracted image (bright blobs positive).
    min_sigma, max_sigma : float
        Range of Gaussian scales in pixels (log spaced).
    num_sigma : int
    k_sigma : float

    Returns
    -------
    (n, 4) ndarray of float64
        Rows ``(y_px, x_px, sigma_px, response)``, strongest first; the blob radius is
        about ``sqrt(2) * sigma``.
    """
    img = np.asarray(image, dtype=np.float32)
    sigmas = np.geomspace(min_sigma, max_sigma, num_sigma) if num_sigma > 1 else np.array([min_sigma])
    # Pixel noise of the image, robust: from the differences to the 3 x 3 median (for white
    # Gaussian noise their robust SD is 0.862 x the pixel SD, found by simulation).
    pix_sd = _robust_sd(img - cv2.medianBlur(np.ascontiguousarray(img), 3)) / 0.862 \
        if min(img.shape) >= 3 else _robust_sd(img)

    def response(s: float) -> NDArray[np.float32]:
        return (-(s * s) * ndimage.gaussian_laplace(img, s)).astype(np.float32)

    def noise_sd(s: float) -> float:
        # SD of the scale-normalised LoG of white noise: pixel SD x s^2 x ||kernel||_2.
        half = int(math.ceil(5 * s))
        delta = np.zeros((2 * half + 1, 2 * half + 1))
        delta[half, half] = 1.0
        kern = ndimage.gaussian_laplace(delta, s)
        return pix_sd * s * s * float(np.sqrt(np.sum(kern * kern)))

    found: list[tuple[float, float, float, float]] = []
    prev: NDArray[np.float32] | None = None
    cur = response(float(sigmas[0]))
    for k in range(len(sigmas)):
        nxt = response(float(sigmas[k + 1])) if k + 1 < len(sigmas) else None
        local = ndimage.maximum_filter(cur, size=3, mode="nearest")
        if prev is not None:
            local = np.maximum(local, ndimage.maximum_filter(prev, size=3, mode="nearest"))
        if nxt is not None:
            local = np.maximum(local, ndimage.maximum_filter(nxt, size=3, mode="nearest"))
        thr = k_sigma * max(noise_sd(float(sigmas[k])), float(np.finfo(np.float32).tiny))
        peaks = np.argwhere((cur >= local) & (cur > thr) & (cur > 0))
        for yy, xx in peaks:
            found.append((float(yy), float(xx), float(sigmas[k]), float(cur[yy, xx])))
        prev, cur = cur, nxt  # type: ignore[assignment]
        if cur is None:
            break
    found.sort(key=lambda t: -t[3])
    kept: list[tuple[float, float, float, float]] = []
    for b in found:
        r = math.sqrt(2) * b[2]
        if all(math.hypot(b[0] - q[0], b[1] - q[1]) >= max(r, math.sqrt(2) * q[2]) for q in kept):
            kept.append(b)
    return np.array(kept, dtype=np.float64).reshape(-1, 4)


@dataclass(frozen=True)
class _Candidate:
    x_px: float
    y_px: float
    peak: float
    half_area_px: float
    circularity: float


def _measure_candidate(resid: NDArray[np.float32], y: int, x: int, half_px: int) -> _Candidate | None:
    """Half-maximum region around a peak: weighted centroid, area, circularity."""
    from skimage.measure import perimeter

    h, w = resid.shape
    ya, yb = max(0, y - half_px), min(h, y + half_px + 1)
    xa, xb = max(0, x - half_px), min(w, x + half_px + 1)
    win = resid[ya:yb, xa:xb]
    # Refine the peak inside a small neighbourhood (LoG maxima may sit off the brightest pixel).
    ny, nx = y - ya, x - xa
    sub = win[max(0, ny - 2):ny + 3, max(0, nx - 2):nx + 3]
    dy, dx = np.unravel_index(int(np.argmax(sub)), sub.shape)
    ny, nx = max(0, ny - 2) + int(dy), max(0, nx - 2) + int(dx)
    peak = float(win[ny, nx])
    if not peak > 0:
        return None
    lab, _ = ndimage.label(win >= 0.5 * peak, structure=np.ones((3, 3)))
    comp = lab == lab[ny, nx]
    area = float(comp.sum())
    per = float(perimeter(comp))
    circ = min(1.0, 4 * math.pi * area / per**2) if per > 0 else 1.0
    wts = np.where(comp, win, 0.0).astype(np.float64)
    tot = wts.sum()
    rr, cc = np.nonzero(comp)
    cy = float((wts[rr, cc] * rr).sum() / tot) + ya
    cx = float((wts[rr, cc] * cc).sum() / tot) + xa
    return _Candidate(cx, cy, peak, area, circ)


def _find_candidates(resid: NDArray[np.float32], smooth: NDArray[np.float32], noise: float, *,
                     method: str, k_sigma: float, min_area_px: float, min_circularity: float,
                     blobs: NDArray[np.float64] | None, blur_px: float) -> list[_Candidate]:
    """Seeds (threshold components or LoG blobs), measured on ``smooth``, fragments merged.

    ``smooth`` is the residual blurred by a Gaussian of ``blur_px``; a point source
    blurred so covers ``pi (1.1774 blur_px)**2`` pixels above half maximum, which is
    taken off the measured area before the ``min_area_px`` test (a hot pixel does not
    become a spot by being blurred).
    """
    blur_area = math.pi * (math.sqrt(2.0 * math.log(2.0)) * blur_px) ** 2
    seeds: list[tuple[int, int, int]] = []  # (y, x, window half size)
    if method == "threshold":
        lab, n = ndimage.label(smooth > k_sigma * noise, structure=np.ones((3, 3)))
        if n:
            objs = ndimage.find_objects(lab)
            peaks = ndimage.maximum_position(smooth, lab, index=np.arange(1, n + 1))
            for sl, (py, px) in zip(objs, peaks):
                if sl is None:
                    continue
                size = max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start)
                seeds.append((int(py), int(px), max(4, size)))
    else:
        assert blobs is not None
        for by, bx, bs, _ in blobs:
            seeds.append((int(by), int(bx), max(4, int(math.ceil(4 * bs)))))
    measured = []
    for sy, sx, half in seeds:
        c = _measure_candidate(smooth, sy, sx, half)
        if c is not None and c.peak >= k_sigma * noise:
            measured.append(c)
    # Largest first; a candidate whose centre lies inside a larger one's half-maximum
    # radius (times 1.5) is a fragment of it (noisy dim spots break up).
    measured.sort(key=lambda c: -c.half_area_px * c.peak)
    cands: list[_Candidate] = []
    for c in measured:
        if any(math.hypot(c.x_px - o.x_px, c.y_px - o.y_px)
               < 1.5 * math.sqrt(o.half_area_px / math.pi) for o in cands):
            continue
        if c.half_area_px - blur_area < min_area_px or c.circularity < min_circularity:
            continue
        cands.append(c)
    return cands


def detect_spots(projection: NDArray[np.floating], *, method: Literal["threshold", "log"] = "threshold",
                 min_area_px: float = 9.0, min_circularity: float = 0.6, k_sigma: float = 6.0,
                 min_sigma_px: float = 1.5, max_sigma_px: float | None = None,
                 aperture_scale: float = 1.5, aperture_radius_px: float | None = None,
                 uniform_radius: bool = True, background_box_px: int | None = None) -> SpotSet:
    """Find bright round spots on a projection of the dark-corrected stack.

    Steps: subtract a smooth background (:func:`background_surface`), estimate the noise
    as the robust SD of the residual, find candidates (``"threshold"``: connected
    components above ``k_sigma`` SDs of the lightly smoothed residual; ``"log"``:
    :func:`log_blobs`), then measure each candidate's region above half its own peak:
    its area must be at least ``min_area_px`` and its circularity ``4 pi A / P**2`` at
    least ``min_circularity``. The aperture radius is ``aperture_scale`` times the
    half-maximum radius ``sqrt(A / pi)`` (the median over spots when ``uniform_radius``,
    so that spots of one card share one aperture), or ``aperture_radius_px``. Spots are
    numbered row-major (:func:`order_row_major`).

    Parameters
    ----------
    projection : (H, W) ndarray of float
        Max or sum projection in linear units (dark corrected).
    method : {"threshold", "log"}
    min_area_px : float
        Minimum area above half maximum, pixels.
    min_circularity : float
        0..1.
    k_sigma : float
        Detection threshold in robust SDs of the background-subtracted projection.
    min_sigma_px, max_sigma_px : float
        Scale range for ``"log"`` (default max: min(H, W) / 20).
    aperture_scale : float
    aperture_radius_px : float, optional
    uniform_radius : bool
    background_box_px : int, optional
        Tile size of the background surface.

    Returns
    -------
    SpotSet
        Circles; empty (with a :class:`~ecl_quant.errors.NoSpotsWarning`) when nothing is
        found. ``provenance`` holds the parameters and per-spot detection statistics.
    """
    if method not in ("threshold", "log"):
        raise SpotError(f"unknown detection method {method!r}; use 'threshold' or 'log'")
    img = np.asarray(projection, dtype=np.float32)
    if img.ndim != 2:
        raise SpotError(f"projection must be a 2-D image, got shape {img.shape}")
    h, w = img.shape
    finite = np.isfinite(img)
    if not finite.all():
        img = np.where(finite, img, np.median(img[finite]) if finite.any() else 0.0).astype(np.float32)
    bkg = background_surface(img, box_px=background_box_px)
    resid = (img - bkg).astype(np.float32)
    smooth = ndimage.gaussian_filter(resid, 1.0)
    noise = _robust_sd(smooth)
    scale = float(np.max(np.abs(img))) if img.size else 0.0
    noise = max(noise, 1e-7 * scale, float(np.finfo(np.float32).tiny))
    params: dict[str, Any] = {
        "method": method, "min_area_px": min_area_px, "min_circularity": min_circularity,
        "k_sigma": k_sigma, "aperture_scale": aperture_scale,
        "aperture_radius_px": aperture_radius_px, "uniform_radius": uniform_radius,
        "noise_sd": noise, "projection_max": scale}
    max_sigma = max_sigma_px or max(min_sigma_px * 2, min(h, w) / 20)
    if method == "log":
        params.update(min_sigma_px=min_sigma_px, max_sigma_px=max_sigma)
    blobs = (log_blobs(resid, min_sigma=min_sigma_px, max_sigma=max_sigma, k_sigma=k_sigma)
             if method == "log" else None)
    # Stage 1 on the lightly smoothed residual; stage 2 smooths at a third of the typical
    # half-maximum radius found (a matched filter for dim spots, which break up at stage 1).
    cands = _find_candidates(resid, smooth, noise, method=method, k_sigma=k_sigma,
                             min_area_px=min_area_px, min_circularity=min_circularity,
                             blobs=blobs, blur_px=1.0)
    r_typ = math.nan
    if cands:
        snr = np.array([c.peak / noise for c in cands])
        radii_1 = np.array([math.sqrt(c.half_area_px / math.pi) for c in cands])
        bright = snr >= 4 * k_sigma
        r_typ = float(np.median(radii_1[bright] if bright.any() else radii_1))
        sigma2 = r_typ / 3.0
        if sigma2 > 1.5:
            smooth2 = ndimage.gaussian_filter(resid, sigma2)
            noise2 = max(_robust_sd(smooth2), float(np.finfo(np.float32).tiny))
            cands2 = _find_candidates(resid, smooth2, noise2, method=method, k_sigma=k_sigma,
                                      min_area_px=min_area_px, min_circularity=min_circularity,
                                      blobs=blobs, blur_px=sigma2)
            if len(cands2) >= len(cands) // 2:
                cands, noise = cands2, noise2
            params["matched_smoothing_px"] = sigma2
    if not cands:
        dark = scale <= 0 or float(smooth.max()) <= k_sigma * noise
        hint = ("the projection looks dark (nothing stands out from the noise); check the "
                "exposure and lens, or give the spots in a file") if dark else \
               ("nothing passed the area/circularity filters; lower min_area_px, "
                "min_circularity or k_sigma, or give the spots in a file")
        warnings.warn(f"no spot found: {hint}", NoSpotsWarning, stacklevel=2)
        return SpotSet((), (h, w), (), {"detection": params, "n_found": 0})
    half_r = np.array([math.sqrt(c.half_area_px / math.pi) for c in cands])
    if aperture_radius_px is not None:
        radii = np.full(len(cands), float(aperture_radius_px))
    elif uniform_radius:
        # The typical half-maximum radius of the bright spots at light smoothing (the
        # matched smoothing widens what it measures).
        r0 = r_typ if math.isfinite(r_typ) else float(np.median(half_r))
        radii = np.full(len(cands), aperture_scale * r0)
    else:
        radii = aperture_scale * half_r
    # A spot whose aperture leaves the frame cannot be measured: drop it (and say so).
    inside = [i for i, c in enumerate(cands)
              if c.x_px - radii[i] >= -0.5 and c.y_px - radii[i] >= -0.5
              and c.x_px + radii[i] <= w - 0.5 and c.y_px + radii[i] <= h - 0.5]
    params["n_dropped_at_edge"] = len(cands) - len(inside)
    cands = [cands[i] for i in inside]
    half_r, radii = half_r[inside], radii[inside]
    if not cands:
        warnings.warn("no spot found: every candidate's aperture runs off the frame edge; "
                      "frame the card with a margin or give the spots in a file",
                      NoSpotsWarning, stacklevel=2)
        return SpotSet((), (h, w), (), {"detection": params, "n_found": 0})
    order, _ = order_row_major([c.x_px for c in cands], [c.y_px for c in cands])
    spots = []
    stats = []
    for num, i in enumerate(order, start=1):
        c = cands[i]
        spots.append(make_spot(num, "circle", (round(c.x_px, 3), round(c.y_px, 3),
                                               round(float(radii[i]), 3))))
        stats.append({"spot": num, "peak": c.peak, "half_max_radius_px": float(half_r[i]),
                      "circularity": c.circularity})
    return SpotSet(tuple(spots), (h, w), (), {"detection": params, "n_found": len(spots),
                                               "candidates": stats})


# ---------------------------------------------------------------- projections


class ProjectionAccumulator:
    """Running max and sum over time of registered frames (memory: two (H, W) arrays).

    ``add(values, shift)`` takes a frame in its own pixel grid and the integer
    displacement ``(sx, sy)`` of its content relative to the reference frame; the
    accumulators stay in reference coordinates. How many frames covered each pixel is
    kept as a 2-D difference array (four updates per frame), so borders that some
    shifted frames did not reach are scaled correctly. With ``keep_sum=False`` only the
    max is kept.
    """

    def __init__(self, shape: tuple[int, int], *, keep_sum: bool = True) -> None:
        self.shape = (int(shape[0]), int(shape[1]))
        self._max = np.full(self.shape, -np.inf, np.float32)
        self.keep_sum = keep_sum
        self._sum = np.zeros(self.shape if keep_sum else (0, 0), np.float32)
        self._cover = np.zeros((self.shape[0] + 1, self.shape[1] + 1), np.int64)
        self.n_frames = 0

    def add(self, values: NDArray[np.floating], shift: tuple[int, int] = (0, 0)) -> None:
        """Add one frame (not modified) with integer content shift ``(sx, sy)`` in pixels."""
        if values.shape != self.shape:
            raise SpotError(f"frame is {values.shape[1]}x{values.shape[0]} but the projection "
                            f"is {self.shape[1]}x{self.shape[0]}")
        sx, sy = int(shift[0]), int(shift[1])
        h, w = self.shape
        ya, yb = max(0, -sy), min(h, h - sy)
        xa, xb = max(0, -sx), min(w, w - sx)
        if yb <= ya or xb <= xa:
            return
        src = values[ya + sy:yb + sy, xa + sx:xb + sx]
        np.maximum(self._max[ya:yb, xa:xb], src, out=self._max[ya:yb, xa:xb])
        if self.keep_sum:
            self._sum[ya:yb, xa:xb] += src
        c = self._cover
        c[ya, xa] += 1
        c[ya, xb] -= 1
        c[yb, xa] -= 1
        c[yb, xb] += 1
        self.n_frames += 1

    @property
    def count(self) -> NDArray[np.int64]:
        """Frames that covered each pixel."""
        return np.cumsum(np.cumsum(self._cover, axis=0), axis=1)[:self.shape[0], :self.shape[1]]

    @property
    def max(self) -> NDArray[np.float32]:
        """Max projection (NaN where no frame covered the pixel)."""
        out = self._max.copy()
        out[self.count == 0] = np.nan
        return out

    @property
    def sum(self) -> NDArray[np.float32]:
        """Sum projection, scaled to the full frame count where borders were not covered."""
        if not self.keep_sum:
            raise SpotError("this projection keeps only the max (keep_sum=False)")
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = self._sum / self.count
        return (mean * self.n_frames).astype(np.float32)


def isolated_pixels(image: NDArray[np.floating], *, k_sigma: float = 8.0) -> NDArray[np.bool_]:
    """Isolated bright pixels (hot pixels): far above every one of their 8 neighbours.

    A pixel is flagged when it exceeds the largest of its 8 neighbours by ``k_sigma``
    robust SDs (1.4826 MAD of ``image - median3x3(image)``, the pixel noise). A spot
    wider than a pixel is not flagged, not even at its edge: some neighbour is as bright.

    Parameters
    ----------
    image : (H, W) ndarray of float
    k_sigma : float

    Returns
    -------
    (H, W) ndarray of bool
    """
    img = np.ascontiguousarray(image, dtype=np.float32)
    if min(img.shape) < 3:
        return np.zeros(img.shape, bool)
    sd = _robust_sd(img - cv2.medianBlur(img, 3))
    if sd <= 0:
        sd = float(np.std(img)) or float(np.finfo(np.float32).tiny)
    ring = np.ones((3, 3), np.uint8)
    ring[1, 1] = 0
    neighbours = cv2.dilate(img, ring, borderType=cv2.BORDER_REFLECT)
    return np.asarray(img - neighbours > k_sigma * sd)


# ---------------------------------------------------------------- drift


def drift_plane(frame: Any, channel: str = "luma") -> NDArray[np.generic]:
    """The single 2-D plane of a frame that drift is measured on (no copy).

    Video: the luma plane Y'. RGB stills: the requested colour plane (green for luma), a
    strided view of the (H, W, 3) data; :func:`downscale_for_drift` recognises such a
    view and downscales the interleaved image before taking the channel, so the plane is
    never copied at full size. Grey stills and raw mosaics: the data itself.
    """
    data = frame.data
    if data.ndim == 3:
        idx = {"red": 0, "green": 1, "blue": 2}.get(channel, 1)
        return data[..., idx]  # type: ignore[no-any-return]
    return data  # type: ignore[no-any-return]


def _interleaved_parent(plane: NDArray[np.generic]) -> tuple[NDArray[np.generic], int] | None:
    """The (H, W, C) pixel-interleaved array a 2-D channel view was taken from, and the
    channel, when ``plane`` is such a view (``data[..., c]``); else None."""
    if plane.ndim != 2 or plane.strides[1] == plane.itemsize or plane.strides[1] <= 0:
        return None
    parent = plane.base
    if not (isinstance(parent, np.ndarray) and parent.ndim == 3 and parent.dtype == plane.dtype
            and parent.shape[:2] == plane.shape and parent.strides[:2] == plane.strides
            and parent.strides[2] == plane.itemsize and 1 < parent.shape[2] <= 4):
        return None
    offset = plane.__array_interface__["data"][0] - parent.__array_interface__["data"][0]
    channel, rest = divmod(offset, plane.itemsize)
    if rest or not 0 <= channel < parent.shape[2]:
        return None
    return parent, int(channel)


# OpenCV hands a resize of this many output pixels or more to its worker threads, which
# then spin-wait for more work after the call: on a machine whose cores are decoding
# video that costs more CPU time than the split saves (measured: 2 x 2 area step of a
# 1080p plane, 0.15 ms wall but 0.5 ms CPU in total). Row strips below it run in the
# calling thread.
_SERIAL_OUTPUT_PX = 1 << 16


def _drift_kernels() -> _NativeDrift | None:
    """The tracker's compiled kernels (C, ``ecl_quant/native/drift.c``, loaded with
    ctypes), or None: disabled (``ECL_QUANT_JIT=0``), not built (no C compiler at
    install) or older than drift.c; then the OpenCV / numpy code runs, which the kernels
    reproduce (the tests compare both)."""
    lib = _jit.native("drift")
    if lib is None:
        return None
    kern = _native_drift.get(id(lib))
    if kern is None or kern.lib is not lib:
        kern = _native_drift[id(lib)] = _NativeDrift(lib)
    return kern


_native_drift: dict[int, _NativeDrift] = {}

_C_KIND = {np.dtype(np.float32): 0, np.dtype(np.uint8): 1, np.dtype(np.uint16): 2}


def _addr(a: NDArray[Any] | None) -> int | None:
    """Address of an array's first element for ctypes (None: a NULL pointer). Through
    the buffer protocol for a writable C-contiguous array (0.3 us; ``a.ctypes.data``
    costs 1.2 us, and a frame passes a few dozen arrays), else ``a.ctypes.data``."""
    if a is None:
        return None
    try:
        return ctypes.addressof(ctypes.c_char.from_buffer(a))
    except (TypeError, ValueError, BufferError):  # read-only, strided or empty
        return a.ctypes.data  # type: ignore[no-any-return]


def _c_check(status: int) -> None:
    if status == -1:
        raise MemoryError("drift kernel: out of memory")
    if status != 0:  # pragma: no cover - a sample type the callers never pass
        raise TypeError(f"drift kernel: unsupported sample type (status {status})")


class _NativeDrift:
    """The C drift kernels with numpy arrays in and out. Each method does what its
    OpenCV / numpy counterpart in this module does, in the same order of float32 and
    float64 operations (see drift.c); inputs are not modified."""

    def __init__(self, lib: ctypes.CDLL) -> None:
        self.lib = lib
        P, I, D = ctypes.c_void_p, ctypes.c_int64, ctypes.c_double
        for name, args, res in (
                ("halve_to_float", [P, I, I, I, I, P], ctypes.c_int),
                ("quarter_sums", [P, I, I, I, I, P], ctypes.c_int),
                ("halve_channel", [P, I, I, I, I, I, P], ctypes.c_int),
                ("box_down_twice", [P, I, I, I, I, D, P], ctypes.c_int),
                ("box_sums_down2", [P, I, I, I, P], ctypes.c_int),
                ("highpass_rest", [P, P, I, I, I, I, P, D, P, P], ctypes.c_int),
                ("highpass_sums_rest", [P, P, I, I, I, P, D, P, P], ctypes.c_int),
                ("cross_power", [P, P, I, D, P, P], ctypes.c_int),
                ("peak_box", [P, I, I, I, I, P], None),
                ("spectral_lags", [P, I, I, P, P, I, I, P, P, I, P, P, I, P], ctypes.c_int)):
            fn = getattr(lib, "ecl_drift_" + name)
            fn.argtypes, fn.restype = args, res
            setattr(self, "_" + name, fn)

    @staticmethod
    def _rows(src: NDArray[np.generic]) -> NDArray[np.generic]:
        # contiguous columns, rows at any positive stride
        if src.strides[1] != src.itemsize or src.strides[0] < src.shape[1] * src.itemsize:
            return np.ascontiguousarray(src)
        return src

    @staticmethod
    def _fits(src: NDArray[np.generic], out: NDArray[np.generic], f: int) -> None:
        if (src.ndim != 2 or out.ndim != 2 or src.shape[0] < f * out.shape[0]
                or src.shape[1] < f * out.shape[1] or not out.flags.c_contiguous):
            raise ValueError(f"a contiguous output of {out.shape} needs {f} x as many "
                             f"input rows and columns, got {src.shape}")

    def halve_to_float(self, src: NDArray[np.generic], out: NDArray[np.float32]
                       ) -> NDArray[np.float32]:
        """2 x 2 block means of an integer plane (uint8 / uint16) into ``out`` (float32,
        contiguous): cv2.resize INTER_AREA of the float32 copy."""
        src = self._rows(src)
        oh, ow = out.shape
        self._fits(src, out, 2)
        if out.dtype != np.float32 or src.dtype not in (np.uint8, np.uint16):
            raise TypeError("halve_to_float: uint8 / uint16 in, float32 out")
        _c_check(self._halve_to_float(_addr(src), _C_KIND[src.dtype], src.strides[0],
                                      oh, ow, _addr(out)))
        return out

    def quarter_sums(self, src: NDArray[np.generic], out: NDArray[np.generic]
                     ) -> NDArray[np.generic]:
        """Two 2 x 2 steps of an integer plane: the first rounded to a whole code, the
        second as the sum of four (``out``: uint16 for uint8 codes, uint32 for uint16)."""
        src = self._rows(src)
        oh, ow = out.shape
        self._fits(src, out, 4)
        if src.dtype not in (np.uint8, np.uint16):
            raise TypeError("quarter_sums: uint8 or uint16 codes")
        want = np.uint16 if src.dtype == np.uint8 else np.uint32
        if out.dtype != want:
            raise TypeError("quarter_sums: out must be a contiguous %s array"
                            % np.dtype(want).name)
        _c_check(self._quarter_sums(_addr(src), _C_KIND[src.dtype], src.strides[0],
                                    oh, ow, _addr(out)))
        return out

    def halve_channel(self, img: NDArray[np.generic], channel: int) -> NDArray[np.generic]:
        """:func:`_halve` of channel ``channel`` of a pixel-interleaved (H, W, C) integer
        image (cv2.resize INTER_AREA rounding), read in place."""
        if (img.ndim != 3 or img.dtype not in (np.uint8, np.uint16)
                or not 0 <= channel < img.shape[2] or img.strides[0] <= 0
                or img.strides[1] <= 0 or img.strides[2] != img.itemsize):
            raise TypeError("halve_channel: an (H, W, C) uint8 / uint16 image with "
                            "interleaved samples")
        oh, ow = img.shape[0] // 2, img.shape[1] // 2
        out = np.empty((oh, ow), img.dtype)
        start = img[0, 0, channel:channel + 1] if oh and ow else img
        _c_check(self._halve_channel(_addr(start), _C_KIND[img.dtype], img.strides[0],
                                     img.strides[1], oh, ow, _addr(out)))
        return out

    def box_down_twice(self, src: NDArray[np.generic], r: int, scale: float
                       ) -> NDArray[np.float32]:
        """Twice the mean over rows i - r .. i + r (BORDER_REFLECT) of src (float32 or
        uint16) times scale: cv2.blur with a (1, 2 r + 1) kernel, twice."""
        src = np.ascontiguousarray(src)
        if src.dtype not in (np.float32, np.uint16):
            raise TypeError("box_down_twice: float32 or uint16 samples")
        h, w = src.shape
        out = np.empty((h, w), np.float32)
        _c_check(self._box_down_twice(_addr(src), _C_KIND[src.dtype], h, w,
                                      self._radius(r, h),
                                      float(scale), _addr(out)))
        return out

    def box_sums_down2(self, src: NDArray[np.uint16], r: int) -> NDArray[np.int32]:
        """:meth:`box_down_twice` of uint16 codes as exact int32 sums (not divided)."""
        src = np.ascontiguousarray(src, dtype=np.uint16)
        h, w = src.shape
        out = np.empty((h, w), np.int32)
        _c_check(self._box_sums_down2(_addr(src), h, w, self._radius(r, h), _addr(out)))
        return out

    def highpass_rest(self, low_h: NDArray[np.float32], med: NDArray[np.generic], r: int,
                      window: NDArray[np.float32], scale: float
                      ) -> tuple[NDArray[np.float32], float, float]:
        """med times scale minus the vertical part of the double box blur of low_h, and
        the sum and sum of squares of the result; with a (non-empty) window, (result -
        float32(mean)) * window instead."""
        low_h = np.ascontiguousarray(low_h, dtype=np.float32)
        med = np.ascontiguousarray(med)
        if med.dtype not in (np.float32, np.uint16) or low_h.shape != med.shape:
            raise TypeError("highpass_rest: float32 or uint16 samples, both of one shape")
        h, w = med.shape
        r = self._radius(r, h)
        win = self._window(window, (h, w))
        out = np.empty((h, w), np.float32)
        mom = np.empty(2)
        _c_check(self._highpass_rest(_addr(low_h), _addr(med), _C_KIND[med.dtype],
                                     h, w, r, _addr(win), float(scale), _addr(out),
                                     _addr(mom)))
        return out, float(mom[0]), float(mom[1])

    def highpass_sums_rest(self, sums_h: NDArray[np.int32], med: NDArray[np.uint16], r: int,
                           window: NDArray[np.float32], scale: float
                           ) -> tuple[NDArray[np.float32], float, float]:
        """:meth:`highpass_rest` for uint16 codes from the exact horizontal box sums."""
        sums_h = np.ascontiguousarray(sums_h, dtype=np.int32)
        med = np.ascontiguousarray(med, dtype=np.uint16)
        if sums_h.shape != med.shape:
            raise ValueError("highpass_sums_rest: sums and codes of different shapes")
        h, w = med.shape
        r = self._radius(r, h)
        win = self._window(window, (h, w))
        out = np.empty((h, w), np.float32)
        mom = np.empty(2)
        _c_check(self._highpass_sums_rest(_addr(sums_h), _addr(med), h, w, int(r),
                                          _addr(win), float(scale), _addr(out),
                                          _addr(mom)))
        return out, float(mom[0]), float(mom[1])

    @staticmethod
    def _radius(r: int, h: int) -> int:
        # the running sums reflect once at each border: the window must fit in the rows
        r = int(r)
        if not 0 <= r < h:
            raise ValueError(f"box radius {r} px needs more than {r} rows, got {h}")
        return r

    @staticmethod
    def _window(window: NDArray[np.float32], shape: tuple[int, int]
                ) -> NDArray[np.float32] | None:
        if window.size == 0:
            return None
        if window.shape != shape:
            raise ValueError(f"window of shape {window.shape} for an image of {shape}")
        return np.ascontiguousarray(window, dtype=np.float32)

    def cross_power(self, spec: NDArray[np.float32], ref: NDArray[np.float32], eps: float
                    ) -> tuple[NDArray[np.float32], NDArray[np.float32]]:
        """spec * conj(ref) and P |P| / (|P|^2 + eps): float32 views (re, im
        interleaved) of complex64 spectra of one shape, numpy's float32 arithmetic."""
        spec = np.ascontiguousarray(spec, dtype=np.float32)
        ref = np.ascontiguousarray(ref, dtype=np.float32)
        if spec.shape != ref.shape or spec.size % 2:
            raise ValueError("cross_power: spectra of different shapes")
        cross = np.empty_like(spec)
        norm = np.empty_like(spec)
        _c_check(self._cross_power(_addr(spec), _addr(ref), spec.size // 2,
                                   float(eps), _addr(cross), _addr(norm)))
        return cross, norm

    def peak_box(self, c: NDArray[np.float32], py: int, px: int) -> tuple[float, float, float]:
        """Sum of the 5 x 5 samples around (py, px) of a periodic surface (float32) and
        its first moments along the rows and the columns, in float64."""
        c = np.ascontiguousarray(c, dtype=np.float32)
        rows, cols = c.shape
        if not rows or not cols:
            raise ValueError("peak_box: an empty surface")
        out = np.empty(3)
        self._peak_box(_addr(c), rows, cols, int(py), int(px), _addr(out))
        return float(out[0]), float(out[1]), float(out[2])

    def spectral_lags(self, cross: NDArray[np.float32], wy: NDArray[np.float64],
                      wx: NDArray[np.float64], ix: int, iy: int, cos_x: NDArray[np.float64],
                      sin_x: NDArray[np.float64], cos_y: NDArray[np.float64],
                      sin_y: NDArray[np.float64]) -> NDArray[np.float64]:
        """The nine sums of :func:`_spectral_lags` from the float32 view of the cross
        spectrum (rows, 2 (cols // 2 + 1)), the weights and the cos / sin tables."""
        cross = np.ascontiguousarray(cross, dtype=np.float32)
        h, wc = wy.size, wx.size
        if cross.shape != (h, 2 * wc):
            raise ValueError("spectral_lags: cross spectrum and weights do not match")
        arrays = [np.ascontiguousarray(a, dtype=np.float64)
                  for a in (wy, wx, cos_x, sin_x, cos_y, sin_y)]
        wy, wx, cos_x, sin_x, cos_y, sin_y = arrays
        if sin_x.size != cos_x.size or sin_y.size != cos_y.size or not (cos_x.size
                                                                       and cos_y.size):
            raise ValueError("spectral_lags: cos and sin tables of different lengths")
        out = np.empty((3, 3))
        _c_check(self._spectral_lags(_addr(cross), h, wc, _addr(wy), _addr(wx),
                                     int(ix), int(iy), _addr(cos_x), _addr(sin_x),
                                     cos_x.size, _addr(cos_y), _addr(sin_y),
                                     cos_y.size, _addr(out)))
        return out


def _halve(img: NDArray[np.generic], channel: int | None = None) -> NDArray[np.generic]:
    """2 x 2 box average (cv2.resize INTER_AREA, even sizes); integer types are rounded.

    With ``channel``, ``img`` is (H, W, C) pixel-interleaved and only that channel is
    averaged. Large images are done in strips of whole output rows (identical result:
    each output pixel depends only on its own 2 x 2 block), each in the calling thread,
    unless OpenCV runs single-threaded anyway (cv2.setNumThreads(1)): then one call; a
    channel is copied out one strip at a time, while the strip is still in cache.
    """
    h, w = img.shape[:2]
    oh, ow = h // 2, w // 2
    step = max(1, (_SERIAL_OUTPUT_PX - 1) // max(1, ow))
    if channel is None and (oh <= step or cv2.getNumThreads() <= 1):  # no workers to wake
        whole: NDArray[np.generic] = cv2.resize(img, (ow, oh), interpolation=cv2.INTER_AREA)
        return whole
    out = np.empty((oh, ow) + (img.shape[2:] if channel is None else ()), dtype=img.dtype)
    for r0 in range(0, oh, step):
        r1 = min(oh, r0 + step)
        strip = (img[2 * r0:2 * r1] if channel is None
                 else cv2.extractChannel(img[2 * r0:2 * r1], channel))
        out[r0:r1] = cv2.resize(strip, (ow, r1 - r0), interpolation=cv2.INTER_AREA)
    return out


def downscale_for_drift(plane: NDArray[np.generic], factor: int) -> NDArray[np.float32]:
    """Box-average a plane over ``factor`` x ``factor`` blocks, as float32.

    The output has ``(H // factor, W // factor)`` pixels, each the mean of one block from
    the top-left (a partial last block row or column is dropped). A factor is split into
    2 x 2 steps (cv2.resize INTER_AREA, several times faster per pixel than one large
    area step) and an odd remainder: the 2 x 2 steps but the last run in the input's
    integer type (each rounds half up to a whole code: for a factor of 8, at most 1 code
    and on average 1/4 code high, an offset the high-pass of the tracker removes), the
    rest in float32 (exact). One channel of a pixel-interleaved image (``data[..., c]``,
    see :func:`drift_plane`) is copied out in strips of rows that are averaged at once,
    instead of as one full-size copy.
    """
    small, scale = _downscale_scaled(plane, factor)
    if scale != 1.0:
        return np.multiply(small, np.float32(scale), dtype=np.float32)
    return small  # type: ignore[return-value]


def _downscale_scaled(plane: NDArray[np.generic], factor: int
                      ) -> tuple[NDArray[np.generic], float]:
    """:func:`downscale_for_drift` as an image and a scale: the block means are the
    image times the scale. For an 8-bit plane and a factor 4, 8, 16 ... with the
    compiled kernels, the image holds the sums of the four whole-code means of the last
    2 x 2 step (uint16, scale 1/4: exact, and a 3 x 3 median of uint16 costs a third of
    one of float32); else it is the float32 result itself (scale 1)."""
    factor = max(1, int(factor))
    parent = _interleaved_parent(plane)
    h, w = plane.shape[:2]
    hc, wc = (h // factor) * factor, (w // factor) * factor
    channel = None
    if parent is not None:
        src: NDArray[np.generic] = parent[0][:hc, :wc]
        channel = parent[1]
    else:
        src = plane[:hc, :wc]
        if src.strides[-1] != src.itemsize:
            src = np.ascontiguousarray(src)
    if src.dtype not in (np.uint8, np.uint16, np.float32):
        src = src.astype(np.float32)
    twos, rest = 0, factor
    while rest % 2 == 0:
        twos, rest = twos + 1, rest // 2
    n_int = max(0, twos - 1) if src.dtype != np.float32 else twos
    n_float = twos - n_int
    if channel is not None and n_int > 0:
        kern_c = _drift_kernels()
        if kern_c is not None:  # the channel's 2 x 2 means read in place
            src = kern_c.halve_channel(src, channel)  # type: ignore[arg-type]
        else:  # the channel is copied out strip by strip
            src = _halve(src, channel)
        channel = None
        n_int -= 1
    elif channel is not None:
        src, channel = np.ascontiguousarray(src[..., channel]), None
    kern = _drift_kernels() if n_float and src.dtype != np.float32 else None
    for _ in range(n_int - (1 if kern is not None else 0)):
        src = _halve(src)
    if kern is not None and n_int:  # the last rounded and the first float step, one pass
        oh, ow = src.shape[0] // 4, src.shape[1] // 4
        acc = np.uint16 if src.dtype == np.uint8 else np.uint32
        sums = kern.quarter_sums(src, np.empty((oh, ow), acc))
        if n_float == 1 and rest == 1 and sums.dtype == np.uint16:
            return sums, 0.25
        small = np.multiply(sums, np.float32(0.25), dtype=np.float32)
        n_float -= 1
    elif kern is not None:  # the first float step straight from the integer plane
        small = kern.halve_to_float(src, np.empty((src.shape[0] // 2, src.shape[1] // 2),
                                                  dtype=np.float32))
        n_float -= 1
    else:
        small = np.asarray(src, dtype=np.float32)
    for _ in range(n_float):
        small = _halve(small)
    if rest > 1:
        sh, sw = small.shape[:2]
        small = cv2.resize(small, (sw // rest, sh // rest), interpolation=cv2.INTER_AREA)
    return np.ascontiguousarray(small, dtype=np.float32), 1.0


def _lag_products(a: NDArray[np.float32], b: NDArray[np.float32], margin: int,
                  lags: Sequence[tuple[int, int]]) -> list[float]:
    """Cross-correlation ``sum(core * b[core shifted by (lx, ly)])`` for each lag, where
    ``core`` is ``a`` without ``margin`` pixels on each side (``|lx|, |ly| < margin``).

    The core is placed in a zero image of the full row width, so that every lag is one
    dot product of two contiguous runs of memory (a row's wrap into the next row meets
    only zeros): no copy of ``b`` per lag.
    """
    h, w = a.shape
    m = margin
    rows = h - 2 * m
    padded = np.zeros((rows, w), dtype=np.float32)
    padded[:, m:w - m] = a[m:h - m, m:w - m]
    flat_core = padded.ravel()
    flat_b = np.ascontiguousarray(b, dtype=np.float32).ravel()
    n = rows * w
    out = []
    for lx, ly in lags:
        start = (m + ly) * w + lx
        out.append(float(np.dot(flat_core, flat_b[start:start + n])))
    return out


def _refine_blurred(a: NDArray[np.float32], b: NDArray[np.float32], dx: float, dy: float
                    ) -> tuple[float, float]:
    """Sub-pixel peak of the cross-correlation of the (already blurred) images ``a`` and
    ``b`` at the 3 x 3 integer lags around (dx, dy): a parabola through each axis."""
    ix, iy = int(round(dx)), int(round(dy))
    h, w = a.shape
    m = 2 + max(abs(ix), abs(iy))
    if h - 2 * m < 4 or w - 2 * m < 4:
        return dx, dy
    c = np.empty((3, 3))
    where = ((1, 0), (1, 1), (1, 2), (0, 1), (2, 1))  # the corners are not used
    values = _lag_products(a, b, m, [(ix + i - 1, iy + j - 1) for j, i in where])
    for (j, i), v in zip(where, values):
        c[j, i] = v
    return _parabola_peak(c, dx, dy)


def _parabola_peak(c: NDArray[np.float64], dx: float, dy: float) -> tuple[float, float]:
    """The sub-pixel peak from correlations ``c[j, i]`` at lags (ix + i - 1, iy + j - 1)
    around the whole-pixel lag (ix, iy) nearest (dx, dy): the vertex of a parabola
    through the three lags along each axis (the corners are not used); (dx, dy) on an
    axis without a maximum within one pixel."""
    ix, iy = int(round(dx)), int(round(dy))

    def vertex(left: float, mid: float, right: float) -> float | None:
        den = left - 2.0 * mid + right
        if not den < 0:
            return None
        off = 0.5 * (left - right) / den
        return off if abs(off) <= 1.0 else None

    ox = vertex(c[1, 0], c[1, 1], c[1, 2])
    oy = vertex(c[0, 1], c[1, 1], c[2, 1])
    return (dx if ox is None else ix + ox), (dy if oy is None else iy + oy)


@lru_cache(maxsize=8)
def _lag_weights(shape: tuple[int, int], blur: float
                 ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Weights of a real DFT of size ``shape`` (``scipy.fft.rfft2`` layout) that turn
    sums over a cross spectrum into the cross-correlation of the two images, each
    blurred by the Gaussian cv2.GaussianBlur uses for ``blur`` px (float32 data: 8
    sigma + 1 taps): the squared DFT of that kernel, times 2 for the columns that stand
    for their complex-conjugate twins of the full spectrum; as the factors of the rows
    and of the columns (their outer product is the weight)."""
    rows, cols = shape
    if blur > 0:
        ksize = int(np.rint(blur * 8 + 1)) | 1
        g = cv2.getGaussianKernel(ksize, blur, cv2.CV_32F).ravel().astype(np.float64)
        r = ksize // 2

        def response(n: int, k: NDArray[np.float64]) -> NDArray[np.float64]:
            t = np.arange(1, r + 1)
            return g[r] + 2.0 * np.cos(2.0 * np.pi * np.outer(k, t) / n) @ g[r + 1:]

        gy = response(rows, np.arange(rows, dtype=np.float64))
        gx = response(cols, np.arange(cols // 2 + 1, dtype=np.float64))
    else:
        gy, gx = np.ones(rows), np.ones(cols // 2 + 1)
    twin = np.full(cols // 2 + 1, 2.0)
    twin[0] = 1.0
    if cols % 2 == 0:
        twin[-1] = 1.0
    return gy**2, twin * gx**2


def _spectral_lags(cross: NDArray[np.complex64], shape: tuple[int, int], blur: float,
                   ix: int, iy: int) -> NDArray[np.float64]:
    """Cross-correlation of the blurred images at the 3 x 3 whole-pixel lags around
    (ix, iy), ``c[j, i]`` at (ix + i - 1, iy + j - 1), from their cross spectrum
    ``cross`` (image spectrum times the reference's conjugate, DFT size ``shape``): the
    inverse DFT at nine points only (two small matrix products)."""
    rows, cols = shape
    wy, wx = _lag_weights(shape, blur)
    kern = _drift_kernels()
    if (kern is not None and cross.dtype == np.complex64 and cross.flags.c_contiguous
            and cross.shape == (rows, cols // 2 + 1)):
        cos_x, sin_x, cos_y, sin_y = _dft_tables(shape)
        lags: NDArray[np.float64] = kern.spectral_lags(cross.view(np.float32), wy, wx, ix, iy,
                                                       cos_x, sin_x, cos_y, sin_y)
        return lags
    d = np.arange(-1, 2)
    # the column weights folded into the column factors, the row weights into the row
    # factors; each contraction as a product and a sum along the rows (numpy's own
    # loops: a BLAS product of this size may wake the BLAS threads, which then spin on
    # cores the decoder needs; an einsum of mixed complex types costs 1.3 ms)
    vx = (np.exp((2j * np.pi / cols) * np.outer(ix + d, np.arange(cols // 2 + 1)))
          * wx).astype(np.complex64)
    vy = np.exp((2j * np.pi / rows) * np.outer(iy + d, np.arange(rows))) * wy
    rows_at = np.stack([np.multiply(cross, v, dtype=np.complex64).sum(axis=1) for v in vx])
    c = np.einsum("jk,ik->ji", vy, rows_at.astype(np.complex128)).real  # c[j, i]
    return c / (rows * cols)  # type: ignore[no-any-return]


@lru_cache(maxsize=8)
def _dft_tables(shape: tuple[int, int]) -> tuple[NDArray[np.float64], ...]:
    """cos and sin of 2 pi n / N for n < N, N the columns and the rows of ``shape``."""
    rows, cols = shape
    ax = 2.0 * np.pi * np.arange(cols) / cols
    ay = 2.0 * np.pi * np.arange(rows) / rows
    return np.cos(ax), np.sin(ax), np.cos(ay), np.sin(ay)


_FLT_EPS = float(np.finfo(np.float32).eps)

try:  # scipy.fft's own transform functions, without its argument checks and dispatch
    from scipy.fft._pocketfft import pypocketfft as _pocketfft  # (40 us a call, per frame)
except ImportError:  # pragma: no cover - another scipy layout: the public functions
    _pocketfft = None


def _rfft2(a: NDArray[np.float32], shape: tuple[int, int]) -> NDArray[np.complex64]:
    """scipy.fft.rfft2(a, s=shape) of a C-contiguous float32 image."""
    if _pocketfft is not None and a.shape == shape and a.dtype == np.float32:
        try:
            out: NDArray[np.complex64] = _pocketfft.r2c(a, (0, 1), True, 0, None, 1)
            return out
        except TypeError:  # pragma: no cover - a changed signature
            pass
    return sp_fft.rfft2(a, s=shape)  # type: ignore[no-any-return]


def _irfft2(q: NDArray[np.complex64], shape: tuple[int, int]) -> NDArray[np.float32]:
    """scipy.fft.irfft2(q, s=shape, norm="forward"): the inverse of :func:`_rfft2`, not
    divided by its size (which saves a pass over the output)."""
    if _pocketfft is not None and q.dtype == np.complex64 and q.shape[1] == shape[1] // 2 + 1:
        try:
            out: NDArray[np.float32] = _pocketfft.c2r(q, (0, 1), shape[1], False, 0, None, 1)
            return out
        except TypeError:  # pragma: no cover - a changed signature
            pass
    return sp_fft.irfft2(q, s=shape, norm="forward")  # type: ignore[no-any-return]


class _Prepared:
    """One image made ready for phase correlation, computed once per frame (and kept
    with the reference until it is replaced): mean removed and windowed (float32), its
    zero-padded real DFT, and the blur of the sub-pixel refinement (None: no
    refinement) with the Gaussian-blurred copy, made when first asked for."""

    __slots__ = ("windowed", "spectrum", "blur", "_blurred", "_conj")

    def __init__(self, image: NDArray[np.floating], window: NDArray[np.float32] | None,
                 blur: float | None, *, mean: float | None = None) -> None:
        img = np.asarray(image)
        a = np.subtract(img, np.float32(img.mean(dtype=np.float32) if mean is None else mean),
                        dtype=np.float32)
        if window is not None:
            a *= window
        self._finish(a, blur)

    @classmethod
    def of_windowed(cls, windowed: NDArray[np.float32], blur: float | None) -> _Prepared:
        """From an image already mean-removed and windowed (float32, not copied)."""
        self = cls.__new__(cls)
        self._finish(windowed, blur)
        return self

    def _finish(self, a: NDArray[np.float32], blur: float | None) -> None:
        self.windowed = a
        h, w = a.shape
        shape = (cv2.getOptimalDFTSize(h), cv2.getOptimalDFTSize(w))
        self.spectrum: NDArray[np.complex64] = _rfft2(a, shape)
        self.blur = None if blur is None else float(blur)
        self._blurred: NDArray[np.float32] | None = None
        self._conj: NDArray[np.complex64] | None = None

    @property
    def blurred(self) -> NDArray[np.float32] | None:
        """The windowed image blurred by ``blur`` px (cv2.GaussianBlur), or None."""
        if self._blurred is None and self.blur is not None:
            self._blurred = (cv2.GaussianBlur(self.windowed, (0, 0), self.blur)
                             if self.blur > 0 else self.windowed)
        return self._blurred

    def conj_spectrum(self) -> NDArray[np.complex64]:
        """Complex conjugate of the spectrum (kept: a reference is used many times)."""
        if self._conj is None:
            self._conj = np.conj(self.spectrum)
        return self._conj


def _phase_correlate(ref_conj: NDArray[np.complexfloating],
                     img_spectrum: NDArray[np.complexfloating],
                     shape: tuple[int, int]) -> tuple[float, float, float]:
    """Phase correlation of two real DFTs (``scipy.fft.rfft2`` of size ``shape``; the
    reference's is passed complex-conjugated).

    The same estimate as OpenCV's cv2.phaseCorrelate (Kuglin and Hines 1975; OpenCV
    imgproc phasecorr.cpp is the reference implementation): the cross-power spectrum
    divided by its magnitude (``P |P| / (|P|^2 + FLT_EPSILON)``), inverse DFT, the
    highest sample, its 5 x 5 weighted centroid for the sub-pixel position, and as
    response the sum of the 5 x 5 samples divided by the number of DFT samples. Unlike
    cv2.phaseCorrelate, lags wrap around the periodic correlation surface instead of
    going through a quadrant swap, which in OpenCV 5.0 puts the zero lag half a pixel
    off on an odd-sized (or padded to odd) axis; on even sizes that need no padding the
    two agree (checked with a window, as the tracker uses).

    Returns
    -------
    dx, dy : float
        Displacement of the image relative to the reference.
    response : float
    """
    # peak at +shift (cv2 conjugates the other spectrum)
    return _phase_peak(img_spectrum * ref_conj, shape)


def _phase_peak(cross: NDArray[np.complexfloating], shape: tuple[int, int]
                ) -> tuple[float, float, float]:
    """:func:`_phase_correlate` from the cross spectrum (not modified)."""
    mag = np.abs(cross)
    den = mag * mag
    den += _FLT_EPS
    np.divide(mag, den, out=mag)
    return _peak_of(cross * mag, shape)


def _cross_spectra(ref: _Prepared, img: _Prepared
                   ) -> tuple[NDArray[np.complex64], NDArray[np.complex64]]:
    """The cross spectrum of two prepared images (the image's spectrum times the
    reference's conjugate) and its normalised form ``P |P| / (|P|^2 + FLT_EPSILON)``."""
    kern = _drift_kernels()
    a, b = img.spectrum, ref.spectrum
    if (kern is not None and a.dtype == b.dtype == np.complex64 and a.shape == b.shape
            and a.flags.c_contiguous and b.flags.c_contiguous):
        cross, norm = kern.cross_power(a.view(np.float32), b.view(np.float32), _FLT_EPS)
        return cross.view(np.complex64), norm.view(np.complex64)
    cross = a * ref.conj_spectrum()
    mag = np.abs(cross)
    den = mag * mag
    den += _FLT_EPS
    np.divide(mag, den, out=mag)
    return cross, cross * mag


def _peak_of(norm: NDArray[np.complexfloating], shape: tuple[int, int]
             ) -> tuple[float, float, float]:
    """Peak, its 5 x 5 centroid and response of the inverse DFT of a normalised cross
    spectrum (see :func:`_phase_correlate`)."""
    c = _irfft2(norm, shape)  # times M * N: divided below (cv2's division of the response)
    rows, cols = shape
    py, px = divmod(int(np.argmax(c)), cols)
    kern = _drift_kernels()
    if kern is not None:
        total, my, mx = kern.peak_box(c, py, px)
    else:
        d = np.arange(-2, 3)
        box = c[((py + d) % rows)[:, None], (px + d) % cols].astype(np.float64)
        total = float(box.sum())
        my, mx = float(box.sum(axis=1) @ d), float(box.sum(axis=0) @ d)
    size = rows * cols
    total, my, mx = total / size, my / size, mx / size
    den_c = total + 2.220446049250313e-16  # cv2: + DBL_EPSILON
    oy = my / den_c
    ox = mx / den_c
    ly = py - rows if py > rows // 2 else py
    lx = px - cols if px > cols // 2 else px
    return lx + ox, ly + oy, total


def _shift_between(ref: _Prepared, img: _Prepared) -> tuple[float, float, float]:
    """Phase correlation of two prepared images, sub-pixel refined when both have the
    same refinement blur (see :func:`estimate_shift`).

    The refinement's nine correlations of the blurred images come from the cross
    spectrum the phase correlation uses (:func:`_spectral_lags`), which is the same sum
    as :func:`_refine_blurred` over the blurred copies but for what lies within a few
    pixels of the border, where the window is near zero, so no blurred copy is made.
    """
    h, w = ref.windowed.shape
    shape = (cv2.getOptimalDFTSize(h), cv2.getOptimalDFTSize(w))
    cross, norm = _cross_spectra(ref, img)
    dx, dy, resp = _peak_of(norm, shape)
    if (ref.blur is not None and ref.blur == img.blur
            and math.isfinite(dx) and math.isfinite(dy)):
        ix, iy = int(round(dx)), int(round(dy))
        m = 2 + max(abs(ix), abs(iy))  # as _refine_blurred
        if h - 2 * m >= 4 and w - 2 * m >= 4:
            dx, dy = _parabola_peak(_spectral_lags(cross, shape, ref.blur, ix, iy), dx, dy)
    return float(dx), float(dy), float(resp)


def estimate_shift(reference: NDArray[np.floating], image: NDArray[np.floating], *,
                   window: NDArray[np.floating] | None = None,
                   refine_blur: float | None = 1.0) -> tuple[float, float, float]:
    """Displacement of ``image`` relative to ``reference`` by phase correlation.

    Content at ``(x, y)`` in ``reference`` appears at ``(x + dx, y + dy)`` in ``image``.
    Both are mean-removed and multiplied by ``window``; the phase-correlation peak and
    response are those of cv2.phaseCorrelate (computed here so that a tracker can keep
    the reference's spectrum, see :func:`_phase_correlate`). Its 5 x 5 centroid is
    biased towards whole pixels, so the sub-pixel part is then refined by a parabola
    through the cross-correlation of the (Gaussian-blurred, ``refine_blur`` px) images
    at the 3 x 3 whole-pixel lags around the peak, evaluated from the cross spectrum
    (:func:`_spectral_lags`). Inputs are not modified.

    Parameters
    ----------
    reference, image : (h, w) ndarray of float32
    window : (h, w) ndarray of float32, optional
        Apodisation window (e.g. cv2.createHanningWindow).
    refine_blur : float or None, optional
        Blur of the refinement step in pixels; None skips the refinement.

    Returns
    -------
    dx, dy : float
        Displacement in pixels of the inputs.
    response : float
        Peak response (near 1 for a clean match, a few hundredths for noise).
    """
    win = None if window is None else np.asarray(window, dtype=np.float32)
    blur = None if refine_blur is None else float(refine_blur)
    return _shift_between(_Prepared(reference, win, blur), _Prepared(image, win, blur))


def _prepare_for_drift(small: NDArray[np.float32], highpass_px: float) -> NDArray[np.float32]:
    """3 x 3 median (removes isolated hot pixels) minus a wide blur (ambient).

    The blur is two passes of a box filter of width ``2 * highpass_px + 1`` (close to a
    Gaussian, at a cost independent of the width).
    """
    return _highpass_moments(small, highpass_px)[0]


def _highpass_moments(small: NDArray[np.generic], highpass_px: float, *,
                      window: NDArray[np.float32] | None = None, scale: float = 1.0
                      ) -> tuple[NDArray[np.float32], float, float]:
    """:func:`_prepare_for_drift` of ``small`` times ``scale`` (float32, or the uint16
    sums of :func:`_downscale_scaled` with their scale), and the mean and SD of the
    result.

    With ``window``, the first result is instead the high-passed image minus its mean
    (rounded to float32) times the window, in float32, as :class:`_Prepared` makes it.

    The OpenCV code: cv2.medianBlur, cv2.blur twice (BORDER_REFLECT), cv2.meanStdDev.
    With the compiled kernels the box blurs are separated (a box blur is a vertical
    times a horizontal one, and both passes of each commute with the other's): the
    horizontal passes run as vertical ones on the transposed median (cv2.transpose),
    the vertical ones with a running sum along the columns, the last fused with the
    subtraction and the sums of the moments; same values within float32 rounding.
    """
    kern = _drift_kernels()
    k = 2 * int(round(highpass_px)) + 1
    if small.dtype != np.float32 and (kern is None or small.dtype != np.uint16
                                      or k // 2 >= min(small.shape)):
        small, scale = np.multiply(small, np.float32(scale), dtype=np.float32), 1.0
    # the median commutes with the (exact) scale
    med = cv2.medianBlur(small, 3) if min(small.shape) >= 3 else small
    if kern is not None and k // 2 < min(med.shape):
        r = k // 2
        win = _NO_WINDOW if window is None else np.asarray(window, dtype=np.float32)
        if med.dtype == np.uint16 and 65535 * k**4 < 2**31:  # exact int32 sums (k <= 13)
            sums_h = cv2.transpose(kern.box_sums_down2(cv2.transpose(med), r))
            out, s1, s2 = kern.highpass_sums_rest(sums_h, med, r, win, scale)
        else:
            low_h = cv2.transpose(kern.box_down_twice(cv2.transpose(med), r, scale))
            out, s1, s2 = kern.highpass_rest(low_h, med, r, win, scale)
        mean = s1 / out.size
        return out, mean, math.sqrt(max(s2 / out.size - mean * mean, 0.0))
    low = cv2.blur(cv2.blur(med, (k, k), borderType=cv2.BORDER_REFLECT),
                   (k, k), borderType=cv2.BORDER_REFLECT)
    out = (med - low).astype(np.float32, copy=False)
    m, sd = cv2.meanStdDev(out)
    if window is not None:
        out = np.subtract(out, np.float32(m[0, 0]), dtype=np.float32)
        out *= window
    return out, float(m[0, 0]), float(sd[0, 0])


_NO_WINDOW = np.zeros((0, 0), np.float32)


class DriftTracker:
    """Per-frame shift of a hand-held recording against an adaptive reference.

    Each frame's drift plane is box-downscaled by ``factor`` (:func:`downscale_for_drift`);
    a 3 x 3 median removes isolated hot pixels and subtracting a wide Gaussian blur
    (``highpass_px`` downscaled pixels) removes the smooth ambient leak, both fixed to the
    sensor, leaving what moves with the card (its texture and the spots). The result is
    phase-correlated with the reference (:func:`estimate_shift`; the reference's windowed
    spectrum is kept until it is replaced, and a frame that becomes the reference brings
    its own, so each frame costs one forward and one inverse DFT; the sub-pixel
    refinement reads the cross spectrum). The per-frame passes run as compiled C
    kernels when they were built at install (see :func:`_drift_kernels`; loaded with
    ctypes, no start-up cost), else as OpenCV / numpy code with the same results within
    float32 rounding. The first frame is the initial
    reference; a later frame replaces it when its contrast (SD of the prepared
    frame) exceeds ``refresh_ratio`` times the reference's, so the reference follows the
    spots as they light up. When the response is below ``min_response`` (nothing to
    lock on, e.g. a featureless card before the emission) the last accepted shift is
    held. A jump of more than ``max_jump_px`` from the last accepted shift is accepted
    only with a response of at least ``strong_response`` (a spot grid is periodic, so
    weak frames can lock on a neighbour one spacing away). Shifts are relative to the
    card position at the first frame with measurable structure (the first frame for a
    textured card).

    Parameters
    ----------
    shape : (int, int)
        (H, W) of the frames.
    target_px : int, optional
        Longest side of the downscaled frame.
    min_response : float, optional
        Smallest phase-correlation response accepted (noise alone gives a few
        hundredths, occasionally up to 0.2; a clean match is near 1).
    refresh_ratio : float, optional
    highpass_px : float, optional
    max_jump_px : float, optional
        Default: 2 % of the longest side, at least 4 px.
    strong_response : float, optional
    """

    def __init__(self, shape: tuple[int, int], *, target_px: int = 256,
                 min_response: float = 0.3, refresh_ratio: float = 1.5,
                 highpass_px: float = 6.0, max_jump_px: float | None = None,
                 strong_response: float = 0.5) -> None:
        h, w = int(shape[0]), int(shape[1])
        self.factor = max(1, int(math.ceil(max(h, w) / target_px)))
        self.small_shape = (h // self.factor, w // self.factor)
        sh, sw = self.small_shape
        self._window = cv2.createHanningWindow((sw, sh), cv2.CV_32F) if min(sh, sw) >= 8 else None
        self.min_response = min_response
        self.refresh_ratio = refresh_ratio
        self.highpass_px = highpass_px
        self.max_jump_px = max(4.0, 0.02 * max(h, w)) if max_jump_px is None else float(max_jump_px)
        self.strong_response = strong_response
        self._ref: _Prepared | None = None
        self._ref_shift = (0.0, 0.0)
        self._ref_contrast = 0.0
        self._last = (0.0, 0.0)
        self.n_refreshes = 0
        self.n_measured = 0

    def _nearer_match(self, prep: _Prepared, dx: float, dy: float
                      ) -> tuple[float, float] | None:
        """The best whole-pixel lag within ``max_jump_px`` of the last accepted shift,
        sub-pixel refined, when the frames correlate there at least as well as at the
        phase-correlation peak ``(dx, dy)`` (downscaled px); else None.

        A card whose only structure is its spot grid correlates at every multiple of the
        pitch, and more so while the spots light up one after another: a far peak is
        then as likely an alias as a real jump, and the nearer match is preferred.
        """
        f = self.factor
        r = max(1, int(math.ceil(self.max_jump_px / f)))
        cx = int(round((self._last[0] - self._ref_shift[0]) / f))
        cy = int(round((self._last[1] - self._ref_shift[1]) / f))
        ix, iy = int(round(dx)), int(round(dy))
        if self._ref is None or self._ref.blurred is None or prep.blurred is None:
            return None
        ab, bb = self._ref.blurred, prep.blurred
        lags = [(cx + i, cy + j) for j in range(-r, r + 1) for i in range(-r, r + 1)
                if i * i + j * j <= r * r]
        m = 2 + max(abs(v) for lag in lags + [(ix, iy)] for v in lag)
        h, w = ab.shape
        if h - 2 * m < 4 or w - 2 * m < 4:
            return None
        *score, at_peak = _lag_products(ab, bb, m, lags + [(ix, iy)])
        k = int(np.argmax(score))
        if score[k] < at_peak:
            return None
        return _refine_blurred(ab, bb, float(lags[k][0]), float(lags[k][1]))

    def _prepared(self, plane: NDArray[np.generic]) -> tuple[_Prepared, float]:
        """This frame downscaled, filtered and made ready for phase correlation (its
        spectrum is kept if it becomes the reference), and its contrast."""
        small, scale = _downscale_scaled(plane, self.factor)
        windowed, _, sd = _highpass_moments(small, self.highpass_px, window=self._window,
                                            scale=scale)
        return _Prepared.of_windowed(windowed, 1.0), sd

    def resume(self) -> DriftTracker:
        """A tracker for another pass over the same recording, from its first frame.

        It keeps this tracker's reference (and its origin), so the shifts of both passes
        share one origin: spots found on a projection registered by this tracker (e.g.
        from the key frames only) are then where the new pass's masks expect them. Its
        last accepted shift starts at (0, 0), the first frame's. This tracker is not
        changed.
        """
        new = copy.copy(self)
        new._last = (0.0, 0.0)
        return new

    def update(self, plane: NDArray[np.generic]) -> tuple[float, float, float, bool]:
        """Shift of this frame's content relative to the reference, in full-resolution px.

        Returns
        -------
        dx_px, dy_px : float
        response : float
            Phase-correlation response (0 when nothing was measured).
        measured : bool
            False when the shift was held from the previous frame.
        """
        if self._window is None:
            return 0.0, 0.0, 0.0, False
        prep, contrast = self._prepared(plane)
        if self._ref is None:
            self._ref, self._ref_contrast = prep, contrast
            return 0.0, 0.0, 0.0, False
        if self.n_measured == 0 and contrast > self.refresh_ratio * self._ref_contrast:
            # Nothing has matched the reference yet (a featureless card before the
            # emission): its correlation with the first frame showing structure is noise
            # and can peak anywhere, often one grid spacing away, with a high response.
            # Re-base on this frame instead of measuring against the old reference.
            self._ref, self._ref_contrast, self._ref_shift = prep, contrast, self._last
            self.n_refreshes += 1
            return self._last[0], self._last[1], 0.0, False
        dx, dy, resp = _shift_between(self._ref, prep)
        measured = resp >= self.min_response and math.isfinite(dx) and math.isfinite(dy)
        if measured:
            new = (self._ref_shift[0] + dx * self.factor, self._ref_shift[1] + dy * self.factor)
            jump = math.hypot(new[0] - self._last[0], new[1] - self._last[1])
            # A reference with much less structure than this frame (spots lighting up,
            # some before others) matches it at grid-spacing lags as well as at the true
            # one: it cannot vouch for a large jump, whatever the response.
            weak_ref = contrast > self.refresh_ratio * self._ref_contrast
            near = (self._nearer_match(prep, dx, dy)
                    if jump > self.max_jump_px and not weak_ref else None)
            if near is not None:
                new = (self._ref_shift[0] + near[0] * self.factor,
                       self._ref_shift[1] + near[1] * self.factor)
                jump = math.hypot(new[0] - self._last[0], new[1] - self._last[1])
            measured = jump <= self.max_jump_px or (resp >= self.strong_response
                                                    and not weak_ref)
        if measured:
            self._last = new
            self.n_measured += 1
        if contrast > self.refresh_ratio * self._ref_contrast:
            self._ref, self._ref_contrast, self._ref_shift = prep, contrast, self._last
            self.n_refreshes += 1
        return self._last[0], self._last[1], resp if measured else 0.0, measured
