"""The printed reference card as it appears in a synthetic photo.

A white card carrying one or two DICT_4X4_50 markers (drawn by OpenCV's own
``cv2.aruco.generateImageMarker``), a quiet zone of at least one module, a
caption and optionally a millimetre ruler.  Units: card mm, origin at the
card's top-left corner, x to the right, y down.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..model import SurfacesError
from . import _noise
from ._render import Layer, grid_A

MODULES = 6  # 4x4 data bits + a one-module black border on each side


def marker_image(marker_id: int, side_px: int) -> np.ndarray:
    """The DICT_4X4_50 marker ``marker_id`` as a ``(side_px, side_px)`` uint8 image.

    Black outer square with no white margin (one-module border): OpenCV's
    pattern (``cv2.aruco.generateImageMarker`` at 6 px) with every module
    ``side_px / 6`` whole pixels, as the card's PDF draws it (vector
    modules).  OpenCV's generator at the full size is not used: at some
    sizes (module 49, 98, 103, 107, 161, 187, 196 or 197 px of 3-200) it
    rounds the inner edges one pixel off the grid, and a card rendered so
    would carry a print error the truth does not know of.  A side that is
    not a multiple of 6 falls back to OpenCV's drawing.

    Examples
    --------
    >>> marker_image(7, 60).shape
    (60, 60)
    """
    if not (0 <= int(marker_id) < 50):
        raise SurfacesError(f"marker id {marker_id} is outside DICT_4X4_50 (use 0..49)")
    if int(side_px) < MODULES:
        raise SurfacesError(f"marker side {side_px} px is too small (use at least {MODULES} px)")
    d = cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50)
    if int(side_px) % MODULES:
        return cv2.aruco.generateImageMarker(d, int(marker_id), int(side_px), borderBits=1)
    m = int(side_px) // MODULES
    return np.kron(cv2.aruco.generateImageMarker(d, int(marker_id), MODULES, borderBits=1), np.ones((m, m), np.uint8))


@dataclass
class Card:
    layer: Layer  # A maps canvas px -> card mm
    size_mm: tuple[float, float]  # (width, height)
    markers: list[tuple[int, np.ndarray]]  # (id, 4x2 corners in card mm, OpenCV order)
    marker_mm: float
    ruler: bool


def make_card(
    rng: np.random.Generator,
    *,
    marker_mm: float,
    ids: list[int],
    ruler: bool,
    px_per_mm: float,
    max_pixels: float = 4e6,
) -> Card:
    """Render the card canvas at about ``px_per_mm`` with whole-pixel modules."""
    S = float(marker_mm)
    n = len(ids)
    quiet = S / MODULES * rng.uniform(1.2, 2.5)
    gap = S / MODULES * rng.uniform(2.0, 4.0)
    cap_h = max(3.5, 0.16 * S)
    rul_h = 7.0 if ruler else 0.0
    W = 2 * quiet + n * S + (n - 1) * gap
    Hc = 2 * quiet + S + cap_h + rul_h
    if ruler:
        W = max(W, 2 * quiet + 50.0)
    # module in whole canvas pixels so the marker edges fall on pixel edges
    r_goal = min(px_per_mm, math.sqrt(max_pixels / (W * Hc)))
    m_px = max(3, int(round(S / MODULES * r_goal)))
    r = MODULES * m_px / S
    cw, ch = int(math.ceil(W * r)), int(math.ceil(Hc * r))
    paper = np.array(rng.choice([[0.92, 0.92, 0.9], [0.95, 0.94, 0.92], [0.9, 0.91, 0.93], [0.93, 0.92, 0.86]]), np.float32)
    paper = paper * np.float32(rng.uniform(0.93, 1.03))
    tex = 1.0 + 0.012 * _noise.value(rng, (ch, cw), max(1.0, 0.15 * r)) + 0.02 * _noise.value(rng, (ch, cw), 25 * r)
    ink = np.float32(rng.uniform(0.04, 0.12))
    gray = np.ones((ch, cw), np.float32)
    markers = []
    q0 = int(round(quiet * r))
    for k, mid in enumerate(ids):
        u0 = q0 + int(round(k * (S + gap) * r))
        v0 = q0
        img = marker_image(mid, MODULES * m_px).astype(np.float32) / 255.0
        gray[v0 : v0 + MODULES * m_px, u0 : u0 + MODULES * m_px] = img
        x0, y0 = u0 / r, v0 / r  # pixel u0 covers [u0/r, (u0+1)/r) in card mm
        markers.append((int(mid), np.array([[x0, y0], [x0 + S, y0], [x0 + S, y0 + S], [x0, y0 + S]])))
    # caption (our own wording) below the markers
    text = f"scale mark {S:g} mm" + ("" if n == 1 else f"  x{n}")
    fs = cap_h * r / 30.0
    th = max(1, int(round(fs * 1.6)))
    tw = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, fs, th)[0][0]
    if tw > (W - 2 * quiet) * r:
        fs *= (W - 2 * quiet) * r / tw
        th = max(1, int(round(fs * 1.6)))
    ty = int(round((2 * quiet + S - 0.4 * quiet) * r + cap_h * r * 0.75))
    txt = np.zeros((ch, cw), np.uint8)
    cv2.putText(txt, text, (q0, min(ty, ch - 2)), cv2.FONT_HERSHEY_SIMPLEX, fs, 255, th, cv2.LINE_AA)
    if ruler:
        y_base = int(round((2 * quiet + S + cap_h) * r))
        x_start = quiet
        length = int(min(100.0, W - 2 * quiet))
        for mm in range(length + 1):
            tick = 4.5 if mm % 10 == 0 else (3.2 if mm % 5 == 0 else 2.0)
            xp = int(round((x_start + mm) * r))
            cv2.line(txt, (xp, y_base), (xp, int(round(y_base + tick * r))), 255, max(1, int(round(0.15 * r))), cv2.LINE_AA)
        cv2.line(txt, (int(round(x_start * r)), y_base), (int(round((x_start + length) * r)), y_base), 255, max(1, int(round(0.15 * r))), cv2.LINE_AA)
    t = txt.astype(np.float32) / 255.0
    gray = np.minimum(gray, 1.0 - t)
    # printed ink is not pure black; paper carries faint texture
    shade = gray * (1.0 - ink) + ink
    rgb = paper[None, None, :] * (shade * tex)[..., None]
    alpha = np.ones((ch, cw), np.float32)
    layer = Layer(rgb.astype(np.float32), alpha, grid_A(0.0, 0.0, r))
    return Card(layer=layer, size_mm=(cw / r, ch / r), markers=markers, marker_mm=S, ruler=ruler)
