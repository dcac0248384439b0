"""Bend openings must stand out of the texture grain of their own neighbourhood.

Checks against the outside world:
* the neighbourhood's grain is the normal-scaled median absolute deviation,
  compared with SciPy's ``scipy.stats.median_abs_deviation(scale="normal")``
  on the same pixels;
* constructed coupon images whose truth is known by construction: a strip of
  fine grain with one stretch of coarse grain (as a stretched surface shows
  orange peel in places), shallow dips and deep openings placed on both;
  isotropic grain with a thin line of known depth laid on it.
"""

from __future__ import annotations

import cv2
import pytest
import numpy as np
from scipy import stats

from surfaces import bend

MM = 10.0  # px/mm of the constructed strip
L_MM, W_MM = 80.0, 20.0
COARSE = (8.0, 30.0)  # x range (mm) of the coarse-grained stretch


def _grain(rng, shape, *, sigma_mm, amp):
    """Zero-mean grain of about ``amp`` spread at the scale ``sigma_mm`` (Gaussian-blurred white noise)."""
    n = cv2.GaussianBlur(rng.standard_normal(shape).astype(np.float32), (0, 0), sigma_mm * MM)
    return amp * n / max(float(n.std()), 1e-6)


def _strip(seed, dips):
    """Grey strip (rows across, columns along), ``dips`` = [(x_mm, y_mm, radius_mm, depth_share, sharp)]."""
    rng = np.random.default_rng(seed)
    h, w = int(W_MM * MM), int(L_MM * MM)
    base = 160.0 * (1.0 + _grain(rng, (h, w), sigma_mm=0.1, amp=0.006))
    x = np.arange(w) / MM
    coarse = ((x >= COARSE[0]) & (x < COARSE[1])).astype(np.float32)
    coarse = cv2.GaussianBlur(coarse[None, :].repeat(h, 0), (0, 0), 0.5 * MM)
    base *= 1.0 + coarse * _grain(rng, (h, w), sigma_mm=0.35, amp=0.045)
    yy, xx = np.mgrid[0:h, 0:w] / MM
    for cx, cy, r, depth, sharp in dips:
        d = np.hypot(xx - cx, yy - cy)
        prof = (d <= r).astype(np.float32) if sharp else np.exp(-0.5 * (d / r) ** 2)
        if sharp:
            prof = cv2.GaussianBlur(prof, (0, 0), 0.6)
        base *= 1.0 - depth * prof
    g = np.clip(base, 0, 255).astype(np.uint8)
    return np.dstack([g, g, g])


def _found(dets, x, y, tol=1.0):
    return [d for d in dets if abs(d.features["cx_mm"] - x) < tol and abs(d.features["cy_mm"] - y) < tol]


def test_local_grain_is_the_normal_scaled_mad_of_the_neighbourhood():
    rng = np.random.default_rng(3)
    rel = rng.normal(0.0, 0.02, (120, 300)).astype(np.float32)
    rel[:, 150:] *= 4.0  # coarser on the right
    cand = np.zeros(rel.shape, bool)
    cand[50:60, 200:210] = True
    valid = np.ones(rel.shape, bool)
    valid[:3] = False
    f = {"x0_mm": 20.0, "x1_mm": 21.0, "y0_mm": 5.0, "y1_mm": 6.0}
    got = bend._local_grain(rel, cand, valid, f, mm=MM)
    r = int(round(bend.LOCAL_GRAIN_MM * MM))
    R0, R1, C0, C1 = 50 - r, 60 + r + 1, 200 - r, 210 + r + 1
    win, keep = rel[R0:R1, C0:C1], valid[R0:R1, C0:C1] & ~cand[R0:R1, C0:C1]
    cc, cr = 205 - C0, 55 - R0
    halves = [np.s_[:, :cc], np.s_[:, cc:], np.s_[:cr, :], np.s_[cr:, :]]
    # SciPy reference: the coarsest of the four halves' normal-scaled MADs
    ref = max(stats.median_abs_deviation(win[p][keep[p]], scale="normal") for p in halves)
    assert abs(got - ref) <= 1e-5 * ref
    assert abs(got - 0.08) < 0.01  # all in the coarse grain (by construction: spread 0.02 x 4)
    # an opening just inside the coarse stretch is judged by the coarse side, not the smooth one
    f = {"x0_mm": 15.2, "x1_mm": 15.6, "y0_mm": 5.0, "y1_mm": 5.4}
    assert abs(bend._local_grain(rel, np.zeros_like(cand), valid, f, mm=MM) - 0.08) < 0.01


