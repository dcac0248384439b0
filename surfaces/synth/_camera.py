"""Pinhole camera over the scene plane -> plane-to-photo homography.

World frame = plane frame: X, Y in the plane (mm), Z into the table, so a
camera with identity rotation above the plane sees X to the right and Y
down, unmirrored.  Pixel centres are at integer coordinates.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..geometry import apply_h, jacobian


def _rot(axis: np.ndarray, ang: float) -> np.ndarray:
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    K = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    return np.eye(3) + math.sin(ang) * K + (1 - math.cos(ang)) * K @ K


@dataclass(frozen=True)
class Camera:
    """A posed pinhole camera; ``H`` maps plane mm (X, Y) to photo px (x, y)."""

    width: int
    height: int
    f_px: float
    R: np.ndarray  # world -> camera rotation
    C: np.ndarray  # camera centre in world mm
    tilt_deg: float
    roll_deg: float

    @property
    def K(self) -> np.ndarray:
        return np.array([[self.f_px, 0, (self.width - 1) / 2.0], [0, self.f_px, (self.height - 1) / 2.0], [0, 0, 1.0]])

    @property
    def H(self) -> np.ndarray:
        t = -self.R @ self.C
        H = self.K @ np.c_[self.R[:, 0], self.R[:, 1], t]
        return H / H[2, 2]

    def depth(self, pts_mm: np.ndarray) -> np.ndarray:
        """Camera-z of plane points (positive = in front)."""
        P = np.c_[np.asarray(pts_mm, float).reshape(-1, 2), np.zeros(len(np.asarray(pts_mm).reshape(-1, 2)))]
        return ((P - self.C) @ self.R.T)[:, 2]


def scale_at(H: np.ndarray, X: float, Y: float) -> float:
    """sqrt(|det J|) of the plane->photo homography at plane point (X, Y), px/mm."""
    return float(math.sqrt(abs(np.linalg.det(jacobian(H, X, Y)))))


def pose(
    *,
    width: int,
    height: int,
    f_px: float,
    tilt_deg: float,
    tilt_azimuth_deg: float,
    roll_deg: float,
    target_mm: tuple[float, float],
    face_mm: tuple[float, float],
    px_per_mm: float,
) -> Camera:
    """Camera aimed at ``target_mm`` with the wanted scale at ``face_mm``.

    The camera is tilted by ``tilt_deg`` about a plane axis perpendicular to
    ``tilt_azimuth_deg`` and rolled by ``roll_deg`` about its optical axis;
    its distance is solved so that sqrt|det J| at ``face_mm`` equals
    ``px_per_mm`` (to 1e-9 relative).
    """
    az = math.radians(tilt_azimuth_deg)
    axis = np.array([-math.sin(az), math.cos(az), 0.0])
    R_tilt = _rot(axis, math.radians(tilt_deg))  # camera -> world for the tilt
    R_roll = _rot(np.array([0.0, 0.0, 1.0]), math.radians(roll_deg))
    R = (R_tilt @ R_roll).T  # world -> camera
    opt = R.T @ np.array([0.0, 0.0, 1.0])  # optical axis in world
    T = np.array([target_mm[0], target_mm[1], 0.0])
    d = f_px / px_per_mm * math.sqrt(math.cos(math.radians(tilt_deg)))
    cam = None
    for _ in range(60):
        cam = Camera(width, height, f_px, R, T - d * opt, tilt_deg, roll_deg)
        s = scale_at(cam.H, *face_mm)
        ratio = s / px_per_mm
        if abs(ratio - 1) < 1e-11:
            break
        d *= ratio
    assert cam is not None
    return cam


def inside(cam: Camera, pts_mm: np.ndarray, margin_px: float) -> bool:
    """True if all plane points are in front of the camera and inside the photo with a margin."""
    pts_mm = np.asarray(pts_mm, float).reshape(-1, 2)
    if (cam.depth(pts_mm) <= 1.0).any():
        return False
    p = apply_h(cam.H, pts_mm)
    return bool(
        (p[:, 0] >= margin_px).all()
        and (p[:, 1] >= margin_px).all()
        and (p[:, 0] <= cam.width - 1 - margin_px).all()
        and (p[:, 1] <= cam.height - 1 - margin_px).all()
    )
