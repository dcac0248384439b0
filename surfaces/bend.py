"""Bend coupons: find the coupon, detect open discontinuities, correct for curvature.

A guided bend coupon is photographed from above with its stretched convex
surface towards the camera and the reference card beside it at about the
height of the bend's apex.  Three things differ from a fracture face:

* **The coupon.**  It is usually brighter machined or ground metal on a
  table, a strip 10-40 mm wide; its two long edges are strong straight
  edges.  :func:`find_coupon` segments it against the table colour in the
  marker plane (coarse), then places each long edge to a fraction of a
  working pixel from the strongest brightness step across the coupon in
  short blocks along it, fitting a straight line to the blocks (fine).  The
  face axes follow the coupon: x along it (column), y across (row).
* **Open discontinuities.**  :func:`detect` looks for thin dark openings of
  any orientation (Sato ridge filter plus a darkness threshold against a
  robust local background) and rounded or slag-filled openings.  Near the
  long edges the background is taken along the edge (a running median in x)
  so the edge's own shading is not mistaken for an opening while a crack
  running into the edge is kept.  Grinding and machining marks are long,
  shallow and parallel: candidates aligned with the face's dominant line
  direction must be much deeper than that family to count.  The orange-peel
  texture of stretched metal is the noise the thresholds are scaled by.
* **Curvature.**  Seen from above, the convex surface is foreshortened along
  the coupon (across the bend axis): a point at true arc length ``s`` from
  the apex appears at ``x = R sin(s / R)``.  With the outer radius ``R``
  (``former_diameter / 2 + thickness``, or measured) the outlines are mapped
  back to true surface coordinates, ``s = R asin(x / R)``; straight legs
  beyond the bend (bends under 180 degrees) are inclined at half the bend
  angle.  Where the surface slopes more than :data:`STEEP_SLOPE_DEG` the
  correction is unreliable; this is said in the notes and widens the
  uncertainty.

Every length is in millimetres; pixels appear only when warping.
"""

from __future__ import annotations

import math
from typing import Callable

import cv2
import numpy as np
from scipy import ndimage as ndi
from skimage.filters import apply_hysteresis_threshold, sato

from . import face as _face
from .geometry import apply_h
from .model import WORK_PX_PER_MM, Calibration, Face, FaceError, Settings, SurfacesError
from .segment import ISO6520, Detection, _classify_dark, _robust_sigma, _trace_dark, background, texture_energy
from .shapes import polygon_features

__all__ = ["find_coupon", "detect", "outer_radius", "arc_length_map", "STEEP_SLOPE_DEG"]

COARSE_PX_PER_MM = 4.0
EDGE_PX_PER_MM = 8.0  # resolution of the pass that places the long edges
WIDTH_RANGE_MM = (5.0, 70.0)  # coupons accepted (typical 10-40 mm)
LENGTH_RANGE_MM = (15.0, 320.0)  # visible length accepted (typical 40-150 mm)
#: Surface slope beyond which lengths along the coupon are marked unreliable.
STEEP_SLOPE_DEG = 60.0
#: Relative 1-sigma uncertainty of the outer radius when it is derived from the
#: former diameter and thickness: spring-back and a coupon that does not wrap
#: the former tightly make the real radius larger (common practice).
RADIUS_REL_U_DERIVED = 0.05
RADIUS_REL_U_MEASURED = 0.02  # a measured outer radius (from memory: gauge reading)
APEX_U_MM = 2.0  # 1-sigma of the apex position when taken as the face centre
#: Camera distance assumed when the surface lies below the marker plane
#: (typical hand-held photo of a coupon, from memory: 250-400 mm).
CAMERA_DISTANCE_MM = 300.0
EDGE_BG_MM = 2.0  # band along each long edge where the background is taken along x
EDGE_IGNORE_MM = 0.12  # the outermost strip of the face (edge blur) never seeds a detection
CRACK_SIGMAS_MM = (0.05, 0.09, 0.15)  # ridge filter scales
SCRATCH_ALIGN_DEG = 12.0


# --------------------------------------------------------------------------
# curvature


