"""Imperfection outlines in face millimetres and their exact measures.

Shapes are fine closed polygons ``(N, 2)`` of ``(x, y)`` mm in face axes
(x along the weld / coupon, y across).  Simple shapes (circle, ellipse,
capsule) also carry analytic measures, which the truth uses instead of the
polygon values; irregular ones are measured on their polygon (thousands of
vertices, so the polygon error is far below any photo's resolution).
"""

from __future__ import annotations

import math

import numpy as np

N_VERTS = 256  # even, so a circle's opposite vertices are exactly 2r apart


# --------------------------------------------------------------------------- measures
def polygon_area(poly: np.ndarray) -> float:
    """Shoelace area of a simple polygon, mm^2."""
    x, y = poly[:, 0], poly[:, 1]
    return float(0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def polygon_centroid(poly: np.ndarray) -> tuple[float, float]:
    """Area centroid of a simple polygon (x, y)."""
    x, y = poly[:, 0], poly[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cr = x * y1 - x1 * y
    a = cr.sum() / 2.0
    if abs(a) < 1e-12:
        return float(x.mean()), float(y.mean())
    return float(((x + x1) * cr).sum() / (6 * a)), float(((y + y1) * cr).sum() / (6 * a))


def convex_hull(pts: np.ndarray) -> np.ndarray:
    """Andrew's monotone chain; returns hull vertices counter-clockwise."""
    p = np.unique(np.round(np.asarray(pts, float), 12), axis=0)
    if len(p) <= 2:
        return p

    def cross(o, a, b):
        return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])

    lower: list = []
    for q in p:
        while len(lower) >= 2 and cross(lower[-2], lower[-1], q) <= 0:
            lower.pop()
        lower.append(q)
    upper: list = []
    for q in p[::-1]:
        while len(upper) >= 2 and cross(upper[-2], upper[-1], q) <= 0:
            upper.pop()
        upper.append(q)
    return np.array(lower[:-1] + upper[:-1])


def feret(poly: np.ndarray) -> tuple[float, float]:
    """(max, min) Feret diameter of a polygon: greatest and least caliper width."""
    h = convex_hull(poly)
    if len(h) < 3:
        d = float(np.ptp(h, axis=0).max()) if len(h) else 0.0
        return d, 0.0
    diff = h[:, None, :] - h[None, :, :]
    dmax = float(np.sqrt((diff**2).sum(-1)).max())
    e = np.roll(h, -1, axis=0) - h
    n = np.c_[-e[:, 1], e[:, 0]] / np.linalg.norm(e, axis=1)[:, None]
    proj = h @ n.T  # (points, edges)
    dmin = float((proj.max(0) - proj.min(0)).min())
    return dmax, dmin


def measures(poly: np.ndarray, analytic: dict | None = None) -> dict:
    """Truth measures of an outline in face mm (analytic values win).

    Returns greatest_mm (max Feret), width_mm (min Feret), along_mm / across_mm
    (extent along face x / y), area_mm2, centroid (x, y) and extent x0..y1.
    """
    gmax, gmin = feret(poly)
    cx, cy = polygon_centroid(poly)
    out = {
        "greatest_mm": gmax,
        "width_mm": gmin,
        "along_mm": float(np.ptp(poly[:, 0])),
        "across_mm": float(np.ptp(poly[:, 1])),
        "area_mm2": polygon_area(poly),
        "centroid": (cx, cy),
        "extent": (float(poly[:, 0].min()), float(poly[:, 0].max()), float(poly[:, 1].min()), float(poly[:, 1].max())),
    }
    if analytic:
        out.update(analytic)
    return out


# --------------------------------------------------------------------------- shapes
def ellipse(cx: float, cy: float, a: float, b: float, angle_deg: float = 0.0, n: int = N_VERTS):
    """Ellipse with semi-axes ``a >= b`` (a along ``angle_deg``); returns (poly, analytic)."""
    if b > a:
        a, b, angle_deg = b, a, angle_deg + 90.0
    t = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    ex, ey = a * np.cos(t), b * np.sin(t)
    poly = np.c_[cx + c * ex - s * ey, cy + s * ex + c * ey]
    # analytic extents of a rotated ellipse (bounding box half-sides)
    hx = math.sqrt((a * c) ** 2 + (b * s) ** 2)
    hy = math.sqrt((a * s) ** 2 + (b * c) ** 2)
    analytic = {
        "greatest_mm": 2 * a,
        "width_mm": 2 * b,
        "area_mm2": math.pi * a * b,
        "along_mm": 2 * hx,
        "across_mm": 2 * hy,
        "centroid": (cx, cy),
        "extent": (cx - hx, cx + hx, cy - hy, cy + hy),
    }
    return poly, analytic


def capsule(cx: float, cy: float, length: float, r: float, angle_deg: float = 0.0, n: int = N_VERTS):
    """Stadium of total length ``length`` and radius ``r`` (worm-hole); (poly, analytic)."""
    half = max(length / 2.0 - r, 0.0)
    k = n // 2
    t1 = np.linspace(-np.pi / 2, np.pi / 2, k)
    t2 = t1 + np.pi
    right = np.c_[half + r * np.cos(t1), r * np.sin(t1)]
    left = np.c_[-half + r * np.cos(t2), r * np.sin(t2)]
    loc = np.r_[right, left]
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    poly = np.c_[cx + c * loc[:, 0] - s * loc[:, 1], cy + s * loc[:, 0] + c * loc[:, 1]]
    hx = half * abs(c) + r
    hy = half * abs(s) + r
    analytic = {
        "greatest_mm": 2 * half + 2 * r,
        "width_mm": 2 * r,
        "area_mm2": math.pi * r * r + 4 * half * r,
        "along_mm": 2 * hx,
        "across_mm": 2 * hy,
        "centroid": (cx, cy),
        "extent": (cx - hx, cx + hx, cy - hy, cy + hy),
    }
    return poly, analytic


