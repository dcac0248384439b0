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
    hull = convex_hull(pts)
    if len(hull) == 1:
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
    anisotropic grids.
    """
    pts = np.asarray(pts, dtype=np.float64)
    sx, sy = (px_per_mm, px_per_mm) if np.isscalar(px_per_mm) else px_per_mm
    mm = pts / np.array([sx, sy])
    area = polygon_area(mm)
    hull = convex_hull(mm)
    hull_area = polygon_area(hull) if len(hull) >= 3 else 0.0
    per = float(np.linalg.norm(np.roll(mm, -1, 0) - mm, axis=1).sum())
    hper = float(np.linalg.norm(np.roll(hull, -1, 0) - hull, axis=1).sum()) if len(hull) >= 2 else per
    gmax, gmin, ang = feret(mm)
    # centroid of the polygon (area-weighted)
    x, y = mm[:, 0], mm[:, 1]
    cross = x * np.roll(y, -1) - np.roll(x, -1) * y
    a2 = cross.sum()
    if abs(a2) > 1e-12:
        cx = float(((x + np.roll(x, -1)) * cross).sum() / (3 * a2))
        cy = float(((y + np.roll(y, -1)) * cross).sum() / (3 * a2))
    else:
        cx, cy = float(x.mean()), float(y.mean())
    return {
        "area_mm2": area,
        "perimeter_mm": per,
        "greatest_mm": gmax,
        "width_mm": gmin,
        "angle_rad": ang,
        "solidity": area / hull_area if hull_area > 0 else 1.0,
        "aspect": gmax / gmin if gmin > 1e-9 else float("inf"),
        "roughness": per / hper if hper > 0 else 1.0,
        "along_mm": float(x.max() - x.min()),
        "across_mm": float(y.max() - y.min()),
        "x0_mm": float(x.min()),
        "x1_mm": float(x.max()),
        "y0_mm": float(y.min()),
        "y1_mm": float(y.max()),
        "cx_mm": cx,
        "cy_mm": cy,
        "cx_px": cx * sx,
        "cy_px": cy * sy,
        "y0_px": float(pts[:, 1].min()),
        "y1_px": float(pts[:, 1].max()),
    }
