"""Scale and perspective of a photo from the printed reference marker.

:func:`calibrate` turns a photo into a :class:`~surfaces.model.Calibration`:
a homography from photo pixels to the marker plane in mm, with a 1-sigma
scale uncertainty, the camera tilt and any warnings.

How the marker is measured
--------------------------
1. **Detection.**  OpenCV's ``ArucoDetector`` looks for DICT_4X4_50 markers
   (any id) in the whole photo, once with parameters tuned for uneven light,
   blur and tilt and once with OpenCV's defaults (each finds markers the
   other misses; the results are merged; the retries below run them one
   after the other).  Large photos are searched on a
   copy reduced by the smallest whole number that brings the long side to at
   most ``DETECT_LONG_SIDE_PX`` and the copy to at most ``DETECT_MAX_PIXELS``
   (12 MP photos: a third); when nothing is found there, the search is
   repeated at full resolution (small markers) and at a long side near half
   of ``DETECT_LONG_SIDE_PX`` (big, blurred markers).
2. **Module grid.**  Every black/white boundary of the marker's bit
   pattern (OpenCV's own, ``generateImageMarker``) lies on a known grid
   line U = k or V = k (in modules): the outer square and every edge
   between data modules, 300-900 points spread over the whole marker.  On
   the full-resolution grey image a profile is sampled across each
   module-long segment, about one per pixel, 0.42 module either side (so
   that only that edge is inside it; ends where another edge meets are
   left out).  The edge on each profile is placed by the area
   (first-moment) rule and then, where the blur is resolved (sigma of
   0.8 px or more), by the first moment of the profile's slope under a
   Gaussian taper of the blur's width centred on it (a matched filter:
   less noise from the window's ends; both unbiased for symmetric blur).
   One Gauss-Newton fit then puts every point on its line: the 8
   homography parameters and one *edge bias*, the shift of every edge from
   black towards white that a tone curve, clipped white paper or ink spread
   give a blurred edge (edges of both polarities lie on the same lines
   inside the marker, so the bias separates from the scale; the outline
   alone cannot tell them apart).  Points beyond 3.5 robust sigma are
   dropped (glare, specks).  The corners follow from the fitted homography.
   Starting from the detector's corners; if the grid fit fails (tiny,
   occluded or badly blurred marker), straight lines are fitted to the four
   outer sides instead (profiles across each side, the light of white inner
   modules modelled, total least squares, adjacent lines intersected) and
   the grid fit is tried again from those corners.
3. **Homography.**  Detections on one spot are merged, and when some
   marker's grid fit succeeded, detections whose grid fit failed are
   dropped with a warning (a square in the background texture decoded with
   error correction shows no printed pattern and quiet zone), and so are
   detections whose own scale is far less certain than the best one's
   (``JOIN_SIGMA_RATIO``: a speck decoded as a 10 px marker).  The four
   corners give the photo -> plane map of that marker (plane origin at its top-left corner, X right, Y down, mm).  With
   several markers, each one's scale is compared at a common point; when they
   agree (within ``CONSISTENCY_WARN_PCT`` or three times their own combined
   uncertainty, whichever is larger), all corners are fitted together: one
   plane -> photo homography and, for every marker but the reference, its
   unknown turn and shift in the plane, by Gauss-Newton on the corner
   reprojection error in pixels.  The
   wider spread of corners pins the perspective far better than one marker.
   Markers that disagree more are not combined (a warning names them);
   beyond ``CONSISTENCY_ERROR_PCT`` the photo is refused, as they were most
   likely printed at different sizes.
4. **Uncertainty** (1-sigma, percent) combines

   * corner localisation: from the grid fit, the covariance of its
     homography (cluster-robust over segments: points along one segment
     share JPEG blocks and paper grain) plus the effect of an unmodelled
     change of the edge bias across the marker (``EDGE_BIAS_GRADIENT_PX``),
     plus one random shift per grid line (lines printed off their place:
     a printer's dot raster, a raster marker image; its variance from the
     lines' mean residuals beyond their segments' scatter), all turned
     into a covariance of the eight corner coordinates; floors
     ``GRID_FLOOR_PX`` and ``GRID_FLOOR_MODULE``.  For an outline-only fit,
     sigma_c per corner coordinate from the line-fit residuals
     (``2 * rms / sqrt(n_eff)``, n_eff discounting correlated residuals)
     and what the model of the inner modules' light may miss
     (``OUTLINE_BLEED_SIGMA * blur^2 / module``), with a floor of ``CORNER_FLOOR_PX`` plus ``CORNER_FLOOR_MODULE`` of a
     module.  Either is propagated by a seeded Monte-Carlo of the whole fit
     (correlated corner draws) to the point where the scale is used (the
     face), so the growth of the error with distance from the marker is
     included;
   * the printing scale of the card: ``PRINT_SCALE_PCT`` (office printers at
     100 % are typically within +/- 0.5 %, from memory; the card's 50 mm
     check square catches worse prints).

5. **Tilt.**  The angle between the camera axis and the marker plane's
   normal, from the homography decomposed with an assumed camera: principal
   point at the image centre and a diagonal field of view of
   ``ASSUMED_DIAGONAL_FOV_DEG`` (a typical phone main camera; the true lens is
   unknown).  Used for warnings and the record, not for the scale; reported
   as unknown (None) when the corner errors spread it by more than
   ``TILT_UNKNOWN_SD_DEG`` (small markers), and warned about only when it
   exceeds ``TILT_WARN_DEG`` by more than twice that spread.

Fallbacks when there is no marker: ``px_per_mm`` (a scale typed by hand) or
``ruler`` (two points of a ruler seen in the photo and their distance).
Neither corrects perspective; both say so in a warning.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import cv2
import numpy as np

from .geometry import apply_h, fit_line_tls, intersect_lines, local_scale_px_per_mm
from .model import Calibration, CalibrationError, MarkerHit, Photo, SurfacesError

__all__ = [
    "calibrate",
    "detect_markers",
    "scale_uncertainty_pct",
    "corner_sigma_px",
    "assumed_camera_matrix",
    "tilt_from_homography",
    "plane_centroid_px",
    "DEFAULT_MARKER_MM",
    "PRINT_SCALE_PCT",
    "MANUAL_SCALE_UNCERTAINTY_PCT",
]

#: Side of the card's marker (outer black square), mm.
DEFAULT_MARKER_MM: float = 20.0
MARKER_DICT = cv2.aruco.DICT_4X4_50
MODULES = 6  # 4 data bits + 1 border module each side

#: Long side of the reduced copy that the first detection pass searches.
DETECT_LONG_SIDE_PX: int = 2000
#: A photo reduced for that pass anyway is reduced further until the copy holds at most this
#: many pixels (a 4000 x 3000 photo is searched at a third, not at half: its marker is then
#: still several times the detector's smallest, and the search costs a third as much).
DETECT_MAX_PIXELS: int = 2_000_000
#: Smallest marker side (px in the searched image) the detector accepts.
MIN_DETECT_SIDE_PX: float = 14.0

#: 1-sigma printing scale tolerance of the card, percent (see module docstring).
PRINT_SCALE_PCT: float = 0.3
#: Floor of the corner localisation sigma (px), plus a fraction of a module.
CORNER_FLOOR_PX: float = 0.05
CORNER_FLOOR_MODULE: float = 0.003
#: The same floor for corners from the module-grid fit (px, and fraction of a module).
GRID_FLOOR_PX: float = 0.005
GRID_FLOOR_MODULE: float = 0.0003
#: Outline fit: 1-sigma corner error left by the model of the inner modules' light, per
#: blur^2 / module (px).  Set from blurred scenes with 6-8 px modules (tests/test_calibrate.py).
OUTLINE_BLEED_SIGMA: float = 0.2
#: Stated uncertainty of a scale typed by hand, percent.
MANUAL_SCALE_UNCERTAINTY_PCT: float = 2.0
#: Click error of each ruler end, px.
RULER_CLICK_PX: float = 1.0

ASSUMED_DIAGONAL_FOV_DEG: float = 70.0
TILT_WARN_DEG: float = 35.0
#: Report no tilt when its Monte-Carlo spread is wider than this (small markers).
TILT_UNKNOWN_SD_DEG: float = 10.0
MODULE_WARN_PX: float = 4.0
CONSISTENCY_WARN_PCT: float = 2.0
CONSISTENCY_ERROR_PCT: float = 10.0
EXTRAPOLATION_WARN_PCT: float = 1.0

_MC_SAMPLES = 200
_MC_SEED = 20260
_EDGE_HALF_MODULES = 0.6
#: Module-grid fit: half-width of each profile (modules; the next parallel
#: edge is a module away), along-edge margin where another edge meets one
#: (modules), samples per profile.
_GRID_HALF_MODULES = 0.42
_GRID_END_MARGIN = 0.25
_GRID_SAMPLES = 33
#: Smallest module (px) the grid fit is tried on: below it the profiles hold too few pixels.
_GRID_MIN_MODULE_PX = 6.0
#: Largest blur sigma (modules) for the grid fit: beyond it the light of the neighbouring edges
#: reaches into its 0.42-module profiles (the outline fit models that light).
_GRID_MAX_BLUR_MODULES = 0.2
#: Taper of the edge estimate (blur sigmas), used from a blur sigma of this many px.
_GRID_TAPER = 1.0
_GRID_TAPER_MIN_SIGMA_PX = 0.8
#: 1-sigma of an unmodelled change of the edge bias from the marker's centre
#: to its sides (px): overexposed paper under a brightness gradient clips more
#: on one side.  Enters the grid fit's covariance, not the fit.
EDGE_BIAS_GRADIENT_PX: float = 0.015

_RETAKE = (
    "retake the photo with the card beside the face at the same height, the whole marker and its white "
    "margin in the frame, the marker at least 60 px across and free of glare, or give --px-per-mm or --ruler"
)


# =========================================================================== public API


def calibrate(
    photo: Photo | np.ndarray,
    *,
    marker_mm: float | None = None,
    px_per_mm: float | None = None,
    ruler: tuple[float, float, float, float, float] | None = None,
    face_hint_px: tuple[float, float] | None = None,
) -> Calibration:
    """Find the photo's scale (and perspective) from the reference marker or a fallback.

    Parameters
    ----------
    photo : Photo or (H, W) uint8 ndarray
        The photo (its ``gray`` is used) or a grey image.
    marker_mm : float, optional
        Printed side of the marker's outer black square; default
        ``DEFAULT_MARKER_MM`` (the card's).
    px_per_mm : float, optional
        Scale typed by hand: skips the marker, no perspective correction.
    ruler : (x0, y0, x1, y1, mm), optional
        Two photo points on a ruler (px) and their distance (mm): skips the
        marker, no perspective correction.
    face_hint_px : (x, y), optional
        Where the face is in the photo (px).  Picks the marker nearest to it
        as the plane frame and is where the uncertainty is evaluated
        (default: the photo centre).

    Returns
    -------
    Calibration

    Raises
    ------
    CalibrationError
        No marker found and no fallback given, or markers that disagree.
    SurfacesError
        Invalid option values.
    """
    gray, name = _gray_of(photo)
    h, w = gray.shape
    hint = _check_point(face_hint_px, "face hint")
    eval_pt = hint if hint is not None else ((w - 1) / 2.0, (h - 1) / 2.0)

    if px_per_mm is not None and ruler is not None:
        raise SurfacesError("both a typed scale (px_per_mm) and a ruler were given: give only one of them")
    if px_per_mm is not None:
        return _manual_scale(_positive(px_per_mm, "px_per_mm (photo pixels per mm)"))
    if ruler is not None:
        return _ruler_scale(ruler, w, h)

    side_mm = DEFAULT_MARKER_MM if marker_mm is None else _positive(marker_mm, "marker size (mm)")
    if not 1.0 <= side_mm <= 1000.0:
        raise SurfacesError(f"marker size {side_mm:g} mm is not plausible: give the printed side in mm, e.g. 20")

    hits, n_rejected = detect_markers(gray)
    if not hits:
        seen = (
            f" ({n_rejected} square shape{'s' if n_rejected != 1 else ''} seen but none decoded as a marker)"
            if n_rejected
            else ""
        )
        raise CalibrationError(f"no reference marker found in photo '{name}'{seen}: {_RETAKE}")
    hits, notes = _faint_hits(gray, hits)
    return _calibrate_from_hits(hits, side_mm, eval_pt, hint, (w, h), notes=notes)


#: a detection whose black and white modules differ by less than this share of the
#: clearest detection's difference is not printed ink on paper (see :func:`_faint_hits`)
FAINT_INK_SHARE: float = 0.35


def ink_contrast(gray: np.ndarray, hit: MarkerHit) -> float:
    """Grey-level difference between a detection's white and black modules (median over module centres).

    The 6 x 6 modules of the decoded id's own pattern (OpenCV's) are sampled
    at their centres, 3 x 3 points over the middle half of each module, through
    the square's homography.  Printed ink on white paper gives a large
    difference; a square that faint texture decoded as a marker gives a small
    one.  NaN when no point falls in the photo.
    """
    black = _marker_black(hit.marker_id)
    S = float(MODULES)
    offs = (np.arange(3) - 1.0) * 0.25
    jj, ii, dy, dx = np.meshgrid(np.arange(MODULES), np.arange(MODULES), offs, offs, indexing="ij")
    plane = np.c_[(ii + 0.5 + dx).ravel(), (jj + 0.5 + dy).ravel()]  # (x, y) in module units
    is_black = black[jj.ravel(), ii.ravel()]
    to_photo = np.linalg.inv(_square_homography(hit.corners_px, S))
    px = np.round(apply_h(to_photo, plane)).astype(int)
    h, w = gray.shape
    inside = (px[:, 0] >= 0) & (px[:, 0] < w) & (px[:, 1] >= 0) & (px[:, 1] < h)
    if not inside.any() or not (is_black & inside).any() or not (~is_black & inside).any():
        return float("nan")
    v = gray[px[inside, 1], px[inside, 0]].astype(np.float64)
    b = is_black[inside]
    return float(np.median(v[~b]) - np.median(v[b]))


def _faint_hits(gray: np.ndarray, hits: list[MarkerHit]) -> tuple[list[MarkerHit], list[str]]:
    """Drop detections far fainter than the clearest one (texture decoded as a marker); a note for each.

    Markers printed on one card share ink, paper and, roughly, light: their
    black/white difference stays within a factor of two under shade or a
    colour cast.  A fracture face, rust or a painted table can hold a faint
    square that decodes as some id; joined to the real marker it would bend
    the homography (one generated photo read a 58 degree tilt from such a
    36 px square).  With a single detection nothing is dropped.
    """
    if len(hits) < 2:
        return list(hits), []
    c = np.array([ink_contrast(gray, hit) for hit in hits])
    if not np.isfinite(c).any():
        return list(hits), []
    best = float(np.nanmax(c))
    kept, notes = [], []
    for hit, ci in zip(hits, c):
        if np.isfinite(ci) and ci < FAINT_INK_SHARE * best:
            x, y = hit.corners_px.mean(axis=0)
            notes.append(
                f"ignored a square at ({x:.0f}, {y:.0f}) px that decoded as marker id {hit.marker_id}: its black and "
                f"white differ by {ci:.0f} grey levels against {best:.0f} on the clearest marker (not printed ink)"
            )
        else:
            kept.append(hit)
    return kept, notes


def detect_markers(gray: np.ndarray) -> tuple[list[MarkerHit], int]:
    """Detect DICT_4X4_50 markers and measure their outlines to sub-pixel accuracy.

    Parameters
    ----------
    gray : (H, W) uint8 ndarray

    Returns
    -------
    hits : list of MarkerHit
        Corners in full-resolution photo pixels (x, y), OpenCV's order.
    n_rejected : int
        Square candidates the detector saw but could not decode (first pass).
    """
    h, w = gray.shape
    long_side = max(h, w)
    # whole-number reductions: INTER_AREA then averages exact pixel blocks, fast
    scales: list[float] = []
    first = max(1, math.ceil(long_side / DETECT_LONG_SIDE_PX))
    if first > 1:
        while (h // first) * (w // first) > DETECT_MAX_PIXELS:
            first += 1
        scales.append(1.0 / first)
    scales.append(1.0)
    second = max(2, round(2 * long_side / DETECT_LONG_SIDE_PX))
    if long_side / second >= 600 and second != first:
        scales.append(1.0 / second)

    n_rejected = -1
    found: list[tuple[int, np.ndarray]] = []
    for k, s in enumerate(scales):
        corners, ids, rejected = _detect_at_scale(gray, s, union=k == 0)
        if n_rejected < 0:
            n_rejected = rejected
        if corners:
            found = list(zip(ids, corners))
            break
    hits = [_measure_marker(gray, int(i), c) for i, c in found]
    return hits, max(n_rejected, 0)


def corner_sigma_px(hit: MarkerHit) -> float:
    """1-sigma localisation error of each corner coordinate of ``hit`` (px).

    With a module-grid fit: the largest standard deviation of its corner
    covariance, in quadrature with ``GRID_FLOOR_PX + GRID_FLOOR_MODULE *
    module`` (the Monte-Carlo uses the whole covariance).  Otherwise from the
    outline fit (:class:`MeasuredMarker.sigma_fit_px`); for a bare :class:`MarkerHit` (e.g. read
    back from a record) ``2 * rms / sqrt(n / 2)`` with ``n`` edge points
    expected for its size.  Either way in quadrature with the floor
    ``CORNER_FLOOR_PX + CORNER_FLOOR_MODULE * module``.
    """
    cov = getattr(hit, "corner_cov_px2", None)
    if cov is not None:
        floor = GRID_FLOOR_PX + GRID_FLOOR_MODULE * hit.module_px
        return float(math.hypot(math.sqrt(max(float(np.max(np.diag(cov))), 0.0)), floor))
    stat = float(getattr(hit, "sigma_fit_px", float("nan")))
    if not math.isfinite(stat):
        n = _edge_points_per_side(hit.side_px)
        rms = hit.reproj_rms_px if math.isfinite(hit.reproj_rms_px) else 0.25 * hit.module_px
        stat = 2.0 * rms / math.sqrt(n / 2.0)
    floor = CORNER_FLOOR_PX + CORNER_FLOOR_MODULE * hit.module_px
    return float(math.hypot(stat, floor))


def _corner_cov_root(hit: MarkerHit) -> np.ndarray:
    """(8, 8) matrix L with L L^T the covariance of ``hit``'s corner coordinates (px^2).

    The grid fit's covariance (correlated corners) plus the floor on each
    coordinate; for an outline-only hit, ``corner_sigma_px`` on each.
    """
    cov = getattr(hit, "corner_cov_px2", None)
    if cov is None:
        return np.eye(8) * corner_sigma_px(hit)
    floor = GRID_FLOOR_PX + GRID_FLOOR_MODULE * hit.module_px
    c = np.asarray(cov, np.float64) + floor**2 * np.eye(8)
    w, v = np.linalg.eigh(0.5 * (c + c.T))
    return v * np.sqrt(np.clip(w, 0.0, None))[None, :]


def scale_uncertainty_pct(
    cal: Calibration, x: float, y: float, *, parts: bool = False
) -> float | dict[str, float]:
    """1-sigma relative scale uncertainty (percent) of ``cal`` at photo pixel ``(x, y)``.

    For marker calibrations this repeats the seeded Monte-Carlo of the
    corner errors at the given point (in quadrature with the printing
    tolerance); for the fallbacks it returns the stated value.

    With ``parts=True`` returns ``{"corners_pct", "print_pct", "total_pct"}``.
    """
    if not cal.markers or cal.marker_mm is None:
        total = float(cal.uncertainty_pct)
        return {"corners_pct": float("nan"), "print_pct": float("nan"), "total_pct": total} if parts else total
    hits = list(cal.markers)
    ref = _ref_index_from_h(hits, cal.H, cal.marker_mm)
    joint = cal.method == "markers"
    mc = _mc_scale_pct(hits, cal.marker_mm, ref, joint, (float(x), float(y)))
    total = math.hypot(mc, PRINT_SCALE_PCT)
    if parts:
        return {"corners_pct": mc, "print_pct": PRINT_SCALE_PCT, "total_pct": total}
    return total


def plane_centroid_px(cal: Calibration, polygon_px: np.ndarray) -> tuple[float, float]:
    """Photo point (x, y) of the area centroid, in the marker plane, of a photo polygon.

    The point "at the face" where a scale is quoted: under perspective the
    mean of a polygon's photo vertices (or its centroid in photo pixels) is
    not the image of the face's centre, and the scale changes across a
    tilted face by several percent.  Falls back to the vertex mean when the
    polygon has no area.
    """
    pts = np.asarray(polygon_px, np.float64).reshape(-1, 2)
    if len(pts) == 0:
        raise SurfacesError("an empty polygon has no centroid: give the face outline in photo pixels")
    mm = apply_h(cal.H, pts)
    x, y = mm[:, 0], mm[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    area = 0.5 * float(cross.sum())
    if len(pts) < 3 or not math.isfinite(area) or abs(area) < 1e-12:
        c = pts.mean(axis=0)
        return float(c[0]), float(c[1])
    c_mm = np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * area)
    c = apply_h(np.linalg.inv(cal.H), c_mm[None])[0]
    return float(c[0]), float(c[1])


def assumed_camera_matrix(width: int, height: int) -> np.ndarray:
    """3x3 camera matrix assumed for tilt: centred principal point, diagonal FOV of ``ASSUMED_DIAGONAL_FOV_DEG``."""
    diag = math.hypot(width, height)
    f = diag / (2.0 * math.tan(math.radians(ASSUMED_DIAGONAL_FOV_DEG) / 2.0))
    return np.array([[f, 0.0, (width - 1) / 2.0], [0.0, f, (height - 1) / 2.0], [0.0, 0.0, 1.0]])


def tilt_from_homography(H_px_to_mm: np.ndarray, K: np.ndarray) -> float:
    """Angle (deg) between the camera axis and the plane normal.

    The plane -> photo map is ``K [r1 r2 t]`` up to scale; r1 and r2 are the
    normalised first two columns of ``K^-1 H^-1`` and the normal is their
    cross product.
    """
    return float(_tilt_batch(np.asarray(H_px_to_mm, np.float64)[None], np.asarray(K, np.float64))[0])


# =========================================================================== fallbacks


def _manual_scale(px_per_mm: float) -> Calibration:
    H = np.diag([1.0 / px_per_mm, 1.0 / px_per_mm, 1.0])
    return Calibration(
        method="px-per-mm",
        H=H,
        uncertainty_pct=MANUAL_SCALE_UNCERTAINTY_PCT,
        tilt_deg=None,
        marker_mm=None,
        warnings=(
            f"scale typed by hand ({px_per_mm:g} px/mm): no perspective correction, the photo must be square-on; "
            f"uncertainty taken as {MANUAL_SCALE_UNCERTAINTY_PCT:g} %",
        ),
    )


def _ruler_scale(ruler, w: int, h: int) -> Calibration:
    try:
        vals = [float(v) for v in ruler]
    except (TypeError, ValueError):
        raise SurfacesError(f"ruler {ruler!r} is not five numbers: give x0, y0, x1, y1 in px and the distance in mm") from None
    if len(vals) != 5 or not all(math.isfinite(v) for v in vals):
        raise SurfacesError(f"ruler {ruler!r} is not five finite numbers: give x0, y0, x1, y1 in px and the distance in mm")
    x0, y0, x1, y1, mm = vals
    if mm <= 0:
        raise SurfacesError(f"ruler distance {mm:g} mm must be positive: give the mm between the two points")
    length_px = math.hypot(x1 - x0, y1 - y0)
    if length_px < 10:
        raise SurfacesError(f"ruler points are only {length_px:.1f} px apart: pick two ruler marks far apart")
    warnings = [
        f"scale from a ruler ({mm:g} mm over {length_px:.0f} px): no perspective correction, "
        "the ruler must lie on the face plane and the photo be square-on"
    ]
    for px, py in ((x0, y0), (x1, y1)):
        if not (-0.5 <= px <= w - 0.5 and -0.5 <= py <= h - 0.5):
            warnings.append(f"ruler point ({px:g}, {py:g}) lies outside the {w} x {h} photo: check the points")
    s = length_px / mm
    # each end placed to within RULER_CLICK_PX along the ruler -> sqrt(2) px on the length
    unc = 100.0 * math.sqrt(2.0) * RULER_CLICK_PX / length_px
    if length_px < 200:
        warnings.append(
            f"ruler span of {length_px:.0f} px is short: the scale is uncertain by {unc:.1f} %; pick marks farther apart"
        )
    return Calibration(
        method="ruler",
        H=np.diag([1.0 / s, 1.0 / s, 1.0]),
        uncertainty_pct=unc,
        tilt_deg=None,
        marker_mm=None,
        warnings=tuple(warnings),
    )


# =========================================================================== from markers


def _printed_hits(hits: list[MarkerHit]) -> tuple[list[MarkerHit], list[str]]:  # noqa: C901
    """Drop detections that cannot be the printed marker(s); returns the kept hits and a warning for each drop.

    * Two detections on the same spot (their centres less than half the
      larger side apart, whatever ids they decoded as) are one marker: the
      better measured one is kept (grid fit before outline, then more edge
      points, then the larger side).
    * A detection whose edges neither fit could find (big enough for both)
      is dropped; if every detection is like that the photo is refused.
    * When some detection's module-grid fit succeeded, a detection whose
      grid fit failed is not kept: a printed marker of the same card shows
      every edge of its bit pattern with the quiet zone around it, while a
      square in the background texture decoded with error correction does
      not.  (Markers too small for the grid fit are all kept.)
    """
    def rank(hit):
        return (int(getattr(hit, "grid_points", 0) > 0), int(getattr(hit, "grid_points", 0)), hit.side_px)

    order = sorted(range(len(hits)), key=lambda i: rank(hits[i]), reverse=True)
    kept: list[int] = []
    notes: list[str] = []
    for i in order:
        c = hits[i].corners_px.mean(axis=0)
        twin = [j for j in kept if np.hypot(*(hits[j].corners_px.mean(axis=0) - c)) < 0.5 * max(hits[j].side_px, hits[i].side_px)]
        if twin:
            continue  # the same marker seen twice: nothing to warn about
        kept.append(i)
    unmeasured = [i for i in kept if not getattr(hits[i], "edges_measured", True)]
    if unmeasured and len(unmeasured) == len(kept):
        ids = ", ".join(str(hits[i].marker_id) for i in unmeasured)
        raise CalibrationError(
            f"marker id {ids} was found but its edges could not be measured (a corner covered, glare on it, or no "
            f"white margin around it): {_RETAKE}"
        )
    for i in unmeasured:
        kept.remove(i)
        x, y = hits[i].corners_px.mean(axis=0)
        notes.append(
            f"ignored marker id {hits[i].marker_id} at ({x:.0f}, {y:.0f}) px: its edges could not be measured "
            "(a corner covered, glare, or no white margin); the other marker(s) were used"
        )
    if any(getattr(hits[i], "grid_points", 0) > 0 for i in kept):
        for i in list(kept):
            hit = hits[i]
            if getattr(hit, "grid_points", 0) == 0 and hit.module_px >= _GRID_MIN_MODULE_PX:
                kept.remove(i)
                x, y = hit.corners_px.mean(axis=0)
                notes.append(
                    f"ignored a square at ({x:.0f}, {y:.0f}) px that decoded as marker id {hit.marker_id}: its edges do not "
                    "show a printed marker's pattern and quiet zone (background texture, or a marker half covered)"
                )
    return [hits[i] for i in sorted(kept)], notes


def _calibrate_from_hits(hits, side_mm, eval_pt, hint, size, *, notes=()) -> Calibration:
    w, h = size
    hits, warnings = _printed_hits(list(hits))
    hits, weak = _helpful_hits(hits, side_mm)
    warnings = list(notes) + warnings + weak
    centres = np.array([hit.corners_px.mean(axis=0) for hit in hits])
    if hint is not None:
        ref = int(np.argmin(np.hypot(*(centres - np.asarray(hint)).T)))
    else:
        ref = int(np.argmax([hit.side_px for hit in hits]))
    singles = [_square_homography(hit.corners_px, side_mm) for hit in hits]

    used = [ref]
    consistency = None
    if len(hits) > 1:
        common = tuple(centres.mean(axis=0))
        scales = np.array([local_scale_px_per_mm(Hk, *common) for Hk in singles])
        sig = np.array([_mc_scale_pct([hit], side_mm, 0, False, common) for hit in hits])
        consistency = float(100.0 * (scales.max() - scales.min()) / np.median(scales))
        spread_sigma = float(np.sqrt((np.sort(sig)[-2:] ** 2).sum()))  # two least certain markers
        limit = max(CONSISTENCY_WARN_PCT, 3.0 * spread_sigma)
        i_hi, i_lo = int(np.argmax(scales)), int(np.argmin(scales))
        pair = f"markers id {hits[i_hi].marker_id} and id {hits[i_lo].marker_id}"
        if consistency > max(CONSISTENCY_ERROR_PCT, limit):
            raise CalibrationError(
                f"{pair} disagree by {consistency:.0f} % in scale: were they printed at different sizes? "
                "cover every marker but one and give its printed side with --marker-mm, "
                "or give --px-per-mm or --ruler"
            )
        if consistency > limit:
            warnings.append(
                f"{pair} disagree by {consistency:.1f} % in scale (printed at different sizes, or not on one plane?): "
                f"used only marker id {hits[ref].marker_id}; cover the others or check the print"
            )
        else:
            used = list(range(len(hits)))
    used_hits = [hits[i] for i in used]
    if len(used) > 1:
        H = _joint_homography(used_hits, side_mm, used.index(ref))
        method = "markers"
    else:
        H = singles[ref]
        method = "marker"

    K = assumed_camera_matrix(w, h)
    mc, tilt_sd = _monte_carlo(used_hits, side_mm, used.index(ref), len(used) > 1, eval_pt, K)
    unc = math.hypot(mc, PRINT_SCALE_PCT)
    tilt = tilt_from_homography(H, K)

    for hit in hits:
        if hit.module_px < MODULE_WARN_PX:
            warnings.append(
                f"marker id {hit.marker_id} too small in the photo ({hit.side_px:.0f} px across, "
                f"{hit.module_px:.1f} px per square): move closer or print a bigger marker"
            )
    if tilt - 2.0 * (tilt_sd if math.isfinite(tilt_sd) else 0.0) > TILT_WARN_DEG:
        warnings.append(
            f"camera tilted about {tilt:.0f} degrees from square-on (estimate assuming a typical phone lens): "
            "the perspective correction is large; retake within 30 degrees of square-on"
        )
    if mc > EXTRAPOLATION_WARN_PCT:
        warnings.append(
            f"{'the face' if hint is not None else 'the photo centre'} is far from the marker for the marker's "
            f"size in the photo (scale uncertain there by {mc:.1f} %): put the marker closer to the face "
            "or use a bigger marker"
        )
    return Calibration(
        method=method,
        H=H,
        uncertainty_pct=float(unc),
        # a tilt that the corner errors leave this open is not a measurement
        tilt_deg=float(tilt) if not (tilt_sd > TILT_UNKNOWN_SD_DEG) else None,
        marker_mm=float(side_mm),
        markers=tuple(hits),
        consistency_pct=consistency,
        warnings=tuple(warnings),
    )


#: A detection whose scale alone is more than this many times less certain (at the detections' common
#: centre) than the most certain detection's, and uncertain there by more than
#: ``EXTRAPOLATION_WARN_PCT``, is not joined to it (see :func:`_helpful_hits`).
JOIN_SIGMA_RATIO: float = 4.0


def _helpful_hits(hits: list[MarkerHit], side_mm: float) -> tuple[list[MarkerHit], list[str]]:
    """Drop detections too uncertain to help the most certain one; returns the kept hits and a note per drop.

    The joint fit weighs every corner alike, so a detection whose own scale
    at the detections' common centre is ``JOIN_SIGMA_RATIO`` times less
    certain than the best one's, and worse than ``EXTRAPOLATION_WARN_PCT``
    (a speck of texture decoded as a 10 px "marker", a marker far off at
    the photo's edge), adds nothing but its errors: one such square 10 px
    across beside a 200 px marker bent the joint perspective by 290 % at
    the face.  Markers that are all well measured are all kept, and so is a
    weak one whose scale differs from the best one's beyond doubt (more
    than ``CONSISTENCY_ERROR_PCT`` and three combined sigmas: printed at
    another size), so that the consistency check still refuses misprints.
    """
    if len(hits) < 2:
        return hits, []
    common = tuple(np.mean([hit.corners_px.mean(axis=0) for hit in hits], axis=0))
    sig = np.array([_mc_scale_pct([hit], side_mm, 0, False, common) for hit in hits])
    best = float(np.nanmin(sig)) if np.isfinite(sig).any() else float("nan")
    if not math.isfinite(best):
        return hits, []
    bar = max(JOIN_SIGMA_RATIO * best, EXTRAPOLATION_WARN_PCT)
    i_best = int(np.nanargmin(sig))
    scale = np.array([local_scale_px_per_mm(_square_homography(hit.corners_px, side_mm), *common) for hit in hits])
    off = 100.0 * np.abs(scale / scale[i_best] - 1.0)
    # a weak one that disagrees beyond doubt (printed at another size) is kept, for the consistency check to refuse
    keep = [k for k in range(len(hits))
            if np.isfinite(sig[k]) and (sig[k] <= bar or off[k] > max(CONSISTENCY_ERROR_PCT, 3.0 * math.hypot(sig[k], best)))]
    notes = []
    for k in range(len(hits)):
        if k not in keep:
            x, y = hits[k].corners_px.mean(axis=0)
            notes.append(
                f"ignored marker id {hits[k].marker_id} at ({x:.0f}, {y:.0f}) px: {hits[k].side_px:.0f} px across, "
                f"its scale is {sig[k] / max(best, 1e-6):.0f} times less certain than the best marker's, so it "
                "cannot help (a speck decoded as a marker, or a marker too small in the photo)"
            )
    return [hits[k] for k in keep], notes


def _square_plane(side_mm: float) -> np.ndarray:
    return np.array([[0.0, 0.0], [side_mm, 0.0], [side_mm, side_mm], [0.0, side_mm]])


def _dlt(src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    """Least-squares homographies ``src -> dst`` for a stack: (S, n, 2) -> (S, 3, 3), n >= 4.

    Direct linear transform with Hartley normalisation (exact for n = 4).
    """
    src = np.asarray(src, np.float64)
    dst = np.asarray(dst, np.float64)

    def norm(p):
        c = p.mean(axis=1, keepdims=True)
        d = np.sqrt(((p - c) ** 2).sum(axis=2)).mean(axis=1)
        k = math.sqrt(2.0) / np.maximum(d, 1e-12)
        T = np.zeros((len(p), 3, 3))
        T[:, 0, 0] = T[:, 1, 1] = k
        T[:, 0, 2] = -k * c[:, 0, 0]
        T[:, 1, 2] = -k * c[:, 0, 1]
        T[:, 2, 2] = 1.0
        return (p - c) * k[:, None, None], T

    ps, Ts = norm(src)
    pd, Td = norm(dst)
    S, n = ps.shape[:2]
    x, y = ps[..., 0], ps[..., 1]
    X, Y = pd[..., 0], pd[..., 1]
    one, zero = np.ones_like(x), np.zeros_like(x)
    rows_a = np.stack([x, y, one, zero, zero, zero, -X * x, -X * y, -X], axis=-1)
    rows_b = np.stack([zero, zero, zero, x, y, one, -Y * x, -Y * y, -Y], axis=-1)
    A = np.concatenate([rows_a, rows_b], axis=1)  # (S, 2n, 9)
    _, _, vt = np.linalg.svd(A)
    Hn = vt[:, -1, :].reshape(S, 3, 3)
    H = np.linalg.solve(Td, Hn @ Ts)  # Td^-1 Hn Ts
    return H / H[:, 2:3, 2:3]


def _square_homography(corners_px: np.ndarray, side_mm: float) -> np.ndarray:
    """Photo px -> marker plane mm from the four corners (float64)."""
    return _dlt(np.asarray(corners_px, np.float64)[None], _square_plane(side_mm)[None])[0]


def _apply_batch(H: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """(S, 3, 3) homographies on (S, n, 2) points."""
    q = pts @ H[:, :2, :2].transpose(0, 2, 1) + H[:, None, :2, 2]
    w = pts @ H[:, 2, :2][:, :, None] + H[:, None, 2:3, 2]
    return q / w


def _rigid_batch(src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    """Rotation + translation (no scale, no mirror) taking ``src`` (n, 2) onto each ``dst`` (S, n, 2): (S, 3, 3)."""
    cs = src.mean(axis=0)
    cd = dst.mean(axis=1)
    M = np.einsum("ni,snj->sij", src - cs, dst - cd[:, None, :])
    U, _, Vt = np.linalg.svd(M)
    d = np.sign(np.linalg.det(np.transpose(Vt, (0, 2, 1)) @ np.transpose(U, (0, 2, 1))))
    d[d == 0] = 1.0
    D = np.zeros((len(dst), 2, 2))
    D[:, 0, 0] = 1.0
    D[:, 1, 1] = d
    R = np.transpose(Vt, (0, 2, 1)) @ D @ np.transpose(U, (0, 2, 1))
    T = np.zeros((len(dst), 3, 3))
    T[:, :2, :2] = R
    T[:, :2, 2] = cd - np.einsum("sij,j->si", R, cs)
    T[:, 2, 2] = 1.0
    return T


def _joint_batch(corners: np.ndarray, side_mm: float, ref: int, iterations: int = 8) -> np.ndarray:
    """One homography per stack entry for all markers together.

    ``corners`` is (S, M, 4, 2) photo px.  The reference marker's square
    fixes the plane frame; every other marker's place and turn in that plane
    is unknown.  Start: two rounds of alternation (rigid fit of each square
    to where the current homography puts it, then one least-squares
    homography through all corners); then Gauss-Newton on the corner
    reprojection error in photo pixels over the plane -> photo homography
    (8 parameters) and each other marker's turn and shift (3 each).
    """
    S, M = corners.shape[:2]
    P = _square_plane(side_mm)
    H = _dlt(corners[:, ref], np.broadcast_to(P, (S, 4, 2)))
    src = corners.reshape(S, 4 * M, 2)
    others = [k for k in range(M) if k != ref]
    placements = {}
    for _ in range(2):
        dst = np.empty((S, M, 4, 2))
        for k in range(M):
            if k == ref:
                dst[:, k] = P
                continue
            T = _rigid_batch(P, _apply_batch(H, corners[:, k]))
            placements[k] = T
            dst[:, k] = _apply_batch(T, np.broadcast_to(P, (S, 4, 2)))
        H = _dlt(src, dst.reshape(S, 4 * M, 2))
    if iterations <= 0 or not others:
        return H

    # parameters in units of the marker side, so that all are of order one
    Nn = np.diag([side_mm, side_mm, 1.0])
    G0 = np.linalg.inv(H) @ Nn  # plane (in sides) -> photo
    G0 = G0 / G0[:, 2:3, 2:3]
    unit = P / side_mm
    p = np.zeros((S, 8 + 3 * len(others)))
    for j, k in enumerate(others):
        T = placements[k]
        p[:, 8 + 3 * j] = np.arctan2(T[:, 1, 0], T[:, 0, 0])
        p[:, 9 + 3 * j] = T[:, 0, 2] / side_mm
        p[:, 10 + 3 * j] = T[:, 1, 2] / side_mm

    def predict(q):
        D = np.concatenate([q[:, :8], np.zeros((len(q), 1))], axis=1).reshape(-1, 3, 3)
        G = G0 @ (np.eye(3)[None] + D)
        pts = np.empty((len(q), M, 4, 2))
        pts[:, ref] = _apply_batch(G, np.broadcast_to(unit, (len(q), 4, 2)))
        for j, k in enumerate(others):
            th, tx, ty = q[:, 8 + 3 * j], q[:, 9 + 3 * j], q[:, 10 + 3 * j]
            c, s_ = np.cos(th), np.sin(th)
            X = c[:, None] * unit[None, :, 0] - s_[:, None] * unit[None, :, 1] + tx[:, None]
            Y = s_[:, None] * unit[None, :, 0] + c[:, None] * unit[None, :, 1] + ty[:, None]
            pts[:, k] = _apply_batch(G, np.stack([X, Y], axis=-1))
        return pts.reshape(len(q), -1), G

    obs = corners.reshape(S, -1)
    step = 1e-6
    for _ in range(iterations):
        f0, _ = predict(p)
        r = f0 - obs
        J = np.empty((S, r.shape[1], p.shape[1]))
        for j in range(p.shape[1]):
            dp = p.copy()
            dp[:, j] += step
            J[:, :, j] = (predict(dp)[0] - f0) / step
        JtJ = np.einsum("sri,srj->sij", J, J)
        JtJ += 1e-9 * np.eye(p.shape[1])[None] * (np.trace(JtJ, axis1=1, axis2=2)[:, None, None] + 1e-12)
        delta = np.linalg.solve(JtJ, -np.einsum("sri,sr->si", J, r)[..., None])[..., 0]
        p = p + delta
        if np.nanmax(np.abs(delta)) < 1e-10:
            break
    _, G = predict(p)
    H = Nn @ np.linalg.inv(G)
    return H / H[:, 2:3, 2:3]


def _joint_homography(hits, side_mm, ref, iterations: int = 8) -> np.ndarray:
    corners = np.stack([np.asarray(h.corners_px, np.float64) for h in hits])[None]
    return _joint_batch(corners, side_mm, ref, iterations)[0]


def _scale_batch(H: np.ndarray, x: float, y: float) -> np.ndarray:
    """sqrt|det J| of plane -> photo at photo (x, y) for (S, 3, 3) photo -> plane maps.

    The photo -> plane Jacobian of a homography has det = det(H) / w^3 with
    w = h31 x + h32 y + h33; the plane -> photo scale is its inverse root.
    """
    w = H[:, 2, 0] * x + H[:, 2, 1] * y + H[:, 2, 2]
    return np.sqrt(np.abs(w**3 / np.linalg.det(H)))


def _tilt_batch(H: np.ndarray, K: np.ndarray) -> np.ndarray:
    G = np.linalg.inv(H)
    M = np.linalg.solve(K[None], G)
    r1 = M[:, :, 0] / np.linalg.norm(M[:, :, 0], axis=1, keepdims=True)
    r2 = M[:, :, 1] / np.linalg.norm(M[:, :, 1], axis=1, keepdims=True)
    n = np.cross(r1, r2)
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    return np.degrees(np.arccos(np.clip(np.abs(n[:, 2]), 0.0, 1.0)))


def _ref_index_from_h(hits, H, side_mm) -> int:
    """Which marker's own frame ``H`` is (its corners land on the square)."""
    P = _square_plane(side_mm)
    err = [np.abs(apply_h(H, hit.corners_px) - P).max() for hit in hits]
    return int(np.argmin(err))


