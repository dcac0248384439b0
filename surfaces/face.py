"""Find the test face and rectify it into its own metric axes.

The face is located in two passes:

1. **Coarse**, on a copy of the photo warped into the marker plane at
   ``COARSE_PX_PER_MM``: a texture-energy map (the granular fracture surface
   is rougher at the 0.1-0.5 mm scale than plate, card, table and shadow),
   with the reference card masked out, oriented texture (brushing, ripples,
   grid lines) and saturated (rusty) areas damped.  Candidate regions from a
   ladder of thresholds must stand out from a ring around them; a region
   holding a much more textured one running most of its length is the
   specimen, not the face, while a rougher region spanning the whole width
   of a longer clean strip is a stretch of that strip (the face).
2. **Fine**, on the face rectified at ``FINE_PX_PER_MM`` with a margin, with
   texture scales set by what the photo resolves at the face: the ends and
   long edges are where the texture profile rises to half-way between the
   outside and inside levels, walking in from outside, snapped to the
   brightness step, then moved out over a calmer end of the face's own
   brightness that is still textured (of any brightness where its texture is plainly the
   face's: a shinier zone of the break) (the profile along the face follows an upper share of
   the rows across it, so a defect across most of the face does not end it, and each end
   sits at the half-way level of the face's own texture just inside it); a frame whose margin
   the face's texture runs into (the coarse region was a stretch of the face) is lengthened
   that way and the pass repeated; each long edge is a line whose slope comes from
   stretches along the face (a tapered face keeps its taper) and which a
   smooth band along the root does not pull inwards.  The frame turns to the
   edges' direction when they lean.

A region too wide for the test's face (the specimen: plate, bead and face)
is searched for a band along it at most that wide whose fine texture stands
well above the region's (:func:`_textured_band`); the fine pass then fits
the face on that band.

The result is the outline (``Face.mask``, ``Face.area_mm2``), not its
bounding rectangle.  An automatic search that is unsure (faint outline, an
end beyond which the face's texture and brightness go on, an outline much
smaller than the textured region it came from, a face wider than the test
allows, a face running out of the photo) raises
:class:`~surfaces.model.FaceError` asking for ``--roi`` rather than measure
the wrong region.

Every length here is in millimetres; pixels appear only when warping.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
from scipy import ndimage as ndi

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
    hp *= hp
    e = cv2.GaussianBlur(hp, (0, 0), max(window_mm * px_per_mm, 0.8))
    np.maximum(e, 0, out=e)
    return np.sqrt(e, out=e)


# --------------------------------------------------------------------------
# coarse search


def _search_box(calib: Calibration, shape, roi_poly_px) -> tuple[np.ndarray, str]:
    """Plane-mm polygon to search, and a description."""
    h, w = shape[:2]
    if roi_poly_px is not None:
        return apply_h(calib.H, roi_poly_px), "roi"
    corners = np.array([[0, 0], [w - 1, 0], [w - 1, h - 1], [0, h - 1]], dtype=np.float64)
    return apply_h(calib.H, corners), "photo"


def _marker_squares(calib: Calibration, grow: float) -> list[np.ndarray]:
    """Plane polygons (mm): each marker's square scaled by ``grow`` about its centre."""
    out = []
    for m in calib.markers:
        c = apply_h(calib.H, m.corners_px)
        ctr = c.mean(axis=0)
        out.append(ctr + (c - ctr) * grow)
    return out


def _card_exclusion(calib: Calibration) -> list[np.ndarray]:
    """Plane polygons around each marker that are certainly card, not face."""
    return _marker_squares(calib, 2.2)  # marker + quiet zone + card margin


#: the marker's zone the fine pass never takes for face: the marker and this many modules of its quiet
#: zone around it (a printed marker has a white margin of a module or more; common practice)
MARKER_ZONE_MODULES = 1.0


def _on_markers(zones: list[np.ndarray], Af: np.ndarray, mask: np.ndarray) -> float:
    """Area (mm2) of the face ``mask`` (face px, frame ``Af``: face px -> plane mm) inside the marker ``zones``."""
    inside = _in_zones(zones, Af, mask.shape)
    return 0.0 if inside is None else float((inside & mask).sum()) * abs(float(np.linalg.det(Af[:2, :2])))


def _marker_zones(calib: Calibration) -> list[np.ndarray]:
    """Plane polygons (mm) of each marker with ``MARKER_ZONE_MODULES`` of its quiet zone around it."""
    return _marker_squares(calib, (6.0 + 2.0 * MARKER_ZONE_MODULES) / 6.0)


