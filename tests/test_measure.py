"""The outline-level and thin-protrusion terms of the size uncertainty
(surfaces.measure.level_spread, spur_spread_mm).

Checked against analytic geometry: a disc of radius R blurred by a Gaussian of
sigma s crosses the level ``b - f * contrast`` at radius R - s * Phi^-1(f)
(Phi^-1 from SciPy's ``norm.ppf``), when R is many sigmas.  Opening a disc
with a smaller disc gives the disc back (analytic), so only what sticks out
of it (a spur of known length) is counted.
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from scipy.stats import norm

from surfaces.measure import LEVEL_FRACS, level_spread, spur_spread_mm

MM = 16.0  # face-image pixels per mm
PHOTO = 1000.0  # photo px/mm: the function's own smoothing is then its 0.05 mm floor


def _disc_image(r_px: float, blur_px: float, *, extra=None):
    h = w = 240
    img = np.full((h, w), 200.0, np.float32)
    yy, xx = np.mgrid[0:h, 0:w]
    inside = (xx - 120.0) ** 2 + (yy - 120.0) ** 2 <= r_px**2
    img[inside] = 60.0
    if extra is not None:
        cx, cy, r2, level = extra
        img[((xx - cx) ** 2 + (yy - cy) ** 2 <= r2**2) & ~inside] = level
    return cv2.GaussianBlur(img, (0, 0), blur_px), inside


def _outline(mask: np.ndarray) -> np.ndarray:
    cs, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    return max(cs, key=len).reshape(-1, 2).astype(float)


def test_a_blurred_disc_spreads_as_the_gaussian_edge_says():
    blur = 3.0
    img, inside = _disc_image(40.0, blur)
    got = level_spread(img, _outline(inside), px_per_mm=MM, photo_px_per_mm=PHOTO)
    assert got is not None
    s_total = np.hypot(blur, 0.05 * MM)  # the image's blur and the function's own smoothing
    lo, hi = LEVEL_FRACS
    # analytic geometry: diameter at fraction f is 2 (R - s Phi^-1(f)); SciPy norm.ppf
    want = 2 * s_total * (norm.ppf(hi) - norm.ppf(lo)) / MM
    spread = got["greatest_mm"][0] - got["greatest_mm"][1]
    assert spread == pytest.approx(want, abs=1.5 / MM)
    # and the two sizes straddle the drawn disc's diameter (80 px = 5 mm)
    assert got["greatest_mm"][1] < 80 / MM + 1.5 / MM and got["greatest_mm"][0] > 80 / MM - 1.5 / MM
    assert got["area_mm2"][0] > got["area_mm2"][1]


def test_grey_grain_merged_at_one_level_widens_the_spread():
    # a grey grain touching the disc, taken into the outline at half contrast (as the
    # segmenter's level would): inside the region at 35 %, outside it at 65 %
    clean, inside = _disc_image(30.0, 1.5)
    merged, _ = _disc_image(30.0, 1.5, extra=(120 + 38, 120, 12, 125.0))
    union = merged < 200 - 0.5 * (200 - 60)
    a = level_spread(clean, _outline(inside), px_per_mm=MM, photo_px_per_mm=PHOTO)
    b = level_spread(merged, _outline(union), px_per_mm=MM, photo_px_per_mm=PHOTO)
    sa = a["greatest_mm"][0] - a["greatest_mm"][1]
    sb = b["greatest_mm"][0] - b["greatest_mm"][1]
    # analytic geometry: the grain reaches 38 + 12 px right of the centre, the disc 30 px,
    # so the extra spread is at most the grain's 20 px; the blurred grain's own edge at
    # these levels and the outline's reach keep it a few pixels under that
    assert 12 / MM < sb - sa <= 20 / MM


def test_no_contrast_gives_no_level_term():
    flat = np.full((120, 120), 128.0, np.float32)
    yy, xx = np.mgrid[0:120, 0:120]
    mask = (xx - 60) ** 2 + (yy - 60) ** 2 <= 20**2
    assert level_spread(flat, _outline(mask), px_per_mm=MM, photo_px_per_mm=PHOTO) is None


# --------------------------------------------------------------------------- thin protrusions


def _disc_with_spur(r_px: float, spur_len_px: float, spur_half_px: int) -> np.ndarray:
    """A disc centred at (120, 120) with a straight spur of ``2 * spur_half_px + 1`` px width to the right."""
    yy, xx = np.mgrid[0:240, 0:240]
    m = (xx - 120.0) ** 2 + (yy - 120.0) ** 2 <= r_px**2
    if spur_len_px > 0:
        m |= (abs(yy - 120) <= spur_half_px) & (xx >= 120) & (xx <= 120 + r_px + spur_len_px)
    return m


def test_a_round_outline_has_no_spur_term():
    # analytic: opening a disc with a smaller disc gives the disc back (up to the raster)
    for r in (6.0, 15.0, 40.0):
        assert spur_spread_mm(_outline(_disc_with_spur(r, 0, 0)), px_per_mm=MM, photo_px_per_mm=MM) < 1.5 / MM


def test_a_thin_spur_is_measured_as_its_length():
    # analytic: a disc of radius 30 px with a 3 px wide spur reaching 12 px past its rim: its
    # greatest dimension runs along the spur, 2R + 12 px; opened, it is the disc's 2R again, so
    # the spread is the spur's 12 px (within the raster's pixel)
    c = _outline(_disc_with_spur(30.0, 12.0, 1))
    got = spur_spread_mm(c, px_per_mm=MM, photo_px_per_mm=MM)
    assert got == pytest.approx(12.0 / MM, abs=1.5 / MM)


def test_a_region_too_thin_to_open_keeps_its_size():
    # a line 3 px wide is all "spur": the opening would take it whole, so no term
    yy, xx = np.mgrid[0:60, 0:200]
    line = (abs(yy - 30) <= 1) & (xx >= 20) & (xx <= 180)
    assert spur_spread_mm(_outline(line), px_per_mm=MM, photo_px_per_mm=MM) == 0.0


def test_the_spur_term_enters_the_greatest_uncertainty_only():
    # through measure(): the same pore with and without a spur on a flat grey face (no level
    # term: no contrast); the spur adds (spread) / sqrt(3) to the greatest dimension's
    # uncertainty (the value reported is the end of the range) and leaves the width's alone
    from test_bend import _face_and_calib

    from surfaces.measure import measure
    from surfaces.segment import Detection

    face, calib = _face_and_calib()
    plain = _outline(_disc_with_spur(30.0, 0, 0)) + [200, 100]
    spur = _outline(_disc_with_spur(30.0, 12.0, 1)) + [200, 100]
    # as slag inclusions: a rounded pore's outline adds its own term (its Feret diameter over its ellipse's)
    dets = [Detection("inclusion", 0.9, plain, "301"), Detection("inclusion", 0.9, spur, "301")]
    t = measure(dets, face, calib, photo_px_per_mm=face.px_per_mm)
    spread = spur_spread_mm(spur, px_per_mm=face.px_per_mm, photo_px_per_mm=face.px_per_mm)
    u0, u1 = t["greatest_u_mm"].iloc[0], t["greatest_u_mm"].iloc[1]
    g0, g1 = t["greatest_mm"].iloc[0], t["greatest_mm"].iloc[1]
    # the other terms scale with the length: remove that part before comparing
    expected = np.hypot(u0 * g1 / g0, spread / np.sqrt(3.0))
    assert spread > 0.5
    assert u1 == pytest.approx(expected, rel=0.1)
    assert t["width_u_mm"].iloc[1] == pytest.approx(t["width_u_mm"].iloc[0], rel=0.1)


# --------------------------------------------------------------------------- round pores: moment ellipse


def _noisy_circle(d_mm, sigma_mm, seed, n=240, aspect=1.0):
    """Outline (mm) of an ellipse of axes d x d/aspect whose radius wiggles by ``sigma_mm``: white noise
    smoothed over about 8 of the ``n`` points, as a traced outline wiggles, without the 0-3 cycles per turn
    that would change the shape itself (truth by construction)."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, 2 * np.pi, n, endpoint=False)
    k = np.abs(np.fft.fftfreq(n) * n)
    keep = np.exp(-0.5 * (k / 15.0) ** 2) * (k >= 4)
    noise = np.real(np.fft.ifft(np.fft.fft(rng.normal(0.0, 1.0, n)) * keep))
    noise *= 0.0 if sigma_mm == 0 else sigma_mm / (d_mm / 2) / noise.std()
    r = 1.0 + noise
    return np.c_[0.5 * d_mm * r * np.cos(t), 0.5 * d_mm / aspect * r * np.sin(t)] + [3.0, 3.0]