def _mc_scale_pct(hits, side_mm, ref, joint, pt) -> float:
    """Relative std (percent) of the scale at ``pt`` when the corners move by their sigma."""
    return _monte_carlo(hits, side_mm, ref, joint, pt)[0]


def _monte_carlo(hits, side_mm, ref, joint, pt, K=None) -> tuple[float, float]:
    """Seeded Monte-Carlo of the corner errors: (scale std in % at ``pt``, tilt std in deg or NaN)."""
    rng = np.random.default_rng(_MC_SEED)
    corners = np.stack([np.asarray(h.corners_px, np.float64) for h in hits])  # (M, 4, 2)
    z = rng.normal(0.0, 1.0, (_MC_SAMPLES, len(hits), 8))
    moved = corners[None] + np.einsum("mij,smj->smi", np.stack([_corner_cov_root(h) for h in hits]), z).reshape(
        (_MC_SAMPLES,) + corners.shape
    )
    with np.errstate(all="ignore"):
        if joint:
            nominal = _joint_batch(corners[None], side_mm, ref)
            Hs = _joint_batch(moved, side_mm, ref, iterations=3)
        else:
            P = _square_plane(side_mm)
            nominal = _dlt(corners[ref][None], P[None])
            Hs = _dlt(moved[:, ref], np.broadcast_to(P, (_MC_SAMPLES, 4, 2)))
        s0 = float(_scale_batch(nominal, *pt)[0])
        scale = _scale_batch(Hs, *pt)
        tilt = _tilt_batch(Hs, K) if K is not None else np.full(_MC_SAMPLES, np.nan)
    scale = scale[np.isfinite(scale)]
    if len(scale) < _MC_SAMPLES // 2 or not math.isfinite(s0) or s0 <= 0:
        return 100.0, float("nan")
    tilt = tilt[np.isfinite(tilt)]
    return float(100.0 * np.std(scale) / s0), float(np.std(tilt)) if len(tilt) > 2 else float("nan")