def _in_zones(zones: list[np.ndarray] | None, A: np.ndarray, shape) -> np.ndarray | None:
    """(h, w) bool: True at the pixels of the face frame ``A`` (face px -> plane mm) inside any of ``zones``."""
    if not zones:
        return None
    m = np.zeros(shape, np.uint8)
    Ainv = np.linalg.inv(A)
    for z in zones:
        q = apply_h(Ainv, z)
        if np.all(np.isfinite(q)) and np.abs(q).max() < 1e7:
            cv2.fillPoly(m, [np.round(q * 16).astype(np.int32)], 1, shift=4)
    return m > 0


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
    # (one colour copy; its luma is the grey copy, as in Photo.gray)
    ppm = calib.px_per_mm_at(gray.shape[1] / 2, gray.shape[0] / 2)
    target = 6.0  # px/mm kept for the texture measure
    f = min(1.0, target / max(ppm, 1e-6))
    if f < 0.95:
        small_rgb = cv2.resize(rgb, None, fx=f, fy=f, interpolation=cv2.INTER_AREA)
        small = cv2.cvtColor(small_rgb, cv2.COLOR_RGB2GRAY)
        # pixel-centre convention: x_full = (x_small + .5)/f - .5
        Hs = calib.H @ np.array([[1 / f, 0, 0.5 / f - 0.5], [0, 1 / f, 0.5 / f - 0.5], [0, 0, 1]])
    else:
        small, small_rgb, Hs = gray, rgb, calib.H
    energy_photo = _texture_energy(small, px_per_mm=ppm * f, fine_mm=0.25, window_mm=0.6)
    # granular fracture texture is isotropic; brushed plate, weld ripples and
    # grinding marks are oriented: damp the energy by the structure-tensor coherence
    energy_photo *= 1.0 - _coherence(small, sigma_px=1.0 * ppm * f)
    # rust and paint are coloured; fracture faces are grey metal
    sat = cv2.cvtColor(small_rgb, cv2.COLOR_RGB2HSV)[..., 1].astype(np.float32)
    energy_photo *= np.clip(1.2 - sat / 120.0, 0.2, 1.0)
    M = np.linalg.inv(Hs) @ A
    warp = lambda im, interp=cv2.INTER_LINEAR: cv2.warpPerspective(  # noqa: E731
        im, M, (W, Hh), flags=interp | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_CONSTANT, borderValue=0
    )
    energy = warp(energy_photo)
    valid = warp(np.ones(small.shape, np.uint8), cv2.INTER_NEAREST) > 0
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

    e = energy
    e[~allowed] = 0
    best = _best_component(e, allowed, s)
    if best is None:
        raise FaceError(
            "could not find the face automatically (no region stands out as a fracture face): "
            "give --roi X0,Y0,X1,Y1 (a rough box around the face in photo pixels)"
        )
    pts, fill, contrast = best
    (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
    if rw < rh:
        ang += 90.0
        rw, rh = rh, rw
    centre = lo + (np.array([cx, cy]) + 0.5) / s
    return centre, float(ang), rw / s, rh / s, float(min(fill, 1.0)), where


#: a face must be at least this much more textured than the ring just around it
MIN_RING_CONTRAST = 1.6
#: a rougher region inside a candidate marks the candidate as the specimen only when it runs
#: at least this share of the candidate's length (a face runs the coupon's length beside the
#: plate and bead; a rougher stretch of the face itself is shorter than the face)
HELD_LENGTH_SHARE = 0.5


def _best_component(e: np.ndarray, allowed: np.ndarray, s: float):
    """The compact region that stands out most from its own surroundings.

    Candidate regions are the components of ``e`` above a ladder of
    thresholds (Otsu's split and geometric steps from the median towards the
    top of the distribution).  Each is scored by its texture contrast against
    a ring 1-4 mm around it (a fracture face is rougher than the plate, bead,
    notch faces or table right beside it, whatever their absolute level),
    times its rectangular fill squared (a face is a filled strip, a textured
    background is ragged); components with too little ring contrast are
    never taken.  Pieces on the winner's axis are joined (:func:`_merge_collinear`).
    """
    vals = e[allowed]
    out_level = float(np.median(vals)) + 1e-6
    top = float(np.percentile(vals, 99.9))
    ths = {_otsu(vals)}
    if top > out_level:
        ths.update(out_level * (top / out_level) ** (k / 7.0) for k in range(1, 7))
    k = max(1, int(round(0.8 * s)))
    k_close = np.ones((2 * k + 1, 2 * k + 1), np.uint8)
    k_open = np.ones((k + 1, k + 1), np.uint8)
    r_in, r_out = int(round(1.0 * s)), int(round(4.0 * s))
    H, W = e.shape
    cands, labs = [], []
    for thr in sorted(ths):
        cand = ((e > thr) & allowed).astype(np.uint8)
        cand = cv2.morphologyEx(cand, cv2.MORPH_CLOSE, k_close)
        cand = cv2.morphologyEx(cand, cv2.MORPH_OPEN, k_open)
        n, lab, stats, cents = _components(cand)
        labs.append((lab, n, stats, cents))
        for i in range(1, n):
            area_px = stats[i, cv2.CC_STAT_AREA]
            if area_px / s**2 < 15:
                continue
            x, y, bw, bh = stats[i, :4]
            if max(bw, bh) < 8.0 * s:
                continue
            x0, y0 = max(0, x - r_out), max(0, y - r_out)
            x1, y1 = min(W, x + bw + r_out), min(H, y + bh + r_out)
            sub = (lab[y0:y1, x0:x1] == i).astype(np.uint8)
            contours, _ = cv2.findContours(sub, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
            outline = np.concatenate(contours).reshape(-1, 2).astype(np.float32) + np.float32([x0, y0])
            (_, _), (rw, rh), _ = cv2.minAreaRect(outline)
            L, Wd = max(rw, rh) / s, max(min(rw, rh), 1) / s
            if L < 8.0:
                continue
            fill = min(area_px / s**2 / max(L * Wd, 1e-6), 1.0)
            ring = cv2.dilate(sub, np.ones((2 * r_out + 1, 2 * r_out + 1), np.uint8)) > 0
            ring &= ~(cv2.dilate(sub, np.ones((2 * r_in + 1, 2 * r_in + 1), np.uint8)) > 0)
            ring &= allowed[y0:y1, x0:x1]
            esub = e[y0:y1, x0:x1]
            inside = float(np.median(esub[sub > 0]))
            # too little ring (the component fills the search area): compare with the whole area
            ring_level = float(np.percentile(esub[ring], 75)) if ring.sum() > 0.3 * area_px else out_level
            contrast = inside / max(ring_level, 1e-6)
            if contrast < MIN_RING_CONTRAST:
                continue
            score = inside * min(contrast, 4.0) ** 0.5 * fill**2 * (area_px / s**2) ** 0.25
            # a point surely inside the component (for the nesting test below): its
            # pixel farthest from the background
            dist = cv2.distanceTransform(sub, cv2.DIST_L1, 3)
            r_mid, c_mid = np.unravel_index(int(np.argmax(dist)), dist.shape)
            cands.append(dict(t=len(labs) - 1, i=i, sub=(sub, x0, y0), fill=fill, contrast=contrast, inside=inside,
                              area=float(area_px), length=L,
                              score=score, mid=(int(r_mid + y0), int(c_mid + x0))))
    # a region holding a clearly more textured, much smaller region that stands out on
    # its own is the specimen (plate, bead, coupon) carrying the face, not the face
    # (a face whose texture varies along it holds rougher stretches of half its size)
    for c in cands:
        lab = labs[c["t"]][0]
        c["holds"] = any(
            d["t"] > c["t"] and d["inside"] > 1.4 * c["inside"] and d["area"] < 0.35 * c["area"]
            and d["length"] >= HELD_LENGTH_SHARE * c["length"] and lab[d["mid"]] == c["i"]
            for d in cands
        )
    # a region running the whole width of a longer, cleanly filled strip that holds it is a
    # rougher stretch of that strip (defects, a coarser break), not the face: the strip is the face
    for d in cands:
        d["stretch"] = any(
            c["t"] < d["t"] and not c["holds"] and c["fill"] >= 0.8 and c["length"] >= 1.3 * d["length"]
            and d["area"] / d["length"] >= 0.7 * c["area"] / c["length"] and labs[c["t"]][0][d["mid"]] == c["i"]
            for c in cands
        )
    pool = [c for c in cands if not c["holds"] and not c["stretch"]]
    if not pool:
        return None
    c = max(pool, key=lambda c: c["score"])
    lab, n, stats, cents = labs[c["t"]]
    sub, x0, y0 = c["sub"]
    ys, xs = np.nonzero(sub)
    best = (np.c_[xs + x0, ys + y0].astype(np.float32), c["fill"], c["contrast"])
    best_lab = (lab, n, c["i"], c["inside"], stats, cents)
    return _merge_collinear(best, best_lab, e, s)


def _components(binary: np.ndarray):
    """``cv2.connectedComponentsWithStats`` (8-connected), with 16-bit labels while they suffice.

    Writing half the label memory makes the labelling about three times
    faster on a large photo's search plane; OpenCV refuses a 16-bit count
    that would overflow, and the labelling is then repeated with 32 bits.
    """
    try:
        return cv2.connectedComponentsWithStats(binary, connectivity=8, ltype=cv2.CV_16U)
    except cv2.error:
        return cv2.connectedComponentsWithStats(binary, connectivity=8, ltype=cv2.CV_32S)


#: grey ranges (share of the paper's level, below it) within which the card's paper is flooded,
#: widest first
CARD_FLOOD_TOLERANCES = (0.25, 0.12, 0.06)
#: a flooded card (its print filled in) fills at least this share of its smallest enclosing
#: rectangle; paper joined to a pale plate or table does not
CARD_RECTANGULAR = 0.8
#: Canny's hysteresis thresholds (on a 3x3 Sobel of the coarse plane blurred by 1 px) for the
#: card's outline when no grey range separates paper from table: an edge of 6 grey levels' step holds
CARD_EDGE_THRESHOLDS = (6, 15)


def _rectangular(region: np.ndarray) -> float:
    """Share of the smallest rotated rectangle around ``region``'s largest piece that the piece fills."""
    n, lab, stats, _ = _components(region.astype(np.uint8))
    if n < 2:
        return 0.0
    k = 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))
    piece = ndi.binary_fill_holes(lab == k)  # the print (marker, text, scale) is paper too
    ys, xs = np.nonzero(piece)
    (_, _), (rw, rh), _ = cv2.minAreaRect(np.c_[xs, ys].astype(np.float32))
    return float(len(xs) / max((rw + 1) * (rh + 1), 1.0))


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
    side_px = float(np.mean(np.linalg.norm(np.roll(q, -1, 0) - q, axis=1)))
    largest = min(70000.0 * s * s, 0.4 * h * w, 400.0 * side_px**2)  # an A4 sheet is the largest we print
    def flood(tol, barrier=None, connectivity=8):
        # the paper from each quiet-zone point, within ``tol`` of its grey below it (mask only:
        # ``img`` kept), held by ``barrier`` where given
        mask[:] = 0
        if barrier is not None:
            mask[1:-1, 1:-1] = barrier
        for x, y in paper:
            if img[y, x] >= 0.7 * white and not mask[y + 1, x + 1]:
                cv2.floodFill(img, mask, (x, y), 255, loDiff=max(1, int(tol * white)), upDiff=255,
                              flags=connectivity | cv2.FLOODFILL_MASK_ONLY | cv2.FLOODFILL_FIXED_RANGE | (2 << 8))
        flooded = mask[1:-1, 1:-1] == 2
        return flooded if flooded.sum() <= largest and _rectangular(flooded) >= CARD_RECTANGULAR else None

    # a flood that leaks into a pale table is no card: the paper is flooded again within a
    # narrower range of its own grey (a cream card on a beige table differs by a few levels)
    card = next((f for f in map(flood, CARD_FLOOD_TOLERANCES) if f is not None), None)
    if card is None:
        # a table as bright as the paper somewhere (light falling across a pale table) takes every
        # grey range: the paper is flooded again within the card's own edges (the card's outline is a
        # sharp step on any table), thickened by a pixel to close the gaps Canny leaves where edges
        # meet, 4-connected so that a diagonal edge holds
        edges = cv2.Canny(cv2.GaussianBlur(img, (0, 0), 1.0), *CARD_EDGE_THRESHOLDS, L2gradient=True)
        held = flood(CARD_FLOOD_TOLERANCES[0], barrier=cv2.dilate(edges, np.ones((3, 3), np.uint8)) > 0, connectivity=4)
        # never less than the square the card is at least (a flood held by the print's edges
        # beside the marker)
        card = np.zeros((h, w), bool)
        cv2.fillPoly(card.view(np.uint8), [np.round(ctr + (q - ctr) * 2.6).astype(np.int32)], 1)
        if held is not None:
            card |= held
    marker = np.zeros((h, w), np.uint8)
    cv2.fillPoly(marker, [np.round(ctr + (q - ctr) * 1.3).astype(np.int32)], 1)
    card |= marker > 0
    # close over the card's print and keep a margin
    k = max(3, int(round(4.0 * s)) | 1)
    card = cv2.morphologyEx(card.astype(np.uint8), cv2.MORPH_CLOSE, np.ones((k, k), np.uint8))
    n, lab = cv2.connectedComponents(1 - card, connectivity=4)
    border = np.unique(np.r_[lab[0], lab[-1], lab[:, 0], lab[:, -1]])
    at_border = np.zeros(n, bool)
    at_border[border] = True
    holes = ~at_border[lab] & (card == 0)
    card = (card > 0) | holes
    return cv2.dilate(card.astype(np.uint8), np.ones((k, k), np.uint8)) > 0


