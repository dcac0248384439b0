"""Small projective-geometry helpers shared by calibration, face and measurement."""

from __future__ import annotations

import numpy as np


def apply_h(H: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """Apply a 3x3 homography to ``(N, 2)`` points ``(x, y)``; returns ``(N, 2)``."""
    pts = np.asarray(pts, dtype=np.float64).reshape(-1, 2)
    hom = np.c_[pts, np.ones(len(pts))] @ np.asarray(H, dtype=np.float64).T
    return hom[:, :2] / hom[:, 2:3]


def jacobian(H: np.ndarray, x: float, y: float) -> np.ndarray:
    """2x2 Jacobian of the homography ``H`` at ``(x, y)`` (analytic)."""
    H = np.asarray(H, dtype=np.float64)
    w = H[2, 0] * x + H[2, 1] * y + H[2, 2]
    u = H[0, 0] * x + H[0, 1] * y + H[0, 2]
    v = H[1, 0] * x + H[1, 1] * y + H[1, 2]
    return np.array(
        [
            [(H[0, 0] * w - u * H[2, 0]) / w**2, (H[0, 1] * w - u * H[2, 1]) / w**2],
            [(H[1, 0] * w - v * H[2, 0]) / w**2, (H[1, 1] * w - v * H[2, 1]) / w**2],
        ]
    )


def local_scale_px_per_mm(H_px_to_mm: np.ndarray, x: float, y: float) -> float:
    """Photo scale at photo pixel ``(x, y)`` in px/mm.

    Defined as sqrt(|det J|) with J the Jacobian of the plane->photo map at
    the plane point that ``(x, y)`` maps to (the square root of the local
    area scale).
    """
    H_inv = np.linalg.inv(np.asarray(H_px_to_mm, dtype=np.float64))
    X, Y = apply_h(H_px_to_mm, [[x, y]])[0]
    return float(np.sqrt(abs(np.linalg.det(jacobian(H_inv, X, Y)))))