# =========================================================================== detection


def _detector(long_side: int, *, tuned: bool = True) -> cv2.aruco.ArucoDetector:
    """OpenCV's ArUco detector for DICT_4X4_50.

    ``tuned``: wider adaptive-threshold windows (uneven light, large
    modules), looser outline approximation (blur, tilt), smaller markers
    accepted; otherwise OpenCV's defaults except the smallest marker size.
    The two find different markers in hard photos, so both are run.
    """
    p = cv2.aruco.DetectorParameters()
    p.minMarkerPerimeterRate = min(0.03, 4.0 * MIN_DETECT_SIDE_PX / max(long_side, 1))
    p.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_NONE  # refined later on the full image
    p.detectInvertedMarker = False
    if tuned:
        p.adaptiveThreshWinSizeMin = 3
        p.adaptiveThreshWinSizeMax = 53
        p.adaptiveThreshWinSizeStep = 10
        p.adaptiveThreshConstant = 7
        p.maxMarkerPerimeterRate = 4.0
        p.polygonalApproxAccuracyRate = 0.05
        p.minCornerDistanceRate = 0.05
        p.minDistanceToBorder = 1
        p.minMarkerDistanceRate = 0.05
        p.perspectiveRemovePixelPerCell = 8
        p.perspectiveRemoveIgnoredMarginPerCell = 0.2
        p.maxErroneousBitsInBorderRate = 0.35
        p.errorCorrectionRate = 0.6
        p.minOtsuStdDev = 5.0
    return cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(MARKER_DICT), p)