def test_round_pore_is_measured_by_its_moment_ellipse_not_its_wiggles():
    from skimage.measure import regionprops

    from surfaces.measure import round_axes_mm
    from surfaces.shapes import polygon_features

    over, axes_err = [], []
    for seed in range(6):
        mm = _noisy_circle(1.0, 0.015, seed)
        f = polygon_features(mm, px_per_mm=1.0)
        g, w = round_axes_mm(mm, f)
        over.append(f["greatest_mm"] - 1.0)
        axes_err.append(g - 1.0)
        assert w <= g
        # the same ellipse as scikit-image's regionprops (axis_major_length: the ellipse with the region's
        # normalised second central moments) on the outline rasterised at 200 px/mm
        m = np.zeros((1200, 1200), np.uint8)
        cv2.fillPoly(m, [np.round(mm * 200 * 16).astype(np.int32)], 1, shift=4)
        rp = regionprops(m)[0]
        assert g == pytest.approx(rp.axis_major_length / 200, rel=0.01)
        assert w == pytest.approx(rp.axis_minor_length / 200, rel=0.01)
    # the wiggles of a 1 mm circle traced to 0.015 mm lengthen its max Feret diameter by several
    # per cent; the moment ellipse stays on the diameter (analytic)
    assert min(over) > 0.03
    assert max(abs(e) for e in axes_err) < 0.01
    # an ellipse 1.2 x 1.0 mm without noise: its axes (analytic)
    mm = _noisy_circle(1.2, 0.0, 0, aspect=1.2)
    g, w = round_axes_mm(mm, polygon_features(mm, px_per_mm=1.0))
    assert g == pytest.approx(1.2, rel=0.002) and w == pytest.approx(1.0, rel=0.002)


