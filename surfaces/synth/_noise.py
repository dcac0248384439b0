"""Procedural noise fields for the synthetic photos (all float32, seeded).

Every function takes a :class:`numpy.random.Generator` and an output shape
``(rows, cols)`` and returns a ``float32`` array; sizes are given in canvas
pixels (the callers convert from mm).  Upsampled random grids
(``cv2.resize``) keep them fast on multi-megapixel canvases.
"""

from __future__ import annotations

import math

import cv2
import numpy as np


def white(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Unit-variance Gaussian white noise, ``float32``.

    Uses OpenCV's generator seeded from ``rng`` (several times faster than
    NumPy's for tens of megapixels, and deterministic for a given seed).
    """
    out = np.empty(shape, np.float32)
    cv2.setRNGSeed(int(rng.integers(1, 2**31 - 1)))
    cv2.randn(out, 0.0, 1.0)
    return out


def value(
    rng: np.random.Generator,
    shape: tuple[int, int],
    cell: float,
    *,
    cell_y: float | None = None,
    angle_deg: float = 0.0,
) -> np.ndarray:
    """Smooth value noise, zero mean, unit-ish variance.

    Parameters
    ----------
    cell : float
        Feature size along the (rotated) x axis in pixels.
    cell_y : float, optional
        Feature size across; ``None`` for isotropic noise.
    angle_deg : float
        Direction of the x feature axis, degrees counter-clockwise from the
        column axis (only used when anisotropic).
    """
    h, w = shape
    cx = max(float(cell), 0.5)
    cy = max(float(cell if cell_y is None else cell_y), 0.5)
    aniso = abs(cx - cy) > 1e-6 and abs(math.sin(math.radians(angle_deg))) > 1e-3
    if aniso:
        side = int(math.ceil(math.hypot(h, w))) + 4
        big = value(rng, (side, side), cx, cell_y=cy)
        c = (side - 1) / 2.0
        M = cv2.getRotationMatrix2D((c, c), angle_deg, 1.0)
        M[0, 2] -= c - (w - 1) / 2.0
        M[1, 2] -= c - (h - 1) / 2.0
        return cv2.warpAffine(big, M, (w, h), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)
    if cx < 1.5 and cy < 1.5:
        n = white(rng, shape)
        s = 0.5 * max(cx, cy)
        if s <= 0.3:
            return n
        n = cv2.GaussianBlur(n, (0, 0), s)
        n *= np.float32(1.0 / max(float(n[::7, ::7].std()), 1e-6))
        return n
    gh = int(math.ceil(h / cy)) + 3
    gw = int(math.ceil(w / cx)) + 3
    grid = rng.standard_normal((gh, gw)).astype(np.float32)
    up = cv2.resize(grid, (int(round(gw * cx)), int(round(gh * cy))), interpolation=cv2.INTER_CUBIC)
    oy = int(rng.integers(0, max(1, int(cy))))
    ox = int(rng.integers(0, max(1, int(cx))))
    out = up[oy : oy + h, ox : ox + w]
    if out.shape != (h, w):  # rounding at tiny sizes
        out = cv2.resize(up, (w, h), interpolation=cv2.INTER_LINEAR)
    return np.ascontiguousarray(out)


def fractal(
    rng: np.random.Generator,
    shape: tuple[int, int],
    cell: float,
    *,
    octaves: int = 4,
    gain: float = 0.5,
    cell_y: float | None = None,
    angle_deg: float = 0.0,
) -> np.ndarray:
    """Sum of ``octaves`` value-noise layers, each half the size of the last."""
    out = np.zeros(shape, np.float32)
    amp, total = 1.0, 0.0
    for k in range(octaves):
        f = 2.0**k
        cy = None if cell_y is None else cell_y / f
        layer = value(rng, shape, cell / f, cell_y=cy, angle_deg=angle_deg)
        out += np.float32(amp) * layer
        total += amp * amp
        amp *= gain
    out *= np.float32(1.0 / math.sqrt(total))
    return out


def facets(
    rng: np.random.Generator,
    shape: tuple[int, int],
    cell: float,
    *,
    grids: int = 3,
) -> tuple[np.ndarray, np.ndarray]:
    """Polygonal facet field (crystalline cleavage facets).

    Several rotated, domain-warped square grids are overlaid; each pixel takes
    the cell of the grid with the highest per-cell priority, which leaves
    irregular polygonal cells with straight edges at several angles.

    Returns
    -------
    level : (rows, cols) float32 ndarray
        Per-facet uniform value in [0, 1).
    tilt : (rows, cols) float32 ndarray
        Within-facet linear ramp in about [-0.5, 0.5] (facet tilt shading).
    """
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    best = np.full(shape, -1.0, np.float32)
    level = np.zeros(shape, np.float32)
    tilt = np.zeros(shape, np.float32)
    for _ in range(grids):
        th = rng.uniform(0.0, math.pi)
        c, s = np.float32(math.cos(th)), np.float32(math.sin(th))
        sc = np.float32(cell * rng.uniform(0.75, 1.35))
        warp = np.float32(0.35 * sc)
        u = (xx * c + yy * s) / sc + value(rng, shape, 1.7 * sc) * (warp / sc)
        v = (yy * c - xx * s) / sc + value(rng, shape, 1.7 * sc) * (warp / sc)
        iu = np.floor(u).astype(np.int32)
        iv = np.floor(v).astype(np.int32)
        u -= iu
        v -= iv
        iu -= iu.min()
        iv -= iv.min()
        tab = rng.random((4, int(iv.max()) + 1, int(iu.max()) + 1), dtype=np.float32)
        pri = tab[0][iv, iu]
        take = pri > best
        best = np.where(take, pri, best)
        level = np.where(take, tab[1][iv, iu], level)
        ramp = (tab[2][iv, iu] - 0.5) * (u - 0.5) + (tab[3][iv, iu] - 0.5) * (v - 0.5)
        tilt = np.where(take, ramp, tilt)
    return level, tilt


def shade(height: np.ndarray, light_dir_deg: float, *, strength: float = 1.0) -> np.ndarray:
    """Directional shading of a height field: ``-grad(h) . light``, float32.

    ``light_dir_deg`` is the azimuth the light comes *from* in canvas axes
    (0 = from +col, 90 = from +row).
    """
    gx = cv2.Sobel(height, cv2.CV_32F, 1, 0, ksize=3) * np.float32(0.125)
    gy = cv2.Sobel(height, cv2.CV_32F, 0, 1, ksize=3) * np.float32(0.125)
    a = math.radians(light_dir_deg)
    return (gx * np.float32(math.cos(a)) + gy * np.float32(math.sin(a))) * np.float32(strength)


def blotches(
    rng: np.random.Generator, shape: tuple[int, int], cell: float, cover: float, *, edge: float = 0.25
) -> np.ndarray:
    """Soft-edged patches covering about ``cover`` (0..1) of the area, float32 0..1."""
    n = fractal(rng, shape, cell, octaves=4, gain=0.55)
    thr = np.float32(np.quantile(n[:: max(1, shape[0] // 64), :: max(1, shape[1] // 64)], 1.0 - cover))
    return np.clip((n - thr) / np.float32(edge) + 0.5, 0.0, 1.0)
