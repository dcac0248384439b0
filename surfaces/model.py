"""Data passed between the stages of one assessment.

Every stage is a pure function that takes the dataclasses below (or arrays)
and returns a new one; nothing flows back.  Pixels appear only in
:class:`Photo`, :class:`Calibration` and the ``*_px`` fields; everything else
is in millimetres on the face plane.

Coordinate conventions
----------------------
* Photo pixels: OpenCV ``(x, y)`` with pixel centres at integers, in the photo
  *after* EXIF orientation.  Only the JSON contract and OpenCV calls use
  ``(x, y)``; arrays are indexed ``[row, col]``.
* Plane millimetres: the metric plane of the reference marker, ``(X, Y)`` mm.
* Face millimetres: the face's own axes, ``x`` along the weld (or along the
  bend coupon) from the face's start, ``y`` across it (throat / wall /
  coupon width direction) from ``y = 0``.  The rectified face image is
  axis-aligned with these axes: column = x, row = y, at ``Face.px_per_mm``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

TestType = Literal["fillet-break", "nick-break", "bend"]
TEST_TYPES: tuple[str, ...] = ("fillet-break", "nick-break", "bend")
KINDS: tuple[str, ...] = ("pore", "inclusion", "unfused", "crack")
#: the ``cause`` a detector reads off an opening's kind (a corner rule of a bend preset
#: ignores some openings "unless from slag or lack of fusion")
KIND_CAUSE: dict[str, str] = {"pore": "pore", "inclusion": "slag", "unfused": "unfused"}

#: Resolution of the rectified face image that every later stage works on.
WORK_PX_PER_MM: float = 16.0


class SurfacesError(ValueError):
    """A problem with the user's input that has a one-line explanation.

    The CLI prints ``str(err)`` on stderr and exits 2; the page shows it.
    The message must name the file or value and say what to do.
    """


class PhotoError(SurfacesError):
    """The photo file cannot be used (empty, not an image, truncated...)."""


class CalibrationError(SurfacesError):
    """No usable scale: no marker found and no fallback given."""


class FaceError(SurfacesError):
    """The face region cannot be found or lies outside the photo."""


@dataclass(frozen=True)
class Photo:
    """A decoded photo, EXIF orientation applied.

    rgb : (H, W, 3) uint8 ndarray
        8-bit RGB pixels (16-bit input is scaled down, alpha dropped on white).
    gray : (H, W) uint8 ndarray
        Luma of ``rgb`` (ITU-R BT.601 weights as in OpenCV's RGB2GRAY).
    """

    rgb: np.ndarray
    gray: np.ndarray
    name: str
    sha256: str
    source_format: str  # e.g. "JPEG", "PNG", "TIFF"
    source_mode: str  # Pillow mode of the file, e.g. "RGB", "I;16", "RGBA"
    exif_orientation: int  # 1 = none; the EXIF value that was applied
    notes: tuple[str, ...] = ()  # e.g. "16-bit scaled to 8-bit"

    @property
    def width(self) -> int:
        return int(self.gray.shape[1])

    @property
    def height(self) -> int:
        return int(self.gray.shape[0])


@dataclass(frozen=True)
class MarkerHit:
    """One detected reference marker, corners in photo pixels (x, y).

    Corner order is OpenCV's: top-left, top-right, bottom-right, bottom-left
    of the printed marker.
    """

    marker_id: int
    corners_px: np.ndarray  # (4, 2) float64
    side_px: float  # mean side length in the photo
    module_px: float  # side_px / 6 (4x4 bits + 1-bit border each side)
    reproj_rms_px: float  # corner residual against the fitted homography


@dataclass(frozen=True)
class Calibration:
    """Scale (and perspective) from photo pixels to the marker plane in mm.

    ``H`` maps homogeneous photo pixels (x, y, 1) to plane mm (X, Y, 1).
    """

    method: str  # "marker", "markers", "px-per-mm", "ruler"
    H: np.ndarray  # (3, 3) photo px -> plane mm
    uncertainty_pct: float  # 1-sigma relative scale uncertainty, percent
    tilt_deg: float | None  # camera tilt from the marker's perspective; None if unknown
    marker_mm: float | None
    markers: tuple[MarkerHit, ...] = ()
    consistency_pct: float | None = None  # spread of scale between markers
    warnings: tuple[str, ...] = ()

    @property
    def H_inv(self) -> np.ndarray:
        """Plane mm -> photo px."""
        return np.linalg.inv(self.H)

    def px_per_mm_at(self, x: float, y: float) -> float:
        """Photo scale at photo pixel ``(x, y)``: sqrt(|det J|) of plane->photo."""
        from .geometry import local_scale_px_per_mm

        return local_scale_px_per_mm(self.H, x, y)


@dataclass(frozen=True)
class Face:
    """The face rectified into its own metric axes.

    image : (h, w, 3) uint8 ndarray at ``px_per_mm``; column = x along the weld.
    mask : (h, w) bool ndarray, True on the face.
    A_face_to_plane : (3, 3) ndarray mapping face-image pixels (col, row, 1)
        to plane mm (X, Y, 1).  Compose with ``Calibration.H_inv`` to reach the
        photo.
    unseen : the warnings (also in ``warnings``) saying that part of the face
        is not in the assessment (out of the photo, under the card); the judge
        then never accepts.  (A coupon ending near the photo's edge, which may
        run on out of view, is only a warning: on the 13 generated bends it
        was raised on, the length found was within 0.3 % of the truth.)
    """

    image: np.ndarray
    mask: np.ndarray
    px_per_mm: float
    A_face_to_plane: np.ndarray
    length_mm: float  # along the weld
    width_mm: float  # across (throat / wall / coupon width)
    area_mm2: float
    polygon_px: np.ndarray  # (N, 2) face outline in photo px (x, y)
    method: str  # "auto", "roi-box", "roi-corners"
    root_side: str = "unknown"  # "y0", "y1" or "unknown": which long edge is the root
    confidence: float = 1.0
    warnings: tuple[str, ...] = ()
    unseen: tuple[str, ...] = ()


@dataclass(frozen=True)
class Settings:
    """Everything the user chose for one assessment (kept with the record)."""

    test: str = "fillet-break"
    marker_mm: float | None = None  # printed marker side; None = card default
    px_per_mm: float | None = None  # manual scale fallback
    ruler: tuple[float, float, float, float, float] | None = None  # x0,y0,x1,y1,mm
    roi: tuple[float, ...] | None = None  # 4 (box) or 8 (corners) photo px
    min_size_mm: float = 0.3  # sensitivity: smallest greatest dimension reported
    limits: str | None = None  # preset name or file path
    nominal: dict = field(default_factory=dict)  # thickness_mm, throat_mm, wall_mm, length_mm
    bend_angle_deg: float | None = None
    former_diameter_mm: float | None = None
    outer_radius_mm: float | None = None

    def key(self) -> str:
        """Stable text key for caching and batch resume."""
        import json
        from dataclasses import asdict

        return json.dumps(asdict(self), sort_keys=True, default=str)