def test_irregular_or_elongated_outlines_keep_their_feret_diameters():
    from surfaces.measure import round_axes_mm
    from surfaces.shapes import polygon_features

    t = np.linspace(0.0, 2 * np.pi, 240, endpoint=False)
    star = np.c_[(1 + 0.25 * np.cos(5 * t)) * np.cos(t), (1 + 0.25 * np.cos(5 * t)) * np.sin(t)] + 3.0
    assert round_axes_mm(star, polygon_features(star, px_per_mm=1.0)) is None
    stadium = _noisy_circle(2.0, 0.0, 0, aspect=2.0)
    assert round_axes_mm(stadium, polygon_features(stadium, px_per_mm=1.0)) is None


def test_only_pores_are_measured_by_the_moment_ellipse():
    # through measure(): one noisy round outline as a pore and as a slag inclusion on a flat face
    from test_bend import _face_and_calib

    from surfaces.measure import measure
    from surfaces.segment import Detection

    face, calib = _face_and_calib()
    q = face.px_per_mm
    c = _noisy_circle(1.5, 0.02, 3) * q + [200, 100] - 0.5  # face px: pixel centres at integers
    t = measure([Detection("pore", 0.9, c, "2011"), Detection("inclusion", 0.9, c, "301")], face, calib,
                photo_px_per_mm=q)
    sx = face.length_mm / face.image.shape[1]
    assert t["greatest_mm"].iloc[0] == pytest.approx(1.5 * sx * q, rel=0.015)
    assert t["greatest_mm"].iloc[1] > 1.03 * t["greatest_mm"].iloc[0]
    # the pore's value is the ellipse's end of the range up to its Feret diameter (the inclusion's value):
    # that range / sqrt(3) is in its uncertainty
    spread = t["greatest_mm"].iloc[1] - t["greatest_mm"].iloc[0]
    assert t["greatest_u_mm"].iloc[0] >= spread / np.sqrt(3.0) - 1e-9
