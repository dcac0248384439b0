"""The region features that tell a pore from a slag inclusion, on shapes whose answer is known.

Shapes are drawn with OpenCV (``cv2.circle``, ``cv2.fillPoly``) into a grain
texture; their outlines are traced by the segmenter and the features compared
with analytic geometry.  The grey-level measures are checked on value sets
whose quartiles are known exactly.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
from scipy.optimize import brentq

from surfaces.regionmodel import FEATURES, along_elongation, feature_vector
from surfaces.segment import inner_grey
from test_segment import PPM, grain, nearest, paint, run, to_rgb
from test_shapes import _square_misfit


def test_inner_grey_of_a_uniform_ramp_analytic():
    # analytic: the quartiles of 0, 1, ..., 100 are 25 and 75, its 98th percentile 98, its median 50
    f = inner_grey(np.arange(101.0), ring_level=100.0, core_level=0.0)
    assert f["inner_spread"] == pytest.approx(0.5)
    assert f["highlight"] == pytest.approx(0.48)
    # the same values over a span twice as large: half the spread (the measures are relative)
    f2 = inner_grey(np.arange(101.0), ring_level=200.0, core_level=0.0)
    assert f2["inner_spread"] == pytest.approx(0.25)


def test_inner_grey_of_an_even_region_is_zero():
    # analytic: every quantile of a constant is the constant
    f = inner_grey(np.full(50, 30.0), ring_level=150.0, core_level=30.0)
    assert f == {"inner_spread": 0.0, "highlight": 0.0}
    # too few pixels to say anything: zero, not a guess
    assert inner_grey(np.array([1.0, 200.0]), ring_level=150.0, core_level=30.0) == {"inner_spread": 0.0, "highlight": 0.0}


@pytest.mark.parametrize("aspect, angle, expected", [
    (1.0, 0.3, 0.0),  # round: no direction
    (math.e, 0.0, 1.0),  # along the weld
    (math.e, math.pi, 1.0),  # the same line, the other way round
    (math.e, math.pi / 2, 0.0),  # across the weld
    (math.e**2, math.pi / 4, 2.0 / math.sqrt(2.0)),
    (30.0, 0.0, math.log(8.0)),  # a line: no more than an 8:1 region
])  # fmt: skip
def test_along_elongation_analytic(aspect, angle, expected):
    # analytic: log(min(aspect, 8)) |cos(angle)|
    assert along_elongation(aspect, angle) == pytest.approx(expected, abs=1e-9)


def _rect(cx, cy, length, width):
    return np.array([[cx - length / 2, cy - width / 2], [cx + length / 2, cy - width / 2],
                     [cx + length / 2, cy + width / 2], [cx - length / 2, cy + width / 2]]) * PPM  # fmt: skip


@pytest.fixture(scope="module")
def drawn():
    """A 2 mm disc, a 4 x 1.2 mm rectangle along the weld and the same one across it, dark on grain."""
    shape = (int(10 * PPM), int(32 * PPM))
    m = np.zeros(shape, np.uint8)
    cv2.circle(m, (int(6 * PPM), int(5 * PPM)), int(1.0 * PPM), 1, -1)
    cv2.fillPoly(m, [np.round(_rect(16, 5, 4.0, 1.2) * 16).astype(np.int32)], 1, shift=4)
    cv2.fillPoly(m, [np.round(_rect(25, 5, 1.2, 4.0) * 16).astype(np.int32)], 1, shift=4)
    dets = run(to_rgb(paint(grain(shape, seed=11), m.astype(bool), 45.0)))
    out = {}
    for name, x in (("disc", 6.0), ("along", 16.0), ("across", 25.0)):
        d, dist = nearest(dets, x, 5.0)
        assert d is not None and dist < 0.25, f"the drawn {name} was not found"
        out[name] = d
    return out


def test_traced_disc_is_round_and_convex(drawn):
    f = drawn["disc"].features
    # analytic geometry: a disc is convex (solidity 1) and is its own moment ellipse (misfit 0);
    # the traced outline of a blurred, quantised disc stays within a few per cent of both
    assert f["solidity"] > 0.97
    assert f["ellipse_misfit"] < 0.05
    assert along_elongation(f["aspect"], f["angle_rad"]) < 0.1


@pytest.mark.parametrize("name", ["along", "across"])
def test_traced_rectangle_misfit_analytic(drawn, name):
    f = drawn[name].features
    # analytic geometry: every rectangle lies 0.194 of its area off its moment ellipse; the blur
    # rounds the traced corners a little, which can only bring it nearer an ellipse
    assert f["ellipse_misfit"] == pytest.approx(_square_misfit(), abs=0.03)
    assert f["ellipse_misfit"] > 5 * drawn["disc"].features["ellipse_misfit"]
    assert f["solidity"] > 0.95  # analytic geometry: a rectangle is convex


def test_traced_rectangle_elongation_follows_the_weld(drawn):
    # analytic geometry: a 4 x 1.2 mm rectangle's greatest dimension is its diagonal, 16.7 deg off its
    # long side, and its min Feret its width: log(4.18 / 1.2) cos(16.7 deg) = 1.19 along the weld,
    # log(4.18 / 1.2) sin(16.7 deg) = 0.36 across it; the traced width is a little wider (half a pixel
    # each side), so the aspect and both values come out a little smaller
    diag = math.hypot(4.0, 1.2)
    ang = math.atan2(1.2, 4.0)
    for name, expected in (("along", math.log(diag / 1.2) * math.cos(ang)), ("across", math.log(diag / 1.2) * math.sin(ang))):
        f = drawn[name].features
        assert along_elongation(f["aspect"], f["angle_rad"]) == pytest.approx(expected, abs=0.15), name


def test_feature_vector_carries_the_new_features(drawn):
    # the model sees what was measured: the vector's entries are the features themselves
    f = drawn["along"].features
    v = feature_vector(f)
    assert v[FEATURES.index("ellipse_misfit")] == pytest.approx(f["ellipse_misfit"])
    assert v[FEATURES.index("inner_spread")] == pytest.approx(f["inner_spread"])
    assert v[FEATURES.index("along_elong")] == pytest.approx(along_elongation(f["aspect"], f["angle_rad"]))
    assert v[FEATURES.index("bowl")] == pytest.approx(f["bowl"])
    assert v[FEATURES.index("log_mottle")] == pytest.approx(math.log(max(f["mottle"], 0.005)))


def test_shaded_or_flecked_inside_spreads_more_than_an_even_one():
    # by construction: three 2.4 mm discs on one face, one even, one with a brightness ramp across it
    # (a dull, unevenly lit filling), one even with a few bright flecks (glassy slag or a highlight)
    shape = (int(10 * PPM), int(30 * PPM))
    g = grain(shape, seed=12)
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]] / PPM
    for cx in (6.0, 15.0, 24.0):
        m = (xx - cx) ** 2 + (yy - 5.0) ** 2 <= 1.2**2
        g[m] = 40.0 + (30.0 * (xx[m] - cx + 1.2) / 2.4 if cx == 15.0 else 0.0)
    for dx, dy in ((-0.5, -0.3), (0.4, 0.2), (0.0, 0.5)):
        cv2.circle(g, (int((24.0 + dx) * PPM), int((5.0 + dy) * PPM)), 2, 120.0, -1)
    dets = run(to_rgb(g))
    even, ramp, fleck = (nearest(dets, cx, 5.0)[0].features for cx in (6.0, 15.0, 24.0))
    # analytic geometry: the quartiles of x over a disc of radius r lie at +/- u r, where the share of
    # the disc left of u r, 1/2 + (u sqrt(1 - u^2) + asin u) / pi, is 3/4 (u = 0.404); so the ramp's
    # quartiles are 30 u grey levels apart, over the span from the grain's mean (150) to the darkest (40)
    u = brentq(lambda u: 0.5 + (u * math.sqrt(1 - u * u) + math.asin(u)) / math.pi - 0.75, 0.0, 1.0)
    assert ramp["inner_spread"] == pytest.approx(30.0 * u / (150.0 - 40.0), abs=0.03)
    assert even["inner_spread"] < 0.03
    assert fleck["highlight"] > even["highlight"] + 0.2


def test_a_model_for_other_features_is_not_used(tmp_path):
    # a refit after a feature change starts from a model file written for the old features:
    # it is recognised as not fitting (so candidates come out bare for the fit), never half-used
    import json

    from surfaces.regionmodel import MODEL_PATH, model_fits

    assert model_fits()  # the shipped model matches the shipped features
    m = json.loads(MODEL_PATH.read_text())
    m["features"] = m["features"][:-1]
    p = tmp_path / "old.json"
    p.write_text(json.dumps(m))
    assert not model_fits(str(p))
    assert not model_fits(str(tmp_path / "missing.json"))


def test_orientation_changes_the_kind_never_whether_there_is_one(drawn):
    # by construction: the same 4 x 1.2 mm rectangle along and across the weld; whether it is an
    # imperfection (1 - P(none)) must not depend on which way it lies, only what kind it is may
    from surfaces.regionmodel import probabilities

    along = dict(drawn["along"].features)
    across = dict(along, angle_rad=along["angle_rad"] + math.pi / 2)
    p_along, p_across = probabilities(np.stack([feature_vector(along), feature_vector(across)]))
    assert p_along[0] == pytest.approx(p_across[0], abs=1e-12)
    assert p_along.sum() == pytest.approx(1.0) and p_across.sum() == pytest.approx(1.0)
    assert not np.allclose(p_along[1:], p_across[1:])  # the kinds do see it


def _disc_pixels(radius_px: float):
    """Rows, columns and distance in from the rim of the pixel centres of a disc (analytic geometry)."""
    r = int(math.ceil(radius_px))
    yy, xx = np.mgrid[-r : r + 1, -r : r + 1].astype(float)
    rho = np.hypot(xx, yy)
    inside = rho <= radius_px
    return yy[inside], xx[inside], radius_px - rho[inside]


def test_inner_relief_of_a_shadowed_floor_analytic():
    from surfaces.segment import inner_relief

    rows, cols, inward = _disc_pixels(12.0)
    # analytic: grey falling linearly with the distance in (a floor darkest in the middle) is
    # perfectly anti-correlated with it (bowl 1) and fully explained (mottle 0)
    v = 150.0 - 8.0 * inward
    f = inner_relief(v, rows, cols, inward, ring_level=150.0, core_level=50.0)
    assert f["bowl"] == pytest.approx(1.0, abs=1e-9)
    assert f["mottle"] == pytest.approx(0.0, abs=1e-9)
    # light from one side (a plane added) is explained as well: still no mottle
    f = inner_relief(v + 2.0 * cols - 1.0 * rows, rows, cols, inward, ring_level=150.0, core_level=50.0)
    assert f["mottle"] == pytest.approx(0.0, abs=1e-9)
    assert 0.0 < f["bowl"] < 1.0
    # lighter in the middle (a dome): the sign turns
    f = inner_relief(50.0 + 8.0 * inward, rows, cols, inward, ring_level=150.0, core_level=50.0)
    assert f["bowl"] == pytest.approx(-1.0, abs=1e-9)


def test_inner_relief_equals_scipys_fit():
    # reference library: SciPy's Pearson correlation and least-squares fit on the same values
    from scipy import linalg, stats

    from surfaces.segment import inner_relief

    rows, cols, inward = _disc_pixels(15.0)
    v = 90.0 - 2.0 * inward + 0.5 * cols + np.random.default_rng(3).normal(0.0, 6.0, rows.size)
    f = inner_relief(v, rows, cols, inward, ring_level=160.0, core_level=40.0)
    assert f["bowl"] == pytest.approx(-stats.pearsonr(inward, v).statistic, abs=1e-9)
    A = np.c_[np.ones_like(v), cols, rows, inward]
    coef, *_ = linalg.lstsq(A, v)
    assert f["mottle"] == pytest.approx(math.sqrt(np.mean((v - A @ coef) ** 2)) / 120.0, rel=1e-9)
    # by construction the noise is 6 grey levels over a 120 span: the mottle is about 0.05
    assert f["mottle"] == pytest.approx(6.0 / 120.0, rel=0.1)


def test_inner_relief_of_an_even_or_tiny_region_is_zero():
    from surfaces.segment import inner_relief

    rows, cols, inward = _disc_pixels(6.0)
    # analytic: a constant has no correlation with anything and nothing left to explain
    assert inner_relief(np.full(rows.size, 40.0), rows, cols, inward, ring_level=150.0, core_level=40.0) == {"bowl": 0.0, "mottle": 0.0}
    # too few pixels to say anything: zero, not a guess
    assert inner_relief(np.arange(5.0), np.arange(5.0), np.arange(5.0), np.arange(5.0), ring_level=150.0, core_level=40.0) == {"bowl": 0.0, "mottle": 0.0}


def test_shadowed_cavity_and_mottled_filling_are_told_apart():
    # by construction: two 2.4 mm discs on one grain face, one darkest in the middle and lighter
    # towards its rim (a cavity's floor in shadow), one as dark on average but mottled at random
    # (a dull solid filling)
    shape = (int(10 * PPM), int(20 * PPM))
    g = grain(shape, seed=21)
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]] / PPM
    rng = np.random.default_rng(22)
    rough = cv2.GaussianBlur(rng.normal(0.0, 1.0, shape).astype(np.float32), (0, 0), 1.5)
    rough *= 18.0 / rough.std()
    for cx in (5.0, 14.0):
        rho = np.hypot(xx - cx, yy - 5.0)
        m = rho <= 1.2
        g[m] = 25.0 + 40.0 * (rho[m] / 1.2) ** 2 if cx == 5.0 else 45.0 + rough[m]
    dets = run(to_rgb(g))
    cavity, filling = (nearest(dets, cx, 5.0)[0].features for cx in (5.0, 14.0))
    assert cavity["bowl"] > 0.5
    assert abs(filling["bowl"]) < 0.3
    assert filling["mottle"] > 2.0 * cavity["mottle"]


def test_fit_can_keep_the_detection_model(tmp_path):
    # a refit of the kind model alone takes the shipped detection model as it is, and refuses one
    # fitted on other detection features
    import importlib.util
    import json
    from pathlib import Path

    from surfaces.regionmodel import MODEL_PATH

    spec = importlib.util.spec_from_file_location("fit_region_model", Path(__file__).parents[1] / "scripts" / "fit_region_model.py")
    fitmod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(fitmod)
    shipped = json.loads(MODEL_PATH.read_text())
    kept = fitmod.kept_detection(str(MODEL_PATH))
    assert kept["W"] == shipped["W"] and kept["mean"] == shipped["mean"]
    other = dict(shipped, detect_features=shipped["detect_features"][:-1])
    p = tmp_path / "other.json"
    p.write_text(json.dumps(other))
    with pytest.raises(SystemExit):
        fitmod.kept_detection(str(p))


@pytest.mark.parametrize("p, expected", [
    # P(none) the largest single class but under the detection threshold: reported, as its likeliest kind
    ([0.35, 0.30, 0.25, 0.05, 0.05], "pore"),
    ([0.39, 0.10, 0.11, 0.40 - 0.01, 0.01], "unfused"),
    # the detection model says "none" at or above the threshold, whatever the kinds
    ([0.45, 0.50, 0.03, 0.01, 0.01], "none"),
])
def test_whether_to_report_is_the_detection_models_call(monkeypatch, p, expected):
    # the decision rule on given probabilities (analytic): report when P(none) < DETECT_P_NONE
    from surfaces import regionmodel as rm

    assert rm.CLASSES == ("none", "pore", "inclusion", "unfused", "crack")
    monkeypatch.setattr(rm, "probabilities", lambda X, model=None: np.array([p], float))
    monkeypatch.setattr(rm, "feature_vector", lambda f: np.zeros(len(FEATURES)))
    kind, conf, probs = rm.classify({})
    assert kind == expected
    assert conf == pytest.approx(p[rm.CLASSES.index(kind)])
    assert (p[0] < rm.DETECT_P_NONE) == (kind != "none")
