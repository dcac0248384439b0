"""Find the test face and rectify it into its own metric axes.

The face is located in two passes:

1. **Coarse**, on a copy of the photo warped into the marker plane at
   ``COARSE_PX_PER_MM``: a texture-energy map (the granular fracture surface
   is rougher at the 0.1-0.5 mm scale than plate, card, table and shadow),
   with the reference card masked out and saturated (rusty) areas damped.
   The best elongated component gives the face's centre, axis and rough size.
2. **Fine**, on the face rectified at :data:`surfaces.model.WORK_PX_PER_MM`
   with a margin: texture profiles across and along the face give its edges
   to a fraction of a working pixel (half-way between the inside and outside
   texture levels).  Medians over the face's length make the edges robust to
   an untextured unfused band along part of the root.

Every length here is in millimetres; pixels appear only when warping.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from .geometry import apply_h
from .model import WORK_PX_PER_MM, Calibration, Face, FaceError

COARSE_PX_PER_MM = 4.0
#: Largest plane extent searched around the photo's footprint (mm).
MAX_SEARCH_MM = 700.0


# --------------------------------------------------------------------------
# warping helpers


def face_frame(centre_mm, axis_deg: float, origin_mm, *, px_per_mm: float) -> np.ndarray:
    """Matrix mapping face-image pixels (col, row, 1) to plane mm (X, Y, 1).

    ``origin_mm`` is the face-axes position (x, y) of the image's top-left
    pixel edge; pixel centres sit at ``origin + (col + 0.5) / px_per_mm``.
    """
    a = math.radians(axis_deg)
    ux = np.array([math.cos(a), math.sin(a)])  # along the weld, in the plane
    uy = np.array([-math.sin(a), math.cos(a)])  # across
    s = 1.0 / px_per_mm
    ox, oy = origin_mm
    c = np.asarray(centre_mm, dtype=np.float64)
    # plane = c + ux * (ox + (col + .5) s) + uy * (oy + (row + .5) s)
    t = c + ux * (ox + 0.5 * s) + uy * (oy + 0.5 * s)
    return np.array([[ux[0] * s, uy[0] * s, t[0]], [ux[1] * s, uy[1] * s, t[1]], [0, 0, 1.0]])


def warp_to_face(img: np.ndarray, H_px_to_mm: np.ndarray, A: np.ndarray, shape) -> np.ndarray:
    """Sample ``img`` (photo pixels) on the face grid described by ``A``."""
    M = np.linalg.inv(H_px_to_mm) @ A  # face px -> photo px
    h, w = int(shape[0]), int(shape[1])
    return cv2.warpPerspective(
        img, M, (w, h), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_REPLICATE
    )


def _texture_energy(gray: np.ndarray, *, px_per_mm: float, fine_mm: float, window_mm: float) -> np.ndarray:
    """Local RMS of the band-pass detail between ``fine_mm`` and the pixel scale."""
    g = gray.astype(np.float32)
    hp = g - cv2.GaussianBlur(g, (0, 0), max(fine_mm * px_per_mm, 0.6))
    e = cv2.GaussianBlur(hp * hp, (0, 0), max(window_mm * px_per_mm, 0.8))
    return np.sqrt(np.maximum(e, 0))


# --------------------------------------------------------------------------
# coarse search


def _search_box(calib: Calibration, shape, roi_poly_px) -> tuple[np.ndarray, str]:
    """Plane-mm polygon to search, and a description."""
    h, w = shape[:2]
    if roi_poly_px is not None:
        return apply_h(calib.H, roi_poly_px), "roi"
    corners = np.array([[0, 0], [w - 1, 0], [w - 1, h - 1], [0, h - 1]], dtype=np.float64)
    return apply_h(calib.H, corners), "photo"


def _card_exclusion(calib: Calibration) -> list[np.ndarray]:
    """Plane polygons around each marker that are certainly card, not face."""
    out = []
    for m in calib.markers:
        c = apply_h(calib.H, m.corners_px)
        ctr = c.mean(axis=0)
        out.append(ctr + (c - ctr) * 2.2)  # marker + quiet zone + card margin
    return out


def _coarse_face(gray: np.ndarray, rgb: np.ndarray, calib: Calibration, roi_poly_px, test: str):
    poly_mm, where = _search_box(calib, gray.shape, roi_poly_px)
    lo = poly_mm.min(axis=0)
    hi = poly_mm.max(axis=0)
    if calib.markers:
        mc = np.mean([apply_h(calib.H, m.corners_px).mean(axis=0) for m in calib.markers], axis=0)
        lo = np.maximum(lo, mc - MAX_SEARCH_MM)
        hi = np.minimum(hi, mc + MAX_SEARCH_MM)
    if np.any(hi - lo < 5):
        raise FaceError("the face region is too small or lies outside the photo: give --roi inside the photo")
    s = COARSE_PX_PER_MM
    if (hi[0] - lo[0]) * (hi[1] - lo[1]) > (2 * MAX_SEARCH_MM) ** 2 or not np.all(np.isfinite(hi - lo)):
        raise FaceError(
            f"the scale makes the photo {hi[0] - lo[0]:.3g} x {hi[1] - lo[1]:.3g} mm across: "
            "check --px-per-mm / --marker-mm (a phone photo of a test face covers a few hundred mm at most)"
        )
    W = int(math.ceil((hi[0] - lo[0]) * s))
    Hh = int(math.ceil((hi[1] - lo[1]) * s))
    # plane grid: col -> X = lo.x + (col + .5)/s
    A = np.array([[1 / s, 0, lo[0] + 0.5 / s], [0, 1 / s, lo[1] + 0.5 / s], [0, 0, 1.0]])
    # downscale the photo first so the warp does not alias the texture away
    ppm = calib.px_per_mm_at(gray.shape[1] / 2, gray.shape[0] / 2)
    target = 6.0  # px/mm kept for the texture measure
    f = min(1.0, target / max(ppm, 1e-6))
    if f < 0.95:
        small = cv2.resize(gray, None, fx=f, fy=f, interpolation=cv2.INTER_AREA)
        small_rgb = cv2.resize(rgb, None, fx=f, fy=f, interpolation=cv2.INTER_AREA)
        # pixel-centre convention: x_full = (x_small + .5)/f - .5
        Hs = calib.H @ np.array([[1 / f, 0, 0.5 / f - 0.5], [0, 1 / f, 0.5 / f - 0.5], [0, 0, 1]])
    else:
        small, small_rgb, Hs = gray, rgb, calib.H
    energy_photo = _texture_energy(small, px_per_mm=ppm * f, fine_mm=0.25, window_mm=0.6)
    # granular fracture texture is isotropic; brushed plate, weld ripples and
    # grinding marks are oriented: damp the energy by the structure-tensor coherence
    energy_photo *= 1.0 - _coherence(small, sigma_px=1.0 * ppm * f)
    valid_photo = np.ones(small.shape, np.uint8)
    M = np.linalg.inv(Hs) @ A
    warp = lambda im, interp=cv2.INTER_LINEAR: cv2.warpPerspective(  # noqa: E731
        im, M, (W, Hh), flags=interp | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_CONSTANT, borderValue=0
    )
    energy = warp(energy_photo)
    valid = warp(valid_photo, cv2.INTER_NEAREST) > 0
    hsv = cv2.cvtColor(small_rgb, cv2.COLOR_RGB2HSV)
    sat = warp(hsv[..., 1]).astype(np.float32)
    val = warp(small).astype(np.float32)

    # search polygon and card exclusion, in coarse plane pixels
    to_px = lambda p: ((np.asarray(p) - lo) * s - 0.5).astype(np.int32)  # noqa: E731
    allowed = np.zeros((Hh, W), np.uint8)
    cv2.fillPoly(allowed, [to_px(poly_mm)], 1)
    for ex in _card_exclusion(calib):
        cv2.fillPoly(allowed, [to_px(ex)], 0)
    allowed = (allowed > 0) & valid
    # the card around each marker: flood the white paper from the marker's quiet
    # zone, close over its print (scale bar, text) and keep clear of it
    for m in calib.markers:
        allowed &= ~_card_mask(val, to_px(apply_h(calib.H, m.corners_px)), s)
    if allowed.sum() < 50:
        raise FaceError("no room for a face beside the reference card: give --roi around the face")

    e = energy.copy()
    # rust and paint are coloured; fracture faces and bend coupons are grey metal
    e *= np.clip(1.2 - sat / 120.0, 0.2, 1.0)
    e[~allowed] = 0
    vals = e[allowed]
    out_level = float(np.median(vals))
    best, best_score = None, -1.0
    k = max(1, int(round(0.8 * s)))
    for thr in _thresholds(vals):
        cand = (e > thr) & allowed
        cand = cv2.morphologyEx(cand.astype(np.uint8), cv2.MORPH_CLOSE, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
        cand = cv2.morphologyEx(cand, cv2.MORPH_OPEN, np.ones((k + 1, k + 1), np.uint8))
        n, lab, stats, cents = cv2.connectedComponentsWithStats(cand, connectivity=8)
        for i in range(1, n):
            area_mm2 = stats[i, cv2.CC_STAT_AREA] / s**2
            if area_mm2 < 15:
                continue
            ys, xs = np.nonzero(lab == i)
            pts = np.c_[xs, ys].astype(np.float32)
            (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
            L, Wd = max(rw, rh) / s, max(min(rw, rh), 1) / s
            fill = area_mm2 / max(L * Wd, 1e-6)
            # the fracture face is the most (isotropically) textured, compact region:
            # rank by its typical texture level, filled rectangles first
            contrast = float(np.median(e[ys, xs])) / max(out_level, 1e-6)
            if L < 8.0:
                continue
            score = float(np.median(e[ys, xs])) * min(fill, 1.0) ** 2 * area_mm2**0.1
            if score > best_score:
                best_score, best = score, (pts, fill, contrast)
                best_lab = (lab, n, i, float(np.median(e[ys, xs])))
    if best is not None:
        best = _merge_collinear(best, best_lab, e)
    if best is None:
        raise FaceError(
            "could not find the face automatically: give --roi X0,Y0,X1,Y1 (a rough box around the face in photo pixels)"
        )
    pts, fill, contrast = best
    (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
    if rw < rh:
        ang += 90.0
        rw, rh = rh, rw
    centre = lo + (np.array([cx, cy]) + 0.5) / s
    return centre, float(ang), rw / s, rh / s, float(min(fill, 1.0)), where


def _card_mask(val: np.ndarray, quad_px: np.ndarray, s: float) -> np.ndarray:
    """Coarse-plane pixels of the paper card that carries the marker ``quad_px``."""
    h, w = val.shape
    q = quad_px.astype(np.float64)
    ctr = q.mean(axis=0)
    mask = np.zeros((h + 2, w + 2), np.uint8)
    img = np.clip(val, 0, 255).astype(np.uint8)
    paper = []
    for k in range(4):  # quiet-zone points just outside each side's middle
        mid = 0.5 * (q[k] + q[(k + 1) % 4])
        p = mid + (mid - ctr) * 0.18
        x, y = int(round(p[0])), int(round(p[1]))
        if 0 <= x < w and 0 <= y < h:
            paper.append((x, y))
    if not paper:
        return np.zeros((h, w), bool)
    white = float(np.median([img[y, x] for x, y in paper]))
    for x, y in paper:
        if img[y, x] >= 0.7 * white and not mask[y + 1, x + 1]:
            cv2.floodFill(img.copy(), mask, (x, y), 255, loDiff=int(0.18 * white), upDiff=255,
                          flags=8 | cv2.FLOODFILL_MASK_ONLY | (255 << 8))
    card = mask[1:-1, 1:-1] > 0
    side_px = float(np.mean(np.linalg.norm(np.roll(q, -1, 0) - q, axis=1)))
    # a flood that leaks into a pale table is no card: an A4 sheet is the largest we print
    if card.sum() > min(70000.0 * s * s, 0.4 * h * w, 400.0 * side_px**2):
        card = np.zeros((h, w), bool)
        cv2.fillPoly(card.view(np.uint8), [np.round(ctr + (q - ctr) * 2.6).astype(np.int32)], 1)
    marker = np.zeros((h, w), np.uint8)
    cv2.fillPoly(marker, [np.round(ctr + (q - ctr) * 1.3).astype(np.int32)], 1)
    card |= marker > 0
    # close over the card's print and keep a margin
    k = max(3, int(round(4.0 * s)) | 1)
    card = cv2.morphologyEx(card.astype(np.uint8), cv2.MORPH_CLOSE, np.ones((k, k), np.uint8))
    n, lab = cv2.connectedComponents(1 - card, connectivity=4)
    border = np.unique(np.r_[lab[0], lab[-1], lab[:, 0], lab[:, -1]])
    holes = ~np.isin(lab, border) & (card == 0)
    card = (card > 0) | holes
    return cv2.dilate(card.astype(np.uint8), np.ones((k, k), np.uint8)) > 0


def _merge_collinear(best, best_lab, e):
    """Join pieces of the same face split by a smooth (unfused) stretch or a defect.

    Components lying on the chosen one's axis, within its width, with a
    similar texture level, are added before the outline is fitted.
    """
    pts, fill, contrast = best
    lab, n, i0, level = best_lab
    (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
    if rw < rh:
        ang += 90.0
        rw, rh = rh, rw
    a = math.radians(ang)
    ux, uy = math.cos(a), math.sin(a)
    keep = [pts]
    for j in range(1, n):
        if j == i0:
            continue
        ys, xs = np.nonzero(lab == j)
        if len(xs) < 4:
            continue
        if float(np.median(e[ys, xs])) < 0.4 * level:
            continue
        across = np.abs(-(xs - cx) * uy + (ys - cy) * ux)
        along = (xs - cx) * ux + (ys - cy) * uy
        gap_ok = np.min(np.abs(along)) < 0.5 * rw + max(rw, 40.0 * COARSE_PX_PER_MM)
        if np.mean(across <= 0.6 * rh + 2) > 0.8 and gap_ok:
            keep.append(np.c_[xs, ys].astype(np.float32))
    if len(keep) == 1:
        return best
    allp = np.concatenate(keep)
    (cx2, cy2), (rw2, rh2), _ = cv2.minAreaRect(allp)
    fill2 = len(allp) / max(rw2 * rh2, 1.0)
    return allp, min(fill2, 1.0), contrast


def _coherence(gray: np.ndarray, *, sigma_px: float) -> np.ndarray:
    """Structure-tensor coherence ((l1 - l2) / (l1 + l2)), 0 isotropic .. 1 oriented."""
    g = gray.astype(np.float32)
    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0, ksize=3)
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1, ksize=3)
    s = max(sigma_px, 0.8)
    jxx = cv2.GaussianBlur(gx * gx, (0, 0), s)
    jyy = cv2.GaussianBlur(gy * gy, (0, 0), s)
    jxy = cv2.GaussianBlur(gx * gy, (0, 0), s)
    return np.clip(np.sqrt((jxx - jyy) ** 2 + 4 * jxy**2) / (jxx + jyy + 1e-6), 0, 1)


def _thresholds(vals: np.ndarray) -> list[float]:
    """Candidate texture thresholds: Otsu, and the upper class split of a 3-class Otsu."""
    from skimage.filters import threshold_multiotsu

    out = [_otsu(vals)]
    v = vals[np.isfinite(vals)]
    if v.size > 100:
        try:
            out.extend(float(t) for t in threshold_multiotsu(v, classes=3))
        except ValueError:
            pass
    return sorted(set(out))


def _otsu(vals: np.ndarray) -> float:
    v = vals[np.isfinite(vals)]
    if v.size == 0:
        return 0.0
    top = float(np.percentile(v, 99.5)) or 1.0
    q = np.clip(v / top * 255, 0, 255).astype(np.uint8)
    t, _ = cv2.threshold(q.reshape(-1, 1), 0, 255, cv2.THRESH_BINARY + cv2.THRESH_OTSU)
    return float(t) / 255 * top


# --------------------------------------------------------------------------
# fine edges


def _edge_from_profile(profile: np.ndarray, inside: slice, outside_lo: slice, outside_hi: slice, *, persist: int = 1):
    """Sub-pixel positions where ``profile`` crosses half-way inside/outside, each side.

    Walking out from the centre, a crossing counts only when the profile then
    stays on the outside level for ``persist`` samples, so a short internal
    dip (a smooth unfused patch across the face) is not taken for an end.
    """
    p = np.asarray(profile, dtype=np.float64)
    inner = float(np.median(p[inside]))
    out_l = float(np.median(p[outside_lo])) if p[outside_lo].size else inner * 0.3
    out_h = float(np.median(p[outside_hi])) if p[outside_hi].size else inner * 0.3
    c = (inside.start + inside.stop) // 2

    def cross(level, rng):
        idx = list(rng)
        for k in range(1, len(idx)):
            a, b = idx[k - 1], idx[k]
            if p[a] >= level > p[b]:
                after = [p[j] for j in idx[k : k + persist]]
                if len(after) < persist or max(after) < level:
                    return a + (level - p[a]) / (p[b] - p[a]) * (b - a)
        return None

    lvl_l = 0.5 * (inner + out_l)
    lvl_h = 0.5 * (inner + out_h)
    lo_edge = cross(lvl_l, range(c, -1, -1))
    hi_edge = cross(lvl_h, range(c, len(p)))
    contrast = min(inner - out_l, inner - out_h) / max(inner, 1e-6)
    return lo_edge, hi_edge, contrast


def _ends_from_profile(profile: np.ndarray, inside: slice, outside_lo: slice, outside_hi: slice, *, persist: int):
    """Face ends along the weld, found walking inwards from each outer margin.

    The face may lose its texture in the middle (glare, a long unfused
    stretch), so the inside level is an upper quantile of the central part and
    each end is the outermost place where the profile rises above half-way
    and stays there for ``persist`` samples.
    """
    p = np.asarray(profile, dtype=np.float64)
    inner = float(np.percentile(p[inside], 75))
    out_l = float(np.median(p[outside_lo])) if p[outside_lo].size else inner * 0.3
    out_h = float(np.median(p[outside_hi])) if p[outside_hi].size else inner * 0.3

    def first_up(level, idx):
        for k in range(1, len(idx)):
            a, b = idx[k - 1], idx[k]
            if p[a] < level <= p[b]:
                after = [p[j] for j in idx[k : k + persist]]
                if len(after) >= persist and min(after) >= level:
                    return a + (level - p[a]) / (p[b] - p[a]) * (b - a)
        return None

    lo = first_up(0.5 * (inner + out_l), list(range(0, len(p))))
    hi = first_up(0.5 * (inner + out_h), list(range(len(p) - 1, -1, -1)))
    contrast = min(inner - out_l, inner - out_h) / max(inner, 1e-6)
    if lo is not None and hi is not None and hi - lo < persist:
        return None, None, contrast
    return lo, hi, contrast


def _snap_to_step(profile: np.ndarray, pos: float, *, win: int) -> float:
    """Move an edge estimate to the strongest brightness step within ``win`` samples.

    The texture profile locates the face; where the face also differs in
    brightness from its surroundings, the brightness step is the sharper
    edge.  The step is taken only when it clearly stands out of the profile's
    own sample-to-sample noise; its sub-sample position is the vertex of a
    parabola through the gradient peak.
    """
    p = np.asarray(profile, dtype=np.float64)
    grad = np.abs(np.gradient(p))
    i0, i1 = max(1, int(pos) - win), min(len(p) - 2, int(pos) + win)
    if i1 <= i0:
        return pos
    noise = 1.4826 * float(np.median(np.abs(np.diff(p) - np.median(np.diff(p))))) + 1e-6
    k = i0 + int(np.argmax(grad[i0 : i1 + 1]))
    if grad[k] < 4 * noise:
        return pos
    a, b, c = grad[k - 1], grad[k], grad[k + 1]
    den = a - 2 * b + c
    off = 0.5 * (a - c) / den if abs(den) > 1e-12 else 0.0
    return float(k + np.clip(off, -0.5, 0.5))


def find_face(
    rgb: np.ndarray,
    gray: np.ndarray,
    calib: Calibration,
    *,
    roi: tuple[float, ...] | None = None,
    test: str = "fillet-break",
    px_per_mm: float = WORK_PX_PER_MM,
) -> Face:
    """Locate the face and rectify it.

    Parameters
    ----------
    rgb, gray : (H, W, 3) and (H, W) uint8 ndarrays
        The photo (after EXIF orientation).
    calib : Calibration
        Photo px -> plane mm.
    roi : 4 or 8 numbers, optional
        A rough box ``x0, y0, x1, y1`` or four corners ``x0, y0, ..., x3, y3``
        in photo pixels; the face is searched within it.
    test : str
        Test type; kept for the face's warnings.
    px_per_mm : float
        Resolution of the rectified face image.

    Returns
    -------
    Face
        Rectified image with column = x along the weld (the face's longer
        side), row = y across it.
    """
    roi_poly = _roi_polygon(roi, gray.shape) if roi is not None else None
    warnings: list[str] = []
    centre, axis, L, Wd, fill, where = _coarse_face(gray, rgb, calib, roi_poly, test)
    method = "auto" if roi is None else ("roi-box" if len(roi) == 4 else "roi-corners")

    # fine pass: rectify the face with a margin, find its edges from texture profiles
    margin = max(3.0, 0.6 * Wd)
    margin_x = max(5.0, 0.35 * L)
    ox, oy = -L / 2 - margin_x, -Wd / 2 - margin
    w = int(math.ceil((L + 2 * margin_x) * px_per_mm))
    h = int(math.ceil((Wd + 2 * margin) * px_per_mm))
    A = face_frame(centre, axis, (ox, oy), px_per_mm=px_per_mm)
    g = warp_to_face(gray, calib.H, A, (h, w))
    e = _texture_energy(g, px_per_mm=px_per_mm, fine_mm=0.12, window_mm=0.35)
    e *= 1.0 - _coherence(g, sigma_px=0.5 * px_per_mm)
    mrow = int(margin * px_per_mm * 0.6)
    core_c = slice(int(w * 0.5 - L * px_per_mm * 0.3), int(w * 0.5 + L * px_per_mm * 0.3) + 1)
    e = e * e  # blurred energy is linear in the blur: its half-level is the edge (sqrt would bias outward)
    gi = cv2.GaussianBlur(g.astype(np.float32), (0, 0), 0.08 * px_per_mm)
    prof_y = np.median(e[:, core_c], axis=1)
    inside_y = slice(int(h / 2 - Wd * px_per_mm * 0.25), int(h / 2 + Wd * px_per_mm * 0.25) + 1)
    y_lo, y_hi, c_y = _edge_from_profile(
        prof_y, inside_y, slice(0, mrow), slice(h - mrow, h), persist=int(0.4 * px_per_mm)
    )
    if y_lo is None or y_hi is None:
        y_lo, y_hi = margin * px_per_mm, (margin + Wd) * px_per_mm
        warnings.append("face edges across the weld are unclear: width taken from the coarse outline")
    else:
        prof_i = np.median(gi[:, core_c], axis=1)
        y_lo = _snap_to_step(prof_i, y_lo, win=int(0.8 * px_per_mm))
        y_hi = _snap_to_step(prof_i, y_hi, win=int(0.8 * px_per_mm))
    band = slice(int(math.ceil(y_lo + 0.15 * (y_hi - y_lo))), int(y_hi - 0.15 * (y_hi - y_lo)) + 1)
    prof_x = np.median(e[band, :], axis=0)
    inside_x = slice(int(w / 2 - L * px_per_mm * 0.25), int(w / 2 + L * px_per_mm * 0.25) + 1)
    mcol = int(margin_x * px_per_mm * 0.6)
    x_lo, x_hi, c_x = _ends_from_profile(
        prof_x, inside_x, slice(0, mcol), slice(w - mcol, w), persist=int(2.0 * px_per_mm)
    )
    if x_lo is None or x_hi is None:
        x_lo, x_hi = margin_x * px_per_mm, (margin_x + L) * px_per_mm
        warnings.append("face ends are unclear: length taken from the coarse outline")
    else:
        prof_i = np.median(gi[band, :], axis=0)
        x_lo = _snap_to_step(prof_i, x_lo, win=int(0.8 * px_per_mm))
        x_hi = _snap_to_step(prof_i, x_hi, win=int(0.8 * px_per_mm))
    # edges in face-centred mm (pixel centre i sits at o + (i + .5)/ppm)
    fx0, fx1 = ox + (x_lo + 0.5) / px_per_mm, ox + (x_hi + 0.5) / px_per_mm
    fy0, fy1 = oy + (y_lo + 0.5) / px_per_mm, oy + (y_hi + 0.5) / px_per_mm
    length, width = fx1 - fx0, fy1 - fy0
    if length <= 1 or width <= 0.5:
        raise FaceError("the face found is too small to assess: give --roi around the face")
    if width > length:
        warnings.append("the face is wider than long: check the weld axis on the overlay")
    conf = float(np.clip(min(c_x, c_y) * 1.5, 0.05, 1.0)) * (0.5 + 0.5 * fill)
    if conf < 0.4:
        warnings.append("the face outline is uncertain: check it on the overlay or give --roi")

    # final rectified face, exactly the face rectangle
    wf = int(round(length * px_per_mm))
    hf = int(round(width * px_per_mm))
    Af = face_frame(centre, axis, (fx0, fy0), px_per_mm=px_per_mm)
    Af = _rescale_frame(Af, length / wf, width / hf, px_per_mm)
    img = warp_to_face(rgb, calib.H, Af, (hf, wf))
    mask = np.ones((hf, wf), bool)
    corners_face = np.array([[-0.5, -0.5], [wf - 0.5, -0.5], [wf - 0.5, hf - 0.5], [-0.5, hf - 0.5]])
    poly_px = apply_h(np.linalg.inv(calib.H) @ Af, corners_face)
    Hp, Wp = gray.shape
    if np.any(poly_px < -2) or np.any(poly_px[:, 0] > Wp + 1) or np.any(poly_px[:, 1] > Hp + 1):
        warnings.append("part of the face lies outside the photo: retake with the whole face in frame")
    return Face(
        image=img,
        mask=mask,
        px_per_mm=px_per_mm,
        A_face_to_plane=Af,
        length_mm=float(length),
        width_mm=float(width),
        area_mm2=float(length * width),
        polygon_px=poly_px,
        method=method,
        root_side="unknown",
        confidence=conf,
        warnings=tuple(warnings),
    )


def _rescale_frame(A: np.ndarray, sx_mm: float, sy_mm: float, px_per_mm: float) -> np.ndarray:
    """Adjust the pixel pitch of a face frame so that an integer pixel grid spans the face exactly."""
    B = A.copy()
    # columns 0 and 1 carry the pitch; the translation was set for 1/px_per_mm
    s = 1.0 / px_per_mm
    ux = A[:2, 0] / s
    uy = A[:2, 1] / s
    t0 = A[:2, 2] - ux * 0.5 * s - uy * 0.5 * s  # top-left pixel edge
    B[:2, 0] = ux * sx_mm
    B[:2, 1] = uy * sy_mm
    B[:2, 2] = t0 + ux * 0.5 * sx_mm + uy * 0.5 * sy_mm
    return B


def face_to_mm(face: Face, cols, rows) -> tuple[np.ndarray, np.ndarray]:
    """Face-image pixel centres -> face-axes mm (x along, y across)."""
    sx = face.length_mm / face.image.shape[1]
    sy = face.width_mm / face.image.shape[0]
    return (np.asarray(cols, float) + 0.5) * sx, (np.asarray(rows, float) + 0.5) * sy


def face_to_photo(face: Face, calib: Calibration, pts_colrow: np.ndarray) -> np.ndarray:
    """Face-image points (col, row) -> photo pixels (x, y)."""
    return apply_h(np.linalg.inv(calib.H) @ face.A_face_to_plane, pts_colrow)


def _roi_polygon(roi, shape) -> np.ndarray:
    vals = [float(v) for v in roi]
    if not all(math.isfinite(v) for v in vals):
        raise FaceError("--roi must be finite numbers")
    if len(vals) == 4:
        x0, y0, x1, y1 = vals
        if x1 <= x0 or y1 <= y0:
            raise FaceError(f"--roi {x0:g},{y0:g},{x1:g},{y1:g}: need X0 < X1 and Y0 < Y1")
        poly = np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])
    elif len(vals) == 8:
        poly = np.array(vals).reshape(4, 2)
    else:
        raise FaceError(f"--roi takes 4 numbers (box) or 8 (corners), not {len(vals)}")
    h, w = shape[:2]
    inside = (poly[:, 0] >= -1) & (poly[:, 0] <= w) & (poly[:, 1] >= -1) & (poly[:, 1] <= h)
    if not inside.any():
        raise FaceError(
            f"--roi lies outside the photo ({w}x{h} px): give a box in the photo's pixel coordinates"
        )
    poly[:, 0] = np.clip(poly[:, 0], 0, w - 1)
    poly[:, 1] = np.clip(poly[:, 1], 0, h - 1)
    if cv2.contourArea(poly.astype(np.float32)) < 100:
        raise FaceError("--roi is too small (under 100 px²): draw the box around the whole face")
    return poly