def _merge_collinear(best, best_lab, e, s: float = COARSE_PX_PER_MM):
    """Join pieces of the same face split by a smooth (unfused) stretch, glare or a defect.

    Components whose centre lies on the chosen one's axis, within its width,
    close to one of its ends, with a similar texture level, are added before
    the outline is fitted.
    """
    pts, fill, contrast = best
    lab, n, i0, level, stats, cents = best_lab
    (cx, cy), (rw, rh), ang = cv2.minAreaRect(pts)
    if rw < rh:
        ang += 90.0
        rw, rh = rh, rw
    a = math.radians(ang)
    ux, uy = math.cos(a), math.sin(a)
    keep = [pts]
    reach = 0.5 * rw + max(0.25 * rw, 8.0 * s)
    for j in range(1, n):
        if j == i0 or stats[j, cv2.CC_STAT_AREA] < 4:
            continue
        dx, dy = cents[j, 0] - cx, cents[j, 1] - cy
        if abs(-dx * uy + dy * ux) > 0.6 * rh + 2 or abs(dx * ux + dy * uy) > reach + 0.5 * max(stats[j, 2:4]):
            continue
        x, y, bw, bh = stats[j, :4]
        ys, xs = np.nonzero(lab[y : y + bh, x : x + bw] == j)
        ys, xs = ys + y, xs + x
        if float(np.median(e[ys, xs])) < 0.6 * level:
            continue
        across = np.abs(-(xs - cx) * uy + (ys - cy) * ux)
        along = (xs - cx) * ux + (ys - cy) * uy
        if np.mean(across <= 0.6 * rh + 2) > 0.8 and np.min(np.abs(along)) < reach:
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
    gx *= gy
    jxy = cv2.GaussianBlur(gx, (0, 0), s)
    # sqrt((jxx - jyy)^2 + 4 jxy^2) / (jxx + jyy + 1e-6), clipped to 0..1, in place
    num = jxx - jyy
    num *= num
    jxy *= jxy
    jxy *= 4
    num += jxy
    np.sqrt(num, out=num)
    jxx += jyy
    jxx += 1e-6
    num /= jxx
    return np.clip(num, 0, 1, out=num)


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


