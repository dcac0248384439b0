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
  texture of stretched metal is the noise the thresholds are scaled by.  An
  opening is outlined at half its depth, each pixel's depth taken against
  its own background (the shading changes across a highlight's border), and
  followed into surface the photo clips at white; rounded openings are
  told pore or slag by a small logistic model (:data:`SLAG_WEIGHTS`).
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
from .model import KIND_CAUSE, WORK_PX_PER_MM, Calibration, Face, FaceError, Settings, SurfacesError
from skimage import measure as skm

from .segment import ISO6520, Detection, background, pieces_holding
from .shapes import polygon_features

__all__ = ["find_coupon", "detect", "outer_radius", "arc_length_map", "STEEP_SLOPE_DEG"]

COARSE_PX_PER_MM = 4.0
EDGE_PRESENCE = 3.0  # a long edge is there while it differs 3x more than the table varies
END_LEVEL = 0.25  # the coupon ends where its edges fade below this share of their contrast mid-coupon
#: ... and, once found, lasts down to this share of that level's excess (hysteresis), but
#: never below this many times the table's own variation
END_LOW_SHARE = 0.4
END_LOW_RATIO = 1.4
END_BOTH_RATIO = 1.2
END_BOTH_SHARE = 0.05
#: An end whose contrast fades over more than this (mm) is placed at the fade's foot.
END_RAMP_MM = 1.0
#: ... its foot, when the table beyond the end stands above the low level, is this share of
#: the way from the table's level up to the fade's half-way level.
END_FOOT_SHARE = 0.25
#: When the coupon runs on to the end of the strip looked at, look this much further
#: (or half the coarse length), at most this many times.
EXTEND_MM = 20.0
EXTEND_TRIES = 2
#: A pair of steps scores its weaker step times the share of the region between them to
#: this power (the region found can run on over a lit patch of table beside the coupon,
#: so a higher power favours pairs that span the table too).
COVER_POWER = 1.0
OUT_OF_PHOTO = "part of the coupon lies outside the photo: retake with the whole bend in frame"
UNDER_CARD = "the reference card covers part of the coupon: that part is not assessed"
NEAR_PHOTO_EDGE = (
    "the coupon ends close to the photo's edge, where it may run on out of view: check the visible length "
    "on the overlay, or retake with room around the bend"
)
EDGE_PX_PER_MM = 8.0  # resolution of the pass that places the long edges
WIDTH_RANGE_MM = (5.0, 70.0)  # coupons accepted (typical 10-40 mm)
LENGTH_RANGE_MM = (15.0, 320.0)  # visible length accepted (typical 40-150 mm)
#: Surface slope beyond which lengths along the coupon are marked unreliable.
STEEP_SLOPE_DEG = 60.0
#: Bright bridges narrower than this do not join the card's paper to its flood (mm).
CARD_BRIDGE_MM = 3.0
#: Bright pieces touching the card within this distance of it are paper too (mm).
CARD_MARGIN_MM = 8.0
#: Bright paper parted from the card by a printed line is joined within this distance (mm).
CARD_GROW_MM = 5.0
#: Paper is within this Lab chroma distance of the quiet zone's tint (OpenCV 8-bit Lab units).
CARD_CHROMA = 12.0
#: The perpendicular pair of straight steps is weighed as the coupon's long edges when
#: at least this share of the strongest pair's score (the ends can be the stronger steps).
OTHER_PAIR_SHARE = 0.05
#: Shading along the coupon (Lab L spread of the mean profile) that marks a bend's axis
#: clearly: more than this, and this many times the spread across it.
SHADING_CLEAR_L = 6.0
SHADING_RATIO = 2.0
#: Candidate regions weighed by their straight edges: at most this many, each at least
#: this share of the likeliest's region score.
CANDIDATES_CHECKED = 4
CANDIDATE_SHARE = 0.05
#: The edge step (Lab L per pixel of strip length) weighs a candidate within these bounds.
STEP_FLOOR_L = 0.5
STEP_CAP_L = 40.0
STEP_POWER = 2.0  # ... squared: a coupon's machined edges are sharp, a lit patch of table is not
OUTER_STEP_SHARE = 0.5
#: Relative 1-sigma uncertainty of the outer radius when it is derived from the
#: former diameter and thickness: spring-back and a coupon that does not wrap
#: the former tightly make the real radius larger (common practice).
RADIUS_REL_U_DERIVED = 0.05
RADIUS_REL_U_MEASURED = 0.02  # a measured outer radius (from memory: gauge reading)
#: 1-sigma of the apex position taken as the face centre when the visible
#: extent cannot be checked against the bend's (straight legs in view).
APEX_U_MM = 2.0
APEX_U_MIN_MM = 0.5  # the two visible ends each placed to about 0.5 mm
#: Camera distance assumed when the surface lies below the marker plane
#: (typical hand-held photo of a coupon, from memory: 250-400 mm).
CAMERA_DISTANCE_MM = 300.0
COLUMN_MEDIAN_MM = 1.5  # running median of the shading profile along the coupon
ROW_MEDIAN_MM = 16.0  # running median along x of the profile across (edge bands, grinding marks)
EDGE_IGNORE_MM = 0.25  # the outermost strip of the face (edge blur) never seeds a detection
#: The ends of the visible surface are where it turns away steepest and meets the
#: table; nothing starts within this distance of them.
END_IGNORE_MM = 1.0
END_ZONE_MM = 2.5  # an opening wholly this close to an end, touching the ignored strip, is not trusted
BACKGROUND_MM = 6.0  # window of the local background median
SCRATCH_ALIGN_DEG = 12.0
SOFT_EDGE_PER_MM = 2.0  # an opening's walls go from dark to bright within about 0.5 mm
LOCAL_GRAIN_MM = 3.0  # the neighbourhood (beyond the opening's box) whose texture grain it must stand out of
LOCAL_MIN_CNR = 6.5  # ... by this many of that grain's spreads
#: ... or, for an opening at least this many times as long as wide and deeper than a grinding
#: mark (SCRATCH_MAX_CONTRAST), by as many spreads of the grain averaged along lines of its own
#: direction and length (at most this long, mm)
LINE_GRAIN_ASPECT = 4.0
LINE_GRAIN_MAX_MM = 4.0
MIN_CNR = 4.5  # an opening's depth must stand this many texture spreads out of the surface
SCRATCH_MAX_CONTRAST = 0.3  # grinding marks are shallow: less than 30 % darker than the surface
MERGE_GAP_MM = 0.4  # pieces of one opening closer than this are one opening
LINE_MM = 1.0  # length of the oriented line filter
LINE_SIGMAS = 7.0  # its detection threshold, in its own robust spreads
TIP_DEPTH = 0.33  # fraction of an elongated opening's depth at which its outline is taken
#: Grey level (8-bit) at and above which the photo shows the surface clipped at white.
CLIP_GREY = 250.0
CLIP_REACH_MM = 0.25  # ... within this distance of a clipped pixel
#: The texture's line family (grinding marks) is read only when at least this share of the
#: surface is not clipped at white.
TEXTURE_SEEN_SHARE = 0.2


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


LAB_WEIGHTS = np.array([1.0, 1.6, 1.6], np.float32)  # chroma differences count more than shading
SHADOW_WEIGHT = 0.45


def _features(plane_rgb: np.ndarray, *, px_per_mm: float) -> np.ndarray:
    """Per-pixel features for coupon vs table: Lab (smoothed) and log texture energy, (h, w, 4) float32."""
    lab = cv2.GaussianBlur(_lab(plane_rgb), (0, 0), 0.5 * px_per_mm)
    g = cv2.cvtColor(plane_rgb, cv2.COLOR_RGB2GRAY)
    tex = _face._texture_energy(g, px_per_mm=px_per_mm, fine_mm=0.3, window_mm=1.0)
    # texture relative to brightness (a shadow keeps the table's texture contrast)
    rel = np.log((tex + 1.0) / (lab[..., 0] * 0.1 + 4.0))
    return np.dstack([lab, rel.astype(np.float32)])


def _difference(feat: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Distance of each pixel's features from the (local) table reference."""
    dl = (feat[..., :3] - ref[..., :3]) * LAB_WEIGHTS
    # darker than the table counts less: shadows are darker table, same colour and texture
    dl[..., 0] = np.where(dl[..., 0] < 0, SHADOW_WEIGHT * dl[..., 0], dl[..., 0])
    dt = (feat[..., 3] - ref[..., 3]) * 18.0
    return np.sqrt((dl**2).sum(-1) + dt**2)


def _local_reference(feat: np.ndarray, table: np.ndarray, *, px_per_mm: float, sigma_mm: float = 12.0) -> np.ndarray:
    """Table features interpolated under the coupon: normalised convolution over table pixels.

    Done at 1 px/mm (the table varies slowly), then brought back to the grid.
    """
    h, w = table.shape
    f = min(1.0, 1.0 / px_per_mm)
    sz = (max(1, int(round(w * f))), max(1, int(round(h * f))))
    wt = cv2.resize(table.astype(np.float32), sz, interpolation=cv2.INTER_AREA)
    sig = sigma_mm * px_per_mm * f
    den = cv2.GaussianBlur(wt, (0, 0), sig) + 1e-6
    out = np.empty((sz[1], sz[0], feat.shape[2]), np.float32)
    for c in range(feat.shape[2]):
        fc = cv2.resize(feat[..., c] * table, sz, interpolation=cv2.INTER_AREA)
        out[..., c] = cv2.GaussianBlur(fc, (0, 0), sig) / den
    far = den < 0.02  # no table nearby: fall back to the global table median
    if far.any() and table.any():
        out[far] = np.median(feat[table], axis=0)
    return cv2.resize(out, (w, h), interpolation=cv2.INTER_LINEAR)


def _card_mask(lab, calib, to_px, shape) -> np.ndarray:
    """The reference card: the marker and its quiet zone, and the bright paper joined to the
    quiet zone, within a few marker sides of the marker.

    The paper is told from what lies beside it by its own brightness (the
    quiet zone's, measured beside the marker): a pixel is paper when it is
    nearer that than the surroundings' median.  Bridges under
    :data:`CARD_BRIDGE_MM` wide are cut before the flood, so that a bright
    coupon (a highlight on ground metal) touching the card is not taken for
    paper.  Each flooded piece of paper is taken with its convex hull (the
    printed ruler and text break the paper into strips narrower than the cut).
    """
    card = np.zeros(shape, np.uint8)
    near = np.zeros(shape, np.uint8)
    seeds = []
    for m in calib.markers:
        c = apply_h(calib.H, m.corners_px)
        ctr = c.mean(axis=0)
        cv2.fillPoly(card, [to_px(ctr + (c - ctr) * 1.6)], 1)  # marker + quiet zone (2 modules a side)
        # the paper around the marker (a ruler makes it 50 mm or more wide)
        reach = max(4.0, 70.0 / max(float(np.linalg.norm(c[0] - ctr)), 1e-6))
        cv2.fillPoly(near, [to_px(ctr + (c - ctr) * reach)], 1)
        seeds.append(to_px(ctr + (c - ctr) * 1.35))
    if seeds:
        rings = np.zeros(shape, np.uint8)
        for ring_pts in seeds:
            cv2.polylines(rings, [ring_pts], True, 1, 2)
        lab_l = lab[..., 0]
        paper = float(np.median(lab_l[rings > 0])) if (rings > 0).any() else float(np.percentile(lab_l, 90))
        # the paper's own tint (a coloured light tints it too), from the quiet zone
        paper_ab = np.median(lab[rings > 0][:, 1:], axis=0) if (rings > 0).any() else np.array([128.0, 128.0])
        chroma = np.sqrt(((lab[..., 1:] - paper_ab) ** 2).sum(-1))
        around = float(np.median(lab_l[(near > 0) & (card == 0)])) if ((near > 0) & (card == 0)).any() else float(np.median(lab_l))
        thr = 0.5 * (paper + around) if paper > around + 8 else float(np.percentile(lab_l, 60))
        raw = ((lab_l > thr) & (chroma < CARD_CHROMA) & (near > 0)).astype(np.uint8)
        k = max(3, int(round(CARD_BRIDGE_MM * COARSE_PX_PER_MM)) | 1)
        bright = cv2.morphologyEx(raw, cv2.MORPH_OPEN, cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (k, k)))
        bright = (bright > 0) | (card > 0)  # the quiet zone itself always joins
        quiet = card.copy()
        n, lab = cv2.connectedComponents(bright.astype(np.uint8), connectivity=4)
        ids = np.unique(lab[(rings > 0) & bright])
        for i in ids[ids > 0]:
            # the paper is flat and convex: its hull takes back what the cut removed among
            # printed lines (the ruler's ticks, the text)
            ys, xs = np.nonzero(lab == i)
            hull = cv2.convexHull(np.c_[xs, ys].astype(np.int32))
            cv2.fillConvexPoly(card, hull, 1)
        # paper beyond a printed line that the cut parted from the rest (a ruler along the
        # card's edge, next to a table nearly as bright): whatever bright, untinted region
        # joins the quiet zone, taken only within a few mm of the paper found so far
        loose = ((lab_l > min(thr, float(np.percentile(lab_l, 60)))) & (chroma < CARD_CHROMA) & (near > 0)) | (quiet > 0)
        n3, lab3 = cv2.connectedComponents(loose.astype(np.uint8), connectivity=4)
        ids3 = np.unique(lab3[(rings > 0) & loose])
        kk = int(round(CARD_GROW_MM * COARSE_PX_PER_MM)) * 2 + 1
        grow = cv2.dilate(card, cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (kk, kk))) > 0
        card[np.isin(lab3, ids3[ids3 > 0]) & grow] = 1
        # paper cut off beyond a printed line (a ruler along the card's edge): bright pieces
        # touching the card that lie almost wholly within a few mm of it
        kk = int(round(CARD_MARGIN_MM * COARSE_PX_PER_MM)) * 2 + 1
        reach_card = cv2.dilate(card, cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (kk, kk)))
        touch = cv2.dilate(card, np.ones((3, 3), np.uint8)) > 0
        n2, lab2, st2, _ = cv2.connectedComponentsWithStats((raw > 0).astype(np.uint8), connectivity=8)
        ids2 = np.unique(lab2[touch & (raw > 0) & (card == 0)])
        for i in ids2[ids2 > 0]:
            piece = lab2 == i
            if float(reach_card[piece].mean()) > 0.9:
                card[piece] = 1
    return cv2.dilate(card, np.ones((13, 13), np.uint8)) > 0  # 1.5 mm at 4 px/mm: the paper's edge


