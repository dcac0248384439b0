"""Shape measures against analytic geometry and scikit-image's regionprops."""

import math

import cv2
import numpy as np
import pytest
from skimage import draw, measure

from surfaces.shapes import ellipse_misfit, feret, moment_ellipse, polygon_area, polygon_features


def circle(r, n=720, cx=0.0, cy=0.0):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return np.c_[cx + r * np.cos(t), cy + r * np.sin(t)]


def ellipse(a, b, theta=0.0, n=1440):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    x, y = a * np.cos(t), b * np.sin(t)
    c, s = math.cos(theta), math.sin(theta)
    return np.c_[c * x - s * y, s * x + c * y]


@pytest.mark.parametrize("r", [0.25, 1.0, 3.7])
def test_circle_area_and_diameters_analytic(r):
    # analytic geometry: area pi r^2, every Feret diameter is 2r
    f = polygon_features(circle(r), px_per_mm=1.0)
    assert f["area_mm2"] == pytest.approx(math.pi * r * r, rel=1e-4)
    assert f["greatest_mm"] == pytest.approx(2 * r, rel=1e-4)
    assert f["width_mm"] == pytest.approx(2 * r, rel=1e-4)
    assert f["solidity"] == pytest.approx(1.0, abs=1e-6)


@pytest.mark.parametrize("a,b,theta", [(3.0, 1.0, 0.0), (2.0, 0.5, 0.7), (5.0, 4.0, 2.0)])
def test_ellipse_area_and_ferets_analytic(a, b, theta):
    # analytic geometry: ellipse area pi a b; max Feret 2a, min Feret 2b
    f = polygon_features(ellipse(a, b, theta), px_per_mm=1.0)
    assert f["area_mm2"] == pytest.approx(math.pi * a * b, rel=1e-4)
    assert f["greatest_mm"] == pytest.approx(2 * a, rel=1e-4)
    assert f["width_mm"] == pytest.approx(2 * b, rel=1e-3)


def test_rectangle_ferets_analytic():
    # analytic geometry: a w x h rectangle has max Feret sqrt(w^2 + h^2), min Feret min(w, h)
    pts = np.array([[0, 0], [7, 0], [7, 2], [0, 2]], float)
    gmax, gmin, _ = feret(pts)
    assert gmax == pytest.approx(math.hypot(7, 2))
    assert gmin == pytest.approx(2.0)
    assert polygon_area(pts) == pytest.approx(14.0)


def test_px_per_mm_scales_sizes():
    f1 = polygon_features(circle(32.0), px_per_mm=16.0)
    assert f1["greatest_mm"] == pytest.approx(4.0, rel=1e-4)
    assert f1["area_mm2"] == pytest.approx(math.pi * 4.0, rel=1e-4)


@pytest.mark.parametrize("seed", range(5))
def test_against_skimage_regionprops(seed):
    # reference library: scikit-image regionprops feret_diameter_max and area on the
    # same mask; our outline comes from find_contours at the 0.5 level, so the two
    # differ by at most about a pixel (regionprops measures pixel-corner hulls).
    rng = np.random.default_rng(seed)
    img = np.zeros((200, 220), bool)
    rr, cc = draw.ellipse(100, 110, rng.uniform(10, 60), rng.uniform(8, 40), rotation=rng.uniform(0, np.pi))
    img[rr, cc] = True
    props = measure.regionprops(img.astype(np.uint8))[0]
    cont = measure.find_contours(np.pad(img, 1).astype(float), 0.5)[0][:, ::-1] - 1
    f = polygon_features(cont, px_per_mm=1.0)
    assert f["greatest_mm"] == pytest.approx(props.feret_diameter_max, abs=1.5)
    assert f["area_mm2"] == pytest.approx(props.area, rel=0.03)
    # min Feret vs regionprops' minor axis of the equivalent ellipse (ellipses only)
    assert f["width_mm"] == pytest.approx(props.axis_minor_length, abs=2.0)


