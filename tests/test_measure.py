"""The outline-level term of the size uncertainty (surfaces.measure.level_spread).

Checked against analytic geometry: a disc of radius R blurred by a Gaussian of
sigma s crosses the level ``b - f * contrast`` at radius R - s * Phi^-1(f)
(Phi^-1 from SciPy's ``norm.ppf``), when R is many sigmas.
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from scipy.stats import norm

from surfaces.measure import LEVEL_FRACS, level_spread

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
