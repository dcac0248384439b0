"""Colour textures of the table, the plate steel and the fracture itself.

All functions return ``(h, w, 3)`` float32 RGB in 0..~1 for a canvas at
``r`` px/mm, so every feature size below is in millimetres.
"""

from __future__ import annotations

import math

import numpy as np

from . import _noise

TABLES = ("wood", "cardboard", "concrete", "steel", "cloth", "mat", "paper")
PLATES = ("millscale", "ground", "blasted", "rusty")


def _rgb(lum: np.ndarray, col) -> np.ndarray:
    return lum[..., None] * np.asarray(col, np.float32)[None, None, :]


def table(rng: np.random.Generator, shape: tuple[int, int], r: float, kind: str) -> np.ndarray:
    """Background the specimen and card lie on."""
    h, w = shape
    if kind == "wood":
        ang = rng.uniform(0, 180)
        grain = _noise.fractal(rng, shape, 60 * r, cell_y=1.2 * r, angle_deg=ang, octaves=3)
        rings = _noise.value(rng, shape, 200 * r, cell_y=8 * r, angle_deg=ang)
        lum = 0.85 + 0.08 * grain + 0.1 * np.sin(rings * 6.0)
        col = np.array([0.62, 0.45, 0.28]) * rng.uniform(0.7, 1.15)
    elif kind == "cardboard":
        fib = _noise.value(rng, shape, 3 * r, cell_y=0.5 * r, angle_deg=rng.uniform(0, 180))
        lum = 0.9 + 0.04 * fib + 0.06 * _noise.fractal(rng, shape, 40 * r)
        col = np.array([0.66, 0.53, 0.38]) * rng.uniform(0.85, 1.1)
    elif kind == "concrete":
        lum = 0.85 + 0.12 * _noise.fractal(rng, shape, 30 * r, octaves=5)
        sp = _noise.value(rng, shape, max(1.0, 0.8 * r))
        lum += 0.12 * np.clip(sp - 1.6, 0, None) - 0.2 * np.clip(-sp - 2.0, 0, None)
        g = rng.uniform(0.42, 0.62)
        col = np.array([g, g * rng.uniform(0.97, 1.02), g * rng.uniform(0.93, 1.0)])
    elif kind == "steel":
        ang = rng.uniform(0, 180)
        brushed = _noise.value(rng, shape, 30 * r, cell_y=max(0.3 * r, 0.6), angle_deg=ang)
        stains = _noise.blotches(rng, shape, 40 * r, rng.uniform(0.05, 0.3))
        lum = 0.9 + 0.06 * brushed - rng.uniform(0.05, 0.2) * stains + 0.05 * _noise.fractal(rng, shape, 80 * r)
        g = rng.uniform(0.28, 0.45)
        col = np.array([g, g, g * 1.04])
    elif kind == "cloth":
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        p = rng.uniform(0.6, 1.5) * r
        weave = np.sin(xx * (2 * math.pi / p)) * np.sin(yy * (2 * math.pi / p)) if p >= 2.5 else 0.0
        folds = _noise.fractal(rng, shape, 60 * r, octaves=3)
        lum = 0.85 + 0.05 * weave + 0.15 * folds
        col = np.array(rng.choice([[0.3, 0.36, 0.5], [0.45, 0.45, 0.45], [0.55, 0.3, 0.25], [0.6, 0.6, 0.55]]))
    elif kind == "mat":
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        pitch = 10.0 * r
        lw = max(0.25 * r, 0.7)
        gx = np.abs(((xx + rng.uniform(0, pitch)) % pitch) - pitch / 2) > pitch / 2 - lw
        gy = np.abs(((yy + rng.uniform(0, pitch)) % pitch) - pitch / 2) > pitch / 2 - lw
        lum = 0.85 + 0.05 * _noise.fractal(rng, shape, 50 * r) + 0.35 * (gx | gy)
        col = np.array(rng.choice([[0.2, 0.42, 0.3], [0.22, 0.3, 0.5], [0.3, 0.3, 0.32]]))
    else:  # paper
        lum = 0.92 + 0.03 * _noise.fractal(rng, shape, 30 * r) + 0.01 * _noise.value(rng, shape, max(1.0, 0.3 * r))
        g = rng.uniform(0.7, 0.88)
        col = np.array([g, g * 0.99, g * 0.96])
    return _rgb(np.asarray(lum, np.float32), col)