def blob(rng, cx: float, cy: float, a: float, b: float, angle_deg: float, *, rough: float = 0.18, n: int = 720):
    """Irregular rounded outline around an ellipse (slag): radius modulated by low harmonics."""
    t = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    r = np.ones_like(t)
    for k in range(2, 8):
        r += rng.normal(0, rough / k**0.9) * np.cos(k * t + rng.uniform(0, 2 * np.pi))
    r = np.clip(r, 0.45, 1.6)
    ex, ey = a * r * np.cos(t), b * r * np.sin(t)
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    return np.c_[cx + c * ex - s * ey, cy + s * ex + c * ey]


def band(rng, x0: float, x1: float, y_edge: float, width: float, *, sign: float = 1.0, n: int = 400):
    """Band from the straight edge ``y = y_edge`` into the face (``sign`` +1/-1).

    The free side wanders smoothly and the ends close within about one width.
    """
    x = np.linspace(x0, x1, n)
    L = x1 - x0
    ramp = min(max(width * 1.2, 0.3), L / 3.0)
    taper = np.clip(np.minimum(x - x0, x1 - x) / ramp, 0.0, 1.0)
    taper = np.sqrt(1 - (1 - taper) ** 2)  # quarter-ellipse ends
    wav = np.ones_like(x)
    for k in range(1, 6):
        wav += rng.normal(0, 0.12 / k) * np.sin(2 * np.pi * k * (x - x0) / max(L, 4 * width) + rng.uniform(0, 6.3))
    free = y_edge + sign * width * taper * np.clip(wav, 0.6, 1.4)
    edge = np.full_like(x, y_edge)
    return np.r_[np.c_[x, free], np.c_[x[::-1], edge[::-1]]]


def strip(rng, x0: float, x1: float, yc: float, width: float, *, n: int = 400):
    """Free-standing band along x centred on ``yc`` (side-wall lack of fusion)."""
    x = np.linspace(x0, x1, n)
    L = x1 - x0
    ramp = min(max(width, 0.3), L / 3.0)
    taper = np.clip(np.minimum(x - x0, x1 - x) / ramp, 0.0, 1.0)
    taper = np.sqrt(1 - (1 - taper) ** 2)
    wander = np.zeros_like(x)
    for k in range(1, 4):
        wander += rng.normal(0, 0.12 * width) * np.sin(2 * np.pi * k * (x - x0) / L + rng.uniform(0, 6.3))
    half = 0.5 * width * taper
    return np.r_[np.c_[x, yc + wander + half], np.c_[x[::-1], (yc + wander - half)[::-1]]]


def crack(
    rng, x0: float, y0: float, length: float, width: float, angle_deg: float, *, jag: float = 0.35, open_start: bool = False
):
    """Thin jagged crack of chord ``length`` and peak ``width``, sharp ends.

    The centre line is a random walk of short straight segments; the
    half-width tapers to zero at both ends (``open_start``: widest at the
    start, for a crack opening from an edge).  Returns (poly, centreline).
    """
    nseg = max(6, int(length / 0.25))
    t = np.linspace(0.0, 1.0, nseg + 1)
    off = np.cumsum(rng.normal(0, jag * length / nseg, nseg + 1))
    off -= np.linspace(off[0], off[-1], nseg + 1)  # ends on the chord
    off += rng.normal(0, 0.25 * jag * length / nseg, nseg + 1) * (np.arange(nseg + 1) % 2 * 2 - 1)
    off[0] = off[-1] = 0.0
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    px = x0 + c * t * length - s * off
    py = y0 + s * t * length + c * off
    centre = np.c_[px, py]
    d = np.gradient(centre, axis=0)
    d /= np.linalg.norm(d, axis=1)[:, None]
    nrm = np.c_[-d[:, 1], d[:, 0]]
    if open_start:
        prof = (1 - t) ** 0.7 * (0.75 + 0.25 * rng.random(nseg + 1))
        prof[0] = 1.0
    else:
        prof = np.sin(np.pi * t) ** 0.6 * (0.75 + 0.25 * rng.random(nseg + 1))
    hw = 0.5 * width * prof
    hw[-1] = 0.0
    if open_start:
        poly = np.r_[centre + nrm * hw[:, None], (centre - nrm * hw[:, None])[::-1][1:]]
    else:
        hw[0] = 0.0
        poly = np.r_[centre + nrm * hw[:, None], (centre - nrm * hw[:, None])[::-1][1:-1]]
    return poly, centre


def point_in_polygon(pts: np.ndarray, poly: np.ndarray) -> np.ndarray:
    """Even-odd rule, vectorised over ``pts`` (M, 2); returns bool (M,)."""
    x, y = pts[:, 0][:, None], pts[:, 1][:, None]
    x1, y1 = poly[:, 0][None, :], poly[:, 1][None, :]
    x2, y2 = np.roll(poly[:, 0], -1)[None, :], np.roll(poly[:, 1], -1)[None, :]
    cond = (y1 > y) != (y2 > y)
    with np.errstate(divide="ignore", invalid="ignore"):
        xi = x1 + (y - y1) * (x2 - x1) / (y2 - y1)
    return ((cond & (x < xi)).sum(1) % 2) == 1
