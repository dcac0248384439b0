"""Shape measures of closed outlines: Feret diameters, area, solidity.

Outlines are ``(N, 2)`` float arrays of ``(col, row)`` points (sub-pixel),
closed implicitly (the last point connects to the first).
"""

from __future__ import annotations

import math

import cv2
import numpy as np


def polygon_area(pts: np.ndarray) -> float:
    """Shoelace area of a closed polygon (absolute value), in the points' units squared."""
    x, y = pts[:, 0], pts[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def convex_hull(pts: np.ndarray) -> np.ndarray:
    hull = cv2.convexHull(np.asarray(pts, dtype=np.float32).reshape(-1, 1, 2)).reshape(-1, 2)
    return hull.astype(np.float64)


def feret(pts: np.ndarray) -> tuple[float, float, float]:
    """Max Feret diameter, min Feret (caliper) width and the max Feret angle (rad).

    The max Feret diameter is the largest distance between two hull vertices;
    the min Feret width is the smallest distance between two parallel lines
    enclosing the shape, attained with one line on a hull edge (rotating
    calipers).
    """
    return _feret_of_hull(convex_hull(pts))


def _feret_of_hull(hull: np.ndarray) -> tuple[float, float, float]:
    """:func:`feret` of the vertices of a convex hull (in order)."""
    if len(hull) <= 1:
        return 0.0, 0.0, 0.0
    d = hull[:, None, :] - hull[None, :, :]
    dist2 = (d**2).sum(-1)
    i, j = np.unravel_index(int(np.argmax(dist2)), dist2.shape)
    dmax = math.sqrt(float(dist2[i, j]))
    ang = math.atan2(hull[j, 1] - hull[i, 1], hull[j, 0] - hull[i, 0])
    if len(hull) < 3:
        return dmax, 0.0, ang
    e = np.roll(hull, -1, axis=0) - hull
    n = np.linalg.norm(e, axis=1)
    ok = n > 1e-12
    e, n, base = e[ok], n[ok], hull[ok]
    normal = np.c_[-e[:, 1], e[:, 0]] / n[:, None]
    proj = np.einsum("kij,kj->ki", hull[None, :, :] - base[:, None, :], normal)
    widths = proj.max(axis=1) - proj.min(axis=1)
    return dmax, float(widths.min()), ang


def polygon_features(pts: np.ndarray, *, px_per_mm: float | tuple[float, float]) -> dict:
    """Size and shape of an outline given in pixels; sizes returned in mm.

    ``px_per_mm`` may be one number or ``(along, across)`` for slightly
    anisotropic grids.  Area, perimeter, hull and centroid come from
    OpenCV's contour functions (shoelace sums and Green's-theorem moments of
    the polygon), evaluated on coordinates relative to the outline's first
    point so that single precision loses nothing on large photos.
    """
    pts = np.asarray(pts, dtype=np.float64)
    sx, sy = (px_per_mm, px_per_mm) if np.isscalar(px_per_mm) else px_per_mm
    mm = pts / np.array([sx, sy])
    o = mm[0].copy()
    rel = (mm - o).astype(np.float32).reshape(-1, 1, 2)
    area = abs(float(cv2.contourArea(rel)))
    per = float(cv2.arcLength(rel, True))
    hull = cv2.convexHull(rel).reshape(-1, 2).astype(np.float64)
    hull_area = abs(float(cv2.contourArea(hull.astype(np.float32)))) if len(hull) >= 3 else 0.0
    hper = float(cv2.arcLength(hull.astype(np.float32).reshape(-1, 1, 2), True)) if len(hull) >= 2 else per
    gmax, gmin, ang = _feret_of_hull(hull)
    mo = cv2.moments(rel)
    x, y = mm[:, 0], mm[:, 1]
    if abs(mo["m00"]) > 1e-12:
        cx, cy = float(mo["m10"] / mo["m00"] + o[0]), float(mo["m01"] / mo["m00"] + o[1])
    else:
        cx, cy = float(x.mean()), float(y.mean())
    x0, x1, y0, y1 = float(x.min()), float(x.max()), float(y.min()), float(y.max())
    return {
        "area_mm2": area,
        "perimeter_mm": per,
        "greatest_mm": gmax,
        "width_mm": gmin,
        "angle_rad": ang,
        "solidity": area / hull_area if hull_area > 0 else 1.0,
        "aspect": gmax / gmin if gmin > 1e-9 else float("inf"),
        "roughness": per / hper if hper > 0 else 1.0,
        "along_mm": x1 - x0,
        "across_mm": y1 - y0,
        "x0_mm": x0,
        "x1_mm": x1,
        "y0_mm": y0,
        "y1_mm": y1,
        "cx_mm": cx,
        "cy_mm": cy,
        "cx_px": cx * sx,
        "cy_px": cy * sy,
        "y0_px": y0 * sy,
        "y1_px": y1 * sy,
    }


def moment_ellipse(mo: dict) -> tuple[float, float, float]:
    """Semi-axes ``(a, b)`` and angle (rad) of the ellipse with a region's area and second moments.

    ``mo`` are OpenCV contour moments (``cv2.moments``); an ellipse with
    semi-axes a, b has central second moments ``pi a^3 b / 4`` and
    ``pi a b^3 / 4`` along its axes (analytic geometry), so ``a = 2 sqrt(l1 / m00)``
    and ``b = 2 sqrt(l2 / m00)`` with ``l1 >= l2`` the eigenvalues of the
    normalised central moment matrix (times m00).
    """
    m00 = abs(mo["m00"])
    if m00 <= 1e-12:
        return 0.0, 0.0, 0.0
    sgn = 1.0 if mo["m00"] > 0 else -1.0
    mu20, mu02, mu11 = sgn * mo["mu20"] / m00, sgn * mo["mu02"] / m00, sgn * mo["mu11"] / m00
    common = math.sqrt(max((mu20 - mu02) ** 2 / 4 + mu11**2, 0.0))
    l1 = max((mu20 + mu02) / 2 + common, 0.0)
    l2 = max((mu20 + mu02) / 2 - common, 0.0)
    return 2 * math.sqrt(l1), 2 * math.sqrt(l2), 0.5 * math.atan2(2 * mu11, mu20 - mu02)


def ellipse_misfit(pts: np.ndarray, *, grid: int = 64) -> float:
    """How far an outline is from an ellipse: the area outside their overlap, over the outline's area.

    The ellipse is the one with the outline's own area centroid and second
    moments (:func:`moment_ellipse`).  The measure does not change under an
    affine map (areas scale alike), so it is counted where that ellipse
    becomes the unit disc, on a ``grid`` x ``grid`` raster over the common box
    of both shapes (filled by one rasteriser, so its boundary rule cancels).
    0 for an ellipse, 0.194 for every rectangle, more for notched or ragged
    outlines: a gas pore's outline is rounded (surface tension), slag's is
    irregular (common practice).
    """
    pts = np.asarray(pts, dtype=np.float64)
    if len(pts) < 3:
        return 0.0
    o = pts.mean(axis=0)
    q = pts - o
    mo = cv2.moments(q.astype(np.float32).reshape(-1, 1, 2))
    if abs(mo["m00"]) <= 1e-12:
        return 0.0
    a, b, th = moment_ellipse(mo)
    if b <= 1e-9 * max(a, 1e-12):
        return 0.0
    c = np.array([mo["m10"] / mo["m00"], mo["m01"] / mo["m00"]])
    ct, st = math.cos(th), math.sin(th)
    u = ((q - c) @ np.array([[ct, -st], [st, ct]])) / np.array([a, b])  # the moment ellipse is the unit disc here
    lo = np.minimum(u.min(axis=0), -1.0)
    hi = np.maximum(u.max(axis=0), 1.0)
    step = float(max(hi - lo)) / grid
    n = int(math.ceil(float(max(hi - lo)) / step)) + 2
    t = np.linspace(0.0, 2 * math.pi, 180, endpoint=False)
    disc = np.c_[np.cos(t), np.sin(t)]
    inside = np.zeros((n, n), np.uint8)
    ell = np.zeros((n, n), np.uint8)
    cv2.fillPoly(inside, [np.round((u - lo) / step * 16).astype(np.int32)], 1, lineType=cv2.LINE_8, shift=4)
    cv2.fillPoly(ell, [np.round((disc - lo) / step * 16).astype(np.int32)], 1, lineType=cv2.LINE_8, shift=4)
    return float((inside ^ ell).sum()) / max(float(inside.sum()), 1.0)