def _step_stats(profiles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """What :func:`_snap_to_step` needs of brightness profiles (along axis 0), for many at once.

    Returns the absolute gradient (same shape, float64) and each profile's
    sample-to-sample noise, ``1.4826 * MAD`` of its differences plus 1e-6.
    """
    p = np.asarray(profiles, dtype=np.float64)
    d = np.diff(p, axis=0)
    noise = 1.4826 * np.median(np.abs(d - np.median(d, axis=0)), axis=0) + 1e-6
    return np.abs(np.gradient(p, axis=0)), noise


def _snap_to_step(profile: np.ndarray, pos: float, *, win: int, stats=None) -> float:
    """Move an edge estimate to the strongest brightness step within ``win`` samples.

    The texture profile locates the face; where the face also differs in
    brightness from its surroundings, the brightness step is the sharper
    edge.  The step is taken only when it clearly stands out of the profile's
    own sample-to-sample noise; its sub-sample position is the vertex of a
    parabola through the gradient peak.  ``stats``: the profile's
    ``(gradient, noise)`` from :func:`_step_stats`, when already computed.
    """
    n = len(profile)
    i0, i1 = max(1, int(pos) - win), min(n - 2, int(pos) + win)
    if i1 <= i0:
        return pos
    grad, noise = _step_stats(profile) if stats is None else stats
    k = i0 + int(np.argmax(grad[i0 : i1 + 1]))
    if grad[k] < 4 * noise:
        return pos
    a, b, c = grad[k - 1], grad[k], grad[k + 1]
    den = a - 2 * b + c
    off = 0.5 * (a - c) / den if abs(den) > 1e-12 else 0.0
    return float(k + min(max(off, -0.5), 0.5))


#: widest face (mean extent across the weld, mm) accepted per test: a fillet-break face spans the
#: throat and a nick-break face the wall, both well under these on coupons that are broken by hand
#: or in a press (common practice); anything wider is the plate or the table
MAX_FACE_WIDTH_MM = {"fillet-break": 30.0, "nick-break": 50.0}
#: an automatic outline covering less than this share of the coarse region's rectangle is refused
MIN_OUTLINE_SHARE = 0.2
#: below this outline confidence an automatic search gives up (asks for --roi) ...
MIN_AUTO_CONFIDENCE = 0.55
#: the shortest face a fracture test leaves, mm: a fillet-weld break specimen runs tens of mm of weld and a
#: nick-break specimen is about an inch wide (common practice); an outline shorter than this is a mark on
#: the plate or the table, not the face
MIN_FACE_LENGTH_MM = 10.0
#: ... and below this one the face carries a warning to check the outline
WARN_CONFIDENCE = 0.7
#: resolution of the fine pass that places the face's outline (mm pitch 0.1)
FINE_PX_PER_MM = 10.0
#: an end moves outwards over the face's brightness only while the texture stays above this
#: share of the face middle's level (a notch face or smooth plate is below it)
END_TEXTURE_SHARE = 0.25
#: texture (share of the face middle's level) 1-4 mm beyond an end, at the face's brightness,
#: above which the end is not trusted
OPEN_END_SHARE = 0.12
#: the fine pass found no texture step across the weld and kept the coarse region's width
UNCLEAR_WIDTH_NOTE = "face edges across the weld are unclear: width taken from the coarse outline"
OPEN_END_NOTE = "the face's texture goes on beyond an end: check the ends on the overlay"
PART_OUTSIDE_NOTE = "part of the face lies outside the photo: retake with the whole face in frame"
#: a band along a region too wide for a face is the face when its texture (square root of the
#: energy) is at least this many times the region's median row
BAND_CONTRAST = 1.5
#: upper percentile of the texture across the face's band that the profile along the face follows
ALONG_PROFILE_PCT = 75
#: an end margin at least this share of the face middle's texture level ...
RUN_ON_SHARE = 0.3
#: ... and this many times the level beside the long edges is more face (the face runs on)
RUN_ON_CONTRAST = 4.0
#: a rim of the face's brightness beyond a long edge must end in a step within this distance (mm)
BRIGHT_RIM_STEP_MM = 2.0
#: farthest an end moves out to the half-way level of the face's texture just inside it (mm)
LOCAL_END_REACH_MM = 3.0
#: an end moves out over a calmer stretch of the face only when the texture just inside it is at
#: least this many times the surroundings' (room for a faint level between the two)
FAINT_END_CLEAR = 4.0
#: ... and a sample textured at least this share of the texture just inside the end, and this many
#: times the texture beside the long edges there, is face whatever its brightness
FAINT_FACE_SHARE = 0.25
FAINT_FACE_BESIDE = 4.0
#: how many times the frame is lengthened when the face's texture runs on past its margin
MAX_GROW = 3
#: length of the stretches along the weld whose long edges are located separately
EDGE_BIN_MM = 2.0


def _fine_outline(gray, calib: Calibration, centre, axis: float, L: float, Wd: float, *,
                  zones: list[np.ndarray] | None = None):
    """The face's outline around a rough frame (centre, axis, size), from texture profiles.

    ``zones``: plane polygons (mm) whose texture is never the face's (:func:`_marker_zones`).

    Returns
    -------
    outline : (N, 2) ndarray
        Polygon in mm, face axes of the given frame, origin at ``centre``.
    c_x, c_y : float
        Texture contrast of the ends and of the long edges (0..1).
    warnings : list of str
    slope_deg : float
        Mean direction of the two long edges relative to ``axis``.
    """
    warnings: list[str] = []
    q = FINE_PX_PER_MM
    # texture scales follow what the photo resolves at the face (2-4 photo pixels at least)
    c_px = apply_h(np.linalg.inv(calib.H), [centre])[0]
    ppm_photo = calib.px_per_mm_at(float(c_px[0]), float(c_px[1])) if np.all(np.isfinite(c_px)) else q
    fine_mm = max(0.12, 1.5 / max(ppm_photo, 1e-3))
    win_mm = max(0.35, 3.0 / max(ppm_photo, 1e-3))

    # fine pass: rectify the face with a margin, find its edges from texture profiles
    margin = max(3.0, 0.6 * Wd)
    margin_x = max(5.0, 0.35 * L)
    ox, oy = -L / 2 - margin_x, -Wd / 2 - margin
    w = int(math.ceil((L + 2 * margin_x) * q))
    h = int(math.ceil((Wd + 2 * margin) * q))
    A = face_frame(centre, axis, (ox, oy), px_per_mm=q)
    g = warp_to_face(gray, calib.H, A, (h, w))
    e = _texture_energy(g, px_per_mm=q, fine_mm=fine_mm, window_mm=win_mm)
    e *= 1.0 - _coherence(g, sigma_px=max(0.5, 0.5 * win_mm / 0.35) * q)
    e = e * e  # blurred energy is linear in the blur: its half-level is the edge (sqrt would bias outward)
    zone = _in_zones(zones, A, (h, w))
    if zone is not None:
        # the marker's print is textured but never face: a face ending a few mm from the card
        # would otherwise run on across the gap onto it (the coarse pass keeps clear of the whole
        # card; this pass looks past the coarse region's ends)
        e[zone] = 0.0
    gi = cv2.GaussianBlur(g.astype(np.float32), (0, 0), max(0.08, 0.5 / max(ppm_photo, 1e-3)) * q)
    mrow = max(1, int(margin * q * 0.6))
    core_c = slice(int(w * 0.5 - L * q * 0.3), int(w * 0.5 + L * q * 0.3) + 1)
    prof_y = np.median(e[:, core_c], axis=1)
    inside_y = slice(int(h / 2 - Wd * q * 0.25), int(h / 2 + Wd * q * 0.25) + 1)
    snap = max(1, int(round(max(0.8, 2 * win_mm) * q)))
    y_c0, y_c1 = margin * q, (margin + Wd) * q  # the coarse outline's edges
    reach_out = max(1.5, 0.25 * Wd) * q
    lv_in = float(np.percentile(prof_y[inside_y], 75))
    lv_lo = float(np.median(prof_y[:mrow]))
    lv_hi = float(np.median(prof_y[h - mrow :]))
    c_y = min(lv_in - lv_lo, lv_in - lv_hi) / max(lv_in, 1e-6)
    mid = 0.5 * (y_c0 + y_c1)
    pers_y = max(2, int(0.4 * q))
    y_lo = _rise_from_outside(prof_y, 0.5 * (lv_in + lv_lo), y_c0 - reach_out, mid, persist=pers_y)
    y_hi = _rise_from_outside(prof_y, 0.5 * (lv_in + lv_hi), y_c1 + reach_out, mid, persist=pers_y)
    if y_lo is None or y_hi is None or y_hi - y_lo < 0.3 * Wd * q:
        y_lo, y_hi = y_c0, y_c1
        warnings.append(UNCLEAR_WIDTH_NOTE)
    else:
        prof_i = np.median(gi[:, core_c], axis=1)
        y_lo = _snap_to_step(prof_i, y_lo, win=snap)
        y_hi = _snap_to_step(prof_i, y_hi, win=snap)
        # a rim smoother than the face's middle (blur across a tilted photo) but of the
        # face's own brightness is still face
        inner_i = float(np.median(prof_i[int(y_lo + 0.3 * (y_hi - y_lo)) : int(y_hi - 0.3 * (y_hi - y_lo)) + 1]))
        reach_b = max(1.5 * q, 0.3 * (y_hi - y_lo))
        # the surroundings' level: the far margin, or just beyond the reach when that differs more
        # from the face (a background shaded towards the face's brightness)
        def _outer(far, pos, outward):
            a, b = sorted((int(pos + outward * reach_b), int(pos + outward * (reach_b + q))))
            near = prof_i[max(a, 0) : max(min(b, h - 1), 0) + 1]
            lv = [float(np.median(far))] + ([float(np.median(near))] if near.size else [])
            return max(lv, key=lambda v: abs(v - inner_i))
        rim_step = int(BRIGHT_RIM_STEP_MM * q)
        y_lo = _same_brightness_reach(prof_i, y_lo, inner_i, _outer(prof_i[:mrow], y_lo, -1), -1, reach_b,
                                      step_len=rim_step)
        y_hi = _same_brightness_reach(prof_i, y_hi, inner_i, _outer(prof_i[h - mrow :], y_hi, +1), +1, reach_b,
                                      step_len=rim_step)
    band = slice(int(math.ceil(y_lo + 0.15 * (y_hi - y_lo))), int(y_hi - 0.15 * (y_hi - y_lo)) + 1)
    if y_hi - y_lo <= 0.5 * q or band.stop <= band.start:
        raise FaceError("the face found is too small to assess: give --roi around the face")
    # along the face: a profile smoothed over half a millimetre, walked in from both margins
    # (an upper share of the band's rows: a defect across most of the band's middle, a large pore
    # or a long inclusion, leaves the rows beside it textured and does not end the face there)
    prof_x = _blur_along(np.percentile(e[band, :], ALONG_PROFILE_PCT, axis=0), q)
    inside_x = slice(int(w / 2 - L * q * 0.25), int(w / 2 + L * q * 0.25) + 1)
    mcol = max(1, int(margin_x * q * 0.6))
    lv_in = float(np.percentile(prof_x[inside_x], 75))
    lv_l, lv_r = float(np.median(prof_x[:mcol])), float(np.median(prof_x[w - mcol :]))
    c_x = min(lv_in - lv_l, lv_in - lv_r) / max(lv_in, 1e-6)
    # the ends' contrast (a part of the outline's confidence) on the band's median texture, as
    # low as a defect or a calm stretch makes it: the upper share above makes every end clearer
    med_x = _blur_along(np.median(e[band, :], axis=0), q)
    lv_m = float(np.percentile(med_x[inside_x], 75))
    c_x = min(c_x, (lv_m - max(float(np.median(med_x[:mcol])), float(np.median(med_x[w - mcol :])))) / max(lv_m, 1e-6))
    pers_x = max(2, int(2.0 * q))
    x_lo = _rise_from_outside(prof_x, 0.5 * (lv_in + lv_l), 0, w / 2, persist=pers_x)
    x_hi = _rise_from_outside(prof_x, 0.5 * (lv_in + lv_r), w - 1, w / 2, persist=pers_x)
    # the face runs on past a margin when an end is found at the image's own border, or when the
    # margin is textured much like the face and far more than the surroundings beside its long
    # edges (a calmer stretch of the face): the coarse region was then a stretch of the face
    at_border = (x_lo is not None and x_lo <= 1.0, x_hi is not None and x_hi >= w - 2.0)
    lv_side = max(lv_lo, lv_hi, 1e-6)
    runs_on = tuple(
        b or (lv >= RUN_ON_SHARE * lv_in and lv >= RUN_ON_CONTRAST * lv_side) for b, lv in zip(at_border, (lv_l, lv_r))
    )
    if x_lo is None or x_hi is None or x_hi - x_lo < pers_x:
        x_lo, x_hi = margin_x * q, (margin_x + L) * q
        warnings.append("face ends are unclear: length taken from the coarse outline")
    else:
        # the half-way level of the texture right inside each end (a face calmer towards its ends
        # than in its middle ends where its own texture does)
        x_lo = _local_half_level(prof_x, x_lo, lv_l, -1, q=q)
        x_hi = _local_half_level(prof_x, x_hi, lv_r, +1, q=q)
        prof_i = np.median(gi[band, :], axis=0)
        x_lo = _snap_to_step(prof_i, x_lo, win=snap)
        x_hi = _snap_to_step(prof_i, x_hi, win=snap)
        # an end calmer than the face's middle (the middle's defects and texture set the
        # half-way level) but of the face's own brightness and still textured is face
        span = x_hi - x_lo
        inner_i = float(np.median(prof_i[int(x_lo + 0.2 * span) : int(x_hi - 0.2 * span) + 1]))
        # still textured, over two millimetres (single samples of a calm grain dip below)
        textured = cv2.blur(prof_x.reshape(1, -1), (pers_x | 1, 1)).ravel() >= END_TEXTURE_SHARE * lv_in
        # brightness over a millimetre: a coarse grain leaves the median across the face noisy
        prof_s = cv2.blur(prof_i.reshape(1, -1).astype(np.float32), (max(1, int(q)) | 1, 1)).ravel()
        # the surroundings' brightness beyond each end (the far margins)
        far = (float(np.median(prof_i[:mcol])), float(np.median(prof_i[w - mcol :])))
        # texture just beside the long edges (the plate or table around the face: what is
        # textured there too is not the face's own texture)
        r0, r1 = max(0, int(y_lo - 3 * q)), max(1, int(y_lo - 1 * q))
        r2, r3 = min(h - 1, int(y_hi + 1 * q)), min(h, int(y_hi + 3 * q))
        beside = np.maximum(np.median(e[r0:r1], axis=0) if r1 > r0 else 0.0,
                            np.median(e[r2:r3], axis=0) if r3 > r2 else 0.0)
        for side, outward in ((0, -1), (1, +1)):
            pos = _calm_end(prof_s, (x_lo, x_hi)[side], inner_i, far[side], outward, keep=textured, min_len=pers_x,
                            persist=pers_x)
            # a face calming and darkening towards an end (light falling off along a long face, a
            # finer break there) ends where its texture falls to the surroundings', not to half
            # the middle's
            pos = _faint_end(prof_x, prof_s, beside, pos, outward, out_level=(lv_l, lv_r)[side], inner_i=inner_i,
                             outer_i=far[side], q=q, persist=pers_x)
            x_lo, x_hi = (pos, x_hi) if side == 0 else (x_lo, pos)
        # an end beyond which the face's brightness goes on, still clearly textured, is not
        # an end that can be trusted (a face much calmer there than in its middle, or the
        # plate of the face's own look): the outline is then as likely a part of the face
        for pos, outward, far_i in ((x_lo, -1, far[0]), (x_hi, +1, far[1])):
            if _texture_goes_on(prof_x, prof_s, beside, pos, outward, inner_i=inner_i, outer_i=far_i,
                                level=OPEN_END_SHARE * lv_in, q=q):
                c_x = min(c_x, 0.3)
                warnings.append(OPEN_END_NOTE)
                break
    if x_hi - x_lo <= 1 * q or y_hi - y_lo <= 0.5 * q:
        raise FaceError("the face found is too small to assess: give --roi around the face")

    # long edges stretch by stretch: a break wanders and tapers; a smooth stretch along
    # the straight root (lack of fusion) must not pull the edge into the face
    xb, ylo_b, yhi_b = _edges_by_stretch(
        e, gi, x_lo, x_hi, y_lo, y_hi, out_lo=slice(0, mrow), out_hi=slice(h - mrow, h), q=q, snap=snap
    )
    # outline in face-centred mm (pixel centre i sits at o + (i + .5)/q)
    to_x = lambda c: ox + (np.asarray(c) + 0.5) / q  # noqa: E731
    to_y = lambda r: oy + (np.asarray(r) + 0.5) / q  # noqa: E731
    xs_mm = to_x(xb)
    lo_mm, hi_mm = to_y(ylo_b), to_y(yhi_b)
    outline = np.r_[np.c_[xs_mm, lo_mm], np.c_[xs_mm[::-1], hi_mm[::-1]]]
    slope = 0.5 * ((ylo_b[-1] - ylo_b[0]) + (yhi_b[-1] - yhi_b[0])) / max(xb[-1] - xb[0], 1e-6)
    return outline, c_x, c_y, warnings, math.degrees(math.atan(slope)), runs_on


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
        side), row = y across it.  ``image`` spans the face's bounding
        rectangle in its own axes; ``mask`` is True on the face itself (the
        long edges follow the break stretch by stretch, so a wandering or
        tapered face keeps its true outline) and ``area_mm2`` is the area of
        that outline.

    Raises
    ------
    FaceError
        No region stands out as a face, or the one found is too small; the
        message asks for ``--roi``.
    """
    roi_poly = _roi_polygon(roi, gray.shape) if roi is not None else None
    warnings: list[str] = []
    centre, axis, L, Wd, fill, where = _coarse_face(gray, rgb, calib, roi_poly, test)
    zones = _marker_zones(calib)
    method = "auto" if roi is None else ("roi-box" if len(roi) == 4 else "roi-corners")
    L0, W0 = L, Wd
    outline, c_x, c_y, fine_notes, centre, axis = _fine_fit(gray, calib, centre, axis, L, Wd, zones=zones)
    wide = MAX_FACE_WIDTH_MM.get(test)
    if roi is None and wide is not None and _mean_width(outline) > wide:
        # the region found is the specimen (plate, bead and face): the face is the much
        # more finely textured band along it, when one stands out
        refit = _fit_on_band(gray, calib, centre, axis, outline, wide, zones=zones)
        if refit is not None and _mean_width(refit[0][0]) <= wide:
            (outline, c_x, c_y, fine_notes, centre, axis), (L0, W0) = refit
    if UNCLEAR_WIDTH_NOTE in fine_notes:
        # no texture step across the weld within the coarse region (or the box given): it took
        # in the bead or the plate beside the face, as smooth as each other; the face is the much
        # more finely textured band along it, when one stands out and its own edges are clear
        refit = _fit_on_band(gray, calib, centre, axis, outline, wide or max(MAX_FACE_WIDTH_MM.values()), zones=zones)
        if refit is not None and UNCLEAR_WIDTH_NOTE not in refit[0][3]:
            (outline, c_x, c_y, fine_notes, centre, axis), (L0, W0) = refit
    warnings.extend(fine_notes)
    lo_o, hi_o = outline.min(axis=0), outline.max(axis=0)
    fx0, fx1 = float(lo_o[0]), float(hi_o[0])
    fy0, fy1 = float(lo_o[1]), float(hi_o[1])
    length, width = fx1 - fx0, fy1 - fy0
    area = _shoelace(outline)
    if length <= 1 or width <= 0.5 or area <= 0.5:
        raise FaceError("the face found is too small to assess: give --roi around the face")
    if length < MIN_FACE_LENGTH_MM:
        # a face this short measured as the face would pass the coupon unseen (a rust spot 4 mm across
        # was taken for the face of a 113 mm fillet break, and the coupon accepted)
        _refuse_or_warn(f"the face found is only {length:.1f} x {width:.1f} mm, shorter than any {test} face "
                        f"(at least {MIN_FACE_LENGTH_MM:g} mm along the weld)",
                        "it is likely a mark on the plate or the table; give --roi X0,Y0,X1,Y1 around the face",
                        roi, warnings)
    if width > length:
        warnings.append("the face is wider than long: check the weld axis on the overlay")
    conf = float(np.clip(min(c_x, c_y) * 1.5, 0.05, 1.0)) * (0.5 + 0.5 * fill)
    if wide is not None and area / length > wide:
        _refuse_or_warn(f"the face found is {area / length:.0f} mm across, more than a {test} face spans "
                        f"(about {wide:.0f} mm at most): it is likely the plate or the table",
                        "give --roi X0,Y0,X1,Y1 around the face", roi, warnings)
    if roi is None and area < MIN_OUTLINE_SHARE * L0 * W0:
        # the outline and the textured region it came from disagree: one of them is wrong
        raise FaceError(
            f"the face outline found ({length:.0f} x {width:.1f} mm) covers only {100 * area / (L0 * W0):.0f} % "
            f"of the textured region around it ({L0:.0f} x {W0:.1f} mm): give --roi X0,Y0,X1,Y1 around the face"
        )
    if conf < MIN_AUTO_CONFIDENCE and roi is None:
        # an outline this unsure is as likely a part of the face (or of the plate) as the
        # face: measuring against it could pass a face that was never looked at
        why = ("an end of the face found is unsure (the face's texture goes on beyond it; "
               if OPEN_END_NOTE in warnings else "the face's outline barely stands out from its surroundings (")
        raise FaceError(f"{why}outline confidence {conf:.2f}): give --roi X0,Y0,X1,Y1 around the face")
    if conf < WARN_CONFIDENCE:
        warnings.append("the face outline is uncertain: check it on the overlay or give --roi")

    # final rectified face: the outline's bounding rectangle, the outline as the mask
    wf = max(1, int(round(length * px_per_mm)))
    hf = max(1, int(round(width * px_per_mm)))
    Af = face_frame(centre, axis, (fx0, fy0), px_per_mm=px_per_mm)
    Af = _rescale_frame(Af, length / wf, width / hf, px_per_mm)
    # outline -> final face pixels (corners of the image at -0.5 .. n - 0.5)
    oc = np.c_[(outline[:, 0] - fx0) * wf / length - 0.5, (outline[:, 1] - fy0) * hf / width - 0.5]
    mask = np.zeros((hf, wf), np.uint8)
    cv2.fillPoly(mask, [np.round(oc * 16).astype(np.int32)], 1, lineType=cv2.LINE_8, shift=4)  # pixel centres inside
    mask = mask > 0
    on_card = _on_markers(zones, Af, mask)
    if on_card:
        # a face outline over the marker is certainly wrong (the fine pass ran on past an end onto the
        # card): measured, the marker's print reads as imperfections and the face's scale is off
        _refuse_or_warn(f"the face found runs onto the reference card ({on_card:.0f} mm2 of it over the marker)",
                        "give --roi X0,Y0,X1,Y1 around the face, or move the card a little further away",
                        roi, warnings)
    img = warp_to_face(rgb, calib.H, Af, (hf, wf))
    poly_px = apply_h(np.linalg.inv(calib.H) @ Af, oc)
    Hp, Wp = gray.shape
    frame = np.array([[-0.5, -0.5], [Wp - 0.5, -0.5], [Wp - 0.5, Hp - 0.5], [-0.5, Hp - 0.5]], np.float32)
    if np.all(np.isfinite(poly_px)):
        seen, _ = cv2.intersectConvexConvex(frame, cv2.convexHull(poly_px.astype(np.float32)))
        whole = abs(cv2.contourArea(cv2.convexHull(poly_px.astype(np.float32))))
    else:
        seen, whole = 0.0, 1.0
    if seen < 0.999 * whole:
        if roi is None and seen < 0.9 * whole:
            # a face running well out of the frame is more likely the table or plate than a face
            raise FaceError(
                f"the face found runs out of the photo ({100 * (1 - seen / max(whole, 1e-9)):.0f} % of it outside): "
                "retake with the whole face in frame, or give --roi X0,Y0,X1,Y1 around the face"
            )
        warnings.append(PART_OUTSIDE_NOTE)
    return Face(
        image=img,
        mask=mask,
        px_per_mm=px_per_mm,
        A_face_to_plane=Af,
        length_mm=float(length),
        width_mm=float(width),
        area_mm2=float(area),
        polygon_px=poly_px,
        method=method,
        root_side="unknown",
        confidence=conf,
        warnings=tuple(warnings),
        unseen=tuple(w for w in warnings if w == PART_OUTSIDE_NOTE),
    )


def _refuse_or_warn(msg: str, fix: str, roi, warnings: list[str]) -> None:
    """A face found that cannot be the face: refused (``msg: fix``) when found automatically; inside a
    ``--roi`` box the person chose the place, so only a warning (``msg: check the box``)."""
    if roi is None:
        raise FaceError(f"{msg}: {fix}")
    warnings.append(f"{msg}: check the box")


def _fine_fit(gray, calib: Calibration, centre, axis: float, L: float, Wd: float, *,
              zones: list[np.ndarray] | None = None):
    """:func:`_fine_outline` repeated until its frame fits the face (lengthened where the face
    runs on, turned when it was across the weld or its edges lean).  Returns the last outline's
    results and the frame it is in: ``outline, c_x, c_y, notes, centre, axis``."""
    attempt, grown = 0, 0
    while True:
        outline, c_x, c_y, fine_notes, slope, runs_on = _fine_outline(gray, calib, centre, axis, L, Wd, zones=zones)
        lo_o, hi_o = outline.min(axis=0), outline.max(axis=0)
        size = hi_o - lo_o
        mid = 0.5 * (lo_o + hi_o)
        a = math.radians(axis)
        new_centre = _frame_point(centre, axis, mid)
        if grown < MAX_GROW and any(runs_on) and size[0] >= size[1]:
            # the coarse region was a stretch of the face (a long smooth defect or a calmer
            # stretch split it): look further along the open end(s)
            grown += 1
            more = max(float(size[0]), 20.0)
            shift = 0.5 * more * (float(runs_on[1]) - float(runs_on[0]))
            centre = new_centre + shift * np.array([math.cos(a), math.sin(a)])
            L, Wd = float(size[0]) + more * (int(runs_on[0]) + int(runs_on[1])), float(size[1])
            continue
        if attempt < 2 and size[1] > 1.15 * size[0]:
            # the coarse region's long side was across the weld: turn the frame
            attempt += 1
            centre, axis, L, Wd = new_centre, axis + 90.0, float(size[1]), float(size[0])
            continue
        if attempt < 2 and abs(slope) > 0.5:
            # both long edges lean: the coarse axis was off by that much
            attempt += 1
            centre, axis, L, Wd = new_centre, axis + slope, float(size[0]), float(size[1])
            continue
        break
    return outline, c_x, c_y, fine_notes, centre, axis


def _textured_band(gray, calib: Calibration, centre, axis: float, outline: np.ndarray, wide: float):
    """A band along the frame, at most ``wide`` mm across, much more finely textured than the rest.

    Within the outline's extent, the texture (at the scale the fine pass uses) of each row is
    the upper quartile along the row; the band is the rows above 30 % of the way from the
    median row to the top row, around the top row, when the top row is at least
    :data:`BAND_CONTRAST` times the median one and the band is 2 mm to ``wide`` across.
    Returns ``(centre, length, width)`` of a frame on that band, or None.
    """
    q = FINE_PX_PER_MM
    c_px = apply_h(np.linalg.inv(calib.H), [centre])[0]
    ppm = calib.px_per_mm_at(float(c_px[0]), float(c_px[1])) if np.all(np.isfinite(c_px)) else q
    fine_mm, win_mm = max(0.12, 1.5 / max(ppm, 1e-3)), max(0.35, 3.0 / max(ppm, 1e-3))
    (x0, y0), (x1, y1) = outline.min(axis=0), outline.max(axis=0)
    w, h = int(math.ceil((x1 - x0) * q)), int(math.ceil((y1 - y0) * q))
    if w < 2 or h < 2 or w * h > 4e7:
        return None
    g = warp_to_face(gray, calib.H, face_frame(centre, axis, (x0, y0), px_per_mm=q), (h, w))
    e = _texture_energy(g, px_per_mm=q, fine_mm=fine_mm, window_mm=win_mm)
    e *= 1.0 - _coherence(g, sigma_px=max(0.5, 0.5 * win_mm / 0.35) * q)
    prof = _blur_along(np.percentile(e, 75, axis=1), q)  # across the frame: one profile all the same
    base, k = float(np.median(prof)), int(np.argmax(prof))
    if prof[k] < BAND_CONTRAST * base:
        return None
    on = prof >= base + 0.3 * (prof[k] - base)
    a = b = k
    while a > 0 and on[a - 1]:
        a -= 1
    while b < h - 1 and on[b + 1]:
        b += 1
    width = (b - a + 1) / q
    if not 2.0 <= width <= wide:
        return None
    c = _frame_point(centre, axis, ((x0 + x1) / 2, y0 + (a + b + 1) / 2 / q))
    return c, float(x1 - x0), float(width)


def _fit_on_band(gray, calib: Calibration, centre, axis: float, outline: np.ndarray, wide: float, *, zones=None):
    """The fine fit on the :func:`_textured_band` of ``outline``: ``(fit, (length, width))`` with ``fit``
    as :func:`_fine_fit` returns it and the band's rough size, or None when no band stands out."""
    band = _textured_band(gray, calib, centre, axis, outline, wide)
    if band is None:
        return None
    centre_b, L_b, W_b = band
    return _fine_fit(gray, calib, centre_b, axis, L_b, W_b, zones=zones), (L_b, W_b)


