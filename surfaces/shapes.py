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