def _detect_at_scale(gray: np.ndarray, s: float, *, union: bool = True):
    """Markers found on ``gray`` reduced by ``s``; corners in full-size px.

    ``union``: run both detector settings and merge; otherwise OpenCV's
    defaults first (faster) and the tuned settings only if those find nothing.
    """
    h, w = gray.shape
    if s < 1.0:
        f = int(round(1.0 / s))
        ws, hs = w // f, h // f  # crop to whole blocks (at most f - 1 px at the right and bottom)
        img = cv2.resize(gray[: hs * f, : ws * f], (ws, hs), interpolation=cv2.INTER_AREA)
        sx = sy = 1.0 / f
    else:
        img, sx, sy = gray, 1.0, 1.0
    out: list[np.ndarray] = []
    out_ids: list[int] = []
    n_rejected = None
    for tuned in (True, False) if union else (False, True):
        if out and not union:
            break
        corners, ids, rejected = _detector(max(img.shape), tuned=tuned).detectMarkers(img)
        if n_rejected is None:
            n_rejected = 0 if rejected is None else len(rejected)
        if ids is None:
            continue
        for c, i in zip(corners, np.asarray(ids).ravel()):
            c = np.asarray(c, np.float64).reshape(4, 2)
            # pixel centres at integers in both images
            c[:, 0] = (c[:, 0] + 0.5) / sx - 0.5
            c[:, 1] = (c[:, 1] + 0.5) / sy - 0.5
            side = float(np.mean(np.hypot(*(np.roll(c, -1, axis=0) - c).T)))
            if any(int(i) == j and np.hypot(*(c.mean(0) - o.mean(0))) < 0.5 * side for o, j in zip(out, out_ids)):
                continue  # the same marker from the other detector
            out.append(c)
            out_ids.append(int(i))
    return out, out_ids, n_rejected or 0


