"""Find and classify imperfections on a rectified face.

Input is the face image in its own metric axes (column = x along the weld)
at ``px_per_mm``; every parameter below is in millimetres and converted once.

Three detectors feed one list of candidates:

* **dark regions** (pores, slag inclusions): darkness against a robust local
  background (a median over ``BACKGROUND_MM``), hysteresis thresholds scaled by
  the face's own texture noise, then each region's outline re-traced at
  half-contrast between its local background and its core, so sizes do not
  depend on how dark the region is;
* **thin dark lines** (cracks): a multi-scale ridge filter (Sato, from
  scikit-image) for openings narrower than the smoothing scale;
* **smooth regions** (unfused: lack of fusion, incomplete root penetration):
  texture energy far below the face's granular fracture texture, often tinted.

Each candidate gets a kind from its shape and appearance and an honest
confidence from its contrast-to-noise ratio, edge sharpness and how typical
its shape is for that kind.  Nothing under ``min_size_mm`` (greatest
dimension) is reported, and nothing under ``SPECK_MM`` is ever considered.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np
from scipy import ndimage as ndi
from skimage import measure as skm
from skimage.filters import apply_hysteresis_threshold, sato

from .shapes import polygon_features

BACKGROUND_MM = 8.0  # window of the local background median
SMOOTH_MM = 0.06  # noise smoothing before thresholds
SPECK_MM = 0.2  # below this a dark spot is fracture grain, not an imperfection
TEXTURE_HP_MM = 0.1
TEXTURE_WIN_MM = 0.3

ISO6520 = {"pore": "2011", "pore-elongated": "2015", "inclusion": "301", "unfused": "401", "unfused-root": "4021", "crack": "100"}


@dataclass
class Detection:
    """One candidate imperfection in face-image pixels (col, row)."""

    kind: str
    confidence: float
    contour: np.ndarray  # (N, 2) float (col, row), closed (first != last)
    iso6520: str
    features: dict = field(default_factory=dict)
    cause: str = ""


def _gray(rgb: np.ndarray) -> np.ndarray:
    return cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY).astype(np.float32)


def _robust_sigma(x: np.ndarray) -> float:
    x = x[np.isfinite(x)]
    if x.size == 0:
        return 1.0
    med = np.median(x)
    return float(1.4826 * np.median(np.abs(x - med))) or 1.0


def background(gray: np.ndarray, *, px_per_mm: float, window_mm: float = BACKGROUND_MM) -> np.ndarray:
    """Robust local background: median over ``window_mm`` on a 4x reduced copy."""
    f = min(1.0, 4.0 / px_per_mm)
    small = cv2.resize(gray, None, fx=f, fy=f, interpolation=cv2.INTER_AREA) if f < 1 else gray
    k = int(round(window_mm * px_per_mm * f)) | 1
    k = max(3, min(k, 255))
    med = cv2.medianBlur(np.clip(small, 0, 255).astype(np.uint8), k).astype(np.float32)
    med = cv2.GaussianBlur(med, (0, 0), k / 6)
    return cv2.resize(med, (gray.shape[1], gray.shape[0]), interpolation=cv2.INTER_LINEAR)


def texture_energy(gray: np.ndarray, *, px_per_mm: float) -> np.ndarray:
    g = gray.astype(np.float32)
    hp = g - cv2.GaussianBlur(g, (0, 0), max(TEXTURE_HP_MM * px_per_mm, 0.7))
    return np.sqrt(cv2.GaussianBlur(hp * hp, (0, 0), TEXTURE_WIN_MM * px_per_mm))


def segment(
    rgb: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    px_per_mm: float,
    min_size_mm: float = 0.3,
    test: str = "fillet-break",
    sensitivity: float = 1.0,
) -> list[Detection]:
    """Candidate imperfections on a rectified face.

    Parameters
    ----------
    rgb : (h, w, 3) uint8 ndarray
        Rectified face, column = x along the weld.
    mask : (h, w) bool ndarray, optional
        True on the face; everything else is ignored.
    px_per_mm : float
        Resolution of ``rgb``.
    min_size_mm : float
        Smallest greatest dimension reported (the sensitivity in mm).
    test : str
        ``fillet-break``, ``nick-break`` or ``bend``; bend faces report open
        discontinuities (see :mod:`surfaces.bend`).
    sensitivity : float
        Multiplies the detection thresholds (lower finds fainter regions).

    Returns
    -------
    list of Detection, outlines in face pixels (col, row).
    """
    if px_per_mm <= 0 or not math.isfinite(px_per_mm):
        raise ValueError(f"px_per_mm must be a positive number, got {px_per_mm!r}")
    h, w = rgb.shape[:2]
    if mask is None:
        mask = np.ones((h, w), bool)
    mm = px_per_mm
    g = _gray(rgb)
    gs = cv2.GaussianBlur(g, (0, 0), SMOOTH_MM * mm)
    bg = background(g, px_per_mm=mm)
    resid = bg - gs  # positive = darker than the surroundings
    sig = _robust_sigma(resid[mask])
    bgm = float(np.median(bg[mask]))
    hi = sensitivity * max(4.5 * sig, 0.16 * bgm)
    lo = sensitivity * max(2.5 * sig, 0.08 * bgm)
    dark = apply_hysteresis_threshold(np.where(mask, resid, 0), lo, hi)

    # thin dark openings narrower than the smoothing: ridge filter
    sig_px = [s * mm for s in (0.05, 0.1, 0.18)]
    ridge = sato(g / 255.0, sigmas=[max(s, 0.6) for s in sig_px], black_ridges=True, mode="reflect")
    rsig = _robust_sigma(ridge[mask])
    rmed = float(np.median(ridge[mask]))
    ridge_mask = apply_hysteresis_threshold(
        np.where(mask, ridge - rmed, 0), sensitivity * 6 * rsig, sensitivity * 12 * rsig
    )

    tex = texture_energy(g, px_per_mm=mm)
    tex_med = float(np.median(tex[mask]))

    dets: list[Detection] = []
    speck_px = (SPECK_MM * mm) ** 2 * math.pi / 4
    lab, n = ndi.label(dark | ridge_mask, structure=np.ones((3, 3)))
    objs = ndi.find_objects(lab)
    for i, sl in enumerate(objs, start=1):
        if sl is None:
            continue
        comp = lab[sl] == i
        if comp.sum() < speck_px:
            continue
        d = _trace_dark(i, sl, lab, gs, bg, resid, ridge_mask, tex, mask, mm=mm, sig=sig, tex_med=tex_med)
        if d is not None and d.features["greatest_mm"] >= max(min_size_mm, SPECK_MM):
            dets.append(d)

    dets.extend(_unfused(rgb, g, tex, tex_med, mask, dets, mm=mm, min_size_mm=min_size_mm, test=test))
    dets.sort(key=lambda d: (d.features["cx_px"], d.features["cy_px"]))
    return dets


def _trace_dark(i, sl, lab, gs, bg, resid, ridge_mask, tex, mask, *, mm, sig, tex_med) -> Detection | None:
    h, w = gs.shape
    r0, r1, c0, c1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop
    size = max(r1 - r0, c1 - c0)
    pad = int(max(1.0 * mm, 0.5 * size)) + 2
    R0, R1, C0, C1 = max(0, r0 - pad), min(h, r1 + pad), max(0, c0 - pad), min(w, c1 + pad)
    seed = lab[R0:R1, C0:C1] == i
    patch = gs[R0:R1, C0:C1]
    # local background: a ring just outside the candidate, other candidates left out
    rw = max(2, int(round(0.3 * mm)))
    grown = ndi.binary_dilation(seed, iterations=rw)
    ring = grown & ~ndi.binary_dilation(seed, iterations=1) & (lab[R0:R1, C0:C1] == 0)
    ring &= mask[R0:R1, C0:C1]
    b_map = float(np.median(bg[R0:R1, C0:C1][seed]))
    b = float(np.median(patch[ring])) if ring.sum() >= 8 else b_map
    core = float(np.percentile(patch[seed], 5))
    contrast = b - core
    thin_seed = ridge_mask[R0:R1, C0:C1] & seed
    is_ridge = thin_seed.sum() > 0.6 * seed.sum()
    if contrast <= 0:
        return None
    level = b - 0.5 * contrast
    region = patch < level
    # keep only what connects to the seed; fill highlights and holes inside
    rl, _ = ndi.label(region | seed, structure=np.ones((3, 3)))
    keep = np.unique(rl[seed])
    keep = keep[keep > 0]
    region = np.isin(rl, keep)
    region = ndi.binary_fill_holes(region)
    region &= mask[R0:R1, C0:C1]
    if region.sum() < 2:
        return None
    # sub-pixel outline: trace the half-contrast level with holes made dark
    val = np.where(region, np.minimum(patch, level - 1), np.maximum(patch, level + 1))
    val = np.where(ndi.binary_dilation(region, iterations=2), val, level + 1)
    val = np.pad(val, 1, constant_values=level + 1)
    cs = skm.find_contours(val, level)
    if not cs:
        return None
    cont = max(cs, key=len)[:, ::-1] - 1 + np.array([C0, R0])  # (col,row)
    if len(cont) < 4:
        return None
    if np.allclose(cont[0], cont[-1]):
        cont = cont[:-1]
    f = polygon_features(cont, px_per_mm=mm)
    if f["area_mm2"] <= 0:
        return None
    # appearance
    reg_full = np.zeros(gs.shape, bool)
    reg_full[R0:R1, C0:C1] = region
    inner = ndi.binary_erosion(region, iterations=1) if region.sum() > 20 else region
    gy, gx = np.gradient(patch)
    gm = np.hypot(gx, gy)
    rim = region & ~inner
    # edge steepness in 1/mm: about 1 / (width of the dark-to-bright transition)
    edge_sharp = float(np.mean(gm[rim])) * mm / max(contrast, 1e-3) if rim.any() else 0.0
    highlight = bool((patch[region] > b).any())
    cnr = contrast / max(sig, 1e-3)
    f.update(
        contrast=contrast / max(b, 1e-3),
        cnr=cnr,
        edge_sharpness=edge_sharp,
        highlight=highlight,
        ridge=is_ridge,
        inner_texture=float(np.median(tex[R0:R1, C0:C1][region])) / max(tex_med, 1e-3),
    )
    kind, iso, conf = _classify_dark(f)
    return Detection(kind=kind, confidence=conf, contour=cont, iso6520=iso, features=f)


def _sigmoid(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def _classify_dark(f: dict) -> tuple[str, str, float]:
    """Kind, ISO 6520-1 number and confidence of a dark region from its features."""
    g = f["greatest_mm"]
    thick = f["area_mm2"] / max(g, 1e-6)  # mean thickness along its length
    aspect = f["aspect"]
    solidity = f["solidity"]
    rough = f["roughness"]
    # evidence it is real: contrast-to-noise and a sharp edge (dirt is soft)
    real = _sigmoid((f["cnr"] - 5.0) / 1.5) * _sigmoid((f["edge_sharpness"] - 1.6) / 0.4)
    if (thick < 0.4 and g / max(thick, 1e-6) > 6) or (f["ridge"] and aspect > 4):
        # thin, long, sharp-ended: an open discontinuity / crack
        shape = _sigmoid((g / max(thick, 1e-6) - 6) / 2)
        return "crack", ISO6520["crack"], round(real * (0.5 + 0.5 * shape), 3)
    if solidity >= 0.86 and rough < 1.12:
        if aspect < 1.8:
            shape = _sigmoid((solidity - 0.86) / 0.03) * _sigmoid((1.8 - aspect) / 0.2)
            return "pore", ISO6520["pore"], round(real * (0.55 + 0.45 * shape), 3)
        shape = _sigmoid((solidity - 0.86) / 0.03)
        return "pore", ISO6520["pore-elongated"], round(real * (0.5 + 0.4 * shape), 3)
    shape = _sigmoid((0.9 - solidity) / 0.05) * 0.5 + _sigmoid((rough - 1.1) / 0.05) * 0.5
    return "inclusion", ISO6520["inclusion"], round(real * (0.5 + 0.45 * shape), 3)


def _unfused(rgb, g, tex, tex_med, mask, dark_dets, *, mm, min_size_mm, test) -> list[Detection]:
    """Smooth, untextured (often tinted) regions: lack of fusion / incomplete penetration."""
    if test == "bend":
        return []
    h, w = g.shape
    smooth = (tex < 0.35 * tex_med) & mask
    # exclude what the dark detector already explains
    taken = np.zeros((h, w), np.uint8)
    for d in dark_dets:
        cv2.fillPoly(taken, [np.round(d.contour).astype(np.int32)], 1)
    taken = cv2.dilate(taken, np.ones((5, 5), np.uint8)) > 0
    smooth &= ~taken
    k = max(3, int(round(0.3 * mm)) | 1)
    smooth = cv2.morphologyEx(smooth.astype(np.uint8), cv2.MORPH_OPEN, np.ones((k, k), np.uint8))
    smooth = cv2.morphologyEx(smooth, cv2.MORPH_CLOSE, np.ones((k, k), np.uint8)) > 0
    lab, n = ndi.label(smooth)
    hsv = cv2.cvtColor(rgb, cv2.COLOR_RGB2HSV).astype(np.float32)
    sat_med = float(np.median(hsv[..., 1][mask]))
    out = []
    for i, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None:
            continue
        reg = lab[sl] == i
        if reg.sum() < (1.0 * mm) ** 2:
            continue
        cs = skm.find_contours(np.pad(reg.astype(float), 1), 0.5)
        if not cs:
            continue
        cont = max(cs, key=len)[:, ::-1] - 1 + np.array([sl[1].start, sl[0].start])
        if np.allclose(cont[0], cont[-1]):
            cont = cont[:-1]
        f = polygon_features(cont, px_per_mm=mm)
        if f["greatest_mm"] < max(min_size_mm, 1.0):
            continue
        smooth_ratio = float(np.median(tex[sl][reg])) / max(tex_med, 1e-3)
        tint = float(np.median(hsv[..., 1][sl][reg])) - sat_med
        f.update(smooth_ratio=smooth_ratio, tint=tint, contrast=0.0, cnr=0.0)
        conf = _sigmoid((0.3 - smooth_ratio) / 0.06) * (0.6 + 0.4 * _sigmoid((tint - 10) / 8))
        conf *= _sigmoid((f["greatest_mm"] - 1.0) / 0.4)
        near_edge = min(f["y0_px"], h - 1 - f["y1_px"]) < 0.5 * mm
        iso = ISO6520["unfused-root"] if near_edge else ISO6520["unfused"]
        out.append(Detection(kind="unfused", confidence=round(float(conf), 3), contour=cont, iso6520=iso, features=f))
    return out