def outer_radius(settings: Settings) -> tuple[float | None, float, str]:
    """Outer radius of the bend in mm, its relative 1-sigma uncertainty and where it came from.

    Returns ``(None, 0, reason)`` when no curvature is known.

    Raises
    ------
    SurfacesError
        A former diameter, thickness or radius that is not a positive number.
    """

    def _pos(name, v):
        if v is None:
            return None
        try:
            f = float(v)
        except (TypeError, ValueError):
            raise SurfacesError(f"{name} {v!r} is not a number: give it in millimetres") from None
        if not math.isfinite(f) or f <= 0:
            raise SurfacesError(f"{name} {v!r}: give a positive number of millimetres")
        return f

    r = _pos("--outer-radius-mm", settings.outer_radius_mm)
    d = _pos("--former-mm", settings.former_diameter_mm)
    t = _pos("--thickness-mm", (settings.nominal or {}).get("thickness_mm"))
    if settings.bend_angle_deg is not None:
        a = float(settings.bend_angle_deg)
        if not (math.isfinite(a) and 0 < a <= 180):
            raise SurfacesError(f"--bend-angle {settings.bend_angle_deg!r}: give the bend angle in degrees (e.g. 90, 120, 180)")
    if r is not None:
        return r, RADIUS_REL_U_MEASURED, "measured outer radius"
    if d is not None and t is not None:
        return d / 2 + t, RADIUS_REL_U_DERIVED, "former diameter / 2 + thickness"
    if d is not None:
        return None, 0.0, "the former diameter is given but not the coupon thickness"
    return None, 0.0, "no former diameter or outer radius given"


def arc_length_map(u_mm, R: float, *, bend_angle_deg: float | None = None) -> np.ndarray:
    """True surface distance from the apex for projected distances ``u_mm``.

    The convex surface of a bend to ``bend_angle_deg`` (180 when not given)
    is a circular arc of radius ``R`` from -angle/2 to +angle/2 about the
    apex, continued by straight legs inclined at angle/2 (analytic geometry:
    a point at arc length ``s`` projects to ``R sin(s / R)``).  Projected
    distances beyond the visible extent are clipped to it.

    Parameters
    ----------
    u_mm : array_like
        Signed projected distance from the apex along the coupon, mm.
    R : float
        Outer radius of the bend, mm.

    Returns
    -------
    ndarray, same shape: signed true arc length from the apex, mm.

    Examples
    --------
    >>> float(arc_length_map(30.0 * np.sin(0.5), 30.0))  # doctest: +ELLIPSIS
    15.0...
    """
    u = np.asarray(u_mm, dtype=np.float64)
    half = math.radians(180.0 if bend_angle_deg is None else float(bend_angle_deg)) / 2
    half = min(half, math.pi / 2)
    a = np.abs(u)
    u_bend = R * math.sin(half)
    s = np.where(a <= u_bend, R * np.arcsin(np.clip(a / R, 0, 1)), 0.0)
    if half < math.pi / 2 - 1e-9:
        leg = R * half + (a - u_bend) / math.cos(half)
        s = np.where(a > u_bend, leg, s)
    else:
        s = np.where(a > u_bend, R * half, s)
    return np.sign(u) * s


def slope_deg(u_mm, R: float, *, bend_angle_deg: float | None = None) -> np.ndarray:
    """Surface slope (degrees from the marker plane) at projected distance ``u_mm`` from the apex."""
    half = math.degrees(min(math.radians(180.0 if bend_angle_deg is None else float(bend_angle_deg)) / 2, math.pi / 2))
    a = np.abs(np.asarray(u_mm, dtype=np.float64))
    th = np.degrees(np.arcsin(np.clip(a / R, 0, 1)))
    return np.minimum(th, half)


def _make_length_factor(R: float, rel_u_R: float, *, apex_mm: float, length_mm: float, bend_angle_deg, apex_u_mm: float):
    """``f(contour_mm) -> (true_contour_mm, extra_rel_u)`` for one face.

    x is mapped to true arc length measured from the face start
    (``s(x) - s(0)``); y (along the bend axis) is not foreshortened.  The
    relative uncertainty combines, in quadrature: the outer radius (its
    relative uncertainty propagated numerically through the greatest
    dimension), the apex position, the height of the surface below the marker
    plane (perspective, at :data:`CAMERA_DISTANCE_MM`), and a doubling of all
    of it where the slope exceeds :data:`STEEP_SLOPE_DEG`.
    """

    def s_of(x, r, apex):
        return arc_length_map(x - apex, r, bend_angle_deg=bend_angle_deg) - arc_length_map(0.0 - apex, r, bend_angle_deg=bend_angle_deg)

    def greatest(pts):
        from .shapes import feret

        return feret(pts)[0] if len(pts) >= 2 else 0.0

    def f(contour_mm):
        c = np.asarray(contour_mm, dtype=np.float64).reshape(-1, 2)
        out = np.c_[s_of(c[:, 0], R, apex_mm), c[:, 1]]
        g0 = greatest(out)
        if g0 <= 0:
            return out, 0.0
        devs = []
        for r, ap in ((R * (1 + rel_u_R), apex_mm), (R * (1 - rel_u_R), apex_mm), (R, apex_mm + apex_u_mm), (R, apex_mm - apex_u_mm)):
            alt = np.c_[s_of(c[:, 0], r, ap), c[:, 1]]
            devs.append(abs(greatest(alt) - g0) / g0)
        u_r = max(devs[0], devs[1])
        u_a = max(devs[2], devs[3])
        # depth below the apex plane (the marker's plane) changes the photo scale
        th = np.radians(slope_deg(c[:, 0] - apex_mm, R, bend_angle_deg=bend_angle_deg))
        dz = float(np.max(R * (1 - np.cos(th))))
        u_h = dz / CAMERA_DISTANCE_MM / math.sqrt(3)
        rel = math.sqrt(u_r**2 + u_a**2 + u_h**2)
        steep = float(np.max(slope_deg(c[:, 0] - apex_mm, R, bend_angle_deg=bend_angle_deg))) > STEEP_SLOPE_DEG
        if steep:
            rel = 2 * rel + 0.05
        return out, rel

    f.true_length_mm = float(s_of(np.array([length_mm]), R, apex_mm)[0])  # type: ignore[attr-defined]
    f.outer_radius_mm = R  # type: ignore[attr-defined]
    f.apex_mm = apex_mm  # type: ignore[attr-defined]
    return f