# =========================================================================== sub-pixel outline


@dataclass
class _SideFit:
    point: np.ndarray
    direction: np.ndarray
    rms: float
    n: int
    n_eff: float  # independent points: n scaled by the residuals' von Neumann ratio
    sigma_px: float  # 1-sigma position of the line at the side's ends (corners)
    blur_px: float = float("nan")  # blur sigma measured on the side's clean profiles


@dataclass(frozen=True)
class MeasuredMarker(MarkerHit):
    """A :class:`MarkerHit` that also keeps the corner sigma of its edge fit (px).

    ``sigma_fit_px`` is the largest over the four sides of
    ``hypot(2 * rms / sqrt(n_eff), bend)``: ``n_eff`` counts the side's edge
    points as independent only as far as their residuals look like white
    noise (smooth trends from glare or shading count as few), and ``bend`` is
    how far lines through each half of the side land from the whole side's
    line at its ends.
    """

    sigma_fit_px: float = float("nan")
    #: (8, 8) covariance of the corner coordinates (x0, y0, ..., x3, y3), px^2,
    #: from the module-grid fit; None when only the outline was measured.
    corner_cov_px2: np.ndarray | None = None
    #: Edge bias the grid fit removed (px, black towards white); NaN without it.
    edge_bias_px: float = float("nan")
    #: Edge points the grid fit used (0 without it).
    grid_points: int = 0
    #: False when neither the grid nor the outline fit found the marker's edges (see ``_printed_hits``).
    edges_measured: bool = True


def _edge_points_per_side(side_px: float) -> int:
    module = side_px / MODULES
    margin = max(0.5 * module, 2.0)
    return int(np.clip(round(side_px - 2 * margin), 8, 400))


def _measure_marker(gray: np.ndarray, marker_id: int, corners0: np.ndarray) -> MarkerHit:
    """Refine one detected marker's corners on the full-resolution grey image.

    First the module-grid fit straight from the detector's corners; when it
    fails (or for modules under ``_GRID_MIN_MODULE_PX``), the outline fit of
    the four sides, and the grid fit again from its corners.
    """
    corners = np.asarray(corners0, np.float64).copy()
    module0 = float(np.mean(np.hypot(*(np.roll(corners, -1, axis=0) - corners).T))) / MODULES
    grid = _grid_fit(gray, marker_id, corners)
    if grid is not None and np.abs(grid.corners - corners).max() <= max(3.0, 0.5 * module0):
        return _grid_hit(marker_id, grid)
    return _measure_outline(gray, marker_id, corners)


def _grid_hit(marker_id: int, grid: _GridFit) -> MeasuredMarker:
    side_px = float(np.mean(np.hypot(*(np.roll(grid.corners, -1, axis=0) - grid.corners).T)))
    return MeasuredMarker(
        marker_id=marker_id,
        corners_px=grid.corners,
        side_px=side_px,
        module_px=side_px / MODULES,
        reproj_rms_px=grid.rms_px,
        sigma_fit_px=float(math.sqrt(max(float(np.max(np.diag(grid.cov))), 0.0))),
        corner_cov_px2=grid.cov,
        edge_bias_px=grid.bias_px,
        grid_points=grid.n_points,
    )