def plate(rng: np.random.Generator, shape: tuple[int, int], r: float, kind: str) -> tuple[np.ndarray, np.ndarray]:
    """Plate steel around the face; returns (rgb, rust coverage 0..1)."""
    h, w = shape
    rust = np.zeros(shape, np.float32)
    if kind == "millscale":
        lum = 0.9 + 0.1 * _noise.fractal(rng, shape, 12 * r, octaves=4)
        flakes = _noise.blotches(rng, shape, 6 * r, rng.uniform(0.05, 0.25))
        lum += 0.25 * flakes
        g = rng.uniform(0.22, 0.34)
        col = np.array([g * 0.95, g, g * 1.1])
    elif kind == "ground":
        ang = rng.uniform(0, 180)
        marks = _noise.fractal(rng, shape, 25 * r, cell_y=max(0.12 * r, 0.6), angle_deg=ang, octaves=3)
        lum = 0.92 + 0.07 * marks + 0.04 * _noise.fractal(rng, shape, 20 * r)
        g = rng.uniform(0.48, 0.66)
        col = np.array([g, g, g * 1.02])
    elif kind == "blasted":
        lum = 0.92 + 0.06 * _noise.value(rng, shape, max(1.0, 0.15 * r)) + 0.05 * _noise.fractal(rng, shape, 15 * r)
        g = rng.uniform(0.4, 0.55)
        col = np.array([g, g * 0.99, g * 0.97])
    else:  # rusty millscale
        lum = 0.9 + 0.1 * _noise.fractal(rng, shape, 12 * r, octaves=4)
        g = rng.uniform(0.25, 0.36)
        col = np.array([g * 0.97, g, g * 1.05])
    img = _rgb(np.asarray(lum, np.float32), col)
    if kind == "rusty" or rng.random() < 0.35:
        cover = rng.uniform(0.05, 0.3 if kind == "rusty" else 0.12)
        rust = _noise.blotches(rng, shape, rng.uniform(3, 10) * r, cover, edge=0.6) * np.float32(rng.uniform(0.4, 0.8))
        rc = np.array([0.44, 0.28, 0.17], np.float32) * np.float32(rng.uniform(0.7, 1.15))
        rl = (0.8 + 0.3 * _noise.fractal(rng, shape, 1.5 * r, octaves=3))[..., None]
        img = img * (1 - rust[..., None]) + rc * rl * rust[..., None]
    return img.astype(np.float32), rust


def fracture(rng: np.random.Generator, shape: tuple[int, int], r: float, light_az: float) -> tuple[np.ndarray, dict]:
    """Granular fracture texture: crystalline facets, fibrous streaks, relief shading.

    Returns (rgb, description) where description records the grain size and
    the mix, for the truth's ``render`` notes.
    """
    grain = float(rng.uniform(0.05, 0.3))
    fib_mix = float(rng.beta(1.4, 1.8))
    fib_ang = float(rng.normal(90.0, 25.0))  # fibres mostly run across the weld
    level, tilt = _noise.facets(rng, shape, max(grain * r, 1.2), grids=2)
    sparkle_p = rng.uniform(0.02, 0.08)
    cryst = 0.45 + 0.18 * level + 0.35 * tilt
    cryst += np.float32(rng.uniform(0.2, 0.45)) * np.clip((level - (1 - sparkle_p)) / sparkle_p, 0, 1)
    # ductile, fibrous fracture: short directional fibres over a fine dimpled ground
    fib_len = rng.uniform(0.4, 1.2)
    fib = _noise.fractal(rng, shape, fib_len * r, cell_y=max(0.1 * r, 0.6), angle_deg=fib_ang, octaves=3)
    dimples = _noise.value(rng, shape, max(0.08 * r, 0.6))
    fibrous = 0.5 + 0.07 * fib + 0.06 * dimples
    fine = _noise.value(rng, shape, max(0.05 * r, 0.6))
    relief = _noise.fractal(rng, shape, rng.uniform(1.5, 4.0) * r, octaves=4) * np.float32(rng.uniform(0.08, 0.35) * r)
    shade = _noise.shade(relief, light_az, strength=0.4)
    lum = (1 - fib_mix) * cryst + fib_mix * fibrous + 0.05 * fine + shade
    lum = np.maximum(lum.astype(np.float32), np.float32(0.05))
    g = rng.uniform(0.8, 1.15)
    tint = np.array([1.0, 0.99, 0.96]) * g if rng.random() < 0.6 else np.array([0.97, 0.98, 1.0]) * g
    return _rgb(lum, tint), {"grain_mm": grain, "fibrous_mix": fib_mix}