# --------------------------------------------------------------------------
# finding the coupon


def _lab(rgb: np.ndarray) -> np.ndarray:
    return cv2.cvtColor(rgb, cv2.COLOR_RGB2LAB).astype(np.float32)


def _table_ref(lab: np.ndarray, allowed: np.ndarray, ring: np.ndarray) -> np.ndarray:
    sel = allowed & ring
    if sel.sum() < 50:
        sel = allowed
    return np.median(lab[sel], axis=0)


def _coarse_coupon(rgb, gray, calib: Calibration, roi_poly):
    """Centre (plane mm), axis (deg), length, width (mm) and the table colour of the best coupon candidate."""
    poly_mm, _ = _face._search_box(calib, gray.shape, roi_poly)
    lo, hi = poly_mm.min(axis=0), poly_mm.max(axis=0)
    if calib.markers:
        mc = np.mean([apply_h(calib.H, m.corners_px).mean(axis=0) for m in calib.markers], axis=0)
        lo = np.maximum(lo, mc - _face.MAX_SEARCH_MM)
        hi = np.minimum(hi, mc + _face.MAX_SEARCH_MM)
    if np.any(hi - lo < 10):
        raise FaceError("the coupon search region is too small or outside the photo: give --roi around the coupon")
    s = COARSE_PX_PER_MM
    W, Hh = int(math.ceil((hi[0] - lo[0]) * s)), int(math.ceil((hi[1] - lo[1]) * s))
    A = np.array([[1 / s, 0, lo[0] + 0.5 / s], [0, 1 / s, lo[1] + 0.5 / s], [0, 0, 1.0]])
    ppm = calib.px_per_mm_at(gray.shape[1] / 2, gray.shape[0] / 2)
    f = min(1.0, 2.0 * s / max(ppm, 1e-6))
    if f < 0.95:
        small = cv2.resize(rgb, None, fx=f, fy=f, interpolation=cv2.INTER_AREA)
        Hs = calib.H @ np.array([[1 / f, 0, 0.5 / f - 0.5], [0, 1 / f, 0.5 / f - 0.5], [0, 0, 1]])
    else:
        small, Hs = rgb, calib.H
    M = np.linalg.inv(Hs) @ A
    flags = cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP
    plane = cv2.warpPerspective(small, M, (W, Hh), flags=flags, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    valid = cv2.warpPerspective(np.ones(small.shape[:2], np.uint8), M, (W, Hh), flags=cv2.INTER_NEAREST | cv2.WARP_INVERSE_MAP) > 0
    valid = cv2.erode(valid.astype(np.uint8), np.ones((5, 5), np.uint8)) > 0
    to_px = lambda p: ((np.asarray(p) - lo) * s - 0.5).astype(np.int32)  # noqa: E731
    allowed = np.zeros((Hh, W), np.uint8)
    cv2.fillPoly(allowed, [to_px(poly_mm)], 1)
    card = np.zeros((Hh, W), np.uint8)
    for ex in _face._card_exclusion(calib):
        cv2.fillPoly(card, [to_px(ex)], 1)
    allowed = (allowed > 0) & valid & (card == 0)
    if allowed.sum() < 100:
        raise FaceError("no room for a coupon beside the reference card: give --roi around the coupon")
    lab = cv2.GaussianBlur(_lab(plane), (0, 0), 0.6 * s)
    # the table: what lies along the border of the searched region
    dist_in = cv2.distanceTransform(allowed.astype(np.uint8), cv2.DIST_L2, 3) / s
    ring = (dist_in > 0) & (dist_in < max(6.0, 0.06 * min(hi - lo)))
    ref = _table_ref(lab, allowed, ring)
    d = np.sqrt((((lab - ref) * np.array([1.0, 1.5, 1.5], np.float32)) ** 2).sum(-1))
    # texture differs too (ground metal vs wood, cloth, painted steel)
    g = lab[..., 0]
    tex = _face._texture_energy(cv2.cvtColor(plane, cv2.COLOR_RGB2GRAY), px_per_mm=s, fine_mm=0.3, window_mm=1.0)
    tref = float(np.median(tex[allowed & ring])) if (allowed & ring).any() else float(np.median(tex[allowed]))
    dt = np.abs(np.log((tex + 1.0) / (tref + 1.0))) * 25.0
    score = np.hypot(d, 0.5 * dt)
    score[~allowed] = 0
    thr = _face._otsu(score[allowed])
    thr = max(thr, 12.0)
    cand = ((score > thr) & allowed).astype(np.uint8)
    k = max(1, int(round(1.0 * s)))
    cand = cv2.morphologyEx(cand, cv2.MORPH_OPEN, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
    cand = cv2.morphologyEx(cand, cv2.MORPH_CLOSE, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
    n, lab_cc, stats, _ = cv2.connectedComponentsWithStats(cand, connectivity=8)
    best, best_score = None, 0.0
    for i in range(1, n):
        area = stats[i, cv2.CC_STAT_AREA] / s**2
        if area < WIDTH_RANGE_MM[0] * LENGTH_RANGE_MM[0]:
            continue
        ys, xs = np.nonzero(lab_cc == i)
        pts = np.c_[xs, ys].astype(np.float32)
        (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
        L, Wd = max(rw, rh) / s, max(min(rw, rh), 1) / s
        fill = area / max(L * Wd, 1e-6)
        ok_size = WIDTH_RANGE_MM[0] <= Wd <= WIDTH_RANGE_MM[1] and LENGTH_RANGE_MM[0] <= L <= LENGTH_RANGE_MM[1]
        elong = L / Wd
        sc = area * fill**2 * (1.0 if ok_size else 0.05) * (1.0 if elong >= 1.3 else 0.2)
        if sc > best_score:
            best_score, best = sc, (cx, cy, rw, rh, ang)
    if best is None:
        raise FaceError(
            "could not find the bend coupon: give --roi X0,Y0,X1,Y1 (a box around the coupon in photo pixels)"
        )
    cx, cy, rw, rh, ang = best
    if rw < rh:
        ang += 90.0
        rw, rh = rh, rw
    ang = (ang + 90.0) % 180.0 - 90.0  # x runs left to right in the plane
    centre = lo + (np.array([cx, cy]) + 0.5) / s
    return centre, float(ang), rw / s, rh / s, ref, float(thr)


def _edge_in_profile(p: np.ndarray, lo: int, hi: int, sign: float) -> float | None:
    """Sub-pixel index of the strongest step of ``p`` within ``[lo, hi)`` of the given sign."""
    gp = np.gradient(p) * sign
    lo, hi = max(lo, 1), min(hi, len(p) - 1)
    if hi - lo < 3:
        return None
    j = lo + int(np.argmax(gp[lo:hi]))
    if gp[j] <= 0:
        return None
    a, b, c = gp[j - 1], gp[j], gp[min(j + 1, len(gp) - 1)]
    den = a - 2 * b + c
    off = 0.5 * (a - c) / den if abs(den) > 1e-9 else 0.0
    return j + float(np.clip(off, -0.5, 0.5))


def _robust_line(x: np.ndarray, y: np.ndarray) -> tuple[float, float, np.ndarray] | None:
    """Least-squares line y = a + b x after rejecting outlying blocks; (a, b, inliers)."""
    ok = np.isfinite(y)
    if ok.sum() < 3:
        return None
    for _ in range(4):
        b, a = np.polyfit(x[ok], y[ok], 1)
        r = y - (a + b * x)
        sig = max(1.4826 * float(np.median(np.abs(r[ok]))), 0.5)
        new = np.isfinite(y) & (np.abs(r) < 3 * sig)
        if new.sum() < 3 or (new == ok).all():
            ok = new if new.sum() >= 3 else ok
            break
        ok = new
    b, a = np.polyfit(x[ok], y[ok], 1)
    return float(a), float(b), ok


def find_coupon(
    rgb: np.ndarray,
    gray: np.ndarray,
    calib: Calibration,
    *,
    roi: tuple[float, ...] | None = None,
    px_per_mm: float = WORK_PX_PER_MM,
) -> Face:
    """Locate a bend coupon and rectify its visible convex surface.

    Parameters
    ----------
    rgb, gray : (H, W, 3) and (H, W) uint8 ndarrays
        The photo (after EXIF orientation).
    calib : Calibration
        Photo px -> marker-plane mm.
    roi : 4 or 8 numbers, optional
        A rough box ``x0, y0, x1, y1`` or four corners in photo pixels
        around the coupon.
    px_per_mm : float
        Resolution of the rectified face image.

    Returns
    -------
    Face
        ``image`` spans exactly the coupon between its two long edges
        (rows) and over its visible length (columns); ``mask`` is all True.

    Raises
    ------
    FaceError
        No coupon-like strip found (the message suggests ``--roi``).
    """
    roi_poly = _face._roi_polygon(roi, gray.shape) if roi is not None else None
    method = "auto" if roi is None else ("roi-box" if len(roi) == 4 else "roi-corners")
    warnings: list[str] = []
    centre, axis, L, Wd, table_lab, thr = _coarse_coupon(rgb, gray, calib, roi_poly)

    # fine pass at EDGE_PX_PER_MM: straight long edges from brightness steps across the coupon
    e = EDGE_PX_PER_MM
    m_y = max(5.0, 0.5 * Wd)
    m_x = max(6.0, 0.15 * L)
    ox, oy = -L / 2 - m_x, -Wd / 2 - m_y
    w, h = int(math.ceil((L + 2 * m_x) * e)), int(math.ceil((Wd + 2 * m_y) * e))
    A = _face.face_frame(centre, axis, (ox, oy), px_per_mm=e)
    sub = _face.warp_to_face(rgb, calib.H, A, (h, w))
    lab = cv2.GaussianBlur(_lab(sub), (0, 0), 0.08 * e)
    Lc = lab[..., 0]
    # which way the step goes: coupon minus table brightness
    c0 = int(round((m_x + 0.3 * L) * e))
    c1 = int(round((m_x + 0.7 * L) * e))
    r_in = slice(int((m_y + 0.3 * Wd) * e), int((m_y + 0.7 * Wd) * e) + 1)
    inside_L = float(np.median(Lc[r_in, c0:c1]))
    sign = 1.0 if inside_L >= table_lab[0] else -1.0
    nb = max(6, min(40, int(L / 3)))
    xs_b, top_b, bot_b = [], [], []
    win = max(2.5, 0.3 * Wd) * e
    y_top0, y_bot0 = m_y * e, (m_y + Wd) * e
    for k in range(nb):
        a0 = int(round((m_x + L * (0.12 + 0.76 * k / nb)) * e))
        a1 = int(round((m_x + L * (0.12 + 0.76 * (k + 1) / nb)) * e))
        if a1 - a0 < 2:
            continue
        prof = np.median(Lc[:, a0:a1], axis=1)
        t = _edge_in_profile(prof, int(y_top0 - win), int(y_top0 + win), sign)
        b = _edge_in_profile(prof, int(y_bot0 - win), int(y_bot0 + win), -sign)
        xs_b.append(0.5 * (a0 + a1 - 1))
        top_b.append(np.nan if t is None else t)
        bot_b.append(np.nan if b is None else b)
    xs_b = np.asarray(xs_b, float)
    lt = _robust_line(xs_b, np.asarray(top_b, float))
    lb = _robust_line(xs_b, np.asarray(bot_b, float))
    if lt is None or lb is None:
        raise FaceError("the coupon's long edges are unclear: give --roi tightly around the coupon")
    (at, bt, okt), (ab, bb, okb) = lt, lb
    if okt.mean() < 0.6 or okb.mean() < 0.6:
        warnings.append("the coupon's long edges are not straight everywhere: check the outline on the overlay")
    if abs(math.degrees(math.atan(bt) - math.atan(bb))) > 1.5:
        warnings.append("the coupon's long edges are not parallel in the marker plane: check the outline on the overlay")
    # centre line and corrected axis, in sub-image pixels
    slope = 0.5 * (bt + bb)
    xc = 0.5 * (w - 1)
    y_mid = 0.5 * ((at + bt * xc) + (ab + bb * xc))
    width = ((ab + bb * xc) - (at + bt * xc)) * math.cos(math.atan(slope)) / e
    if not (WIDTH_RANGE_MM[0] * 0.8 <= width <= WIDTH_RANGE_MM[1] * 1.2):
        raise FaceError(f"the strip found is {width:.1f} mm wide, not a bend coupon: give --roi around the coupon")
    mid_mm = apply_h(A, [[xc, y_mid]])[0]
    axis2 = axis + math.degrees(math.atan(slope))

    # along the coupon: visible extent from the colour difference to the table
    A2 = _face.face_frame(mid_mm, axis2, (ox, -width / 2 - m_y), px_per_mm=e)
    sub2 = _face.warp_to_face(rgb, calib.H, A2, (h, w))
    lab2 = cv2.GaussianBlur(_lab(sub2), (0, 0), 0.3 * e)
    d2 = np.sqrt((((lab2 - table_lab) * np.array([1.0, 1.5, 1.5], np.float32)) ** 2).sum(-1))
    band = slice(int((m_y + 0.2 * width) * e), int((m_y + 0.8 * width) * e) + 1)
    prof = np.median(d2[band, :], axis=0)
    inner = float(np.median(prof[c0:c1]))
    outside = float(np.median(np.r_[prof[: max(2, int(0.4 * m_x * e))], prof[-max(2, int(0.4 * m_x * e)) :]]))
    level = outside + 0.3 * (inner - outside)
    if inner - outside < 0.5 * thr:
        warnings.append("the coupon's ends are unclear: visible length taken from the coarse outline")
        x_lo, x_hi = m_x * e, (m_x + L) * e
    else:
        cen = int(0.5 * (c0 + c1))
        below = prof < level
        left = np.nonzero(below[:cen])[0]
        right = np.nonzero(below[cen:])[0]
        x_lo = _cross(prof, level, left[-1]) if left.size else 0.0
        x_hi = _cross(prof, level, cen + right[0] - 1) if right.size else float(w - 1)
        if not left.size or not right.size:
            warnings.append("the coupon runs out of the searched region: retake with the whole bend in frame")
    fx0, fx1 = ox + (x_lo + 0.5) / e, ox + (x_hi + 0.5) / e
    length = fx1 - fx0
    if length < LENGTH_RANGE_MM[0] * 0.8:
        raise FaceError(f"the coupon found is only {length:.1f} mm long: give --roi around the coupon")

    wf, hf = int(round(length * px_per_mm)), int(round(width * px_per_mm))
    Af = _face.face_frame(mid_mm, axis2, (fx0, -width / 2), px_per_mm=px_per_mm)
    Af = _face._rescale_frame(Af, length / wf, width / hf, px_per_mm)
    img = _face.warp_to_face(rgb, calib.H, Af, (hf, wf))
    corners = np.array([[-0.5, -0.5], [wf - 0.5, -0.5], [wf - 0.5, hf - 0.5], [-0.5, hf - 0.5]])
    poly_px = apply_h(np.linalg.inv(calib.H) @ Af, corners)
    Hp, Wp = gray.shape[:2]
    if np.any(poly_px < -2) or np.any(poly_px[:, 0] > Wp + 1) or np.any(poly_px[:, 1] > Hp + 1):
        warnings.append("part of the coupon lies outside the photo: retake with the whole bend in frame")
    fit_ok = 0.5 * (okt.mean() + okb.mean())
    return Face(
        image=img,
        mask=np.ones((hf, wf), bool),
        px_per_mm=px_per_mm,
        A_face_to_plane=Af,
        length_mm=float(length),
        width_mm=float(width),
        area_mm2=float(length * width),
        polygon_px=poly_px,
        method=method,
        root_side="unknown",
        confidence=float(np.clip(fit_ok, 0.05, 1.0)),
        warnings=tuple(warnings),
    )


def _cross(p: np.ndarray, level: float, i: int) -> float:
    """Sub-pixel position between ``i`` and ``i + 1`` where ``p`` crosses ``level``."""
    i = int(np.clip(i, 0, len(p) - 2))
    a, b = p[i], p[i + 1]
    if a == b:
        return float(i) + 0.5
    return float(i + np.clip((level - a) / (b - a), 0, 1))


# --------------------------------------------------------------------------
# open discontinuities


def _edge_background(g: np.ndarray, *, px_per_mm: float, window_mm: float = 8.0) -> np.ndarray:
    """Background taken along x only (running median per row), for the bands along the long edges."""
    f = min(1.0, 4.0 / px_per_mm)
    small = cv2.resize(g, (max(1, int(round(g.shape[1] * f))), g.shape[0]), interpolation=cv2.INTER_AREA) if f < 1 else g
    k = max(3, int(round(window_mm * px_per_mm * f)) | 1)
    med = ndi.median_filter(small, size=(1, k), mode="reflect")
    return cv2.resize(med, (g.shape[1], g.shape[0]), interpolation=cv2.INTER_LINEAR)


def _dominant_lines(ridge: np.ndarray, g: np.ndarray, *, px_per_mm: float) -> tuple[float, float]:
    """Dominant line direction (rad, in (col,row) axes) of the face's fine structure and its coherence 0..1."""
    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0, ksize=3)
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1, ksize=3)
    jxx, jyy, jxy = float((gx * gx).mean()), float((gy * gy).mean()), float((gx * gy).mean())
    # gradient direction; lines run perpendicular to it
    theta_g = 0.5 * math.atan2(2 * jxy, jxx - jyy)
    coh = math.hypot(jxx - jyy, 2 * jxy) / max(jxx + jyy, 1e-9)
    return theta_g + math.pi / 2, coh


def _angle_diff(a: float, b: float) -> float:
    d = (a - b) % math.pi
    return min(d, math.pi - d)


def detect(
    face: Face,
    settings: Settings,
    *,
    photo_px_per_mm: float,
) -> tuple[list[Detection], Face, Callable | None, list[str]]:
    """Open discontinuities on a bend coupon's convex surface.

    Parameters
    ----------
    face : Face
        From :func:`find_coupon`; column = x along the coupon.
    settings : Settings
        ``min_size_mm``, ``bend_angle_deg``, ``former_diameter_mm``,
        ``outer_radius_mm`` and ``nominal['thickness_mm']`` are used.
    photo_px_per_mm : float
        Photo scale at the coupon (the finest detail the photo holds).

    Returns
    -------
    detections : list of Detection
        Outlines in face-image pixels (col, row); ``cause`` is ``slag`` or
        ``pore`` when the opening shows it, else ``""``.
    face : Face
        The face (with the curvature notes among its warnings).
    length_factor : callable or None
        ``f(contour_mm) -> (true_contour_mm, extra_rel_u)`` mapping projected
        face mm to true surface mm; None when no curvature is known.
    notes : list of str
        Plain-language remarks for the report (projected lengths, steep zones).
    """
    if not (math.isfinite(photo_px_per_mm) and photo_px_per_mm > 0):
        raise SurfacesError(f"photo scale {photo_px_per_mm!r} px/mm is not usable: check the calibration")
    notes: list[str] = []
    R, rel_u_R, why = outer_radius(settings)
    angle = settings.bend_angle_deg
    apex = face.length_mm / 2
    length_factor = None
    if R is None:
        notes.append(
            f"lengths along the coupon are projected ({why}): give --former-mm and --thickness-mm "
            "(or --outer-radius-mm) to correct them to true surface lengths"
        )
    else:
        half_ang = min(math.radians(180.0 if angle is None else float(angle)) / 2, math.pi / 2)
        u_max = R * math.sin(half_ang) if half_ang >= math.pi / 2 - 1e-9 else float("inf")
        if apex > 1.05 * u_max:
            notes.append(
                f"the visible coupon ({face.length_mm:.0f} mm) is longer than the bend's projected width "
                f"({2 * u_max:.0f} mm for an outer radius of {R:.1f} mm): check the former diameter, thickness "
                "and bend angle; lengths beyond it are not corrected"
            )
        u_steep = R * math.sin(math.radians(STEEP_SLOPE_DEG))
        if math.degrees(half_ang) > STEEP_SLOPE_DEG and apex > u_steep:
            notes.append(
                f"beyond {u_steep:.1f} mm either side of the apex (x < {apex - u_steep:.1f} mm or "
                f"x > {apex + u_steep:.1f} mm) the surface slopes more than {STEEP_SLOPE_DEG:.0f} degrees: "
                "lengths along the coupon there are unreliable and carry a wider uncertainty"
            )
        length_factor = _make_length_factor(
            R, rel_u_R, apex_mm=apex, length_mm=face.length_mm, bend_angle_deg=angle, apex_u_mm=APEX_U_MM
        )
        notes.append(
            f"lengths along the coupon corrected to the curved surface (outer radius {R:.1f} mm, {why}; "
            f"apex taken at the centre of the visible bend, x = {apex:.1f} mm)"
        )
    dets = find_openings(face.image, px_per_mm=face.px_per_mm, photo_px_per_mm=photo_px_per_mm, min_size_mm=settings.min_size_mm)
    face2 = Face(**{**face.__dict__, "warnings": tuple(face.warnings)})
    return dets, face2, length_factor, notes


def find_openings(
    rgb: np.ndarray,
    *,
    px_per_mm: float,
    photo_px_per_mm: float,
    min_size_mm: float = 0.3,
    sensitivity: float = 1.0,
) -> list[Detection]:
    """Open discontinuities on a rectified coupon image (column = x along it, rows between the long edges).

    Returns
    -------
    list of Detection, outlines in face pixels (col, row), sorted by x.
    """
    mm = float(px_per_mm)
    h, w = rgb.shape[:2]
    g = cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY).astype(np.float32)
    # photo detail limits the useful smoothing: no finer than ~0.5 photo px
    smooth = max(0.04, 0.4 / photo_px_per_mm) * mm
    gs = cv2.GaussianBlur(g, (0, 0), smooth)
    bg2 = background(g, px_per_mm=mm)
    bge = _edge_background(gs, px_per_mm=mm)
    rows = np.arange(h, dtype=np.float32)
    dist_edge_mm = np.minimum(rows + 0.5, h - 0.5 - rows) / mm
    wgt = np.clip((EDGE_BG_MM + 1.0 - dist_edge_mm) / 1.0, 0, 1)[:, None]
    bg = wgt * bge + (1 - wgt) * bg2
    resid = bg - gs
    mask = np.ones((h, w), bool)
    ign = max(1, int(round(EDGE_IGNORE_MM * mm)))
    seed_mask = mask.copy()
    seed_mask[:ign] = False
    seed_mask[-ign:] = False
    sig = _robust_sigma(resid)
    bgm = float(np.median(bg))
    hi = sensitivity * max(5.0 * sig, 0.12 * bgm)
    lo = sensitivity * max(3.0 * sig, 0.06 * bgm)
    dark = apply_hysteresis_threshold(np.where(seed_mask, resid, 0), lo, hi)

    sig_px = [max(s * mm, 0.6, 0.5 * mm / photo_px_per_mm) for s in CRACK_SIGMAS_MM]
    gn = gs / max(bgm, 1.0)
    ridge = sato(gn - bg / max(bgm, 1.0), sigmas=sorted(set(sig_px)), black_ridges=True, mode="reflect")
    ridge[~seed_mask] = 0
    rsig = _robust_sigma(ridge)
    rmed = float(np.median(ridge))
    ridge_mask = apply_hysteresis_threshold(ridge - rmed, sensitivity * 7 * rsig, sensitivity * 14 * rsig)
    # a ridge must also be dark against its background (ignore bright-edge halos)
    ridge_mask &= resid > lo * 0.6

    theta_lines, coherence = _dominant_lines(ridge, gs, px_per_mm=mm)
    tex = texture_energy(g, px_per_mm=mm)
    tex_med = float(np.median(tex))
    speck_px = (0.15 * mm) ** 2
    lab, n = ndi.label(dark | ridge_mask, structure=np.ones((3, 3)))
    dets: list[Detection] = []
    for i, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None:
            continue
        comp = lab[sl] == i
        if comp.sum() < speck_px:
            continue
        d = _trace_dark(i, sl, lab, gs, bg, resid, ridge_mask, tex, mask, mm=mm, sig=sig, tex_med=tex_med)
        if d is None or d.features["greatest_mm"] < max(min_size_mm, 0.2):
            continue
        f = d.features
        # the coupon's own edge: long, hugging a long edge, parallel to it
        y0, y1 = f["y0_mm"], f["y1_mm"]
        W = h / mm
        hug = min(y1, W - y0) < 0.6 and _angle_diff(f["angle_rad"], 0.0) < math.radians(15) and f["across_mm"] < 0.6
        if hug and f["along_mm"] > 2.0:
            continue
        # grinding / machining marks: aligned with the face's line family and shallow
        if coherence > 0.15 and _angle_diff(f["angle_rad"], theta_lines) < math.radians(SCRATCH_ALIGN_DEG):
            if f["contrast"] < 0.35 or f["cnr"] < 14:
                continue
        kind, iso, conf = _bend_kind(f)
        d.kind, d.iso6520, d.confidence = kind, iso, conf
        d.cause = {"pore": "pore", "inclusion": "slag"}.get(kind, "")
        if kind == "crack" and f.get("blob", False):
            d.cause = "slag"
        dets.append(d)
    dets.sort(key=lambda d: (d.features["cx_px"], d.features["cy_px"]))
    return dets


def _bend_kind(f: dict) -> tuple[str, str, float]:
    """Kind, ISO 6520-1 number and confidence of an opening on a bend surface.

    On a stretched surface an opening is a crack unless it is rounded
    (an opened pore) or irregular and wide (slag laid open).
    """
    kind, iso, conf = _classify_dark(f)
    if kind == "inclusion" and f["aspect"] > 3.0:
        kind, iso = "crack", ISO6520["crack"]
    return kind, iso, conf