def test_a_shallow_dip_in_coarse_grain_is_not_an_opening_but_a_deep_one_is():
    # truth by construction: a 12 % dip 1.5 mm across is three spreads of the coarse grain
    # deep (no more than the grain's own dips) but twenty of the fine grain; a sharp-walled
    # 60 % deep pore stands out of either
    shallow_coarse = (19.0, 8.0, 0.6, 0.12, False)
    deep_coarse = (14.0, 13.0, 0.6, 0.6, True)
    shallow_fine = (55.0, 8.0, 0.6, 0.12, False)
    deep_fine = (68.0, 12.0, 0.6, 0.6, True)
    rgb = _strip(5, [shallow_coarse, deep_coarse, shallow_fine, deep_fine])
    dets = bend.find_openings(rgb, px_per_mm=MM, photo_px_per_mm=MM, min_size_mm=0.3)
    for x, y, *_ in (deep_coarse, deep_fine, shallow_fine):
        assert len(_found(dets, x, y)) == 1, (x, y, [(d.features["cx_mm"], d.features["cy_mm"]) for d in dets])
    assert not _found(dets, shallow_coarse[0], shallow_coarse[1]), "a dip no deeper than its grain was reported"
    # nothing else: the coarse grain's own dips are not openings either
    assert len(dets) == 3, [(round(d.features["cx_mm"], 1), round(d.features["cy_mm"], 1), round(d.features["local_cnr"], 1)) for d in dets]
    for d in dets:
        assert d.features["local_cnr"] >= bend.LOCAL_MIN_CNR


@pytest.mark.parametrize("seed", range(5))
def test_a_thin_line_stands_out_of_grain_averaged_along_it_and_grain_alone_does_not(seed):
    # truth by construction: isotropic grain (white noise blurred to 0.35 mm, spread 0.06 of
    # the surface's brightness) and a 5 mm line 0.2 mm wide, 25 % deep, at 75 degrees.  Judged
    # pixel by pixel the line stands only about 5-7 spreads out of the grain; averaged along
    # its own direction and length the grain's blobs average out and the line does not, so it
    # stands clearly further out; the same outline laid on grain alone finds no line there.
    import math

    from surfaces.shapes import polygon_features

    rng = np.random.default_rng(seed)
    h, w = 200, 300
    n = cv2.GaussianBlur(rng.standard_normal((h, w)).astype(np.float32), (0, 0), 0.35 * MM)
    rel = 0.06 * n / n.std()
    m = np.zeros((h, w), np.uint8)
    d = np.array([math.cos(math.radians(75)), math.sin(math.radians(75))])
    p0, p1 = (np.array([15.0, 10.0]) - 2.5 * d) * MM, (np.array([15.0, 10.0]) + 2.5 * d) * MM
    cv2.line(m, tuple(int(round(v)) for v in p0), tuple(int(round(v)) for v in p1), 1, 2)
    line = m > 0
    cont = cv2.findContours(m, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)[0][0].reshape(-1, 2).astype(float)
    f = polygon_features(cont, px_per_mm=MM)
    valid = np.ones((h, w), bool)
    with_line = rel + 0.25 * line
    pixelwise = float(np.percentile(with_line[line], 95)) / bend._local_grain(with_line, line, valid, f, mm=MM)
    along = bend._line_local_cnr(with_line, line, valid, f, cont, mm=MM, resolve_mm=0.1)
    assert along > 1.1 * pixelwise
    assert bend._line_local_cnr(rel, line, valid, f, cont, mm=MM, resolve_mm=0.1) < 3.0