def _coarse_coupon(rgb, gray, calib: Calibration, roi_poly):
    """Centre (plane mm), axis (deg), length and width (mm) of the best coupon-like strip."""
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
    plane = cv2.warpPerspective(small, M, (W, Hh), flags=flags, borderMode=cv2.BORDER_REPLICATE)
    valid = cv2.warpPerspective(np.ones(small.shape[:2], np.uint8), M, (W, Hh), flags=cv2.INTER_NEAREST | cv2.WARP_INVERSE_MAP) > 0
    valid = cv2.erode(valid.astype(np.uint8), np.ones((5, 5), np.uint8)) > 0
    to_px = lambda p: ((np.asarray(p) - lo) * s - 0.5).astype(np.int32)  # noqa: E731
    allowed = np.zeros((Hh, W), np.uint8)
    cv2.fillPoly(allowed, [to_px(poly_mm)], 1)
    allowed = (allowed > 0) & valid
    feat = _features(plane, px_per_mm=s)
    card = _card_mask(feat[..., :3], calib, to_px, (Hh, W))
    allowed &= ~card
    if allowed.sum() < 100:
        raise FaceError("no room for a coupon beside the reference card: give --roi around the coupon")
    # the table: first what lies along the border of the searched region, then everywhere
    # that does not differ from it, interpolated under the coupon
    dist_in = cv2.distanceTransform(allowed.astype(np.uint8), cv2.DIST_L2, 3) / s
    ring = allowed & (dist_in < (2.5 if roi_poly is not None else max(6.0, 0.06 * float(min(hi - lo)))))
    if ring.sum() < 50:
        ring = allowed
    ref = np.broadcast_to(np.median(feat[ring], axis=0), feat.shape)
    table = ring
    for _ in range(2):
        d = _difference(feat, ref)
        dt = d[table]
        thr = max(10.0, float(np.median(dt) + 6.0 * 1.4826 * np.median(np.abs(dt - np.median(dt)))))
        cand = (d > thr) & allowed
        grown = cv2.dilate(cand.astype(np.uint8), np.ones((int(6 * s) | 1,) * 2, np.uint8)) > 0
        table = allowed & ~grown
        if table.sum() < 100:
            table = ring
        ref = _local_reference(feat, table, px_per_mm=s)
    d = _difference(feat, ref)
    dt = d[table]
    thr = max(10.0, float(np.median(dt) + 5.0 * 1.4826 * np.median(np.abs(dt - np.median(dt)))))
    cand = apply_hysteresis_threshold(np.where(allowed, d, 0), 0.6 * thr, thr)
    cand = (ndi.binary_fill_holes(cand) & allowed).astype(np.uint8)
    k = max(1, int(round(1.0 * s)))
    cand = cv2.morphologyEx(cand, cv2.MORPH_OPEN, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
    cand = cv2.morphologyEx(cand, cv2.MORPH_CLOSE, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
    n, lab_cc, stats, _ = cv2.connectedComponentsWithStats(cand, connectivity=8)
    cands = []
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
        contrast = float(np.median(d[lab_cc == i])) / thr
        sc = area * fill**3 * (1.0 if ok_size else 0.05) * min(contrast, 3.0)
        cands.append((sc, (cx, cy, rw, rh, ang), i))
    if not cands:
        raise FaceError(
            "could not find the bend coupon: give --roi X0,Y0,X1,Y1 (a box around the coupon in photo pixels)"
        )
    # a region that differs from the table is not yet a coupon: of the few likeliest,
    # take the one bounded best by a pair of straight parallel steps (a patch of light
    # or a stain on the table has no straight edges)
    cands.sort(key=lambda t: -t[0])
    best, best_score = None, -1.0
    for sc, rect, i in cands[:CANDIDATES_CHECKED]:
        if sc < CANDIDATE_SHARE * cands[0][0]:
            break
        comp_i = lab_cc == i
        strip_i = _straight_strip(plane, comp_i, allowed, px_per_mm=s)
        step = strip_i[5] if strip_i is not None else 0.0
        final = sc * float(np.clip(step, STEP_FLOOR_L, STEP_CAP_L)) ** STEP_POWER
        if final > best_score:
            best_score, best = final, (rect, i, strip_i)
    rect, _, strip = best
    if strip is not None:
        theta, mid_px, Wd, x0p, x1p, _ = strip
        ang = math.degrees(theta)
        ux = np.array([math.cos(theta), math.sin(theta)])
        uy = np.array([-math.sin(theta), math.cos(theta)])
        c_px = ux * 0.5 * (x0p + x1p) + uy * mid_px
        L = (x1p - x0p) / s
        Wd = Wd / s
    else:
        # no pair of straight edges: the component's own rectangle
        cx, cy, rw, rh, ang = rect
        if rw < rh:
            ang += 90.0
            rw, rh = rh, rw
        c_px = np.array([cx, cy])
        L, Wd = rw / s, rh / s
    ang = (ang + 90.0) % 180.0 - 90.0  # x runs left to right in the plane
    centre = lo + (c_px + 0.5) / s
    card_map = (card.astype(np.uint8), A)  # coarse plane px -> plane mm
    return centre, float(ang), float(L), float(Wd), card_map


def _straight_strip(plane: np.ndarray, comp: np.ndarray, allowed: np.ndarray, *, px_per_mm: float):
    """The coupon's two long edges near a candidate region, from straight-line sums of the gradient.

    For each direction, the brightness gradient across it is summed along
    lines in that direction (a Radon transform of the signed directional
    derivative): a long straight step adds up, texture of random sign does
    not.  The coupon is the pair of opposite steps 5-70 mm apart with the
    largest weaker step.  Returns ``(theta_rad, offset_px, width_px, x0_px,
    x1_px)`` in the plane image's pixel axes (offset and extent along the
    rotated axes through the origin), or None.
    """
    s = px_per_mm
    k = int(15 * s) | 1  # long edges may run on past the region (a dark flank)
    near = cv2.dilate(comp.astype(np.uint8), np.ones((k, k), np.uint8)) > 0
    near &= cv2.erode(allowed.astype(np.uint8), np.ones((5, 5), np.uint8)) > 0
    ys, xs = np.nonzero(near)
    if len(xs) < 100:
        return None
    r0, r1, c0, c1 = ys.min(), ys.max() + 1, xs.min(), xs.max() + 1
    L = cv2.GaussianBlur(_lab(plane[r0:r1, c0:c1])[..., 0], (0, 0), 1.0)
    gx = cv2.Sobel(L, cv2.CV_32F, 1, 0, ksize=3) / 8
    gy = cv2.Sobel(L, cv2.CV_32F, 0, 1, ksize=3) / 8
    m = near[r0:r1, c0:c1].astype(np.float32)
    gx *= m
    gy *= m
    h, w = L.shape
    diag = int(math.ceil(math.hypot(h, w))) + 2
    cx, cy = (w - 1) / 2, (h - 1) / 2
    wmin, wmax = WIDTH_RANGE_MM[0] * s, WIDTH_RANGE_MM[1] * s

    compf = comp[r0:r1, c0:c1].astype(np.float32)
    total = max(float(compf.sum()), 1.0)

    def profile(theta):
        # rotate so that direction theta runs along the columns; sum each row
        n = (-math.sin(theta), math.cos(theta))
        gn = gx * n[0] + gy * n[1]
        R = cv2.getRotationMatrix2D((cx, cy), math.degrees(theta), 1.0)
        R[0, 2] += (diag - 1) / 2 - cx
        R[1, 2] += (diag - 1) / 2 - cy
        rot = cv2.warpAffine(gn, R, (diag, diag), flags=cv2.INTER_LINEAR, borderValue=0)
        p = cv2.reduce(rot, 1, cv2.REDUCE_SUM).ravel()
        rc = cv2.reduce(cv2.warpAffine(compf, R, (diag, diag), flags=cv2.INTER_LINEAR, borderValue=0), 1, cv2.REDUCE_SUM).ravel()
        return np.convolve(p, [0.25, 0.5, 0.25], mode="same"), np.r_[0.0, np.cumsum(rc)] / total

    def best_pair(prof):
        # the pair of opposite straight steps that bounds the candidate region best:
        # the weaker step's strength times the share of the region between them, squared
        p, cum = prof
        inner = p[1:-1]
        is_pk = (inner >= p[:-2]) & (inner >= p[2:]) & (inner > 0)
        is_nk = (inner <= p[:-2]) & (inner <= p[2:]) & (inner < 0)
        pk = np.nonzero(is_pk)[0] + 1
        nk = np.nonzero(is_nk)[0] + 1
        if pk.size == 0 or nk.size == 0:
            return 0.0, None
        pk = pk[np.argsort(-p[pk])[:12]]
        nk = nk[np.argsort(p[nk])[:12]]
        sep = np.abs(pk[:, None] - nk[None, :])
        lo_i = np.minimum(pk[:, None], nk[None, :])
        hi_i = np.maximum(pk[:, None], nk[None, :])
        cover = cum[np.minimum(hi_i + 1, len(cum) - 1)] - cum[lo_i]
        sc = np.minimum(p[pk][:, None], -p[nk][None, :]) * np.clip(cover, 0, 1) ** COVER_POWER
        sc = np.where((sep >= wmin) & (sep <= wmax), sc, 0.0)
        a, b = np.unravel_index(int(np.argmax(sc)), sc.shape)
        if sc[a, b] <= 0:
            return 0.0, None
        return float(sc[a, b]), (int(pk[a]), int(nk[b]))

    def refine(deg):
        best = (0.0, float(deg), None)
        for d in np.arange(deg - 2.0, deg + 2.01, 0.25):
            sc2, pair2 = best_pair(profile(math.radians(d)))
            if pair2 is not None and sc2 > best[0]:
                best = (sc2, float(d), pair2)
        return best

    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)

    def band_mask(pair_info):
        # pixels between a pair's two lines: rows lo..hi of the frame rotated by its angle
        _, dg, (pi, pj) = pair_info
        Rm = cv2.getRotationMatrix2D((cx, cy), dg, 1.0)
        v = Rm[1, 0] * xx + Rm[1, 1] * yy + Rm[1, 2] + (diag - 1) / 2 - cy
        return (v >= min(pi, pj)) & (v <= max(pi, pj))

    scores = []
    for deg in range(0, 180, 2):
        sc, pair = best_pair(profile(math.radians(deg)))
        scores.append((sc, deg, pair))
    sc, deg, pair = max(scores, key=lambda t: t[0])
    if pair is None or sc <= 0:
        return None
    first = refine(deg)
    other = refine((deg + 90) % 180)
    chosen = first
    if other[2] is not None and other[0] > OTHER_PAIR_SHARE * first[0]:
        # a closed rectangle: which pair are the long edges?  The ends of a bent coupon,
        # where it turns away dark against the table, are often stronger steps than its
        # long edges, so the strength of a pair does not say.  A bend is shaded along the
        # coupon (curvature) and not across it: when that shows clearly it decides;
        # otherwise the longer sides are the long edges.
        a = abs(first[2][0] - first[2][1])  # separation of the first pair = its width
        b = abs(other[2][0] - other[2][1])
        # the shading is read inside the rectangle both pairs bound (the region found may
        # run on over the table beside the coupon)
        box = band_mask(first) & band_mask(other) & comp[r0:r1, c0:c1]
        if box.sum() < 0.25 * min(a, b) ** 2:
            box = comp[r0:r1, c0:c1]
        va = _shading_variation(L, box, math.radians(first[1]))
        vb = _shading_variation(L, box, math.radians(other[1]))
        if max(va, vb) > SHADING_CLEAR_L and max(va, vb) > SHADING_RATIO * min(va, vb):
            chosen = first if va >= vb else other
        elif max(a, b) / max(min(a, b), 1) > 1.4:
            chosen = first if a < b else other
        else:
            chosen = first if va >= vb else other
    sc, deg, (i, j) = chosen
    theta = math.radians(deg)
    lo_r, hi_r = sorted((i, j))
    # extent along the strip: where the region lies between the two edges
    R = cv2.getRotationMatrix2D((cx, cy), deg, 1.0)
    R[0, 2] += (diag - 1) / 2 - cx
    R[1, 2] += (diag - 1) / 2 - cy
    cm = cv2.warpAffine(comp[r0:r1, c0:c1].astype(np.uint8), R, (diag, diag), flags=cv2.INTER_NEAREST)
    band = cm[lo_r : hi_r + 1].sum(axis=0)
    cols = np.nonzero(band > 0.3 * (hi_r - lo_r + 1))[0]
    if cols.size < 2:
        return None
    # back to plane-image pixels: rotated (u, v) -> original (x, y)
    Rinv = cv2.invertAffineTransform(R)

    def back(u, v):
        x = Rinv[0, 0] * u + Rinv[0, 1] * v + Rinv[0, 2] + c0
        y = Rinv[1, 0] * u + Rinv[1, 1] * v + Rinv[1, 2] + r0
        return np.array([x, y])

    pa, pb = back(cols[0], 0.5 * (lo_r + hi_r)), back(cols[-1], 0.5 * (lo_r + hi_r))
    d = pb - pa
    th = math.atan2(d[1], d[0])
    ux = np.array([math.cos(th), math.sin(th)])
    uy = np.array([-math.sin(th), math.cos(th)])
    mid = 0.5 * (pa + pb)
    # how strongly the two edges stand out: the weaker step's mean brightness change
    # (Lab L) per pixel of the strip's length
    p_ch = profile(theta)[0]
    step = min(abs(float(p_ch[i])), abs(float(p_ch[j]))) / max(float(cols[-1] - cols[0] + 1), 1.0)
    return th, float(mid @ uy), float(hi_r - lo_r), float(pa @ ux), float(pb @ ux), step


def _shading_variation(L: np.ndarray, region: np.ndarray, theta: float) -> float:
    """Spread of the mean brightness profile along direction ``theta`` over ``region``.

    A bend's curvature shades it along the coupon (across the bend axis);
    across the coupon the brightness stays the same.
    """
    ys, xs = np.nonzero(region)
    if len(xs) < 50:
        return 0.0
    t = xs * math.cos(theta) + ys * math.sin(theta)
    v = L[ys, xs]
    lo, hi = np.percentile(t, [10, 90])
    bins = np.linspace(lo, hi, 13)
    k = np.digitize(t, bins)
    means = [float(np.median(v[k == i])) for i in range(1, len(bins)) if (k == i).sum() > 5]
    return float(np.std(means)) if len(means) > 3 else 0.0


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
    centre, axis, L, Wd, card_map = _coarse_coupon(rgb, gray, calib, roi_poly)

    # fine pass at EDGE_PX_PER_MM: straight long edges from brightness steps across the coupon
    e = EDGE_PX_PER_MM
    m_y = max(6.0, 0.5 * Wd)
    m_x = max(12.0, 0.4 * L)  # the coarse region may have missed a dark flank
    ox, oy = -L / 2 - m_x, -Wd / 2 - m_y
    w, h = int(math.ceil((L + 2 * m_x) * e)), int(math.ceil((Wd + 2 * m_y) * e))
    A = _face.face_frame(centre, axis, (ox, oy), px_per_mm=e)
    sub = _face.warp_to_face(rgb, calib.H, A, (h, w))
    Lc = cv2.GaussianBlur(_lab(sub)[..., 0], (0, 0), 0.1 * e)
    nb = max(8, min(48, int(L / 2.5)))
    xs_b, top_b, bot_b = [], [], []
    win = 1.5 * e  # the coarse edges come from straight-line sums, good to a fraction of a mm
    y_top0, y_bot0 = m_y * e, (m_y + Wd) * e
    for k in range(nb):
        a0 = int(round((m_x + L * (0.1 + 0.8 * k / nb)) * e))
        a1 = int(round((m_x + L * (0.1 + 0.8 * (k + 1) / nb)) * e))
        if a1 - a0 < 2:
            continue
        prof = np.median(Lc[:, a0:a1], axis=1)
        xs_b.append(0.5 * (a0 + a1 - 1))
        top_b.append(_outer_step(prof, int(y_top0 - win), int(y_top0 + win), outward=-1))
        bot_b.append(_outer_step(prof, int(y_bot0 - win), int(y_bot0 + win), outward=+1))
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

    # along the coupon: the visible extent is where the strip differs from the table right
    # beside it (colour, texture); when the coupon runs on to the edge of the strip looked
    # at (the coarse region missed a dark flank), look further, but never past the photo
    more_lo = more_hi = 0.0
    for _ in range(1 + EXTEND_TRIES):
        o2 = ox - more_lo
        w2 = int(math.ceil((L + 2 * m_x + more_lo + more_hi) * e))
        A2 = _face.face_frame(mid_mm, axis2, (o2, -width / 2 - m_y), px_per_mm=e)
        sub2 = _face.warp_to_face(rgb, calib.H, A2, (h, w2))
        outside2 = ~_in_photo(gray.shape, calib.H, A2, (h, w2))
        card2 = _card_in_frame(card_map, A2, (h, w2)) | outside2
        x_lo, x_hi, ok_ends = _visible_extent(sub2, px_per_mm=e, m_y=m_y, width=width, m_x=m_x + more_lo, L=L, card=card2)
        grow_lo = x_hi > x_lo and x_lo <= 1.0 and not card2[:, 0].mean() > 0.5
        grow_hi = x_hi > x_lo and x_hi >= w2 - 2.0 and not card2[:, -1].mean() > 0.5
        if not (grow_lo or grow_hi):
            break
        more_lo += max(EXTEND_MM, 0.5 * L) if grow_lo else 0.0
        more_hi += max(EXTEND_MM, 0.5 * L) if grow_hi else 0.0
    ox = o2
    # an end placed where the photo's edge is near the strip or the table beside it read
    # against is not the coupon's end
    band_rows = slice(max(0, int((m_y - 4.0) * e)), min(h, int((m_y + width + 4.0) * e) + 1))
    for x_end, step_out in ((x_lo, -1), (x_hi, +1)):
        c_a, c_b = sorted((int(round(x_end)), int(round(x_end + step_out * 3.0 * e))))
        zone = outside2[band_rows, max(0, c_a) : max(0, min(outside2.shape[1], c_b + 1))]
        if x_hi > x_lo and (c_a < 0 or c_b >= outside2.shape[1] or (zone.size and zone.mean() > 0.05)):
            warnings.append(NEAR_PHOTO_EDGE)
            break
    if not x_hi > x_lo:
        raise FaceError(
            "the bend coupon's ends cannot be told from the table beside it: give --roi X0,Y0,X1,Y1 "
            "(a box around the coupon in photo pixels)"
        )
    if not ok_ends:
        warnings.append("the coupon's ends are unclear: check the visible length on the overlay or give --roi")
    fx0, fx1 = ox + (x_lo + 0.5) / e, ox + (x_hi + 0.5) / e
    length = fx1 - fx0
    if length < LENGTH_RANGE_MM[0] * 0.8:
        raise FaceError(
            f"the strip found is only {length:.1f} mm long, shorter than a bend coupon's visible surface: "
            "give --roi around the coupon"
        )

    wf, hf = int(round(length * px_per_mm)), int(round(width * px_per_mm))
    Af = _face.face_frame(mid_mm, axis2, (fx0, -width / 2), px_per_mm=px_per_mm)
    Af = _face._rescale_frame(Af, length / wf, width / hf, px_per_mm)
    img = _face.warp_to_face(rgb, calib.H, Af, (hf, wf))
    on_card = _card_in_frame(card_map, Af, (hf, wf))
    if on_card.any():
        warnings.append(UNDER_CARD)
    corners = np.array([[-0.5, -0.5], [wf - 0.5, -0.5], [wf - 0.5, hf - 0.5], [-0.5, hf - 0.5]])
    poly_px = apply_h(np.linalg.inv(calib.H) @ Af, corners)
    Hp, Wp = gray.shape[:2]
    if np.any(poly_px < -2) or np.any(poly_px[:, 0] > Wp + 1) or np.any(poly_px[:, 1] > Hp + 1):
        warnings = [w for w in warnings if w != NEAR_PHOTO_EDGE] + [OUT_OF_PHOTO]
    fit_ok = 0.5 * (okt.mean() + okb.mean())
    return Face(
        image=img,
        mask=~on_card,
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
        unseen=tuple(w for w in warnings if w in (UNDER_CARD, OUT_OF_PHOTO)),
    )


def _outer_step(p: np.ndarray, lo: int, hi: int, *, outward: int) -> float:
    """Sub-pixel index of the outermost strong brightness step of ``p`` within ``[lo, hi)``.

    A strong step is a local maximum of ``|p'|`` of at least half the largest
    in the window; the outermost one is the coupon's edge rather than a band
    of shading just inside it (a rounded corner) or a soft shadow outside it.
    """
    lo, hi = max(lo, 1), min(hi, len(p) - 2)
    if hi - lo < 4:
        return np.nan
    gp = np.abs(np.gradient(np.asarray(p, np.float64)))
    seg = gp[lo:hi]
    top = float(seg.max())
    if top <= 0:
        return np.nan
    peaks = [j for j in range(lo + 1, hi - 1) if gp[j] >= gp[j - 1] and gp[j] >= gp[j + 1] and gp[j] >= OUTER_STEP_SHARE * top]
    if not peaks:
        return np.nan
    j = min(peaks) if outward < 0 else max(peaks)
    a, b, c = gp[j - 1], gp[j], gp[j + 1]
    den = a - 2 * b + c
    off = 0.5 * (a - c) / den if abs(den) > 1e-9 else 0.0
    return j + float(np.clip(off, -0.5, 0.5))


def _in_photo(photo_shape, H: np.ndarray, A_frame: np.ndarray, shape) -> np.ndarray:
    """True where a frame's pixels fall inside the photo (not on the warp's replicated border)."""
    ones = np.ones(photo_shape[:2], np.uint8)
    M = np.linalg.inv(H) @ A_frame  # frame px -> photo px
    out = cv2.warpPerspective(ones, M, (int(shape[1]), int(shape[0])), flags=cv2.INTER_NEAREST | cv2.WARP_INVERSE_MAP,
                              borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    return out > 0


def _card_in_frame(card_map, A_frame: np.ndarray, shape) -> np.ndarray:
    """The card mask (coarse plane grid) sampled on another frame's pixel grid."""
    card, A_coarse = card_map
    M = np.linalg.inv(A_coarse) @ A_frame  # frame px -> coarse px
    out = cv2.warpPerspective(card, M, (int(shape[1]), int(shape[0])), flags=cv2.INTER_NEAREST | cv2.WARP_INVERSE_MAP,
                              borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    return out > 0


def _visible_extent(sub: np.ndarray, *, px_per_mm: float, m_y: float, width: float, m_x: float, L: float, card=None):
    """Columns where the coupon starts and ends in a sub-image whose rows are centred on it.

    Per column, the features (colour, texture) just inside each long edge are
    compared with those just outside it, in units of how much the table
    itself varies (just outside against further out): the coupon lasts while
    both edges stand :data:`EDGE_PRESENCE` times out of that (or
    :data:`END_LEVEL` of their contrast mid-coupon, if lower).  When the edges
    do not stand out anywhere, the whole strip between them is compared with
    the table beside it instead.
    """
    e = px_per_mm
    h, w = sub.shape[:2]
    feat = _features(sub, px_per_mm=e)
    r_in = slice(int((m_y + 0.2 * width) * e), int((m_y + 0.8 * width) * e) + 1)
    o1 = slice(max(0, int((m_y - 4.0) * e)), max(1, int((m_y - 1.0) * e)))
    o2 = slice(int((m_y + width + 1.0) * e), min(h, int((m_y + width + 4.0) * e)))
    inside = np.median(feat[r_in], axis=0)  # (w, 4)
    out_a = np.median(feat[o1], axis=0)
    out_b = np.median(feat[o2], axis=0)
    c_mid = np.minimum(_difference(inside[None], out_a[None])[0], _difference(inside[None], out_b[None])[0])
    # the long edges themselves: just inside against just outside each edge, in units of
    # the table's own variation (just outside against further out)
    ratios = []
    Lg = cv2.GaussianBlur(_lab(sub)[..., 0], (0, 0), max(0.6, 0.1 * e))
    G = np.abs(cv2.Sobel(Lg, cv2.CV_32F, 0, 1, ksize=3))
    for edge, sgn in ((m_y, 1), (m_y + width, -1)):
        def band(d0, d1):
            r = sorted((int((edge + sgn * d0) * e), int((edge + sgn * d1) * e)))
            return np.median(feat[min(max(0, r[0]), h - 1) : min(max(1, r[1]), h)], axis=0)
        fin, fout, ffar = band(0.3, 1.3), band(-0.3, -1.3), band(-2.0, -3.5)
        step = ndi.uniform_filter1d(_difference(fin[None], fout[None])[0], max(3, int(0.5 * e)))
        null = ndi.uniform_filter1d(_difference(fout[None], ffar[None])[0], max(3, int(0.5 * e)))
        r_feat = step / (float(np.median(null)) + 1.0)
        # the edge as a sharp step or line of its own (a coupon as bright as the table still
        # shows its edge), against the table's gradients further out
        e0, e1 = int((edge - 0.35) * e), int((edge + 0.35) * e) + 1
        g_edge = G[max(0, e0) : min(h, e1)].max(axis=0)
        far = sorted((int((edge - sgn * 1.5) * e), int((edge - sgn * 3.5) * e)))
        g_noise = float(np.median(G[max(0, far[0]) : min(h, max(far[1], far[0] + 1))])) + 1e-3
        r_grad = ndi.uniform_filter1d(g_edge, max(3, int(0.5 * e))) / (3.0 * g_noise)
        ratios.append(np.maximum(r_feat, r_grad))
    c_edge = np.minimum(ratios[0], ratios[1])
    c0, c1 = int((m_x + 0.3 * L) * e), int((m_x + 0.7 * L) * e)
    nout = max(2, int(0.4 * m_x * e))
    # the edges' contrast on the coupon: over the coarse extent, not only its middle (the
    # coarse region can run on over a patch of table at one end)
    mid_edge = float(np.percentile(c_edge[int(m_x * e) : max(int((m_x + L) * e), int(m_x * e) + 2)], 75))
    if mid_edge >= EDGE_PRESENCE:
        # the long edges decide where there is coupon (a shadow or the card beside the
        # strip fools the colour).  Both edges standing out (the weaker one) keeps a shadow
        # running on along one edge out; their mean keeps the coupon going where one edge
        # fades into a table of its own shade towards a dark end.  The profile is the sum
        c = c_edge + 0.5 * (ratios[0] + ratios[1])
        level = 2.0 * (1.0 + min(END_LEVEL * (mid_edge - 1.0), EDGE_PRESENCE - 1.0))
        low = 2.0 * max(END_LOW_RATIO, 1.0 + END_LOW_SHARE * (0.5 * level - 1.0))
        # and the weaker edge still stands out of the table's variation, by a share of what it
        # does mid-coupon (a line of the table, a cutting mat's grid, running on along one
        # edge past the end keeps the other edge's contrast up, not the weaker one's)
        both = c_edge >= max(END_BOTH_RATIO, END_BOTH_SHARE * mid_edge)
    else:
        c = ndi.uniform_filter1d(c_mid, max(3, int(0.5 * e)))
        mid = float(np.median(c[c0:c1]))
        out_lvl = float(np.median(np.r_[c[:nout], c[-nout:]]))
        if mid - out_lvl < 6.0:
            return m_x * e, (m_x + L) * e, False
        level = out_lvl + END_LEVEL * (mid - out_lvl)
        low = out_lvl + END_LOW_SHARE * (level - out_lvl)
        both = np.ones(w, bool)
    if card is not None:
        c = np.where(card[int(m_y * e) : int((m_y + width) * e) + 1].mean(axis=0) > 0.2, 0.0, c)  # the card is not coupon
    # hysteresis: the coupon is the run above the low level (gaps under 2 mm closed: a
    # highlight) that holds the middle, or else the one standing out most above the level
    run = max(2, int(2.0 * e))
    i, j = _longest_run((c >= low) & both, gap=run, prefer=(c0 + c1) // 2, weight=np.where(c >= level, c, 0.0))
    if j - i < run:
        return 0.0, -1.0, False  # nothing stands out: the caller says so
    ok = i > 0 and j < w - 1
    # place each end at its own step: the largest drop of the contrast from inside to
    # outside within a few mm of where it stays low (a matched step, so a dip of the
    # noisy contrast near the end does not stop it early), then half-way down that step
    span, a = int(4.0 * e), max(2, int(1.5 * e))
    ramp = int(round(END_RAMP_MM * e))
    x_lo = _end_step(c, i, span=span, arm=a, outward=-1, low=low, ramp=ramp) if i > 0 else 0.0
    x_hi = _end_step(c, j, span=span, arm=a, outward=+1, low=low, ramp=ramp) if j < w - 1 else float(w - 1)
    if not x_hi > x_lo:
        return 0.0, -1.0, False
    return x_lo, x_hi, ok


def _longest_run(mask: np.ndarray, *, gap: int, prefer: int, weight: np.ndarray) -> tuple[int, int]:
    """First and last index of the run of ``mask`` (gaps under ``gap`` closed) holding ``prefer``,
    or else the one with the largest sum of ``weight``; ``(0, -1)`` when there is none."""
    m = np.asarray(mask, bool).copy()
    idx = np.nonzero(m)[0]
    if idx.size == 0:
        return 0, -1
    for a, b in zip(idx[:-1], idx[1:]):
        if 1 < b - a <= gap:
            m[a:b] = True
    d = np.diff(np.r_[0, m.astype(np.int8), 0])
    starts, ends = np.nonzero(d == 1)[0], np.nonzero(d == -1)[0] - 1
    for st, en in zip(starts, ends):
        if st <= prefer <= en:
            return int(st), int(en)
    k = int(np.argmax([float(np.sum(weight[st : en + 1])) for st, en in zip(starts, ends)]))
    return int(starts[k]), int(ends[k])


def _end_step(c: np.ndarray, at: int, *, span: int, arm: int, outward: int, low: float | None = None,
              ramp: int | None = None) -> float:
    """Sub-pixel position of the coupon's end near index ``at`` of the contrast profile ``c``.

    The end is the largest drop from the mean over ``arm`` samples inside to
    the mean over ``arm`` samples outside, within ``span`` of ``at``; it is
    placed where ``c`` crosses half-way between those two means.  With
    ``low`` (the level below which there is no coupon) and ``ramp``: a drop
    that fades gradually (a dark flank turning away ever darker) is followed
    out to its foot, the first crossing, outwards, of ``low`` (when the
    table beyond ``at`` lies below it; else of :data:`END_FOOT_SHARE` of the
    way from the table's level up to the half-way level), if that is more
    than ``ramp`` samples beyond the half-way point (a sharp step keeps its
    half-way point).
    """
    n = len(c)
    cs = np.r_[0.0, np.cumsum(np.asarray(c, np.float64))]
    best, xb, lv, out = -np.inf, at, None, None
    for x in range(max(arm, at - span), min(n - arm, at + span) + 1):
        left = (cs[x] - cs[x - arm]) / arm  # samples x-arm .. x-1
        right = (cs[x + arm] - cs[x]) / arm  # samples x .. x+arm-1
        drop = (left - right) if outward > 0 else (right - left)
        if drop > best:
            best, xb, lv, out = drop, x, 0.5 * (left + right), (right if outward > 0 else left)
    if lv is None:
        return float(at)
    # the crossing of the half level nearest the boundary between xb-1 and xb
    lo_i, hi_i = max(0, xb - arm // 2), min(n - 2, xb + arm // 2)
    cands = [q for q in range(lo_i, hi_i + 1) if (c[q] - lv) * (c[q + 1] - lv) <= 0 and c[q] != c[q + 1]]
    if not cands:
        x_half = float(xb) - 0.5
    else:
        q = min(cands, key=lambda q: abs(q + 0.5 - (xb - 0.5)))
        x_half = _cross(c, lv, q)
    if low is None or ramp is None:
        return x_half
    beyond = c[at + 1 : at + 1 + arm] if outward > 0 else c[max(0, at - arm) : at]
    floor = float(np.median(beyond)) if len(beyond) else float(out)
    # the foot: where the contrast has come down to the table's own level beyond the end:
    # ``low``, or when the table beyond stands above that (a mat's lines along the edges),
    # a share of the way from the table's level up to the drop's half-way level
    foot = low if floor < low else floor + END_FOOT_SHARE * (lv - floor)
    if not foot < lv:
        return x_half
    q = int(math.floor(x_half)) if outward > 0 else int(math.ceil(x_half))
    stop = min(n - 2, q + span) if outward > 0 else max(1, q - span)
    while q != stop:
        nxt = q + outward
        if (c[q] - foot) * (c[nxt] - foot) <= 0 and c[q] != c[nxt]:
            x_foot = _cross(c, foot, min(q, nxt))
            return x_foot if abs(x_foot - x_half) > ramp else x_half
        q = nxt
    return x_half


def _cross(p: np.ndarray, level: float, i: int) -> float:
    """Sub-pixel position between ``i`` and ``i + 1`` where ``p`` crosses ``level``."""
    i = int(np.clip(i, 0, len(p) - 2))
    a, b = p[i], p[i + 1]
    if a == b:
        return float(i) + 0.5
    return float(i + np.clip((level - a) / (b - a), 0, 1))


# --------------------------------------------------------------------------
# open discontinuities


def _coupon_background(gs: np.ndarray, *, px_per_mm: float) -> np.ndarray:
    """Background brightness of a coupon's surface, without its openings.

    A bent coupon is shaded along its length (curvature, highlights) and
    across it near the long edges (rounded corners); both are nearly
    separable.  So the background is a column profile (median over the
    width, then a running median of :data:`COLUMN_MEDIAN_MM` along x, which a
    transverse opening cannot move), times a row profile taken along x over
    :data:`ROW_MEDIAN_MM` (which keeps grinding marks along the coupon and the
    edge bands in the background), times a local median of what is left.
    """
    mm = px_per_mm
    f = min(1.0, 4.0 / mm)  # profiles at 4 px/mm along x are plenty
    small = cv2.resize(gs, (max(1, int(round(gs.shape[1] * f))), gs.shape[0]), interpolation=cv2.INTER_AREA) if f < 1 else gs
    col = np.median(small, axis=0)
    k = max(3, int(round(COLUMN_MEDIAN_MM * mm * f)) | 1)
    col = _ramp_median(col, k)
    col = np.maximum(col, 1.0)
    ratio = small / col[None, :]
    kr = max(3, int(round(ROW_MEDIAN_MM * mm * f)) | 1)
    rowp = ndi.median_filter(ratio, size=(1, kr), mode="nearest")
    sep = col[None, :] * rowp
    sep = cv2.resize(sep.astype(np.float32), (gs.shape[1], gs.shape[0]), interpolation=cv2.INTER_LINEAR)
    rest = gs / np.maximum(sep, 1.0)
    rest_bg = background(np.clip(rest * 128.0, 0, 255), px_per_mm=mm, window_mm=BACKGROUND_MM) / 128.0
    return sep * rest_bg


def _ramp_median(p: np.ndarray, k: int) -> np.ndarray:
    """Running median of ``p`` over ``k`` samples that follows a ramp up to both ends.

    The ends of a bent coupon darken steeply where it turns away; a median
    padded with the end value flattens that ramp and leaves a dark residual
    that reads as an opening.  Padding by point reflection about a robust end
    value (the median of the outermost few samples) keeps a linear ramp
    linear.
    """
    p = np.asarray(p, np.float64)
    h = k // 2
    if len(p) < 2 * h + 2 or h < 1:
        return ndi.median_filter(p, size=k, mode="nearest")
    m = max(1, h // 2)
    a, b = float(np.median(p[:m + 1])), float(np.median(p[-m - 1 :]))
    padded = np.r_[2 * a - p[h:0:-1], p, 2 * b - p[-2 : -h - 2 : -1]]
    return ndi.median_filter(padded, size=k, mode="nearest")[h:-h]


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
        # the apex is the centre of the visible bend; when the whole arc is in view (+-u_max),
        # what is missing from the visible length could be missing from either end
        if math.isfinite(u_max):
            apex_u = max(APEX_U_MIN_MM, abs(2 * u_max - face.length_mm) / 2 / math.sqrt(3))
        else:
            apex_u = APEX_U_MM
        length_factor = _make_length_factor(
            R, rel_u_R, apex_mm=apex, length_mm=face.length_mm, bend_angle_deg=angle, apex_u_mm=apex_u
        )
        notes.append(
            f"lengths along the coupon corrected to the curved surface (outer radius {R:.1f} mm, {why}; "
            f"apex taken at the centre of the visible bend, x = {apex:.1f} mm)"
        )
    dets = find_openings(face.image, px_per_mm=face.px_per_mm, photo_px_per_mm=photo_px_per_mm, min_size_mm=settings.min_size_mm, mask=face.mask)
    return dets, face, length_factor, notes


def find_openings(
    rgb: np.ndarray,
    *,
    px_per_mm: float,
    photo_px_per_mm: float,
    min_size_mm: float = 0.3,
    sensitivity: float = 1.0,
    mask: np.ndarray | None = None,
) -> list[Detection]:
    """Open discontinuities on a rectified coupon image (column = x along it, rows between the long edges).

    Parameters
    ----------
    rgb : (h, w, 3) uint8 ndarray
        The coupon's convex surface, exactly between its long edges.
    px_per_mm : float
        Resolution of ``rgb``.
    photo_px_per_mm : float
        Resolution of the photo at the coupon: smoothing and ridge scales
        follow what the photo can resolve.
    min_size_mm : float
        Smallest greatest dimension reported.
    sensitivity : float
        Multiplies the thresholds (lower finds fainter openings).
    mask : (h, w) bool ndarray, optional
        True where the coupon is seen (False under the reference card).

    Returns
    -------
    list of Detection, outlines in face pixels (col, row), sorted by x.
    """
    mm = float(px_per_mm)
    h, w = rgb.shape[:2]
    g = cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY).astype(np.float32)
    resolve = 1.0 / photo_px_per_mm  # one photo pixel in mm
    gs = cv2.GaussianBlur(g, (0, 0), max(0.04, 0.5 * resolve) * mm)
    bg = _coupon_background(gs, px_per_mm=mm)
    resid = bg - gs  # positive where darker than the surroundings
    rel = resid / np.maximum(bg, 1.0)
    ign = max(1, int(round(EDGE_IGNORE_MM * mm)))
    ign_x = max(1, int(round(END_IGNORE_MM * mm)))
    seed_mask = np.ones((h, w), bool)
    seed_mask[:ign] = False
    seed_mask[-ign:] = False
    seed_mask[:, :ign_x] = False
    seed_mask[:, -ign_x:] = False
    if mask is not None and not mask.all():
        # keep clear of whatever covers the coupon (the card's edge)
        seed_mask &= cv2.erode(mask.astype(np.uint8), _disk(END_IGNORE_MM * mm)) > 0
    sig = _robust_sigma(rel[seed_mask])
    hi = sensitivity * max(6.0 * sig, 0.10)
    lo = sensitivity * max(3.0 * sig, 0.05)
    dark = apply_hysteresis_threshold(np.where(seed_mask, rel, 0), lo, hi)

    # thin openings: ridge filter at one to three photo pixels
    sig_px = sorted({round(max(f * resolve * mm, 0.7), 2) for f in (0.6, 1.2, 2.0)})
    ridge = sato(np.where(seed_mask, gs / np.maximum(bg, 1.0), 1.0), sigmas=sig_px, black_ridges=True, mode="reflect")
    rsig = _robust_sigma(ridge[seed_mask]) + 1e-6
    rmed = float(np.median(ridge[seed_mask]))
    ridge_mask = apply_hysteresis_threshold(np.where(seed_mask, ridge - rmed, 0), sensitivity * 7 * rsig, sensitivity * 14 * rsig)
    ridge_mask &= rel > 0.6 * lo  # dark, not the bright side of a highlight
    # faint thin openings in strong texture: darkness averaged along short oriented lines
    # the texture's own line family is read where the photo shows texture: not on surface
    # clipped at white, where the only lines left are the openings themselves
    seen = seed_mask & (bg < CLIP_GREY)
    textured = seen if seen.sum() >= TEXTURE_SEEN_SHARE * seed_mask.sum() else None
    line_mask, theta_lines, coherence = _line_evidence(rel, seed_mask, px_per_mm=mm, resolve_mm=resolve,
                                                       sensitivity=sensitivity, texture=textured)
    line_mask &= rel > 0.5 * lo

    # one opening seen as several pieces (a jagged crack, the two lips of a wide one) is one
    close_k = _disk(MERGE_GAP_MM / 2 * mm)
    cand = cv2.morphologyEx((dark | ridge_mask | line_mask).astype(np.uint8), cv2.MORPH_CLOSE, close_k) > 0
    lab, _ = ndi.label(cand, structure=np.ones((3, 3)))
    labc = cv2.GaussianBlur(cv2.cvtColor(rgb, cv2.COLOR_RGB2LAB).astype(np.float32), (0, 0), max(0.05, resolve) * mm)
    dets: list[Detection] = []
    speck_px = (0.12 * mm) ** 2
    for i, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None or (lab[sl] == i).sum() < speck_px:
            continue
        d = _trace_opening(i, sl, lab, gs, bg, ridge_mask, labc, seed_mask, mm=mm, sig=sig, close_k=close_k)
        if d is None or d.features["greatest_mm"] < max(min_size_mm, 0.2):
            continue
        f = d.features
        if f["width_mm"] < 1.5 * resolve and f["greatest_mm"] < 4 * resolve:
            continue  # smaller than the photo can show
        W = h / mm
        # the coupon's own edge: hugging a long edge, parallel to it
        hug = min(f["y1_mm"], W - f["y0_mm"]) < 0.6 and f["across_mm"] < 0.6 and f["along_mm"] > 1.0
        Lf = w / mm
        near_lo = f["x1_mm"] < END_ZONE_MM and f["x0_mm"] < END_IGNORE_MM + 0.3
        near_hi = f["x0_mm"] > Lf - END_ZONE_MM and f["x1_mm"] > Lf - END_IGNORE_MM - 0.3
        hug_end = near_lo or near_hi
        if hug or hug_end:
            continue
        # grinding / machining marks: long, shallow, parallel to the face's line family
        if f["cnr"] < MIN_CNR:
            continue  # no deeper than the texture itself
        # ... nor than the texture of its own neighbourhood: the grain of a stretched surface is
        # coarser in places (orange peel, the shaded slopes towards the ends), and a dip of that
        # grain's depth there is no opening, however smooth the rest of the coupon is
        f["local_cnr"] = f["contrast"] / max(_local_grain(rel, cand, seed_mask, f, mm=mm), 1e-4)
        if f["local_cnr"] < LOCAL_MIN_CNR:
            # ... unless it is a deep line the grain does not make: averaged along the opening's
            # own direction and length, grain blobs average out and a crack does not (shallow
            # lines are left out: grain foreshortened on a steep flank streaks along the coupon,
            # and grinding marks are shallow too)
            if f["aspect"] < LINE_GRAIN_ASPECT or f["contrast"] < SCRATCH_MAX_CONTRAST:
                continue
            f["line_local_cnr"] = _line_local_cnr(rel, cand, seed_mask, f, d.contour, mm=mm, resolve_mm=resolve)
            if f["line_local_cnr"] < LOCAL_MIN_CNR:
                continue
        if f["aspect"] < 2.6 and f["edge_sharpness"] < SOFT_EDGE_PER_MM and f["cnr"] < 10:
            continue  # a soft dark patch (shading, a smudge) rather than an opening with walls
        aligned = _angle_diff(f["angle_rad"], theta_lines) < math.radians(SCRATCH_ALIGN_DEG)
        if coherence > 0.1 and f["aspect"] > 2.0 and aligned and f["contrast"] < SCRATCH_MAX_CONTRAST:
            continue
        f["touches_edge"] = bool(min(f["y0_mm"], W - f["y1_mm"]) < 0.25)
        f["photo_px_per_mm"] = float(photo_px_per_mm)
        kind, iso, conf = _bend_kind(f)
        d.kind, d.iso6520, d.confidence = kind, iso, conf
        d.probs = bend_kind_shares(f, kind)
        d.cause = KIND_CAUSE.get(kind, "") if kind in ("pore", "inclusion") else ""
        dets.append(d)
    dets.sort(key=lambda d: (d.features["cx_px"], d.features["cy_px"]))
    return dets


def _line_evidence(rel: np.ndarray, valid: np.ndarray, *, px_per_mm: float, resolve_mm: float, sensitivity: float = 1.0,
                   texture: np.ndarray | None = None) -> np.ndarray:
    """Pixels on a short dark line, of any orientation, standing out of the texture.

    ``rel`` (darkness relative to the background) is filtered with a
    zero-mean oriented line kernel, :data:`LINE_MM` long, at 12
    orientations.  Each orientation's response is divided by its own robust
    spread, so a texture that is itself streaky in one direction (grinding
    marks, orange peel stretched along the coupon) raises only that
    direction's bar.  Averaging along the line lifts a thin opening out of
    texture whose grain is shorter than the line.  Hysteresis at
    :data:`LINE_SIGMAS` (high) and half of it (low).

    ``texture`` (default ``valid``) is where the spreads are read; None
    when too little texture is seen (surface clipped at white) also gives an
    anisotropy of 0: no line family can be told.

    Returns
    -------
    mask : (h, w) bool ndarray
    family_rad : float
        Direction (in (col, row) axes) whose line response spreads most: the
        grinding or machining marks, if any.
    anisotropy : float
        0 for texture without a line direction, towards 1 for strong marks.
    """
    mm = px_per_mm
    half_len = max(2, int(round(LINE_MM / 2 * mm)))
    sw = max(0.06, 0.7 * resolve_mm) * mm  # across: about the photo's blur
    r = half_len + int(math.ceil(3 * sw)) + 1
    yy, xx = np.mgrid[-r : r + 1, -r : r + 1].astype(np.float32)
    src = np.where(valid, rel, 0).astype(np.float32)
    best = np.full(rel.shape, -np.inf, np.float32)
    spreads = []
    for k in range(12):
        th = math.pi * k / 12
        u = xx * math.cos(th) + yy * math.sin(th)
        v = -xx * math.sin(th) + yy * math.cos(th)
        along = np.clip(half_len + 0.5 - np.abs(u), 0, 1)
        line = np.exp(-0.5 * (v / sw) ** 2) * along
        surround = np.exp(-0.5 * (v / (3 * sw)) ** 2) * along
        ker = line / line.sum() - surround / surround.sum()
        resp = cv2.filter2D(src, cv2.CV_32F, ker, borderType=cv2.BORDER_REFLECT)
        vals = resp[valid if texture is None else texture]
        med = float(np.median(vals))
        sig = float(1.4826 * np.median(np.abs(vals - med))) or 1e-6
        spreads.append(sig)
        best = np.maximum(best, (resp - med) / sig)
    best[~valid] = 0
    mask = apply_hysteresis_threshold(best, 0.5 * LINE_SIGMAS * sensitivity, LINE_SIGMAS * sensitivity)
    sp = np.asarray(spreads)
    k = int(np.argmax(sp))
    if texture is None:
        return mask, math.pi * k / 12, 0.0
    return mask, math.pi * k / 12, float((sp[k] - np.median(sp)) / sp[k])


def _local_grain(rel: np.ndarray, cand: np.ndarray, valid: np.ndarray, f: dict, *, mm: float) -> float:
    """Texture grain around one opening: robust spread of the relative darkness of the surface near it.

    The neighbourhood is the opening's box widened by :data:`LOCAL_GRAIN_MM`,
    without any candidate openings and outside ``valid``; its four halves (before,
    after, above, below the opening's centre) are taken separately and the
    coarsest counts, so an opening at the border of a coarse stretch is judged
    by the coarse side it sits in rather than by the smooth surface beyond.
    Spreads are normal-scaled median absolute deviations.
    """
    (r0, r1, c0, c1), (cr, cc) = _neighbourhood(f, rel.shape, reach_mm=LOCAL_GRAIN_MM, mm=mm)
    keep = valid[r0:r1, c0:c1] & ~cand[r0:r1, c0:c1]
    coarsest = _coarsest_half(rel[r0:r1, c0:c1], keep, cr, cc)
    return coarsest[0] if coarsest else _robust_sigma(rel[valid])


def _neighbourhood(f: dict, shape, *, reach_mm: float, mm: float):
    """An opening's box widened by ``reach_mm`` (rows ``r0:r1``, columns ``c0:c1``, clipped to
    ``shape``) and the opening's centre within it ``(row, col)``."""
    h, w = shape
    r = int(round(reach_mm * mm))
    c0, c1 = max(0, int(f["x0_mm"] * mm) - r), min(w, int(math.ceil(f["x1_mm"] * mm)) + r + 1)
    r0, r1 = max(0, int(f["y0_mm"] * mm) - r), min(h, int(math.ceil(f["y1_mm"] * mm)) + r + 1)
    cc = int(round(0.5 * (f["x0_mm"] + f["x1_mm"]) * mm)) - c0
    cr = int(round(0.5 * (f["y0_mm"] + f["y1_mm"]) * mm)) - r0
    return (r0, r1, c0, c1), (cr, cc)


def _coarsest_half(win: np.ndarray, keep: np.ndarray, cr: int, cc: int) -> tuple[float, float] | None:
    """Robust spread and median of ``win[keep]`` in the coarsest of its four halves about ``(cr, cc)``
    (before, after, above, below; a half needs 50 values), or None when none has enough."""
    best = None
    for part in (np.s_[:, :cc], np.s_[:, cc:], np.s_[:cr, :], np.s_[cr:, :]):
        vals = win[part][keep[part]]
        if vals.size >= 50:
            sig = _robust_sigma(vals)
            if best is None or sig > best[0]:
                best = (sig, float(np.median(vals)))
    return best


def _line_local_cnr(rel: np.ndarray, cand: np.ndarray, valid: np.ndarray, f: dict, contour, *, mm: float,
                    resolve_mm: float) -> float:
    """How far a thin opening stands out of its neighbourhood's texture as a line of its own direction and length.

    ``rel`` is averaged along short lines in the opening's direction
    (``angle_rad``), as long as the opening (at most :data:`LINE_GRAIN_MAX_MM`)
    and about the photo's blur across; the opening's strongest response is
    compared with the same response over the neighbourhood (the opening's box
    widened by :data:`LOCAL_GRAIN_MM` plus the line's length, without any
    candidate openings), its four halves taken separately and the coarsest
    counting, as in :func:`_local_grain`.  Grain of blobs shorter than the line
    averages out along it; a crack does not.  Returns the response in units of
    the neighbourhood's robust spread (0 when there is too little
    neighbourhood).
    """
    h, w = rel.shape
    Lk = min(float(f["greatest_mm"]), LINE_GRAIN_MAX_MM)
    half = 0.5 * Lk * mm
    sw = max(0.06, 0.7 * resolve_mm) * mm
    rk = int(math.ceil(half + 3 * sw)) + 1
    yy, xx = np.mgrid[-rk : rk + 1, -rk : rk + 1].astype(np.float32)
    th = float(f["angle_rad"])
    u = xx * math.cos(th) + yy * math.sin(th)
    v = -xx * math.sin(th) + yy * math.cos(th)
    ker = np.exp(-0.5 * (v / sw) ** 2) * np.clip(half + 0.5 - np.abs(u), 0, 1)
    ker /= ker.sum()
    (r0, r1, c0, c1), (cr, cc) = _neighbourhood(f, (h, w), reach_mm=LOCAL_GRAIN_MM + Lk, mm=mm)
    ok = valid[r0:r1, c0:c1]
    resp = cv2.filter2D(np.where(ok, rel[r0:r1, c0:c1], 0).astype(np.float32), cv2.CV_32F, ker,
                        borderType=cv2.BORDER_REFLECT)
    region = np.zeros(ok.shape, np.uint8)
    cv2.fillPoly(region, [np.round(np.asarray(contour) - [c0, r0]).astype(np.int32).reshape(-1, 1, 2)], 1)
    region = region > 0
    if not region.any():
        return 0.0
    peak = float(resp[region].max())
    away = cv2.dilate((cand[r0:r1, c0:c1] | region).astype(np.uint8), _disk(half + 2 * sw)) > 0
    # the kernel reaches rk past a pixel: keep clear of the window's and the valid area's edges
    inside = cv2.erode(ok.astype(np.uint8), np.ones((2 * rk + 1, 2 * rk + 1), np.uint8), borderType=cv2.BORDER_CONSTANT,
                       borderValue=0) > 0
    coarsest = _coarsest_half(resp, inside & ~away, cr, cc)
    if coarsest is None:
        return 0.0
    sig, med = coarsest
    return (peak - med) / max(sig, 1e-4)


def _robust_sigma(x: np.ndarray) -> float:
    x = x[np.isfinite(x)]
    if x.size == 0:
        return 1.0
    return float(1.4826 * np.median(np.abs(x - np.median(x)))) or 1e-3


def _elongated(region: np.ndarray) -> bool:
    """True for a region at least 3 times as long as wide (moment ellipse): a thin opening with tips."""
    ys, xs = np.nonzero(region)
    if len(xs) < 6:
        return False
    ev = np.sort(np.linalg.eigvalsh(np.cov(np.c_[xs, ys].T.astype(float))))
    return bool(ev[0] > 0 and math.sqrt(ev[1] / ev[0]) >= 3.0)


def _extend_tips(region, depth, core, level, inner):
    """Follow a thin opening out to its tapering tips.

    A crack narrows to nothing at its ends; once narrower than the photo's
    blur it is no longer half as dark as its core, so the half-depth outline
    stops short.  For an elongated region the outline is taken at
    :data:`TIP_DEPTH` of the core's relative depth ``core`` instead, as long
    as that only lengthens it (its area may at most double).  ``depth`` is
    the relative darkness against the local background, pixel by pixel.
    """
    if not _elongated(region):
        return region, level
    lvl2 = TIP_DEPTH * core
    deeper = pieces_holding((depth > lvl2) & inner, region)
    if deeper is None:
        return region, level
    reg2 = deeper | region
    if reg2.sum() > 2.0 * region.sum():
        return region, level
    return ndi.binary_fill_holes(reg2), lvl2


def _into_clipped_light(region, patch, bgp, inner, *, mm: float):
    """Follow an opening into surface the photo shows clipped at white (a highlight).

    Where the surface is brighter than the sensor records, its true
    brightness is unknown and an opening's depth against it is understated:
    the shallow parts of a thin opening (a crack's tapering tips) read as
    white as the surface.  For an elongated opening (:func:`_elongated`;
    a rounded one's outline would take in its blur instead), within
    clipped surface (the background at :data:`CLIP_GREY` or more and a
    clipped pixel within :data:`CLIP_REACH_MM`), every pixel darker than
    :data:`CLIP_GREY` joined to the opening is part of it.
    """
    clipped = bgp >= CLIP_GREY
    if not clipped.any() or not _elongated(region):
        return region
    ring = ndi.binary_dilation(region, iterations=2) & ~region
    if not ring.any() or float(np.mean(clipped[ring])) < 0.3:
        return region  # the surface around the opening is not clipped
    k = max(3, int(round(2 * CLIP_REACH_MM * mm)) | 1)
    clipped &= ndi.maximum_filter(patch, size=k) >= CLIP_GREY
    joined = pieces_holding(((patch < CLIP_GREY) & clipped & inner) | region, region)
    return ndi.binary_fill_holes(region if joined is None else joined | region)


def _disk(radius_px: float) -> np.ndarray:
    r = max(1, int(round(radius_px)))
    return cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * r + 1, 2 * r + 1))


def _trace_opening(i, sl, lab, gs, bg, ridge_mask, labc, inner_mask, *, mm: float, sig: float, close_k) -> Detection | None:
    """Outline one candidate at half depth between its local background and its core."""
    h, w = gs.shape
    r0, r1, c0, c1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop
    pad = int(max(0.6 * mm, 0.3 * max(r1 - r0, c1 - c0))) + 2
    R0, R1, C0, C1 = max(0, r0 - pad), min(h, r1 + pad), max(0, c0 - pad), min(w, c1 + pad)
    seed = lab[R0:R1, C0:C1] == i
    patch = gs[R0:R1, C0:C1]
    bgp = np.maximum(bg[R0:R1, C0:C1], 1.0)
    b = float(np.median(bgp[seed]))
    core = float(np.percentile(patch[seed], 5))
    contrast = b - core
    if contrast <= 0:
        return None
    # the outline is at half the core's depth, each pixel's depth taken against its own
    # background (relative darkness): where the surface's shading changes across the
    # opening (the border of a highlight), one grey level would run on into the darker
    # surface beside it
    depth = 1.0 - patch / bgp
    core_d = float(np.percentile(depth[seed], 95))
    if core_d <= 0:
        return None
    level = 0.5 * core_d
    region = depth > level
    held = pieces_holding(region, seed & region)
    region = seed if held is None else held
    region = ndi.binary_fill_holes(cv2.morphologyEx(region.astype(np.uint8), cv2.MORPH_CLOSE, close_k) > 0)
    # the outermost strip of the face is edge blur: an opening that reaches it runs on to
    # the edge (straight across the strip), but never spreads along it
    inner = inner_mask[R0:R1, C0:C1]
    region &= inner
    if (~inner).any() and region.any():
        touch = region & ndi.binary_dilation(~inner, iterations=1)
        if touch.any():
            band_cols = touch.any(axis=0)
            strip = ~inner & band_cols[None, :]
            # only the rows of the strip on the side the opening touches
            top = np.zeros_like(inner)
            rows_out = np.nonzero((~inner).all(axis=1))[0]
            for r in rows_out:
                if ndi.binary_dilation(region, iterations=int(EDGE_IGNORE_MM * mm) + 2)[r].any():
                    top[r] = True
            region |= strip & top
    if not region.any():
        return None
    if region.sum() < 2:
        return None
    region = _into_clipped_light(region, patch, bgp, inner, mm=mm)
    region, level = _extend_tips(region, depth, core_d, level, inner)
    eps = 0.01 * core_d
    val = np.where(region, np.maximum(depth, level + eps), np.minimum(depth, level - eps))
    val = np.where(ndi.binary_dilation(region, iterations=2), val, level - eps)
    cs = skm.find_contours(np.pad(val, 1, constant_values=level - eps), level)
    if not cs:
        return None
    cont = max(cs, key=len)[:, ::-1] - 1 + np.array([C0, R0])
    if np.allclose(cont[0], cont[-1]):
        cont = cont[:-1]
    if len(cont) < 4:
        return None
    f = polygon_features(cont, px_per_mm=mm)
    if f["area_mm2"] <= 0:
        return None
    gy, gx = np.gradient(patch)
    rim = region & ~ndi.binary_erosion(region)
    edge = float(np.mean(np.hypot(gx, gy)[rim])) * mm / max(contrast, 1e-3) if rim.any() else 0.0
    ring = ndi.binary_dilation(region, iterations=max(2, int(0.3 * mm))) & ~ndi.binary_dilation(region, iterations=1)
    pl = labc[R0:R1, C0:C1]
    tint = float(np.hypot(*(np.median(pl[region][:, 1:], axis=0) - np.median(pl[ring][:, 1:], axis=0)))) if ring.any() else 0.0
    inner = ndi.binary_erosion(region, iterations=1)
    mottle = float(np.std(patch[inner])) / max(contrast, 1e-3) if inner.sum() > 8 else 0.0
    f.update(
        contrast=contrast / max(b, 1.0),
        cnr=contrast / max(b, 1.0) / max(sig, 1e-4),
        tint=tint,
        mottle=mottle,
        edge_sharpness=edge,
        ridge_fraction=float((ridge_mask[R0:R1, C0:C1] & seed).sum()) / max(seed.sum(), 1),
    )
    return Detection(kind="crack", confidence=0.0, contour=cont, iso6520=ISO6520["crack"], features=f)


def _sigmoid(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-max(min(x, 50.0), -50.0)))


def _thickness_and_slag(f: dict) -> tuple[float, float]:
    """An opening's mean thickness (area / greatest, mm) and how slag-like its walls are (0..1: tint, irregular walls).

    The second value only keeps a tinted, irregular opening of crack-like
    proportions from being called a crack; whether a rounded opening is a pore
    or slag is :func:`_slag_probability`'s.
    """
    thick = f["area_mm2"] / max(f["greatest_mm"], 1e-6)
    slag = _sigmoid((f.get("tint", 0.0) - 3.0) / 1.0) * 0.6 + _sigmoid((0.86 - f["solidity"]) / 0.04) * 0.4
    return thick, slag


#: Logistic weights of :func:`_slag_probability` (raw feature units).  Slag laid open is
#: tinted (brown, glassy), mottled inside, less regular in outline and less round than an
#: opened pore, whose smooth cavity is also darker (common practice).  Fitted (L2 penalty 3
#: on standardised features) on the matched rounded openings of 70 seeded synthetic bend
#: photos (surfaces.bench.generated_set, seed 600000, bend only, 2-5 MP; seeds disjoint from
#: the dev, test and benchmark sets): 80 pores and slag inclusions, 95 % told apart there;
#: on the dev set's 15, 87 % (the former tint/solidity thresholds: 47 %).
SLAG_WEIGHTS = {"bias": 17.49, "log1p_tint": 0.864, "solidity": -20.34, "mottle": 17.17, "log_aspect": 7.568,
                "contrast": -3.897}
SLAG_ASPECT_MAX = 2.2
#: An opening spanning fewer photo pixels than this has no shape the photo resolves (a
#: crack two pixels wide looks round): its crack share is at least :data:`UNRESOLVED_CRACK_SHARE`.
#: On the synthetic bend photos above and the dev set, 5 of the 22 rounded openings under
#: 8 photo pixels were cracks, none of the 78 larger ones.
UNRESOLVED_PX = 8.0
UNRESOLVED_CRACK_SHARE = 0.25


def _slag_probability(f: dict) -> float:
    """Probability that a rounded opening is slag laid open rather than an opened pore (see :data:`SLAG_WEIGHTS`)."""
    w = SLAG_WEIGHTS
    # the openings it was fitted on were at most 2.2 times as long as wide: no further
    aspect = min(max(float(f["aspect"]), 1.0), SLAG_ASPECT_MAX)
    z = (w["bias"] + w["log1p_tint"] * math.log1p(max(float(f.get("tint", 0.0)), 0.0)) + w["solidity"] * float(f["solidity"])
         + w["mottle"] * float(f["mottle"]) + w["log_aspect"] * math.log(aspect) + w["contrast"] * float(f["contrast"]))
    return _sigmoid(z)


def bend_kind_shares(f: dict, kind: str) -> dict:
    """How much an opening looks like each kind: shares summing to 1, the chosen ``kind`` largest.

    The crack share is a soft version of the thinness thresholds of
    :func:`_bend_kind`, at least :data:`UNRESOLVED_CRACK_SHARE` when the
    opening spans fewer than :data:`UNRESOLVED_PX` photo pixels (feature
    ``photo_px_per_mm``); the rest is split between slag and pore by
    :func:`_slag_probability`.  The runner-up kind and its share are recorded
    with the detection and the judge tries the opening as that kind too.
    """
    a = float(f["aspect"])
    thick, _ = _thickness_and_slag(f)
    slag = _slag_probability(f)
    crack = max(_sigmoid((a - 2.2) / 0.4), _sigmoid((0.3 - thick) / 0.05) * _sigmoid((a - 1.8) / 0.3))
    ppm = float(f.get("photo_px_per_mm", math.nan))
    if math.isfinite(ppm):
        crack = max(crack, UNRESOLVED_CRACK_SHARE * _sigmoid((UNRESOLVED_PX - float(f["greatest_mm"]) * ppm) / 0.75))
    raw = {"crack": crack, "inclusion": (1.0 - crack) * slag, "pore": (1.0 - crack) * (1.0 - slag)}
    top = max(v for k, v in raw.items() if k != kind)
    raw[kind] = max(raw[kind], top + 1e-3)  # the rules chose this kind: it stays first
    tot = sum(raw.values())
    return {k: round(v / tot, 4) for k, v in raw.items()}


def _bend_kind(f: dict) -> tuple[str, str, float]:
    """Kind, ISO 6520-1 number and confidence of an opening on a stretched bend surface.

    An opening is a crack when it is thin: greatest over least dimension at
    least 2.6, or a mean thickness (area / greatest) under 0.3 mm with a ratio
    of at least 1.8, or a wedge opening from a long edge (ratio 1.6), unless
    tinted, irregular walls make it slag; a wider one is slag laid open when
    :func:`_slag_probability` says so (tinted, mottled, irregular, less
    round and less dark), else an opened pore (common practice).  Confidence
    grows with the contrast-to-noise ratio and the sharpness of the opening's
    walls.
    """
    real = _sigmoid((f["cnr"] - 6.0) / 1.2) * _sigmoid((f["edge_sharpness"] - 1.0) / 0.4)
    thick, slag_walls = _thickness_and_slag(f)
    a = f["aspect"]
    crack_shape = a >= 2.6 or (thick < 0.3 and a >= 1.8) or (f.get("touches_edge") and a >= 1.6)
    if crack_shape and not (slag_walls >= 0.5 and a < 2.6):
        shape = _sigmoid((a - 2.2) / 0.6)
        return "crack", ISO6520["crack"], round(real * (0.6 + 0.4 * shape), 3)
    if a >= 2.0 and slag_walls < 0.5:
        return "crack", ISO6520["crack"], round(real * 0.7, 3)
    slag = _slag_probability(f)
    if slag >= 0.5:
        return "inclusion", ISO6520["inclusion"], round(real * (0.5 + 0.5 * slag), 3)
    iso = ISO6520["pore"] if a < 1.8 else ISO6520["pore-elongated"]
    return "pore", iso, round(real * (0.6 + 0.4 * (1 - slag)), 3)