def _mean_width(outline: np.ndarray) -> float:
    """Mean extent across the weld of an outline in face mm: its area over its length."""
    return _shoelace(outline) / max(np.ptp(outline[:, 0]), 1e-6)


def _frame_point(centre, axis_deg: float, xy) -> np.ndarray:
    """Plane mm of the point ``xy`` = (along, across) in the face axes through ``centre`` at ``axis_deg``."""
    a = math.radians(axis_deg)
    return np.asarray(centre, float) + xy[0] * np.array([math.cos(a), math.sin(a)]) + xy[1] * np.array(
        [-math.sin(a), math.cos(a)]
    )


def _blur_along(p: np.ndarray, q: float) -> np.ndarray:
    """A profile along the face smoothed over half a millimetre (``q`` samples per mm)."""
    return cv2.blur(np.asarray(p, np.float32).reshape(1, -1), (max(1, int(0.5 * q)) | 1, 1)).ravel()


def _shoelace(poly: np.ndarray) -> float:
    """Area of a simple polygon (N, 2) by the shoelace formula."""
    x, y = poly[:, 0], poly[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def _edges_by_stretch(e, gi, x_lo, x_hi, y_lo, y_hi, *, out_lo, out_hi, q, snap):
    """Both long edges in stretches of :data:`EDGE_BIN_MM` along the face.

    Each stretch's edge is where its own texture profile crosses half-way
    between the face's level in that stretch and the outside level, searched
    near the whole-face edge and snapped to the brightness step.  Then on
    each side a straight line is fitted robustly; stretches whose edge lies
    well inside that line (a smooth band along a straight root: lack of
    fusion, heat tint, glare) take the line instead, while a genuinely
    wandering edge (spread of the stretches much larger than the tolerance)
    keeps its own positions.

    Returns
    -------
    (x, y_lo, y_hi) : three (n,) arrays, columns and rows of the fine image.
    """
    h, w = e.shape
    W = y_hi - y_lo
    a_start = max(0, int(math.ceil(x_lo)))
    span = min(w, int(math.floor(x_hi)) + 1) - a_start
    nb = max(1, int(round(span / (EDGE_BIN_MM * q))))
    bw = span // nb
    reach = max(1.5 * q, 0.3 * W)  # how far a stretch's edge may stray from the whole-face edge
    persist = max(2, int(0.3 * q))
    xb, lo_b, hi_b = [], [], []
    if bw < 2:
        return np.array([x_lo, x_hi]), np.array([y_lo, y_lo]), np.array([y_hi, y_hi])
    cols = slice(a_start, a_start + nb * bw)
    P = np.median(e[:, cols].reshape(h, nb, bw), axis=2)
    PI = np.median(gi[:, cols].reshape(h, nb, bw), axis=2)
    grads, noises = _step_stats(PI)
    # each stretch's face level and outside levels, all stretches at once
    c0, c1 = int(y_lo + 0.3 * W), int(y_hi - 0.3 * W) + 1
    inners = np.percentile(P[c0:max(c1, c0 + 1)], 60, axis=0)
    ols = np.median(P[out_lo], axis=0) if P[out_lo].shape[0] else 0.3 * inners
    ohs = np.median(P[out_hi], axis=0) if P[out_hi].shape[0] else 0.3 * inners
    mid = 0.5 * (y_lo + y_hi)
    for k in range(nb):
        p, pi = P[:, k], PI[:, k]
        st = (grads[:, k], float(noises[k]))
        inner, ol, oh = float(inners[k]), float(ols[k]), float(ohs[k])
        ylo = _rise_from_outside(p, 0.5 * (inner + ol), max(0.0, y_lo - reach), min(mid, y_lo + reach), persist=persist)
        yhi = _rise_from_outside(p, 0.5 * (inner + oh), min(h - 1.0, y_hi + reach), max(mid, y_hi - reach), persist=persist)
        ylo = y_lo if ylo is None or inner <= 1.2 * ol else _snap_to_step(pi, ylo, win=snap, stats=st)
        yhi = y_hi if yhi is None or inner <= 1.2 * oh else _snap_to_step(pi, yhi, win=snap, stats=st)
        xb.append(a_start + (k + 0.5) * bw - 0.5)
        lo_b.append(ylo)
        hi_b.append(yhi)
    xb = np.asarray(xb, float)
    if len(xb) == 0:
        return np.array([x_lo, x_hi]), np.array([y_lo, y_lo]), np.array([y_hi, y_hi])
    out = []
    x_mid = 0.5 * w  # the whole-face edges come from the columns around the middle
    for vals, inward, y_all in ((np.asarray(lo_b, float), +1.0, y_lo), (np.asarray(hi_b, float), -1.0, y_hi)):
        # the stretches give the edge's slope (a tapered face, a small axis error); its
        # level is the whole-face edge, a median over many columns and less noisy
        a, b = _edge_line(xb, vals, inward, q=q, is_face=_zone_check(PI, xb, vals, inward, q=q, c0=c0, c1=c1))
        # ... unless a smooth band along more than half the edge pulled that median inwards:
        # the stretches' own line (bands left out) is then the outer one
        y_mid = min(y_all, a * x_mid + b) if inward > 0 else max(y_all, a * x_mid + b)
        out.append(np.array([a, y_mid - a * x_mid]))
    # the outline's long edges: straight lines between the ends (a break's small wander
    # averages out over a stretch; stretch-by-stretch positions carry more noise than it)
    xe = np.array([x_lo, x_hi], float)
    return xe, np.polyval(out[0], xe), np.polyval(out[1], xe)


#: two stretch positions within this of each other (after the first slope) lie at one level of an
#: edge; pairs across a band's end (about its width apart) do not give the edge's slope
SAME_LEVEL_MM = 0.4
#: an outer group found with the neighbour-based tolerance stands at least this far outside the
#: main group (a smooth band's width; lack of fusion narrower than this is left to the inset)
BAND_STEP_MM = 0.6
#: ... and the rows it adds differ from the surroundings beyond it by this share of the face-to-surroundings
#: brightness difference (a wandering edge's crests add table or plate)
BAND_ZONE_SHARE = 0.3
#: ... which needs face and surroundings at least this many grey levels apart
BAND_ZONE_MIN_GREY = 12.0


def _edge_line(x: np.ndarray, y: np.ndarray, inward: float, *, q: float, is_face=None) -> np.ndarray:
    """Straight edge ``y = a x + b`` through stretch positions, robust to smooth bands inside it.

    The slope is Theil-Sen's (median of the pairwise slopes): a band along
    the edge runs parallel to it and does not tilt it.  The offset is the
    median of the stretches that lie on the edge: stretches well inside the
    main group (more than ``max(3 sigma, 0.3 mm)``) are a smooth band, not
    the edge, and are left out; when at least a fifth of the stretches lie
    that far *outside* the main group, each within ``tol`` of another one
    of them, the main group is a band along most of the edge and the outer
    group is the edge.  Before that, :func:`_edge_beyond_band` looks for
    a band along one part of the edge that these spread-based tests miss
    (its slope and tolerance from stretches at one level).  With fewer than
    four stretches the median position is used.
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    if len(x) < 4:
        return np.array([0.0, float(np.median(y))])
    i, j = np.triu_indices(len(x), 1)
    dx = x[j] - x[i]
    ok = np.abs(dx) > 1e-9
    a = float(np.median((y[j] - y[i])[ok] / dx[ok])) if ok.any() else 0.0
    band = _edge_beyond_band(x, y, i, j, dx, ok, inward, q=q, is_face=is_face)
    if band is not None:
        return band
    r = (y - a * x) * inward  # larger: further inside
    med = float(np.median(r))
    sig = _mad_sigma(r) + 1e-6
    tol = max(3.0 * sig, 0.3 * q)
    outer = _agreeing(r < med - tol, r, tol)
    if outer.sum() >= max(2, 0.2 * len(r)):
        off = float(np.median(r[outer]))
    else:
        off = float(np.median(r[r <= med + tol]))
    return np.array([a, off * inward])


def _mad_sigma(v: np.ndarray) -> float:
    """1.4826 x the median absolute deviation of ``v``: a normal sigma, robust to a few outliers."""
    return 1.4826 * float(np.median(np.abs(v - np.median(v))))


def _agreeing(outer: np.ndarray, r: np.ndarray, tol: float) -> np.ndarray:
    """The stretches of an outer group that agree with another one of it within ``tol``: a lone
    stretch far outside, where plate or table texture rose, is no edge and must not pull one out."""
    outer = outer.copy()
    ro = r[outer]
    outer[outer] = (np.abs(ro[:, None] - ro[None, :]) <= tol).sum(axis=1) >= 2
    return outer


def _edge_beyond_band(x, y, i, j, dx, ok, inward: float, *, q: float, is_face=None) -> np.ndarray | None:
    """The edge line beyond a smooth band along one part of it, or None when there is no such band.

    A band along one stretch of the edge (an end of it, say) puts every pair of stretches across the
    band's end at a false slope, and the spread of all stretches then holds the band's width, which
    hides the edge beyond it from a spread-based tolerance.  Here the slope comes from pairs of
    stretches at one level (within :data:`SAME_LEVEL_MM` of each other; nearby pairs first, which
    few such pairs can sway), the noise from neighbouring stretches, and the outer group must
    stand clear of the main one by :data:`BAND_STEP_MM`.  ``is_face(a, b, main, outer)``, where
    given, says whether what the line would add beside the ``main`` stretches is face (a band)
    and not the surroundings (a break edge that wanders, whose crests make an outer group).
    """
    if len(x) < 6:
        return None
    rank = np.argsort(np.argsort(x))
    near = ok & (np.abs(rank[j] - rank[i]) <= max(3, len(x) // 3))
    if not near.any():
        return None
    a = float(np.median((y[j] - y[i])[near] / dx[near]))
    for pairs in (near, ok):
        r = y - a * x
        same = pairs & (np.abs(r[j] - r[i]) <= SAME_LEVEL_MM * q)
        if same.sum() >= max(3, 0.25 * pairs.sum()):
            a = float(np.median((y[j] - y[i])[same] / dx[same]))
    r = (y - a * x) * inward
    med = float(np.median(r))
    d = np.diff(r[np.argsort(x)])
    tol = max(3.0 * _mad_sigma(d) / math.sqrt(2.0), 0.3 * q)
    outer = _agreeing(r < med - tol, r, tol)
    off = float(np.median(r[outer])) if outer.any() else med
    if outer.sum() < max(2, 0.2 * len(r)) or off > med - BAND_STEP_MM * q:
        return None
    line = np.array([a, off * inward])
    main = r > off + BAND_STEP_MM * q
    if is_face is not None and not is_face(line[0], line[1], main, outer):
        return None
    return line


def _zone_check(PI: np.ndarray, xb: np.ndarray, vals: np.ndarray, inward: float, *, q: float, c0: int, c1: int):
    """``is_face`` for :func:`_edge_beyond_band` from the stretches' brightness profiles ``PI``.

    The rows a band's line would add beside the ``main`` stretches (between each one's edge and
    the line) are face when their brightness differs from the surroundings just beyond the line
    at the ``outer`` stretches by at least :data:`BAND_ZONE_SHARE` of the face-to-surroundings
    difference (face: the middle rows ``c0:c1``).  Surroundings of the face's own brightness leave
    nothing to tell by, and the band is not taken.
    """
    h = PI.shape[0]

    def is_face(a: float, b: float, main: np.ndarray, outer: np.ndarray) -> bool:
        zone, beyond = [], []
        for k in range(len(xb)):
            yl = a * xb[k] + b
            if main[k]:
                lo, hi = sorted((yl, vals[k]))
                rows = np.arange(int(math.ceil(lo)), int(math.floor(hi)) + 1)
                zone.append(PI[rows[(rows >= 0) & (rows < h)], k])
            elif outer[k]:
                rows = np.round(yl - inward * np.arange(0.3 * q, 1.0 * q + 1)).astype(int)
                beyond.append(PI[rows[(rows >= 0) & (rows < h)], k])
        zone = np.concatenate(zone) if zone else np.zeros(0)
        beyond = np.concatenate(beyond) if beyond else np.zeros(0)
        if zone.size == 0 or beyond.size == 0:
            return False
        face = float(np.median(PI[c0:max(c1, c0 + 1)]))
        out = float(np.median(beyond))
        if abs(face - out) < BAND_ZONE_MIN_GREY:
            return False
        return abs(float(np.median(zone)) - out) >= BAND_ZONE_SHARE * abs(face - out)

    return is_face


def _texture_goes_on(tex, bright, beside, pos: float, outward: int, *, inner_i: float, outer_i: float,
                     level: float, q: float) -> bool:
    """Whether the face seems to go on beyond an end.

    True when the stretch 1-4 mm beyond the end is still textured (mean
    ``tex`` at least ``level``), of the face's brightness (median ``bright``
    within 15 % of the face-to-surroundings difference of ``inner_i``) and
    textured only within the face's band (``beside``, the texture just
    outside the long edges, under half of it there: plate or table carry
    their texture across).
    """
    a, b = sorted((int(round(pos + outward * 1.0 * q)), int(round(pos + outward * 4.0 * q))))
    a, b = max(a, 0), min(b, len(tex) - 1)
    if b - a < q or abs(inner_i - outer_i) < 12.0:
        return False
    t = float(np.mean(tex[a : b + 1]))
    same = abs(float(np.median(bright[a : b + 1])) - inner_i) <= 0.15 * abs(inner_i - outer_i)
    return bool(same and t >= level and float(np.mean(beside[a : b + 1])) < 0.5 * t)


def _local_half_level(p: np.ndarray, pos: float, outer: float, outward: int, *, q: float) -> float:
    """Move an edge found at the half-way level of the face's middle out to its local half-way level.

    The face's level right inside the edge is the median of ``p`` 0.5-2.5 mm
    inwards of ``pos``; when that is lower than the level the edge was found
    at (``p[pos]``, about half-way to the middle's), and at least twice the
    outside level ``outer``, the edge is where ``p``, walking outwards from
    ``pos`` (at most :data:`LOCAL_END_REACH_MM`), first falls below half-way
    between the local level and ``outer``.  It never moves inwards.
    """
    p = np.asarray(p, dtype=np.float64)
    n = len(p)
    k = int(round(pos))
    a, b = sorted((k - outward * int(0.5 * q), k - outward * int(2.5 * q)))
    a, b = max(a, 0), min(b, n - 1)
    if b <= a:
        return pos
    local = float(np.median(p[a : b + 1]))
    lvl = 0.5 * (local + outer)
    if local < 2.0 * outer or not 0 <= k < n or lvl >= p[k]:
        return pos
    prev = k
    for step in range(1, int(LOCAL_END_REACH_MM * q) + 1):
        i = k + outward * step
        if not 0 <= i < n:
            return pos
        if p[i] < lvl:
            frac = (p[prev] - lvl) / max(p[prev] - p[i], 1e-12)
            return float(prev + outward * frac)
        prev = i
    return pos


def _calm_end(p, pos: float, inner: float, outer: float, outward: int, *, keep, min_len: int, persist: int):
    """Move a face end outwards over a calmer stretch of the face itself.

    Walking outwards from ``pos``, the end follows the brightness profile
    ``p`` while it stays within a quarter of the face-to-surroundings
    difference of the face's level ``inner`` (a lone sample outside that band
    is passed over: the walk stops where most of the next ``persist``
    samples are outside it) and while ``keep`` (still textured) holds.  The
    stretch walked is taken only when it is at least ``min_len`` samples long
    (the texture measure's own blur leaves a short textured rim beyond every
    end, and a notch face of the face's brightness begins right after it) and
    its median brightness lies within 15 % of that difference of ``inner`` (a
    plate or bead beside the end is a little darker or brighter than the
    face).  Nothing moves when the face and its surroundings differ by less
    than 12 grey levels.
    """
    p = np.asarray(p, dtype=np.float64)
    n = len(p)
    if abs(inner - outer) < 12.0:
        return pos
    tol = max(4.0, 0.25 * abs(inner - outer))
    off = np.abs(p - inner) > tol
    k = int(round(pos))
    last = None
    for step in range(1, n):
        i = k + outward * step
        if not 0 <= i < n or not keep[i]:
            break
        ahead = off[i : i + persist] if outward > 0 else off[max(0, i - persist + 1) : i + 1]
        if off[i] and np.mean(ahead) >= 0.7:
            break
        last = i
    if last is None or abs(last - pos) < min_len:
        return pos
    a, b = sorted((k, last))
    if abs(float(np.median(p[a : b + 1])) - inner) > 0.15 * abs(inner - outer):
        return pos
    return float(last + 0.5 * outward)


def _faint_end(tex, bright, beside, pos: float, outward: int, *, out_level: float, inner_i: float, outer_i: float,
               q: float, persist: int) -> float:
    """Move a face end outwards over a stretch of the face calmer than the texture just inside the end.

    The texture ``tex`` just inside the end (median 0.5-2.5 mm in) and the
    surroundings' ``out_level`` set a faint level, their geometric mean: far
    below the face and far above plain surroundings, whatever the lighting
    does to both.  Walking outwards from ``pos``, a sample is face while its
    texture is above that level, above twice the texture ``beside`` the long
    edges there (a textured plate or table carries its texture across) and
    its brightness ``bright`` is within half the face-to-surroundings
    difference of ``inner_i`` (or its texture is plainly the face's: at
    least :data:`FAINT_FACE_SHARE` of the texture just inside the end and
    :data:`FAINT_FACE_BESIDE` times that beside: a brighter or darker zone
    of the break, whose brightness alone would end the face); the walk stops where over 70 % of the next
    ``2 * persist`` samples are not (a pore at the very end is passed over).
    A stretch of at least ``persist`` samples moves the end to the half-way
    level between the texture just inside the last face sample and the
    surroundings'.  It never moves inwards, and not
    at all when the face's texture stands less than :data:`FAINT_END_CLEAR`
    times clear of the surroundings'; brightness counts only where face and
    surroundings differ by 12 grey levels or more, and plain surroundings
    count as 1/400 of the face's texture (energy: the faint level is then 1/20).
    """
    tex = np.asarray(tex, dtype=np.float64)
    n = len(tex)
    k = int(round(pos))
    if not 0 <= k < n:
        return pos

    def inside_level(j: int) -> float:
        a, b = sorted((j - outward * int(0.5 * q), j - outward * int(2.5 * q)))
        a, b = max(a, 0), min(b, n - 1)
        return float(np.median(tex[a : b + 1])) if b > a else float(tex[j])

    local = inside_level(k)
    if local <= 0 or local < FAINT_END_CLEAR * out_level:
        return pos
    out = max(float(out_level), 0.0025 * local)  # plain surroundings: the faint level is a twentieth of the face's
    faint = math.sqrt(local * out)
    beside = np.asarray(beside, dtype=np.float64)
    ok = (tex >= faint) & (tex >= 2.0 * beside)
    if abs(inner_i - outer_i) >= 12.0:  # brightness tells face from surroundings only where they differ
        # ... except where the texture is plainly the face's: a fracture has brighter and darker
        # zones (a shinier crystalline stretch, a duller fibrous one: common practice), and a zone
        # brighter than the face's middle stops no end that its texture carries on
        plainly = (tex >= FAINT_FACE_SHARE * local) & (tex >= FAINT_FACE_BESIDE * beside)
        ok &= plainly | (np.abs(np.asarray(bright, dtype=np.float64) - inner_i) <= 0.5 * abs(inner_i - outer_i))
    last = None
    for step in range(1, n):
        i = k + outward * step
        if not 0 <= i < n:
            break
        # a look twice the persistence ahead: a pore or dark speck at the very end is passed over
        ahead = ok[i : i + 2 * persist] if outward > 0 else ok[max(0, i - 2 * persist + 1) : i + 1]
        if not ok[i] and np.mean(ahead) < 0.3:
            break
        if ok[i]:
            last = i
    if last is None or abs(last - k) < persist:
        return pos
    # the end: where the texture, walking in from the last face sample, reaches half-way
    # between its level just inside and the surroundings'
    lvl = 0.5 * (inside_level(last) + out)
    i = last
    while (i - k) * outward > 0 and tex[i] < lvl:
        i -= outward
    j = i + outward  # tex[i] >= lvl > tex[j], or j is the last sample
    if 0 <= j < n and tex[i] > tex[j] and tex[j] < lvl:
        edge = i + outward * (tex[i] - lvl) / (tex[i] - tex[j])
    else:
        edge = last + 0.5 * outward
    return float(edge) if (edge - pos) * outward > 0 else pos


def _same_brightness_reach(p: np.ndarray, pos: float, inner: float, outer: float, outward: int, reach: float,
                           *, step_len: int = 10):
    """Move an edge outwards over samples of the face's own brightness.

    Walking outwards from ``pos`` (at most ``reach`` samples), the edge
    follows the brightness profile ``p`` while it stays within a quarter of
    the face-to-surroundings difference of the face's level ``inner``; it
    never moves inwards, and not at all when the face and its surroundings
    differ by less than 12 grey levels or six times the profile's noise.
    The rim walked must end at a step: within ``step_len`` samples beyond
    it the brightness covers at least half of what is left to ``outer``
    (a plate or bead shading gradually away from the face's brightness has
    no such step, and is not face).
    """
    p = np.asarray(p, dtype=np.float64)
    d = np.diff(p)
    noise = _mad_sigma(d) + 1e-6
    if abs(inner - outer) < max(12.0, 6.0 * noise):
        return pos
    tol = max(4.0, 0.25 * abs(inner - outer))
    n = len(p)
    k = int(round(pos))
    last = None
    for step in range(1, int(reach) + 1):
        i = k + outward * step
        if not 0 <= i < n or abs(p[i] - inner) > tol:
            break
        last = i
    if last is None:
        return pos
    beyond = p[min(max(last + outward * step_len, 0), n - 1)]
    if abs(p[last] - beyond) < 0.5 * abs(p[last] - outer):
        return pos
    edge = last + 0.5 * outward  # the face's last sample ends half a sample further out
    return float(edge) if (edge - pos) * outward > 0 else pos


def _rise_from_outside(p: np.ndarray, level: float, start: float, stop: float, *, persist: int):
    """First place, walking from ``start`` towards ``stop``, where ``p`` rises through ``level`` to stay.

    The rise counts when the next ``persist`` samples average at least
    ``level`` with most of them above it, so a lone bright speck outside the
    face is passed over and an internal smooth patch is never reached.
    Returns the sub-sample position, or None.
    """
    p = np.asarray(p, dtype=np.float64)
    n = len(p)
    a = min(max(int(round(start)), 0), n - 1)
    b = min(max(int(round(stop)), 0), n - 1)
    step = 1 if b >= a else -1
    idx = np.arange(a, b + step, step)
    if len(idx) < 2:
        return None
    v = p[idx]
    # the upward crossings, in walking order; each is checked for staying up
    for k in (np.flatnonzero((v[:-1] < level) & (level <= v[1:])) + 1).tolist():
        after = v[k : k + persist]
        if len(after) >= min(persist, len(v) - k) and after.mean() >= level and np.mean(after >= level) >= 0.7:
            frac = (level - v[k - 1]) / (v[k] - v[k - 1])
            return float(idx[k - 1] + frac * step)
    if v[0] >= level and v[: persist].mean() >= level:
        return float(idx[0])
    return None


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
