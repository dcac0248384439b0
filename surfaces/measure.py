"""Measure detections in millimetres, with uncertainty, and map them back to the photo.

Input: detections with outlines in face-image pixels; output: the
imperfection table (one row per imperfection, columns
:data:`TABLE_COLUMNS`, units in the names; no detections gives 0 rows with
the same columns).

Sizes: the greatest dimension and the width are the outline's maximum and
minimum Feret diameters, except for a rounded pore (outline within
``ROUND_MISFIT`` of an ellipse, less elongated than ``ROUND_ASPECT``): its
axes are those of the ellipse with its area and second moments
(:func:`round_axes_mm`), which the wiggles of a traced outline do not
lengthen; the value is taken as uniformly distributed between that axis and
the Feret diameter, which adds (difference) / sqrt(3) to its uncertainty.

Uncertainty model (1 sigma, documented in the README):

* scale: the calibration's relative uncertainty multiplies every length
  (twice for areas);
* edge placement: each edge of a region is located to ``sigma_edge`` mm,
  the root-sum-square of 0.35 photo pixel (corner/edge localisation on a
  blurred, JPEG-compressed photo) and 0.25 working pixel (resampling); a
  length between two edges carries sqrt(2) of it.  Unfused regions, whose
  boundary is a change of texture, carry an extra 0.1 mm + 1 photo pixel.
* outline: where the segmenter draws a region's edge on a blurred, textured
  face is itself uncertain, beyond the localisation above: a further
  ``OUTLINE_EDGE_PX`` photo pixel per edge and ``OUTLINE_REL`` of each length
  (an irregular outline traced a little short or long).  These two values were
  set so that the stated 2-sigma interval holds the error of 95 % of the matched
  imperfections on a held-out synthetic set whose truth is known by
  construction (the tool's own generator, 39 photos, 91 matches: with the first
  two terms alone only 77 % were covered); ``surfaces bench`` reports the
  coverage on its own set.
* outline level (pores and slag inclusions): a dark region's outline is drawn
  at half contrast between its surrounding ring and its darkest part, but any
  level from ``LEVEL_FRACS`` (35 % to 65 %) is as defensible.  The region is
  re-traced at both ends of that range; where the sizes differ a lot (dark grain
  merged with a pore at one level and not at the other, a soft-edged cavity)
  the greatest dimension is taken as uniformly distributed between them, which
  adds (size at 35 % - size at 65 %) / sqrt(12) to its 1-sigma uncertainty, in
  proportion to every other length and likewise for the area.
* thin protrusion (pores and slag inclusions): the greatest dimension can be
  set by a spur a few photo pixels wide, which may be dark grain touching the
  cavity rather than the cavity.  The region is opened with a disc of
  ``SPUR_PHOTO_PX`` photo pixels' or ``SPUR_INSCRIBED`` x its inscribed
  radius, whichever is larger (the scale at which the segmenter itself cuts
  grain off a cavity); the true value is taken as uniformly distributed
  between the greatest dimension with and without what the opening cuts off.
  The value reported is the end of that range with the spur, so this adds
  (difference) / sqrt(3) (the RMS distance from that end) to its uncertainty;
  the greatest dimension only: a spur hardly changes width or area.
* an area carries perimeter x sigma_edge and twice the relative outline term.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pandas as pd
from scipy import ndimage as ndi

from .face import face_to_photo
from .model import Calibration, Face
from .segment import Detection, dark_piece, grow_by_reach, ring_around, trace_sigma_px
from .shapes import ellipse_misfit, moment_ellipse, polygon_features

EDGE_BAND_MM = 0.5  # "starts at an edge / touches the root" tolerance

TABLE_COLUMNS: tuple[str, ...] = (
    "id", "kind", "iso6520", "confidence",
    "greatest_mm", "greatest_u_mm", "width_mm", "width_u_mm",
    "along_mm", "along_u_mm", "across_mm", "across_u_mm",
    "area_mm2", "area_u_mm2",
    "x0_mm", "x1_mm", "y0_mm", "y1_mm", "cx_mm", "cy_mm",
    "dist_root_mm", "dist_end_mm", "dist_edge_mm", "at_edge", "at_root", "cause",
    "kind_alt", "kind_alt_p",
    "centroid_px", "bbox_px", "outline_px", "source", "status",
)  # fmt: skip


def empty_table() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in TABLE_COLUMNS})


#: Outline terms of the uncertainty model (see the module docstring).
OUTLINE_EDGE_PX = 0.5
OUTLINE_REL = 0.05


#: a pore whose outline is this close to an ellipse (:func:`~surfaces.shapes.ellipse_misfit`) and less
#: elongated than ROUND_ASPECT is measured by the ellipse of its area and second moments (see the module
#: docstring)
ROUND_MISFIT = 0.12
ROUND_ASPECT = 1.3


def round_axes_mm(mm: np.ndarray, f: dict) -> tuple[float, float] | None:
    """Greatest dimension and width (mm) of a rounded outline from its moment ellipse, or None.

    The maximum Feret diameter of a traced outline is the distance between
    its two farthest points, so every wiggle the photo's noise and grain put
    in the outline of a round cavity lengthens it and shortens the minimum
    one: on generated round pores (318 matched) the greatest dimension read
    5.9 % long and the width 1.6 % short while the area was within 1.4 %.
    The axes of the ellipse with the outline's area and second moments
    average over the whole outline instead.  Used only where the outline is
    that ellipse within :data:`ROUND_MISFIT` and less elongated than
    :data:`ROUND_ASPECT` (a gas pore is rounded; common practice): an
    irregular or spurred outline keeps its Feret diameters.
    """
    if len(mm) < 5 or not f["aspect"] < ROUND_ASPECT or f["area_mm2"] <= 0:
        return None
    if ellipse_misfit(mm) >= ROUND_MISFIT:
        return None
    rel = (mm - mm[0]).astype(np.float32).reshape(-1, 1, 2)
    a, b, _ = moment_ellipse(cv2.moments(rel))
    if not (a > 0 and b > 0):
        return None
    return 2.0 * a, 2.0 * b


#: contrast fractions bounding the outline level of a dark region (see the module docstring)
LEVEL_FRACS = (0.35, 0.65)
LEVEL_KINDS = ("pore", "inclusion")


def level_spread(gray: np.ndarray, contour: np.ndarray, *, px_per_mm: float, photo_px_per_mm: float) -> dict | None:
    """Greatest dimension and area of a dark region re-traced at each level of :data:`LEVEL_FRACS`.

    Parameters
    ----------
    gray : (h, w) float32 ndarray
        The rectified face in grey (face-image pixels, ``px_per_mm``).
    contour : (N, 2) ndarray
        The region's outline (col, row) in the same pixels.
    px_per_mm, photo_px_per_mm : float
        Scales of the face image and of the photo at the face.

    Returns
    -------
    dict or None
        ``greatest_mm`` and ``area_mm2``, each a pair (at the lower and the
        higher contrast fraction: the lower level gives the larger region), or
        ``None`` when the region has no usable ring or contrast.
    """
    c = np.asarray(contour, dtype=np.float64).reshape(-1, 2)
    if len(c) < 3:
        return None
    mm = float(px_per_mm)
    pad = int(max(0.6 * mm, 0.5 * float(np.ptp(c, axis=0).max()))) + 3
    h, w = gray.shape[:2]
    C0, R0 = np.maximum(np.floor(c.min(axis=0)).astype(int) - pad, 0)
    C1, R1 = np.minimum(np.ceil(c.max(axis=0)).astype(int) + pad + 1, [w, h])
    if C1 - C0 < 3 or R1 - R0 < 3:
        return None
    g = np.ascontiguousarray(gray[R0:R1, C0:C1], dtype=np.float32)
    gs = cv2.GaussianBlur(g, (0, 0), trace_sigma_px(mm, photo_px_per_mm))  # as the segmenter traces
    reg = np.zeros(g.shape, np.uint8)
    cv2.fillPoly(reg, [np.round((c - [C0, R0]) * 16).astype(np.int32)], 1, shift=4)
    if int(reg.sum()) < 4:
        return None
    ring = ring_around(reg, mm=mm)
    if int(ring.sum()) < 8:
        return None
    inside = reg > 0
    vals = gs[inside]
    b, core = float(np.median(gs[ring])), float(np.percentile(vals, 5))
    contrast = b - core
    if contrast <= 1.0:
        return None
    darkest = inside & (gs <= np.percentile(vals, 20))
    near = grow_by_reach(reg, mm=mm, photo_mm=photo_px_per_mm)
    out = {"greatest_mm": [], "area_mm2": []}
    for f in LEVEL_FRACS:
        piece = dark_piece(gs, b - f * contrast, near, darkest)
        if piece is None:
            return None
        m = ndi.binary_fill_holes(piece).astype(np.uint8)
        out["greatest_mm"].append(_raster_greatest_mm(m, mm) + 1.0 / mm)  # pixel centres -> edges
        out["area_mm2"].append(float(m.sum()) / mm**2)
    return out


#: radius, in photo pixels, of the disc that cuts thin protrusions off a dark region
#: (see the module docstring): wider than the blur of one photo pixel, much
#: narrower than any cavity the photo resolves (RESOLVE_PX)
SPUR_PHOTO_PX = 1.5
SPUR_INSCRIBED = 0.35  # ... or a third of the region's inscribed radius, as the segmenter opens it


def spur_spread_mm(contour: np.ndarray, *, px_per_mm: float, photo_px_per_mm: float) -> float:
    """How much the greatest dimension of a region rests on thin protrusions, in mm.

    Parameters
    ----------
    contour : (N, 2) ndarray
        The region's outline (col, row) in face-image pixels.
    px_per_mm, photo_px_per_mm : float
        Scales of the face image and of the photo at the face.

    Returns
    -------
    float
        Greatest dimension of the filled outline minus that of the outline
        opened with a disc of :data:`SPUR_PHOTO_PX` photo pixels or
        :data:`SPUR_INSCRIBED` x the inscribed radius, whichever is larger
        (both on the same raster), 0 when the opening would take half the region or more (a
        region that thin is all "spur": its size is judged as traced).
    """
    c = np.asarray(contour, dtype=np.float64).reshape(-1, 2)
    if len(c) < 3:
        return 0.0
    mm = float(px_per_mm)
    pad = 3
    C0, R0 = np.floor(c.min(axis=0)).astype(int) - pad
    w, h = (np.ceil(c.max(axis=0)).astype(int) + pad + 1) - [C0, R0]
    reg = np.zeros((int(h), int(w)), np.uint8)
    cv2.fillPoly(reg, [np.round((c - [C0, R0]) * 16).astype(np.int32)], 1, shift=4)
    n = int(reg.sum())
    if n < 4:
        return 0.0
    inscribed = float(cv2.distanceTransform(reg, cv2.DIST_L2, 5).max())
    r = max(1, int(round(max(SPUR_PHOTO_PX * mm / float(photo_px_per_mm), SPUR_INSCRIBED * inscribed))))
    reg = np.pad(reg, r)
    k = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * r + 1, 2 * r + 1))
    op = cv2.morphologyEx(reg, cv2.MORPH_OPEN, k)
    if int(op.sum()) < 0.5 * n:
        return 0.0
    return max(0.0, _raster_greatest_mm(reg, mm) - _raster_greatest_mm(op, mm))


def _raster_greatest_mm(m: np.ndarray, mm: float) -> float:
    """Greatest dimension (max Feret) through the centres of the boundary pixels of the uint8 mask ``m``."""
    cs, _ = cv2.findContours(m, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    pts = np.vstack([x.reshape(-1, 2) for x in cs]).astype(np.float64)
    return polygon_features(pts, px_per_mm=mm)["greatest_mm"]


def _runner_up(d: Detection) -> dict:
    """The second most probable imperfection kind of a detection and its probability
    (``""`` and NaN when the segmenter gave no class probabilities)."""
    alt = sorted(((float(p), k) for k, p in (d.probs or {}).items() if k not in ("none", d.kind)), reverse=True)
    if not alt:
        return {"kind_alt": "", "kind_alt_p": float("nan")}
    return {"kind_alt": alt[0][1], "kind_alt_p": round(alt[0][0], 4)}


def edge_sigma_mm(kind: str, *, photo_px_per_mm: float, work_px_per_mm: float) -> float:
    """1-sigma placement error of one edge of a region, in mm."""
    s = math.hypot(math.hypot(0.35, OUTLINE_EDGE_PX) / photo_px_per_mm, 0.25 / work_px_per_mm)
    if kind == "unfused":
        s = math.hypot(s, 0.1 + 1.0 / photo_px_per_mm)
    return s


def measure(
    detections: list[Detection],
    face: Face,
    calib: Calibration,
    *,
    photo_px_per_mm: float,
    length_factor=None,
    edges_only: bool = False,
) -> pd.DataFrame:
    """The imperfection table for ``detections`` on ``face``.

    Parameters
    ----------
    detections : list of Detection
        Outlines in face-image pixels (col, row).
    face, calib : Face, Calibration
        For the face axes and the mapping back to the photo.
    photo_px_per_mm : float
        The photo's scale at the face (for the edge-placement uncertainty).
    length_factor : callable, optional
        ``f(contour_mm) -> (contour_true_mm, extra_rel_u)``: a correction of
        the outline to true surface lengths (bend curvature); the returned
        relative uncertainty is added in quadrature to the scale term.
    edges_only : bool
        ``at_edge`` from the long edges only (bend coupons: the ends of the
        visible region are not coupon corners, and a crack there must not
        fall under a corner rule).

    Returns
    -------
    pandas.DataFrame with :data:`TABLE_COLUMNS`.
    """
    if not detections:
        return empty_table()
    u_scale = calib.uncertainty_pct / 100.0
    L, W = face.length_mm, face.width_mm
    # x is measured on the true surface when a length correction is given (bend
    # curvature): the far end is then at the true length, not the projected one
    L_true = float(getattr(length_factor, "true_length_mm", L)) if length_factor is not None else L
    sx = L / face.image.shape[1]
    sy = W / face.image.shape[0]
    gray = None
    if any(d.kind in LEVEL_KINDS for d in detections) and face.image.ndim == 3:
        gray = cv2.cvtColor(np.ascontiguousarray(face.image[:, :, :3]), cv2.COLOR_RGB2GRAY).astype(np.float32)
    rows = []
    for k, d in enumerate(detections, start=1):
        c = np.asarray(d.contour, dtype=np.float64)
        mm = (c + 0.5) * np.array([sx, sy])
        extra = 0.0
        if length_factor is not None:
            mm, extra = length_factor(mm)
        f = polygon_features(mm, px_per_mm=1.0)
        u_round = 0.0  # mm: how far the Feret diameter of a rounded pore's outline lies beyond its ellipse's axis
        if d.kind == "pore":
            axes = round_axes_mm(mm, f)
            if axes is not None:
                # the value reported is the ellipse's end of the range up to the Feret diameter
                u_round = max(f["greatest_mm"] - axes[0], 0.0) / math.sqrt(3.0)
                f["greatest_mm"], f["width_mm"] = axes
        se = edge_sigma_mm(d.kind, photo_px_per_mm=photo_px_per_mm, work_px_per_mm=face.px_per_mm)
        ur = math.hypot(u_scale, extra)
        ur_len = math.hypot(ur, OUTLINE_REL)

        u_level, u_level_area, u_spur = 0.0, 0.0, 0.0  # relative to the greatest dimension; mm2; mm
        if d.kind in LEVEL_KINDS and f["greatest_mm"] > 0 and length_factor is None:
            # the value reported is the end of the range with the spur, not its middle: the
            # RMS distance from it to a value uniform over the range is (range) / sqrt(3)
            u_spur = spur_spread_mm(c, px_per_mm=face.px_per_mm, photo_px_per_mm=photo_px_per_mm) / math.sqrt(3.0)
        if gray is not None and d.kind in LEVEL_KINDS and f["greatest_mm"] > 0:
            ls = level_spread(gray, c, px_per_mm=face.px_per_mm, photo_px_per_mm=photo_px_per_mm)
            if ls is not None:
                u_level = abs(ls["greatest_mm"][0] - ls["greatest_mm"][1]) / math.sqrt(12.0) / f["greatest_mm"]
                u_level_area = abs(ls["area_mm2"][0] - ls["area_mm2"][1]) / math.sqrt(12.0)

        def ulen(v):
            return math.hypot(v * ur_len, math.sqrt(2) * se, v * u_level)

        outline = face_to_photo(face, calib, c)
        # where the imperfection is in the photo: the centroid of the outline as seen
        # (uncorrected), not of the surface-corrected one
        fp = polygon_features(c, px_per_mm=1.0) if length_factor is not None else None
        cen_face = [fp["cx_mm"], fp["cy_mm"]] if fp else [f["cx_mm"] / sx - 0.5, f["cy_mm"] / sy - 0.5]
        cen = face_to_photo(face, calib, np.array([cen_face]))[0]
        dist_end = min(f["x0_mm"], L_true - f["x1_mm"])
        dist_edge = min(f["y0_mm"], W - f["y1_mm"])
        if face.root_side == "y0":
            dist_root = f["y0_mm"]
        elif face.root_side == "y1":
            dist_root = W - f["y1_mm"]
        else:
            dist_root = float("nan")
        at_root = (dist_root <= EDGE_BAND_MM) if face.root_side in ("y0", "y1") else dist_edge <= EDGE_BAND_MM
        rows.append(
            {
                "id": k,
                "kind": d.kind,
                "iso6520": d.iso6520,
                "confidence": float(d.confidence),
                "greatest_mm": f["greatest_mm"],
                "greatest_u_mm": math.hypot(ulen(f["greatest_mm"]), u_spur, u_round),
                "width_mm": f["width_mm"],
                "width_u_mm": ulen(f["width_mm"]),
                "along_mm": f["along_mm"],
                "along_u_mm": ulen(f["along_mm"]),
                "across_mm": f["across_mm"],
                "across_u_mm": ulen(f["across_mm"]),
                "area_mm2": f["area_mm2"],
                "area_u_mm2": math.hypot(2 * f["area_mm2"] * ur_len, f["perimeter_mm"] * se, u_level_area),
                "x0_mm": f["x0_mm"],
                "x1_mm": f["x1_mm"],
                "y0_mm": f["y0_mm"],
                "y1_mm": f["y1_mm"],
                "cx_mm": f["cx_mm"],
                "cy_mm": f["cy_mm"],
                "dist_root_mm": dist_root,
                "dist_end_mm": dist_end,
                "dist_edge_mm": dist_edge,
                "at_edge": bool(dist_edge <= EDGE_BAND_MM or (not edges_only and dist_end <= EDGE_BAND_MM)),
                "at_root": bool(at_root),
                "cause": d.cause,
                **_runner_up(d),
                "centroid_px": [round(float(cen[0]), 2), round(float(cen[1]), 2)],
                "bbox_px": [
                    round(float(outline[:, 0].min()), 1),
                    round(float(outline[:, 1].min()), 1),
                    round(float(outline[:, 0].max()), 1),
                    round(float(outline[:, 1].max()), 1),
                ],
                "outline_px": _simplify(outline),
                "source": "auto",
                "status": "auto",
            }
        )
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def _simplify(outline: np.ndarray, max_points: int = 200) -> list[list[float]]:
    step = max(1, int(math.ceil(len(outline) / max_points)))
    return [[round(float(x), 1), round(float(y), 1)] for x, y in outline[::step]]
