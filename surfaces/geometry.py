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


def fit_line_tls(
    pts: np.ndarray, *, robust: bool = True, k_sigma: float = 3.0, min_tol: float = 0.15
) -> tuple[np.ndarray, np.ndarray, float, int] | None:
    """Total-least-squares line through ``(N, 2)`` points ``(x, y)``.

    With ``robust=True`` points farther than ``k_sigma`` robust sigmas
    (1.4826 * MAD, at least ``min_tol``) from the line are dropped and the
    line refitted, up to five times.

    Returns
    -------
    (point, direction, rms, n_inliers) or None
        ``point`` on the line (centroid of the inliers), unit ``direction``,
        RMS perpendicular residual of the inliers; None with fewer than 2
        usable points.
    """
    pts = np.asarray(pts, dtype=np.float64).reshape(-1, 2)
    keep = np.all(np.isfinite(pts), axis=1)

    def _fit(mask):
        sel = pts[mask]
        c = sel.mean(axis=0)
        q = sel - c
        # principal axis of the 2x2 scatter matrix (same line as the SVD of q, cheaper)
        _, vecs = np.linalg.eigh(q.T @ q)
        d = vecs[:, 1]
        return c, d, (pts - c) @ np.array([-d[1], d[0]])

    if keep.sum() < 2:
        return None
    c, d, r = _fit(keep)
    for _ in range(5 if robust else 0):
        tol = max(k_sigma * 1.4826 * float(np.median(np.abs(r[keep]))), min_tol)
        new_keep = np.all(np.isfinite(pts), axis=1) & (np.abs(r) <= tol)
        if new_keep.sum() < 2 or np.array_equal(new_keep, keep):
            break
        keep = new_keep
        c, d, r = _fit(keep)
    return c, d, float(np.sqrt(np.mean(r[keep] ** 2))), int(keep.sum())


def intersect_lines(p1: np.ndarray, d1: np.ndarray, p2: np.ndarray, d2: np.ndarray) -> np.ndarray:
    """Intersection ``(x, y)`` of the lines ``p1 + s d1`` and ``p2 + t d2``; NaN if parallel."""
    p1, d1, p2, d2 = (np.asarray(v, dtype=np.float64) for v in (p1, d1, p2, d2))
    A = np.array([[d1[0], -d2[0]], [d1[1], -d2[1]]])
    det = np.linalg.det(A)
    if abs(det) < 1e-12:
        return np.array([np.nan, np.nan])
    s, _ = np.linalg.solve(A, p2 - p1)
    return p1 + s * d1
