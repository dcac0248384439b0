"""Painting imperfections and distractors onto a face canvas.

Each imperfection is a :class:`Defect` whose outline ``poly`` is in the
canvas' frame millimetres; painting covers exactly that outline (antialiased
coverage from ``cv2.fillPoly``), so the truth outline is the visible one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np

from ..geometry import apply_h
from . import _noise
from ._render import fill_alpha


@dataclass
class Defect:
    kind: str  # pore | inclusion | unfused | crack
    iso6520: str
    poly: np.ndarray  # (N, 2) frame mm (face axes; surface axes on a bend coupon)
    analytic: dict | None = None
    shape: dict = field(default_factory=dict)  # construction parameters (JSON-able)
    extra: dict = field(default_factory=dict)  # kind-specific truth (cause, starts_at_edge...)


@dataclass(frozen=True)
class Light:
    azimuth_deg: float  # direction the light comes from, canvas axes (0 = +col)
    elevation_deg: float

    def vec(self) -> np.ndarray:
        a, e = math.radians(self.azimuth_deg), math.radians(self.elevation_deg)
        return np.array([math.cos(a) * math.cos(e), math.sin(a) * math.cos(e), math.sin(e)], np.float32)


def _window(shape, poly_px, pad):
    h, w = shape
    x0 = max(int(math.floor(poly_px[:, 0].min())) - pad, 0)
    y0 = max(int(math.floor(poly_px[:, 1].min())) - pad, 0)
    x1 = min(int(math.ceil(poly_px[:, 0].max())) + pad + 1, w)
    y1 = min(int(math.ceil(poly_px[:, 1].max())) + pad + 1, h)
    return x0, y0, x1, y1


def _blend(rgb, sl, alpha, col):
    sub = rgb[sl]
    sub *= (1.0 - alpha)[..., None]
    sub += col * alpha[..., None]


def _depth_from_mask(alpha: np.ndarray) -> np.ndarray:
    """Smooth dome profile 0..1 inside a mask (distance transform, normalised)."""
    m = (alpha > 0.5).astype(np.uint8)
    if not m.any():
        return np.zeros_like(alpha)
    d = cv2.distanceTransform(m, cv2.DIST_L2, 5)
    d /= max(float(d.max()), 1e-6)
    return np.sqrt(np.clip(d * (2 - d), 0, 1)).astype(np.float32)


def _lit_cavity(depth: np.ndarray, scale_px: float, light: Light, *, gloss: float):
    """Lambert + specular terms of a concave cavity of normalised ``depth``."""
    gx = cv2.Sobel(depth, cv2.CV_32F, 1, 0, ksize=3) * np.float32(scale_px / 8.0)
    gy = cv2.Sobel(depth, cv2.CV_32F, 0, 1, ksize=3) * np.float32(scale_px / 8.0)
    nz = 1.0 / np.sqrt(1 + gx * gx + gy * gy)
    nx, ny = gx * nz, gy * nz  # walls face inwards (height = -depth)
    L = light.vec()
    lam = np.clip(nx * L[0] + ny * L[1] + nz * L[2], 0, 1)
    hv = L + np.array([0, 0, 1], np.float32)
    hv /= np.linalg.norm(hv)
    cosh = np.clip(nx * hv[0] + ny * hv[1] + nz * hv[2], 0, 1)
    spec = cosh ** np.float32(gloss)
    return lam, spec


def paint_defect(rgb: np.ndarray, A: np.ndarray, d: Defect, rng: np.random.Generator, light: Light) -> None:
    """Paint ``d`` into ``rgb`` (float32, in place); ``A`` maps canvas px -> frame mm."""
    r = 1.0 / A[0, 0]
    poly_px = apply_h(np.linalg.inv(A), d.poly)
    x0, y0, x1, y1 = _window(rgb.shape[:2], poly_px, pad=3)
    if x1 <= x0 or y1 <= y0:
        return
    sl = (slice(y0, y1), slice(x0, x1))
    alpha = fill_alpha((y1 - y0, x1 - x0), [poly_px - [x0, y0]])
    shp = alpha.shape
    if d.kind == "pore":
        depth = _pore_depth(d, A, x0, y0, shp)
        size_px = r * max(d.analytic["width_mm"] if d.analytic else 1.0, 0.3)
        lam, spec = _lit_cavity(depth, 0.6 * size_px, light, gloss=float(rng.uniform(60, 400)))
        base = np.float32(rng.uniform(0.03, 0.1))
        wall = np.float32(rng.uniform(0.25, 0.55))
        # only the wall facing the light catches it; the bottom and the near wall stay dark
        L = light.vec()
        yy, xx = np.mgrid[0 : shp[0], 0 : shp[1]].astype(np.float32)
        cxp, cyp = (apply_h(np.linalg.inv(A), [[d.shape["cx_mm"], d.shape["cy_mm"]]])[0] - [x0, y0]).astype(np.float32)
        toward = ((xx - cxp) * L[0] + (yy - cyp) * L[1]) / np.float32(max(0.5 * size_px, 1.0))
        far = np.clip(-toward, 0, 1)  # far side from the light is lit
        tone = base + wall * lam**2 * (1 - depth) ** 1.5 * (0.35 + 0.65 * far)
        tone += np.float32(rng.uniform(0.3, 0.8)) * spec * (1 - depth) * far
        tint = np.array([1.0, 0.98, 0.95], np.float32) * np.float32(rng.uniform(0.9, 1.1))
        col = tone[..., None] * tint
        # faint bright lip where the cavity meets the face
        lip = np.clip(1.0 - depth * 6.0, 0, 1) * np.float32(rng.uniform(0.0, 0.15)) * far
        col += lip[..., None]
    elif d.kind == "inclusion":
        depth = _depth_from_mask(alpha)
        brown = np.array(
            [[0.16, 0.13, 0.1], [0.12, 0.12, 0.13], [0.19, 0.15, 0.11], [0.1, 0.09, 0.09]][int(rng.integers(0, 4))],
            np.float32,
        )
        mott = 1.0 + 0.25 * _noise.fractal(rng, shp, max(2.0, 0.4 * r), octaves=3)
        lam, spec = _lit_cavity(depth, 0.4 * r, light, gloss=float(rng.uniform(20, 80)))
        glass = np.clip(_noise.value(rng, shp, max(1.5, 0.15 * r)) - 1.4, 0, None) * np.float32(0.6)
        tone = (0.7 + 0.5 * lam) * mott
        col = tone[..., None] * brown + (0.35 * spec + glass)[..., None]
    elif d.kind == "unfused":
        tint = np.array(d.shape.get("tint_rgb", [0.5, 0.5, 0.5]), np.float32)
        smooth = 1.0 + 0.06 * _noise.value(rng, shp, max(3.0, 2.0 * r))
        yy = np.arange(shp[0], dtype=np.float32)[:, None] / max(shp[0], 1)
        sheen = 1.0 + np.float32(rng.uniform(-0.12, 0.12)) * (yy - 0.5)
        col = (smooth * sheen)[..., None] * tint
    else:  # crack
        tone = np.float32(rng.uniform(0.02, 0.08))
        col = np.full(shp + (3,), tone, np.float32)
        # the shadowed lips: slight darkening just around the opening
        halo = cv2.GaussianBlur(alpha, (0, 0), max(0.8, 0.08 * r))
        sub = rgb[sl]
        sub *= (1.0 - 0.25 * halo * (1 - alpha))[..., None]
    _blend(rgb, sl, alpha, col.astype(np.float32))


def _pore_depth(d: Defect, A: np.ndarray, x0: int, y0: int, shp) -> np.ndarray:
    """Analytic bowl depth 0..1 of a circular / elliptical / capsule pore."""
    yy, xx = np.mgrid[0:shp[0], 0:shp[1]].astype(np.float32)
    X = (xx + x0) * np.float32(A[0, 0]) + np.float32(A[0, 2])
    Y = (yy + y0) * np.float32(A[1, 1]) + np.float32(A[1, 2])
    s = d.shape
    cx, cy = s["cx_mm"], s["cy_mm"]
    c, sn = math.cos(math.radians(s.get("angle_deg", 0.0))), math.sin(math.radians(s.get("angle_deg", 0.0)))
    u = (X - cx) * c + (Y - cy) * sn
    v = -(X - cx) * sn + (Y - cy) * c
    if s["shape"] == "capsule":
        half = max(s["length_mm"] / 2 - s["r_mm"], 0.0)
        u = (u - np.clip(u, -half, half)) / s["r_mm"]
        v = v / s["r_mm"]
    else:
        u = u / s["a_mm"]
        v = v / s["b_mm"]
    return np.sqrt(np.clip(1.0 - (u * u + v * v), 0.0, 1.0)).astype(np.float32)


def paint_speck(rgb: np.ndarray, A: np.ndarray, x: float, y: float, d_mm: float, tone: float) -> None:
    r = 1.0 / A[0, 0]
    p = apply_h(np.linalg.inv(A), [[x, y]])[0]
    rad = max(0.5 * d_mm * r, 0.35)
    x0, y0, x1, y1 = _window(rgb.shape[:2], np.array([p - rad, p + rad]), pad=2)
    if x1 <= x0 or y1 <= y0:
        return
    yy, xx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dd = np.sqrt((xx - p[0]) ** 2 + (yy - p[1]) ** 2)
    a = np.clip(rad + 0.5 - dd, 0, 1) * np.float32(min(1.0, rad / 0.8))
    _blend(rgb, (slice(y0, y1), slice(x0, x1)), a.astype(np.float32), np.full(a.shape + (3,), tone, np.float32))


def paint_smudge(rgb: np.ndarray, A: np.ndarray, x: float, y: float, size_mm: float, rng, *, strength: float) -> None:
    r = 1.0 / A[0, 0]
    p = apply_h(np.linalg.inv(A), [[x, y]])[0]
    rad = 0.5 * size_mm * r
    x0, y0, x1, y1 = _window(rgb.shape[:2], np.array([p - 1.6 * rad, p + 1.6 * rad]), pad=2)
    if x1 <= x0 or y1 <= y0:
        return
    yy, xx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    e = rng.uniform(0.5, 1.0)
    dd = ((xx - p[0]) / rad) ** 2 + ((yy - p[1]) / (rad * e)) ** 2
    n = _noise.value(rng, dd.shape, max(2.0, 0.4 * rad))
    a = np.exp(-dd * 1.2) * np.clip(0.7 + 0.3 * n, 0, 1) * np.float32(strength)
    sub = rgb[y0:y1, x0:x1]
    target = sub.reshape(-1, 3).mean(0) * np.array([0.82, 0.78, 0.7], np.float32) * np.float32(rng.uniform(0.7, 1.0))
    sub *= (1.0 - a)[..., None]
    sub += a[..., None] * target.astype(np.float32)