def _square_misfit() -> float:
    """Analytic geometry: a square (half-side 1) against the disc with its area centroid and second
    moments.  Both have I = s^4 / 12 = pi r^4 / 4 about their axes, so r = 2 / sqrt(3); the disc
    overhangs each side by a circular segment of area r^2 acos(1 / r) - sqrt(r^2 - 1)."""
    r = 2 / math.sqrt(3)
    segment = r * r * math.acos(1 / r) - math.sqrt(r * r - 1)
    overlap = math.pi * r * r - 4 * segment
    return ((4 - overlap) + (math.pi * r * r - overlap)) / 4


@pytest.mark.parametrize("a,b,theta", [(1.0, 1.0, 0.0), (3.0, 1.0, 0.0), (2.0, 0.5, 0.7), (40.0, 12.0, 2.0)])
def test_moment_ellipse_of_an_ellipse_is_itself(a, b, theta):
    # analytic geometry: an ellipse's area and second moments are those of itself
    pts = ellipse(a, b, theta)
    ea, eb, eth = moment_ellipse(cv2.moments(pts.astype(np.float32).reshape(-1, 1, 2)))
    assert ea == pytest.approx(a, rel=1e-3)
    assert eb == pytest.approx(b, rel=1e-3)
    if a > b:  # the axis direction is defined up to a half turn
        assert math.cos(2 * (eth - theta)) == pytest.approx(1.0, abs=1e-4)


def test_moment_ellipse_matches_regionprops():
    # reference library: scikit-image regionprops axis lengths (4 sqrt of the eigenvalues of the
    # pixels' normalised central moments) on a drawn ellipse, against the traced outline's polygon
    m = np.zeros((200, 260), np.uint8)
    rr, cc = draw.ellipse(100, 130, 30, 90, shape=m.shape, rotation=0.4)
    m[rr, cc] = 1
    p = measure.regionprops(m)[0]
    c = measure.find_contours(np.pad(m, 1).astype(float), 0.5)[0][:, ::-1]
    ea, eb, _ = moment_ellipse(cv2.moments(c.astype(np.float32).reshape(-1, 1, 2)))
    assert 2 * ea == pytest.approx(p.axis_major_length, rel=0.01)
    assert 2 * eb == pytest.approx(p.axis_minor_length, rel=0.02)


@pytest.mark.parametrize("a,b,theta", [(1.0, 1.0, 0.0), (3.0, 1.0, 0.3), (5.0, 0.8, 2.0)])
def test_ellipse_misfit_of_an_ellipse_is_near_zero(a, b, theta):
    # analytic geometry: an ellipse is its own moment ellipse, so nothing lies outside their overlap
    # (what is left is the raster's boundary rule, about a pixel of a 64-pixel grid)
    assert ellipse_misfit(ellipse(a, b, theta)) < 0.03


@pytest.mark.parametrize("w,h,theta", [(2.0, 2.0, 0.0), (6.0, 2.0, 0.0), (9.0, 1.5, 0.5), (3.0, 3.0, 0.785)])
def test_ellipse_misfit_of_rectangles_analytic(w, h, theta):
    # analytic geometry: the misfit is the same for every rectangle (an affine map takes any rectangle
    # and its moment ellipse to a square and its moment disc and keeps area ratios): _square_misfit()
    c, s = math.cos(theta), math.sin(theta)
    pts = np.array([[-w / 2, -h / 2], [w / 2, -h / 2], [w / 2, h / 2], [-w / 2, h / 2]]) @ np.array([[c, s], [-s, c]])
    assert ellipse_misfit(pts + [5.0, 7.0]) == pytest.approx(_square_misfit(), abs=0.02)


def test_ellipse_misfit_grows_with_notches():
    # analytic geometry: a disc with a quarter cut out (a notch) is further from any ellipse than the
    # square; the misfit of a disc is near zero
    t = np.linspace(0, 1.5 * np.pi, 540)
    notched = np.r_[np.c_[np.cos(t), np.sin(t)], [[0.0, 0.0]]]
    assert ellipse_misfit(notched) > _square_misfit() + 0.02
    assert ellipse_misfit(circle(1.0)) < 0.03