def _measure_outline(gray: np.ndarray, marker_id: int, corners: np.ndarray) -> MarkerHit:
    """Corners from straight lines fitted to the four outer sides (then the grid fit from them)."""
    x0, y0 = np.floor(corners.min(axis=0)).astype(int)
    x1, y1 = np.ceil(corners.max(axis=0)).astype(int)
    side0 = float(np.mean(np.hypot(*(np.roll(corners, -1, axis=0) - corners).T)))
    pad = int(math.ceil(side0 / MODULES * 1.5)) + 4
    h, w = gray.shape
    rx0, ry0 = max(0, x0 - pad), max(0, y0 - pad)
    rx1, ry1 = min(w, x1 + pad + 1), min(h, y1 + pad + 1)
    roi = gray[ry0:ry1, rx0:rx1].astype(np.float32)
    offset = np.array([rx0, ry0], np.float64)

    refined = None
    rms = float("nan")
    sigma_fit = float("nan")
    local = corners - offset
    for _ in range(3):  # re-centre the profiles on the fitted edges
        fits = _fit_sides(roi, local, marker_id)
        if fits is None:
            break
        new = np.array([intersect_lines(fits[i - 1].point, fits[i - 1].direction, fits[i].point, fits[i].direction)
                        for i in range(4)])
        if not np.all(np.isfinite(new)):
            break
        moved = np.abs(new - local).max()
        local = new
        refined = new
        rms = float(np.sqrt(np.mean([f.rms**2 for f in fits])))
        # the light of white inner modules is modelled, not measured: what the model misses grows with
        # the blur's reach into the one-module border (blur^2 / module)
        blur = max((f.blur_px for f in fits if math.isfinite(f.blur_px)), default=0.0)
        bleed = OUTLINE_BLEED_SIGMA * blur**2 / max(side0 / MODULES, 1e-6)
        sigma_fit = math.hypot(max(f.sigma_px for f in fits), bleed)
        if moved < 0.01:
            break
    module0 = side0 / MODULES
    if refined is None or np.abs(refined + offset - corners).max() > max(3.0, 0.5 * module0) or not _convex(refined):
        # edge fit failed (occlusion, no quiet zone): fall back to OpenCV's corner refinement
        refined = _subpix_fallback(gray, corners, module0)
        rms = 0.25 * module0  # no edge fit: a pessimistic stand-in for the residual
        sigma_fit = 0.3 + 0.1 * module0  # pessimistic: OpenCV's corners are good to a fraction of a module
        if module0 >= _GRID_MIN_MODULE_PX:
            # big enough for both fits, yet neither found the edges: a covered corner or glare moved the
            # detector's outline by modules, and no corner refinement can be trusted
            return MeasuredMarker(marker_id=marker_id, corners_px=refined, side_px=side0, module_px=module0,
                                  reproj_rms_px=float(rms), sigma_fit_px=float(sigma_fit), edges_measured=False)
    else:
        refined = refined + offset
    grid = _grid_fit(gray, marker_id, refined)
    if grid is not None and np.abs(grid.corners - refined).max() <= max(1.0, 0.15 * module0):
        return _grid_hit(marker_id, grid)
    sides = np.hypot(*(np.roll(refined, -1, axis=0) - refined).T)
    side_px = float(np.mean(sides))
    return MeasuredMarker(
        marker_id=marker_id,
        corners_px=refined,
        side_px=side_px,
        module_px=side_px / MODULES,
        reproj_rms_px=float(rms),
        sigma_fit_px=float(sigma_fit),
    )


def _convex(q: np.ndarray) -> bool:
    cr = []
    for i in range(4):
        a, b, c = q[i], q[(i + 1) % 4], q[(i + 2) % 4]
        cr.append((b[0] - a[0]) * (c[1] - b[1]) - (b[1] - a[1]) * (c[0] - b[0]))
    cr = np.array(cr)
    return bool(np.all(cr > 0) or np.all(cr < 0))


def _subpix_fallback(gray: np.ndarray, corners: np.ndarray, module: float) -> np.ndarray:
    win = int(np.clip(round(0.4 * module), 2, 15))
    pts = corners.astype(np.float32).reshape(-1, 1, 2).copy()
    try:
        cv2.cornerSubPix(gray, pts, (win, win), (-1, -1), (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 40, 0.01))
    except cv2.error:
        return corners
    out = pts.reshape(4, 2).astype(np.float64)
    return out if np.abs(out - corners).max() <= max(2.0, 0.3 * module) else corners


def _fit_sides(roi: np.ndarray, quad: np.ndarray, marker_id: int) -> list[_SideFit] | None:
    centre = quad.mean(axis=0)
    black = _marker_black(marker_id)
    unit = np.array([[0.0, 0.0], [MODULES, 0.0], [MODULES, MODULES], [0.0, MODULES]])
    with np.errstate(all="ignore"):
        to_photo = _dlt(unit[None], quad[None])[0]  # marker modules -> ROI px, for the module layout
    if not np.all(np.isfinite(to_photo)):
        return None
    fits = []
    for i in range(4):
        a, b = quad[i], quad[(i + 1) % 4]
        fit = _fit_one_side(roi, a, b, centre, _inner_black(black, i), to_photo, i)
        if fit is None:
            return None
        fits.append(fit)
    return fits


@lru_cache(maxsize=64)
def _marker_black(marker_id: int) -> np.ndarray:
    """(6, 6) bool, True where marker ``marker_id`` is black (OpenCV's own pattern)."""
    img = cv2.aruco.generateImageMarker(cv2.aruco.getPredefinedDictionary(MARKER_DICT), marker_id, MODULES)
    out = np.asarray(img) < 128
    out.flags.writeable = False
    return out


def _inner_black(black: np.ndarray, side: int) -> np.ndarray:
    """For side ``side`` (0 top TL->TR, 1 right, 2 bottom, 3 left, in corner order),
    whether the module just inside the border is black, for each of the 6 modules along it."""
    if side == 0:
        return black[1, :].copy()
    if side == 1:
        return black[:, 4].copy()
    if side == 2:
        return black[4, ::-1].copy()
    return black[::-1, 1].copy()


def _side_layout(to_photo: np.ndarray, side: int, base: np.ndarray, n: np.ndarray):
    """Module layout under perspective for the edge points ``base`` of ``side``.

    Returns the position along the side in modules (0..6, in the direction
    of ``_inner_black``), the local length of a module along the side (px),
    and the depths (px, along the outward normal ``n``) of the inner edge of
    the border and of the far edge of the module inside it.
    """
    mm = apply_h(np.linalg.inv(to_photo), base)
    if side == 0:
        along, inward = mm[:, 0], lambda k: np.c_[mm[:, 0], np.full(len(mm), float(k))]
    elif side == 1:
        along, inward = mm[:, 1], lambda k: np.c_[np.full(len(mm), MODULES - float(k)), mm[:, 1]]
    elif side == 2:
        along, inward = MODULES - mm[:, 0], lambda k: np.c_[mm[:, 0], np.full(len(mm), MODULES - float(k))]
    else:
        along, inward = MODULES - mm[:, 1], lambda k: np.c_[np.full(len(mm), float(k)), mm[:, 1]]
    edge = inward(0)
    depth1 = (apply_h(to_photo, edge) - apply_h(to_photo, inward(1))) @ n
    depth2 = (apply_h(to_photo, edge) - apply_h(to_photo, inward(2))) @ n
    step = np.zeros_like(mm)
    step[:, 0 if side in (0, 2) else 1] = 0.05
    module_along = np.hypot(*(apply_h(to_photo, edge + step) - apply_h(to_photo, edge - step)).T) / 0.1
    return along, module_along, depth1, depth2


