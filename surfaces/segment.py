"""Find and classify imperfections on a rectified face.

Input is the face image in its own metric axes (column = x along the weld)
at ``px_per_mm``; every parameter below is in millimetres (or in pixels of
the *original photo*, which set what the photo can resolve) and converted
once.

Two steps:

1. **Candidates**, generous on purpose, from three cues:

   * *dark regions* (pores, slag): brightness relative to a robust local
     background (a median over ``BACKGROUND_MM``), smoothed at the photo's
     own resolving scale, with hysteresis thresholds; each region's outline
     is then re-traced at half contrast between its surrounding ring and its
     core, so its size does not depend on how dark it is;
   * *thin dark lines* (cracks): a multi-scale ridge filter (Sato, from
     scikit-image) at widths of one to three photo pixels;
   * *smooth or tinted regions* (unfused: lack of fusion, incomplete root
     penetration): fracture texture energy far below the face's own, or a
     colour far from the face's.

2. **Decision**: every candidate is described by generic region features
   (size, shape, contrast to its ring, edge steepness, inner texture, colour,
   ridge fraction, contact with the face edge) and scored by a small
   multinomial logistic model (:mod:`surfaces.regionmodel`) whose weights are
   fitted on synthetic faces by ``scripts/fit_region_model.py``.  The model's
   probability is the detection's confidence.  Nothing under ``min_size_mm``
   is reported, and nothing the photo cannot resolve (under
   ``RESOLVE_PX`` photo pixels) is claimed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np
from scipy import ndimage as ndi
from skimage import measure as skm

from .shapes import polygon_features

BACKGROUND_MM = 6.0  # window of the local background median
SPECK_MM = 0.2  # below this a dark spot is fracture grain, not an imperfection
RESOLVE_PX = 4.0  # smallest feature (photo pixels across) a detection may be
EDGE_MM = 0.5

ISO6520 = {"pore": "2011", "pore-elongated": "2015", "inclusion": "301", "unfused": "401", "unfused-root": "4021", "crack": "100"}
KIND_ORDER = ("none", "pore", "inclusion", "unfused", "crack")


@dataclass
class Detection:
    """One imperfection (or candidate) in face-image pixels (col, row)."""

    kind: str
    confidence: float
    contour: np.ndarray  # (N, 2) float (col, row), closed (first != last)
    iso6520: str
    features: dict = field(default_factory=dict)
    cause: str = ""
    probs: dict = field(default_factory=dict)


def _gray(rgb: np.ndarray) -> np.ndarray:
    return cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY).astype(np.float32)


def _robust_sigma(x: np.ndarray) -> float:
    x = x[np.isfinite(x)]
    if x.size == 0:
        return 1.0
    med = np.median(x)
    return float(1.4826 * np.median(np.abs(x - med))) or 1.0


def background(gray: np.ndarray, *, px_per_mm: float, window_mm: float = BACKGROUND_MM) -> np.ndarray:
    """Robust local background: median over ``window_mm`` on a reduced copy (4 px/mm)."""
    f = min(1.0, 4.0 / px_per_mm)
    small = cv2.resize(gray, None, fx=f, fy=f, interpolation=cv2.INTER_AREA) if f < 1 else gray
    k = int(round(window_mm * px_per_mm * f)) | 1
    k = max(3, min(k, 255))
    med = cv2.medianBlur(np.clip(small, 0, 255).astype(np.uint8), k).astype(np.float32)
    med = cv2.GaussianBlur(med, (0, 0), k / 6)
    return cv2.resize(med, (gray.shape[1], gray.shape[0]), interpolation=cv2.INTER_LINEAR)


def texture_energy(gray: np.ndarray, *, px_per_mm: float, scale_mm: float = 0.1) -> np.ndarray:
    """Local RMS of detail finer than ``scale_mm`` (the fracture grain)."""
    g = gray.astype(np.float32)
    hp = g - cv2.GaussianBlur(g, (0, 0), max(scale_mm * px_per_mm, 0.7))
    return np.sqrt(cv2.GaussianBlur(hp * hp, (0, 0), max(2.5 * scale_mm * px_per_mm, 1.0)))


def hysteresis(values: np.ndarray, low: float, high: float) -> np.ndarray:
    """Pixels above ``low`` connected (8-neighbour) to a pixel above ``high``."""
    lowm = values > low
    n, lab = cv2.connectedComponents(lowm.astype(np.uint8), connectivity=8)
    keep = np.zeros(n, bool)
    keep[np.unique(lab[values > high])] = True
    keep[0] = False
    return keep[lab]


def dark_ridges(gray: np.ndarray, *, sigmas) -> np.ndarray:
    """Multi-scale dark-line strength from the Hessian (scale-normalised).

    At each scale the larger Hessian eigenvalue (positive across a dark line)
    times sigma^2, kept where the other eigenvalue is small compared to it
    (a line, not a blob); the maximum over scales.  Same idea as the Sato
    tubeness filter, computed with OpenCV for speed.
    """
    g = gray.astype(np.float32)
    out = np.zeros_like(g)
    for s in sigmas:
        b = cv2.GaussianBlur(g, (0, 0), float(s))
        dxx = cv2.Sobel(b, cv2.CV_32F, 2, 0, ksize=3)
        dyy = cv2.Sobel(b, cv2.CV_32F, 0, 2, ksize=3)
        dxy = cv2.Sobel(b, cv2.CV_32F, 1, 1, ksize=3)
        tmp = np.sqrt((dxx - dyy) ** 2 + 4 * dxy**2)
        l1 = 0.5 * (dxx + dyy + tmp)  # larger eigenvalue
        l2 = 0.5 * (dxx + dyy - tmp)
        line = np.clip(l1, 0, None) * np.exp(-((l2 / (np.abs(l1) + 1e-6)) ** 2) * 2.0) * (l2 < 0.5 * l1)
        out = np.maximum(out, line * np.float32(s * s) / 255.0)
    return out


@dataclass
class _Maps:
    g: np.ndarray
    gs: np.ndarray
    bg: np.ndarray
    rel: np.ndarray
    tex: np.ndarray
    tex_med: float
    lab: np.ndarray
    lab_med: np.ndarray
    ridge: np.ndarray
    ridge_med: float
    ridge_sig: float
    grad: np.ndarray
    mask: np.ndarray
    mm: float
    photo_mm: float  # photo px/mm


def _maps(rgb, mask, mm, photo_mm) -> _Maps:
    g = _gray(rgb)
    resolve = 1.0 / photo_mm  # one photo pixel, in mm
    gs = cv2.GaussianBlur(g, (0, 0), max(0.05, 0.7 * resolve) * mm)
    bg = background(g, px_per_mm=mm)
    rel = gs / np.maximum(bg, 1.0)
    tex = texture_energy(g, px_per_mm=mm, scale_mm=max(0.08, 1.2 * resolve))
    tex_med = float(np.median(tex[mask])) or 1.0
    lab = cv2.cvtColor(rgb, cv2.COLOR_RGB2Lab).astype(np.float32)
    lab = cv2.GaussianBlur(lab, (0, 0), max(0.08, resolve) * mm)
    lab_med = np.median(lab[mask], axis=0)
    sig = [max(s * mm, 0.7) for s in (0.6 * resolve, 1.2 * resolve, 2.0 * resolve)]
    ridge = dark_ridges(g, sigmas=sorted(set(round(s, 2) for s in sig)))
    ridge_med = float(np.median(ridge[mask]))
    ridge_sig = _robust_sigma(ridge[mask]) + 1e-6
    gy, gx = np.gradient(gs)
    return _Maps(g, gs, bg, rel, tex, tex_med, lab, lab_med, ridge, ridge_med, ridge_sig, np.hypot(gx, gy), mask, mm, photo_mm)


def segment(
    rgb: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    px_per_mm: float,
    photo_px_per_mm: float | None = None,
    min_size_mm: float = 0.3,
    test: str = "fillet-break",
    keep_all: bool = False,
) -> list[Detection]:
    """Imperfections on a rectified face.

    Parameters
    ----------
    rgb : (h, w, 3) uint8 ndarray
        Rectified face, column = x along the weld.
    mask : (h, w) bool ndarray, optional
        True on the face; everything else is ignored.
    px_per_mm : float
        Resolution of ``rgb``.
    photo_px_per_mm : float, optional
        Resolution of the original photo at the face (sets the smoothing
        scales and the smallest resolvable size); default ``px_per_mm``.
    min_size_mm : float
        Smallest greatest dimension reported (the sensitivity in mm).
    test : str
        ``fillet-break`` or ``nick-break`` (bend faces: :mod:`surfaces.bend`).
    keep_all : bool
        Return every candidate, including those judged ``none`` (for
        fitting and inspecting the region model).

    Returns
    -------
    list of Detection, outlines in face pixels (col, row), sorted along x.
    """
    from .regionmodel import MODEL_PATH, classify

    if not (px_per_mm > 0 and math.isfinite(px_per_mm)):
        raise ValueError(f"px_per_mm must be a positive number, got {px_per_mm!r}")
    h, w = rgb.shape[:2]
    if mask is None:
        mask = np.ones((h, w), bool)
    photo_mm = float(photo_px_per_mm or px_per_mm)
    M = _maps(rgb, mask, px_per_mm, photo_mm)
    cands = _dark_candidates(M) + _ridge_candidates(M)
    cands += _smooth_candidates(M, cands)
    min_resolvable = RESOLVE_PX / photo_mm
    out = []
    fitting = keep_all and not MODEL_PATH.exists()
    for c in cands:
        f = c.features
        if fitting:  # bootstrapping the region model: features only
            out.append(c)
            continue
        kind, conf, probs = classify(f)
        c.kind, c.confidence, c.probs = kind, conf, probs
        if kind == "pore":
            c.iso6520 = ISO6520["pore"] if f["aspect"] < 1.5 else ISO6520["pore-elongated"]
        elif kind == "unfused":
            c.iso6520 = ISO6520["unfused-root"] if f["edge_contact"] > 0.3 else ISO6520["unfused"]
        elif kind in ISO6520:
            c.iso6520 = ISO6520[kind]
        if keep_all:
            out.append(c)
            continue
        if kind == "none" or f["greatest_mm"] < max(min_size_mm, SPECK_MM, min_resolvable):
            continue
        out.append(c)
    out = _dedupe(out)
    out.sort(key=lambda d: (d.features["cx_px"], d.features["cy_px"]))
    return out


# --------------------------------------------------------------------------
# candidates


def _dark_candidates(M: _Maps) -> list[Detection]:
    rel = np.where(M.mask, M.rel, 1.0)
    seeds_lvl, grow_lvl = 0.6, 0.72
    dark = hysteresis(1.0 - rel, 1.0 - grow_lvl, 1.0 - seeds_lvl)
    speck_px = (SPECK_MM * M.mm) ** 2 * math.pi / 4
    lab, n = ndi.label(dark, structure=np.ones((3, 3)))
    out = []
    for i, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None:
            continue
        if (lab[sl] == i).sum() < speck_px:
            continue
        d = _trace_dark(i, sl, lab, M)
        if d is not None:
            out.append(d)
    return out


def _ridge_candidates(M: _Maps) -> list[Detection]:
    r = np.where(M.mask, (M.ridge - M.ridge_med) / M.ridge_sig, 0)
    m = hysteresis(r, 4.0, 8.0)
    lab, n = ndi.label(m, structure=np.ones((3, 3)))
    return _region_candidates(lab, M, min_px=0.8 * M.mm, min_greatest_mm=0.5, kind="crack", source="ridge")


def _smooth_candidates(M: _Maps, taken_dets) -> list[Detection]:
    h, w = M.g.shape
    smooth = (M.tex < 0.45 * M.tex_med) | (_chroma_dev(M) > 12.0)
    smooth &= M.mask
    taken = np.zeros((h, w), np.uint8)
    for d in taken_dets:
        cv2.fillPoly(taken, [np.round(d.contour).astype(np.int32)], 1)
    smooth &= cv2.dilate(taken, np.ones((3, 3), np.uint8)) == 0
    k = max(3, int(round(0.3 * M.mm)) | 1)
    sm = cv2.morphologyEx(smooth.astype(np.uint8), cv2.MORPH_OPEN, np.ones((k, k), np.uint8))
    sm = cv2.morphologyEx(sm, cv2.MORPH_CLOSE, np.ones((k, k), np.uint8)) > 0
    lab, n = ndi.label(sm)
    return _region_candidates(lab, M, min_px=(0.8 * M.mm) ** 2, min_greatest_mm=1.0, kind="unfused", source="smooth")


def _region_candidates(lab, M: _Maps, *, min_px: float, min_greatest_mm: float, kind: str, source: str) -> list[Detection]:
    """One candidate per labelled region at least ``min_px`` pixels and ``min_greatest_mm`` long."""
    out = []
    for i, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None:
            continue
        reg = lab[sl] == i
        if reg.sum() < min_px:
            continue
        cont = _outline(reg, sl)
        if cont is None:
            continue
        f = polygon_features(cont, px_per_mm=M.mm)
        if f["greatest_mm"] < min_greatest_mm:
            continue
        out.append(Detection(kind, 0.0, cont, ISO6520[kind], _appearance(f, reg, sl, M, source=source)))
    return out


def _chroma_dev(M: _Maps) -> np.ndarray:
    return np.hypot(M.lab[..., 1] - M.lab_med[1], M.lab[..., 2] - M.lab_med[2])


def _outline(reg: np.ndarray, sl) -> np.ndarray | None:
    cs = skm.find_contours(np.pad(reg.astype(np.float32), 1), 0.5)
    if not cs:
        return None
    cont = max(cs, key=len)[:, ::-1] - 1 + np.array([sl[1].start, sl[0].start])
    if np.allclose(cont[0], cont[-1]):
        cont = cont[:-1]
    return cont if len(cont) >= 3 else None


def _trace_dark(i, sl, lab, M: _Maps) -> Detection | None:
    h, w = M.gs.shape
    mm = M.mm
    r0, r1, c0, c1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop
    size = max(r1 - r0, c1 - c0)
    pad = int(max(0.6 * mm, 0.5 * size)) + 2
    R0, R1, C0, C1 = max(0, r0 - pad), min(h, r1 + pad), max(0, c0 - pad), min(w, c1 + pad)
    seed = lab[R0:R1, C0:C1] == i
    patch = M.gs[R0:R1, C0:C1]
    pmask = M.mask[R0:R1, C0:C1]
    rw = max(2, int(round(0.3 * mm)))
    ring = ndi.binary_dilation(seed, iterations=rw) & ~ndi.binary_dilation(seed, iterations=1)
    ring &= (lab[R0:R1, C0:C1] == 0) & pmask
    b = float(np.median(patch[ring])) if ring.sum() >= 8 else float(np.median(M.bg[R0:R1, C0:C1][seed]))
    core = float(np.percentile(patch[seed], 5))
    contrast = b - core
    if contrast <= 1.0:
        return None
    level = b - 0.5 * contrast
    region = patch < level
    rl, _ = ndi.label(region | seed, structure=np.ones((3, 3)))
    keep = np.unique(rl[seed])
    region = np.isin(rl, keep[keep > 0])
    # stay with the seed: half contrast must not leak into the dark grain around it
    reach = max(2, int(round(max(1.5 / M.photo_mm, 0.1) * mm)))
    region &= ndi.binary_dilation(seed, iterations=reach)
    region = ndi.binary_fill_holes(region) & pmask
    if region.sum() < 2:
        return None
    val = np.where(region, np.minimum(patch, level - 1), np.maximum(patch, level + 1))
    val = np.where(ndi.binary_dilation(region, iterations=2), val, level + 1)
    cs = skm.find_contours(np.pad(val, 1, constant_values=level + 1), level)
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
    sl2 = (slice(R0, R1), slice(C0, C1))
    f = _appearance(f, region, sl2, M, source="dark", ring_level=b, core_level=core)
    return Detection("candidate", 0.0, cont, "", f)


def _appearance(f: dict, reg: np.ndarray, sl, M: _Maps, *, source: str, ring_level=None, core_level=None) -> dict:
    """Generic region features used by the region model (all dimensionless or mm)."""
    mm = M.mm
    h, w = M.g.shape
    R0, C0 = sl[0].start, sl[1].start
    patch = M.gs[sl]
    pmask = M.mask[sl]
    rw = max(2, int(round(0.3 * mm)))
    ring = ndi.binary_dilation(reg, iterations=rw) & ~ndi.binary_dilation(reg, iterations=1) & pmask
    if ring.sum() < 4:
        ring = ~reg & pmask
    b = ring_level if ring_level is not None else float(np.median(patch[ring])) if ring.any() else float(np.median(patch))
    inside = float(np.median(patch[reg]))
    core = core_level if core_level is not None else float(np.percentile(patch[reg], 5))
    contrast = (b - inside) / max(b, 1.0)
    inner = ndi.binary_erosion(reg, iterations=1)
    rim = reg & ~inner
    if not inner.any():
        inner = reg
    tex_in = float(np.median(M.tex[sl][inner])) / M.tex_med
    tex_ring = float(np.median(M.tex[sl][ring])) / M.tex_med if ring.any() else 1.0
    span = max(b - core, 1.0)
    edge = float(np.mean(M.grad[sl][rim])) * mm / span if rim.any() else 0.0
    lab = M.lab[sl]
    cin = lab[inner].mean(axis=0) if inner.any() else lab[reg].mean(axis=0)
    cring = lab[ring].mean(axis=0) if ring.any() else M.lab_med
    chroma_ring = float(np.hypot(cin[1] - cring[1], cin[2] - cring[2]))
    chroma_face = float(np.hypot(cin[1] - M.lab_med[1], cin[2] - M.lab_med[2]))
    rz = (M.ridge[sl] - M.ridge_med) / M.ridge_sig
    ridge_frac = float((rz[reg] > 4.0).mean())
    # contact with the face's long edges (root / side wall)
    ys, xs = np.nonzero(reg)
    edge_band = max(1, int(round(EDGE_MM * mm)))
    near = ((ys + R0) < edge_band) | ((ys + R0) >= h - edge_band)
    edge_contact = float(near.mean()) if len(ys) else 0.0
    thick = f["area_mm2"] / max(f["greatest_mm"], 1e-6)
    f = dict(f)
    f.update(
        source=source,
        contrast=contrast,
        depth=(b - core) / max(b, 1.0),
        edge_sharpness=edge,
        tex_in=tex_in,
        tex_ring=tex_ring,
        chroma_ring=chroma_ring,
        chroma_face=chroma_face,
        ridge_frac=ridge_frac,
        edge_contact=edge_contact,
        thickness_mm=thick,
        photo_px=f["greatest_mm"] * M.photo_mm,
        photo_thick_px=thick * M.photo_mm,
        bright_frac=float((patch[reg] > b).mean()),
    )
    return f


def _dedupe(dets: list[Detection]) -> list[Detection]:
    """Drop a detection whose centroid lies inside a larger, more confident one."""
    keep = []
    order = sorted(dets, key=lambda d: -d.features["area_mm2"])
    for d in order:
        c = (d.features["cx_px"], d.features["cy_px"])
        inside = False
        for k in keep:
            if cv2.pointPolygonTest(k.contour.astype(np.float32).reshape(-1, 1, 2), c, False) >= 0:
                inside = True
                break
        if not inside:
            keep.append(d)
    return keep