def _fit_one_side(roi, a, b, centre, inner_black, to_photo, side) -> _SideFit | None:
    """Edge points across one side of the black square, and the line through them.

    The edge on each profile across the side is placed by the area rule
    ``e = u_max - integral(norm du)``, the profile normalised by its own end
    levels (equivalently, the centroid of the grey-level gradient): unbiased
    for any symmetric blur once the window is centred on the edge (the
    caller re-centres).  The border is only one module wide, so where the
    module inside it is white, blur carries its light into the inner end of
    the window and would pull the edge outward.  That light is modelled and
    subtracted: Gaussian blur of the width measured on the clean profiles
    (those with black inside), spread separably along and across the white
    module, whose place comes from the marker's known bit pattern and the
    current outline's perspective.
    """
    vec = b - a
    length = float(np.hypot(*vec))
    if length < 4:
        return None
    d = vec / length
    n = np.array([d[1], -d[0]])
    if np.dot(n, (a + b) / 2 - centre) < 0:
        n = -n  # outward
    module = length / MODULES
    half = float(np.clip(_EDGE_HALF_MODULES * module, 1.5, 60.0))
    margin = max(0.5 * module, 2.0)
    ns = _edge_points_per_side(length)
    t = np.linspace(margin, length - margin, ns)
    nu = int(np.clip(round(2 * half / 0.25) + 1, 9, 41))  # 0.25 px steps, at most 41 samples
    u = np.linspace(-half, half, nu)
    base = a[None, :] + t[:, None] * d[None, :]
    grid = base[:, None, :] + u[None, :, None] * n[None, None, :]
    mx = np.ascontiguousarray(grid[..., 0], dtype=np.float32)
    my = np.ascontiguousarray(grid[..., 1], dtype=np.float32)
    prof = cv2.remap(roi, mx, my, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=np.nan)
    ok = np.all(np.isfinite(prof), axis=1)

    # profiles whose inner neighbour is black over +/- 0.3 module along the side
    pos, module_along, depth1, depth2 = _side_layout(to_photo, side, base, n)
    clean = np.ones(ns, bool)
    for off in (-0.3, 0.0, 0.3):
        j = np.clip(np.floor(pos + off).astype(int), 0, MODULES - 1)
        clean &= inner_black[j]

    k = max(2, nu // 8)
    du = u[1] - u[0]

    def edge_of(q):
        lo = np.mean(q[:, :k], axis=1)
        hi = np.mean(q[:, -k:], axis=1)
        c = hi - lo
        good = np.isfinite(c) & (c > 8.0)
        norm = (q - lo[:, None]) / np.where(good, c, 1.0)[:, None]
        area = du * (norm.sum(axis=1) - 0.5 * (norm[:, 0] + norm[:, -1]))  # trapezoid rule
        return u[-1] - area, c, good, norm

    e, contrast, good, norm = edge_of(prof)
    ok &= good
    if ok.sum() < 6:
        return None
    ref = ok & clean if (ok & clean).sum() >= 4 else ok
    sigma = _quartile_width(u, np.nanmedian(norm[ref], axis=0)) / 1.349
    blur = float(sigma)
    if np.isfinite(sigma) and sigma > 0.05 * module and not clean.all():
        # Blur carries light from white data modules just inside the one-module
        # border into the window.  For a Gaussian blur the light of a square
        # module is separable: (spread along the side) x (spread across it);
        # subtract it and measure again (twice, as it depends on the edge).
        white = np.nonzero(~inner_black)[0]
        lateral = np.zeros(ns)
        for j in white:
            lateral += _phi((pos - j) * module_along / sigma) - _phi((pos - j - 1) * module_along / sigma)
        for _ in range(2):
            depth = (e[:, None] - u[None, :])  # distance inward from the edge
            across = _phi((depth - depth1[:, None]) / sigma) - _phi((depth - depth2[:, None]) / sigma)
            light = np.where(ok, contrast, 0.0)[:, None] * lateral[:, None] * across
            e, contrast, good, _ = edge_of(prof - light)
        ok &= good
    use = ok.copy()
    use &= np.abs(e) < half
    pts = base[use] + e[use, None] * n[None, :]
    if len(pts) < 6:
        return None
    fit = fit_line_tls(pts, robust=True)
    if fit is None:
        return None
    point, direction, rms, n_in = fit
    if n_in < max(6, 0.3 * len(pts)):
        return None
    normal = np.array([-direction[1], direction[0]])
    r = (pts - point) @ normal  # in order along the side
    tol = max(3.0 * 1.4826 * float(np.median(np.abs(r))), 0.15)
    r = r[np.abs(r) <= tol]
    ratio = float(np.mean(np.diff(r) ** 2) / (2.0 * np.mean(r**2))) if len(r) > 2 and np.mean(r**2) > 0 else 1.0
    n_eff = float(np.clip(n_in * ratio, 2.0, n_in))
    # A bent or partly shifted edge (glare, a nick in the print) can leave
    # small residuals yet tilt the line: lines through each half of the side
    # must agree with the whole at its ends, or the difference counts.
    half_n = len(pts) // 2
    bend = 0.0
    for part, end in ((pts[:half_n], a), (pts[half_n:], b)):
        sub = fit_line_tls(part, robust=True) if len(part) >= 4 else None
        if sub is None:
            bend = max(bend, 0.5 * half)
            continue
        on_full = point + np.dot(end - point, direction) * direction
        bend = max(bend, abs(float(np.dot(on_full - sub[0], np.array([-sub[1][1], sub[1][0]])))))
    expected = 2.0 * rms / math.sqrt(max(n_eff / 2.0, 1.0))  # what noise alone gives a half-side line
    sigma = math.hypot(2.0 * rms / math.sqrt(n_eff), math.sqrt(max(bend**2 - expected**2, 0.0)))
    return _SideFit(point=point, direction=direction, rms=rms, n=n_in, n_eff=n_eff, sigma_px=sigma, blur_px=blur)


# =========================================================================== module-grid fit


@dataclass(frozen=True)
class _GridFit:
    corners: np.ndarray  # (4, 2) photo px, bias removed
    cov: np.ndarray  # (8, 8) covariance of the corner coordinates (x0, y0, x1, ...), px^2
    bias_px: float  # how far every edge appears shifted from black towards white
    rms_px: float
    n_points: int
    n_segments: int


@lru_cache(maxsize=64)
def _grid_segments(marker_id: int) -> np.ndarray:
    """Every black/white edge of the marker's module grid, one row per module-long segment.

    Columns: ``axis`` (0: the line U = k, 1: the line V = k, in modules with
    U along corner 0 -> 1 and V along corner 0 -> 3), ``k``, ``j`` (the
    segment covers j..j+1 along the line), ``polarity`` (+1 where the lower
    side of the line is black), and the along-line margins at its two ends
    (``_GRID_END_MARGIN`` where another edge meets or crosses there, else 0).
    The quiet zone outside the square counts as white.
    """
    black = _marker_black(marker_id)  # [V, U]

    def colour(u: int, v: int) -> bool:
        return bool(black[v, u]) if 0 <= u < MODULES and 0 <= v < MODULES else False

    rows = []
    for axis in (0, 1):
        for k in range(MODULES + 1):

            def pair(j: int) -> tuple[bool, bool]:
                return (colour(k - 1, j), colour(k, j)) if axis == 0 else (colour(j, k - 1), colour(j, k))

            for j in range(MODULES):
                lo, hi = pair(j)
                if lo == hi:
                    continue
                m0 = 0.0 if pair(j - 1) == (lo, hi) else _GRID_END_MARGIN
                m1 = 0.0 if pair(j + 1) == (lo, hi) else _GRID_END_MARGIN
                rows.append((axis, k, j, 1.0 if lo else -1.0, m0, m1))
    out = np.array(rows, np.float64)
    out.flags.writeable = False
    return out


def _grid_fit(gray: np.ndarray, marker_id: int, corners0: np.ndarray, *, passes: int = 3) -> _GridFit | None:
    """Fit the marker's homography to every edge of its module grid (outer square and data modules).

    Each black/white boundary between modules lies on a known grid line
    (U = k or V = k, in modules).  Grey-level profiles across every
    module-long segment (``_GRID_HALF_MODULES`` either side, so that only
    this one edge is inside the window) give sub-pixel edge points by the
    area rule, refined (blur sigma >= ``_GRID_TAPER_MIN_SIGMA_PX``) by the
    slope's first moment under a Gaussian taper of ``_GRID_TAPER`` blur
    sigmas about the edge (the matched filter of a Gaussian edge; below
    that blur the pixel grid leaves the slope lopsided and the plain area
    rule is exact); then one Gauss-Newton fit puts every point on its line:
    8 homography parameters plus one *edge bias* ``b`` (px), the shift of
    every edge from black towards white that a tone curve, overexposure or
    ink spread give a blurred edge.  Edges of both polarities lie on the
    same lines inside the marker, so the bias separates from the scale;
    the outer outline alone cannot tell them apart.  A few hundred to a
    thousand points spread over the whole marker pin its perspective far
    better than four corners.

    Returns None when too few edges are seen (occlusion, glare, tiny marker).
    """
    corners0 = np.asarray(corners0, np.float64)
    unit = np.array([[0.0, 0.0], [MODULES, 0.0], [MODULES, MODULES], [0.0, MODULES]])
    with np.errstate(all="ignore"):
        G = _dlt(unit[None], corners0[None])[0]  # modules -> photo px
    if not np.all(np.isfinite(G)):
        return None
    side = float(np.mean(np.hypot(*(np.roll(corners0, -1, axis=0) - corners0).T)))
    module = side / MODULES
    if module < _GRID_MIN_MODULE_PX:
        return None
    segs = _grid_segments(marker_id)

    # sample positions along every segment, about one per pixel (at most 24 per module)
    step = max(1.0, module / 24.0)
    lengths = (1.0 - segs[:, 4] - segs[:, 5]) * module
    counts = np.maximum(2, np.round(lengths / step).astype(int))
    seg = np.repeat(np.arange(len(segs)), counts)
    first = np.cumsum(counts) - counts
    frac = (np.arange(len(seg)) - first[seg] + 0.5) / counts[seg]
    axis = segs[seg, 0]
    kk = segs[seg, 1]
    pol = segs[seg, 3]
    t = segs[seg, 2] + segs[seg, 4] + frac * (1.0 - segs[seg, 4] - segs[seg, 5])
    on_u = axis == 0
    P = np.where(on_u[:, None], np.c_[kk, t], np.c_[t, kk])  # module coordinates of the samples
    across_unit = np.where(on_u[:, None], [[1.0, 0.0]], [[0.0, 1.0]])
    along_unit = across_unit[:, ::-1]

    h_img, w_img = gray.shape
    pad = int(math.ceil(module)) + 4
    x0, y0 = (np.floor(corners0.min(axis=0)).astype(int) - pad).clip(0)
    x1 = min(int(math.ceil(corners0[:, 0].max())) + pad, w_img - 1)
    y1 = min(int(math.ceil(corners0[:, 1].max())) + pad, h_img - 1)
    if x1 - x0 < 8 or y1 - y0 < 8:
        return None
    roi = gray[y0 : y1 + 1, x0 : x1 + 1].astype(np.float32)
    off = np.array([x0, y0], np.float64)
    nu = _GRID_SAMPLES
    kq = max(2, nu // 8)
    s_unit = np.linspace(-1.0, 1.0, nu)

    sigma_blur = None
    bias = 0.0
    fit = None
    for _ in range(passes):
        eps = 1e-3
        q0 = apply_h(G, P) - off
        d_across = (apply_h(G, P + eps * across_unit) - off - q0) / eps  # px per module, across the line
        d_along = apply_h(G, P + eps * along_unit) - off - q0
        d_along /= np.maximum(np.linalg.norm(d_along, axis=1, keepdims=True), 1e-12)
        nrm = np.c_[-d_along[:, 1], d_along[:, 0]]
        nrm *= np.sign(np.sum(nrm * d_across, axis=1))[:, None]  # unit normal towards +U (+V)
        mod_n = np.sum(nrm * d_across, axis=1)  # px per module along that normal
        hmax = _GRID_HALF_MODULES * mod_n
        half = np.minimum(hmax, 10.0) if sigma_blur is None else np.clip(3.5 * sigma_blur + 1.5, 2.5, hmax)
        u = s_unit[None, :] * half[:, None]
        dirn = nrm * pol[:, None]  # from black to white
        grid = q0[:, None, :] + u[..., None] * dirn[:, None, :]
        prof = cv2.remap(
            roi,
            np.ascontiguousarray(grid[..., 0], np.float32),
            np.ascontiguousarray(grid[..., 1], np.float32),
            cv2.INTER_LINEAR,
            borderMode=cv2.BORDER_CONSTANT,
            borderValue=np.nan,
        )
        lo = prof[:, :kq].mean(axis=1)
        hi = prof[:, -kq:].mean(axis=1)
        contrast = hi - lo
        good = np.isfinite(contrast) & (contrast > 8.0)
        if good.sum() < 24:
            return None
        good &= contrast > 0.35 * float(np.median(contrast[good]))
        norm = (prof - lo[:, None]) / np.where(good, contrast, 1.0)[:, None]
        du = 2.0 * half / (nu - 1)
        e = half - du * (norm.sum(axis=1) - 0.5 * (norm[:, 0] + norm[:, -1]))  # area rule, along dirn
        good &= np.abs(e) < 0.8 * half
        if sigma_blur is None:
            ref = good & (np.abs(e) < 0.3 * half)
            if ref.sum() < 12:
                return None
            hh = float(np.median(half[ref]))
            sel = ref & (np.abs(half - hh) < 0.2 * hh + 0.5)
            width = _quartile_width(s_unit * hh, np.nanmedian(norm[sel], axis=0))
            sigma_blur = float(np.clip(width / 1.349, 0.3, 0.3 * module)) if np.isfinite(width) else 0.3 * module
            if sigma_blur > _GRID_MAX_BLUR_MODULES * module:
                return None  # blur reaches the neighbouring edges: the outline fit (which models them) instead
        if _GRID_TAPER and sigma_blur is not None and sigma_blur >= _GRID_TAPER_MIN_SIGMA_PX:
            # tapered first moment of the gradient about the area-rule edge (less noise from the window's ends)
            uc = 0.5 * (u[:, 1:] + u[:, :-1])
            grad = np.diff(norm, axis=1)
            taper = _GRID_TAPER * sigma_blur
            for _ in range(3):
                wgt = np.exp(-0.5 * ((uc - e[:, None]) / taper) ** 2)
                m0 = np.sum(wgt * grad, axis=1)
                e_new = np.sum(wgt * grad * uc, axis=1) / np.where(m0 > 0.2, m0, 1.0)
                e = np.where(m0 > 0.2, e_new, e)
        pts = q0 + e[:, None] * dirn + off
        fit = _grid_solve(pts, good, on_u, kk, pol, nrm, mod_n, seg, G, bias, module, P)
        if fit is None:
            return None
        G, bias = fit[0], fit[1]
    G, bias, cov_p, rms, n_used, n_segs, A_to_corners = fit
    corners = apply_h(G, unit)
    if not (np.all(np.isfinite(corners)) and _convex(corners)) or n_used < max(24, 0.4 * len(seg)) or rms > 0.25 * module:
        return None
    cov = A_to_corners @ cov_p @ A_to_corners.T
    return _GridFit(corners, cov, float(bias), float(rms), int(n_used), int(n_segs))


def _grid_solve(pts, good, on_u, kk, pol, nrm, mod_n, seg, G, bias, module, P):
    """Gauss-Newton for :func:`_grid_fit`: (G, bias, cov of the 8 H parameters, rms, n, segments, dcorners/dp).

    Unknowns: photo -> module homography ``H`` in coordinates centred on the
    points and scaled by the module (h33 = 1), and the edge bias.  Residual
    of a point: (its U or V through ``H`` after removing the bias) minus its
    line's k, times the module's length in px.  Points beyond 3.5 robust
    sigma are dropped.  The covariance is cluster-robust over segments
    (points along one segment share JPEG blocks, paper grain and print
    defects, so they are not independent) plus the effect of an unmodelled
    change of the bias across the marker (``EDGE_BIAS_GRADIENT_PX``) and of
    grid lines printed off their place (:func:`_line_shift_cov`).
    """
    if good.sum() < 24:
        return None
    cen = pts[good].mean(axis=0)
    L = module
    T = np.array([[1.0 / L, 0.0, -cen[0] / L], [0.0, 1.0 / L, -cen[1] / L], [0.0, 0.0, 1.0]])
    Hn = np.linalg.inv(G) @ np.linalg.inv(T)
    if not np.all(np.isfinite(Hn)) or abs(Hn[2, 2]) < 1e-12:
        return None
    Hn = Hn / Hn[2, 2]
    p = np.r_[Hn.ravel()[:8], bias / L]
    qn = (pts - cen) / L
    shift_dir = pol[:, None] * nrm
    use = good.copy()
    ones = np.ones(len(qn))
    J = r = None
    for it in range(8):
        H = np.r_[p[:8], 1.0].reshape(3, 3)
        qq = qn - p[8] * shift_dir
        xt = np.c_[qq, ones]
        a = np.where(on_u[:, None], H[0][None, :], H[1][None, :])
        den = xt @ H[2]
        F = np.sum(xt * a, axis=1) / den
        r = (F - kk) * mod_n
        J = np.zeros((len(qn), 9))
        g = xt / den[:, None]
        J[:, 0:3] = np.where(on_u[:, None], g, 0.0)
        J[:, 3:6] = np.where(on_u[:, None], 0.0, g)
        J[:, 6] = -F * g[:, 0]
        J[:, 7] = -F * g[:, 1]
        J[:, 8] = -np.sum((a[:, :2] - F[:, None] * H[2][None, :2]) * shift_dir, axis=1) / den
        J *= mod_n[:, None]
        if it >= 2:
            mad = 1.4826 * float(np.median(np.abs(r[use])))
            use = good & (np.abs(r) < max(3.5 * mad, 0.05))
        if use.sum() < 24:
            return None
        dp = np.linalg.lstsq(J[use], -r[use], rcond=None)[0]
        if not np.all(np.isfinite(dp)):
            return None
        p = p + dp
        if np.abs(dp).max() < 1e-10:
            break
    Ju, ru, sg = J[use], r[use], seg[use]
    A = np.linalg.pinv(Ju.T @ Ju)
    per_seg = np.zeros((int(seg.max()) + 1, 9))
    np.add.at(per_seg, sg, Ju * ru[:, None])
    n_cl = len(np.unique(sg))
    cov_p = A @ (per_seg.T @ per_seg) @ A * (n_cl / max(n_cl - 9, 1))
    # an edge bias that changes linearly across the marker would move the fit by dp_grad
    for coord in (P[use, 0], P[use, 1]):
        grad_col = Ju[:, 8] * (coord - MODULES / 2.0) / (MODULES / 2.0) * (EDGE_BIAS_GRADIENT_PX / L)
        dp_grad = -A @ (Ju.T @ grad_col)
        cov_p = cov_p + np.outer(dp_grad, dp_grad)
    cov_p = cov_p + _line_shift_cov(Ju, ru, sg, np.where(on_u, 0, MODULES + 1)[use] + kk[use].astype(int), A)
    H = np.r_[p[:8], 1.0].reshape(3, 3)
    Hpx = H @ T
    Gnew = np.linalg.inv(Hpx)
    Gnew = Gnew / Gnew[2, 2]
    # corner coordinates as functions of the 8 homography parameters (numeric)
    unit = np.array([[0.0, 0.0], [MODULES, 0.0], [MODULES, MODULES], [0.0, MODULES]])

    def corners_of(q):
        return apply_h(np.linalg.inv(np.r_[q, 1.0].reshape(3, 3) @ T), unit).ravel()

    c0 = corners_of(p[:8])
    D = np.zeros((8, 9))
    for i in range(8):
        h = 1e-7 * max(1.0, abs(p[i]))
        dq = p[:8].copy()
        dq[i] += h
        D[:, i] = (corners_of(dq) - c0) / h
    rms = float(np.sqrt(np.mean(ru**2)))
    return Gnew, float(p[8] * L), cov_p, rms, int(use.sum()), n_cl, D


def _line_shift_cov(Ju: np.ndarray, ru: np.ndarray, sg: np.ndarray, line: np.ndarray, A: np.ndarray) -> np.ndarray:
    """Covariance (9 x 9) of the grid fit's parameters from grid lines printed off their place.

    A printer puts every edge on its dot raster (half a dot is 0.02 mm at
    600 dpi, about 0.6 % of a 20 mm marker's module), and a marker printed
    from a raster image carries that image's rounding: OpenCV's own
    ``generateImageMarker`` draws the inner edges one pixel off at some
    sizes (98 px modules, for one).  Each grid line then sits off by its own
    shift, common to all its segments, which the cluster-robust covariance
    over segments does not see.  Model: one random shift per line (U = k or
    V = k), its variance the lines' mean residuals beyond what the scatter
    of their segments explains (method of moments, the fit's 9 parameters
    taken from the degrees of freedom), propagated through the fit.  Zero
    when the lines agree with each other within their noise.
    """
    ids = np.unique(line)
    if len(ids) <= 10:
        return np.zeros_like(A)
    sq, noise = 0.0, 0.0
    for i in ids:
        on = line == i
        sq += float(ru[on].mean()) ** 2
        segs = np.unique(sg[on])
        if len(segs) > 1:
            noise += float(np.var([ru[on & (sg == k)].mean() for k in segs], ddof=1)) / len(segs)
        else:
            noise += float(np.var(ru[on])) / max(int(on.sum()) - 1, 1)
    between = max(sq - noise, 0.0) / (len(ids) - 9)
    cov = np.zeros_like(A)
    if between > 0.0:
        for i in ids:
            dp = -A @ (Ju.T @ np.where(line == i, math.sqrt(between), 0.0))
            cov += np.outer(dp, dp)
    return cov


def _phi(x: np.ndarray) -> np.ndarray:
    """Standard normal CDF (Abramowitz & Stegun 7.1.26 erf, |error| < 1.5e-7)."""
    x = np.asarray(x, dtype=np.float64)
    z = np.abs(x) / math.sqrt(2.0)
    t = 1.0 / (1.0 + 0.3275911 * z)
    poly = t * (0.254829592 + t * (-0.284496736 + t * (1.421413741 + t * (-1.453152027 + t * 1.061405429))))
    erf = 1.0 - poly * np.exp(-z * z)
    return 0.5 * (1.0 + np.sign(x) * erf)


def _quartile_width(u: np.ndarray, prof: np.ndarray) -> float:
    """Distance between the 25 % and 75 % crossings of a rising normalised profile."""
    def cross(level):
        above = np.nonzero(prof >= level)[0]
        if len(above) == 0 or above[0] == 0:
            return np.nan
        i = above[0]
        p0, p1 = prof[i - 1], prof[i]
        return u[i - 1] + (level - p0) / (p1 - p0) * (u[i] - u[i - 1]) if p1 != p0 else u[i]
    w = cross(0.75) - cross(0.25)
    return float(w) if np.isfinite(w) else float("inf")


# =========================================================================== input checks


def _gray_of(photo) -> tuple[np.ndarray, str]:
    if isinstance(photo, Photo):
        return photo.gray, photo.name
    arr = np.asarray(photo)
    if arr.ndim == 3 and arr.shape[2] in (3, 4):
        arr = cv2.cvtColor(np.ascontiguousarray(arr[..., :3]), cv2.COLOR_RGB2GRAY)
    if arr.ndim != 2:
        raise SurfacesError(f"calibrate needs a Photo or a 2-D grey image, got an array of shape {arr.shape}")
    if arr.dtype != np.uint8:
        if arr.dtype.kind in "iu" and arr.size and arr.max() <= 255 and arr.min() >= 0:
            arr = arr.astype(np.uint8)
        else:
            raise SurfacesError(f"calibrate needs an 8-bit grey image, got dtype {arr.dtype}: load it with load_photo")
    return np.ascontiguousarray(arr), "photo"


def _positive(value, what: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SurfacesError(f"{what} {value!r} is not a number: give a positive number") from None
    if not math.isfinite(v) or v <= 0:
        raise SurfacesError(f"{what} {value!r} must be a positive finite number")
    return v


def _check_point(pt, what: str) -> tuple[float, float] | None:
    if pt is None:
        return None
    try:
        x, y = (float(v) for v in pt)
    except (TypeError, ValueError):
        raise SurfacesError(f"{what} {pt!r} is not an (x, y) pair of numbers") from None
    if not (math.isfinite(x) and math.isfinite(y)):
        raise SurfacesError(f"{what} {pt!r} is not finite: give (x, y) in photo pixels")
    return x, y
