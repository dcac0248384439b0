"""The segmenter on faces whose imperfections are known by construction.

Each face is a grain texture (band-limited noise, or scikit-image's
``data.gravel`` photo) with dark discs, ellipses and thin lines of known size
drawn into it with ``skimage.draw``; the drawn masks are also measured with
``skimage.measure.regionprops`` (reference library) so the outlines are
checked against analytic geometry and against an independent measurement of
the same pixels.
"""

from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np
import pytest
from skimage import data, draw, measure

from surfaces.evaluate import greatest_tolerance_mm
from surfaces.model import SurfacesError
from surfaces.segment import SegmentError, segment

PPM = 16.0  # face pixels per mm (the runtime's working resolution)


def grain(shape, *, seed=0, mean=150.0, sd=12.0, scale_px=1.5):
    """Band-limited noise: a fine granular texture with no structure of its own."""
    rng = np.random.default_rng(seed)
    t = cv2.GaussianBlur(rng.normal(0, 1, shape).astype(np.float32), (0, 0), scale_px)
    return mean + t / t.std() * sd


def gravel(shape, *, mean=150.0, sd=12.0):
    """scikit-image's gravel photo, rescaled to the face's size and brightness."""
    t = data.gravel().astype(np.float32)
    f = max(shape[0] / t.shape[0], shape[1] / t.shape[1])
    t = cv2.resize(t, None, fx=f, fy=f, interpolation=cv2.INTER_LINEAR)[: shape[0], : shape[1]]
    return mean + (t - t.mean()) / t.std() * sd


def to_rgb(g, *, blur_px=0.8):
    """The face as a camera gives it: slightly blurred, 8-bit RGB."""
    g = cv2.GaussianBlur(g.astype(np.float32), (0, 0), blur_px)
    g = np.clip(np.round(g), 0, 255).astype(np.uint8)
    return np.dstack([g, g, g])


def paint(g, mask, level):
    g = g.copy()
    g[mask] = level
    return g


def disc_mask(shape, centre_mm, d_mm, ppm=PPM):
    m = np.zeros(shape, bool)
    rr, cc = draw.disk((centre_mm[1] * ppm, centre_mm[0] * ppm), d_mm / 2 * ppm, shape=shape)
    m[rr, cc] = True
    return m


def nearest(dets, x_mm, y_mm, ppm=PPM):
    best, dist = None, np.inf
    for d in dets:
        dd = math.hypot(d.features["cx_px"] / ppm - x_mm, d.features["cy_px"] / ppm - y_mm)
        if dd < dist:
            best, dist = d, dd
    return best, dist


def run(rgb, ppm=PPM, **kw):
    return segment(rgb, None, px_per_mm=ppm, photo_px_per_mm=kw.pop("photo", ppm), **kw)


DISCS = [((4.0, 3.0), 0.6), ((10.0, 6.5), 1.0), ((17.0, 3.5), 1.6), ((26.0, 6.0), 2.4)]


@pytest.mark.parametrize("texture", ["grain", "gravel"])
def test_discs_found_with_their_size(texture):
    shape = (int(10 * PPM), int(32 * PPM))
    g = grain(shape) if texture == "grain" else gravel(shape)
    masks = []
    for c, d in DISCS:
        m = disc_mask(shape, c, d)
        g = paint(g, m, 45.0)
        masks.append(m)
    dets = run(to_rgb(g))
    for (c, d), m in zip(DISCS, masks):
        det, dist = nearest(dets, *c)
        assert det is not None and dist < 0.25, f"disc of {d} mm at {c} not found"
        assert det.kind != "none"
        g_mm = det.features["greatest_mm"]
        # analytic geometry: every Feret diameter of a disc is its diameter; the tolerance is
        # the accuracy target's own max(0.15 mm, 5 %)
        assert abs(g_mm - d) <= greatest_tolerance_mm(d), (d, g_mm)
        # scikit-image regionprops on the same drawn pixels (pixel-corner hull: within a pixel and a half)
        p = measure.regionprops(m.astype(np.uint8))[0]
        assert g_mm == pytest.approx(p.feret_diameter_max / PPM, abs=1.5 / PPM + 0.05)
        # area: analytic pi d^2 / 4 and regionprops' pixel count; the outline is traced at half
        # contrast on a blurred, quantised image, which adds up to about half a pixel all round
        # (20 % of a 0.6 mm disc's area, under 10 % from 1 mm up)
        rel = 0.2 if d < 1.0 else 0.1
        assert det.features["area_mm2"] == pytest.approx(math.pi * d * d / 4, rel=rel)
        assert det.features["area_mm2"] == pytest.approx(p.area / PPM**2, rel=rel)


def test_dark_discs_are_called_pores_on_grain():
    shape = (int(10 * PPM), int(32 * PPM))
    g = grain(shape, seed=3)
    for c, d in DISCS[1:]:
        g = paint(g, disc_mask(shape, c, d), 40.0)
    dets = run(to_rgb(g))
    kinds = [nearest(dets, *c)[0].kind for c, _ in DISCS[1:]]
    # a round, smooth, dark cavity is a pore (ISO 6520-1 group 2); most must say so
    assert kinds.count("pore") >= 2, kinds


def test_elongated_region_greatest_and_width():
    shape = (int(10 * PPM), int(24 * PPM))
    a, b, theta = 1.6, 0.4, 0.3  # semi-axes in mm, rotation in rad
    m = np.zeros(shape, bool)
    rr, cc = draw.ellipse(5.0 * PPM, 12.0 * PPM, b * PPM, a * PPM, shape=shape, rotation=theta)
    m[rr, cc] = True
    dets = run(to_rgb(paint(grain(shape, seed=1), m, 50.0)))
    det, dist = nearest(dets, 12.0, 5.0)
    assert dist < 0.3
    # analytic geometry: an ellipse's max Feret is 2a, its min Feret 2b
    assert abs(det.features["greatest_mm"] - 2 * a) <= greatest_tolerance_mm(2 * a)
    assert det.features["width_mm"] == pytest.approx(2 * b, abs=0.15)
    # regionprops on the same pixels
    p = measure.regionprops(m.astype(np.uint8))[0]
    assert det.features["greatest_mm"] == pytest.approx(p.feret_diameter_max / PPM, abs=0.15)


def test_thin_line_is_a_crack_of_its_length():
    shape = (int(10 * PPM), int(30 * PPM))
    L, w, ang = 6.0, 0.15, math.radians(8)  # mm, mm, rad
    c = np.array([15.0, 5.0])
    u, n = np.array([math.cos(ang), math.sin(ang)]), np.array([-math.sin(ang), math.cos(ang)])
    corners = np.array([c - u * L / 2 - n * w / 2, c + u * L / 2 - n * w / 2, c + u * L / 2 + n * w / 2,
                        c - u * L / 2 + n * w / 2]) * PPM  # fmt: skip
    m = np.zeros(shape, np.uint8)
    cv2.fillPoly(m, [np.round(corners * 16).astype(np.int32)], 1, shift=4)
    dets = run(to_rgb(paint(grain(shape, seed=2), m.astype(bool), 40.0)))
    det, dist = nearest(dets, *c)
    assert dist < 0.5
    assert det.kind == "crack"
    # analytic geometry: a w x L rectangle's max Feret is its diagonal
    diag = math.hypot(L, w)
    assert abs(det.features["greatest_mm"] - diag) <= greatest_tolerance_mm(diag)


def test_sizes_in_mm_do_not_depend_on_the_resolution():
    out = {}
    for ppm in (12.0, 16.0, 24.0):
        shape = (int(10 * ppm), int(20 * ppm))
        g = grain(shape, seed=4, scale_px=1.5 * ppm / 16)
        g = paint(g, disc_mask(shape, (10.0, 5.0), 1.8, ppm), 45.0)
        dets = run(to_rgb(g, blur_px=0.8 * ppm / 16), ppm)
        det, dist = nearest(dets, 10.0, 5.0, ppm)
        assert dist < 0.25
        out[ppm] = det.features["greatest_mm"]
    # analytic: a 1.8 mm disc at every resolution
    for ppm, v in out.items():
        assert abs(v - 1.8) <= greatest_tolerance_mm(1.8), (ppm, v)


def test_blank_face_gives_no_detection():
    shape = (int(10 * PPM), int(40 * PPM))
    g = np.full(shape, 150.0, np.float32) + np.random.default_rng(5).normal(0, 2.0, shape)
    assert run(to_rgb(g)) == []


def test_grain_alone_gives_no_detection():
    shape = (int(10 * PPM), int(40 * PPM))
    assert run(to_rgb(grain(shape, seed=6))) == []


def test_mask_hides_what_lies_outside_it():
    shape = (int(10 * PPM), int(20 * PPM))
    g = paint(grain(shape, seed=7), disc_mask(shape, (15.0, 5.0), 1.5), 45.0)
    mask = np.zeros(shape, bool)
    mask[:, : int(10 * PPM)] = True
    assert segment(to_rgb(g), mask, px_per_mm=PPM) == []


@pytest.mark.parametrize(
    "rgb, kw, words",
    [
        (np.full((40, 40, 3), np.nan), {}, "NaN"),
        (np.zeros((40, 40, 3), np.float32), {}, "uint8"),
        (np.zeros((40, 40), np.uint8), {}, "(h, w, 3)"),
        (np.zeros((40, 40, 4), np.uint8), {}, "(h, w, 3)"),
        (np.zeros((40, 40, 3), np.uint8), {"px_per_mm": float("nan")}, "px_per_mm"),
        (np.zeros((40, 40, 3), np.uint8), {"px_per_mm": -3.0}, "px_per_mm"),
        (np.zeros((40, 40, 3), np.uint8), {"photo_px_per_mm": 0.0}, "photo_px_per_mm"),
        (np.zeros((40, 40, 3), np.uint8), {"mask": np.ones((10, 10), bool)}, "mask"),
    ],
)
def test_bad_input_is_a_clear_error(rgb, kw, words):
    kw = {"px_per_mm": PPM, **kw}
    mask = kw.pop("mask", None)
    with pytest.raises(SegmentError) as e:
        segment(rgb, mask, **kw)
    msg = str(e.value)
    assert words in msg and "\n" not in msg
    assert isinstance(e.value, SurfacesError)


def rimmed_face(*, seed, rim_mm, H=8.0, W=50.0):
    """A grain face whose top edge is a bright smooth rim, with two smooth bands at the root (bottom) edge.

    The rim: over its outer half the grain keeps 5 % of its contrast and the
    face is 25 grey levels brighter, then both ramp back to the face's grain
    over its inner half (a rounded or sheared edge catching the light).  The
    bands: grain at 15 % contrast, one 17 mm x 1.4 mm with an oxide-like tint,
    one 17 mm x 2.6 mm untinted.  The mask leaves a 0.25 mm edge band out, as
    the pipeline does.  Returns the RGB face, the mask and the bands as
    (x0, x1, visible width) in mm.
    """
    h, w = int(H * PPM), int(W * PPM)
    g = grain((h, w), seed=seed)
    rows = (np.arange(h) + 0.5) / PPM
    ramp = np.clip((rows - 0.5 * rim_mm) / (0.5 * rim_mm), 0, 1)[:, None]
    g = 150 + (g - 150) * (0.05 + 0.95 * ramp) + 25 * (1 - ramp)
    inset = 0.25
    bands = {"tinted": (5.0, 22.0, 1.4), "grey": (28.0, 45.0, 2.6)}
    masks = {}
    for name, (x0, x1, bw) in bands.items():
        m = np.zeros((h, w), bool)
        m[int(round((H - bw) * PPM)) :, int(x0 * PPM) : int(x1 * PPM)] = True
        masks[name] = m
    smooth = masks["tinted"] | masks["grey"]
    g = np.where(smooth, 150 + (g - 150) * 0.15, g)
    g = cv2.GaussianBlur(g.astype(np.float32), (0, 0), 0.8)
    rgb = np.dstack([g, g, g])
    rgb[masks["tinted"]] += np.array([18.0, 4.0, -14.0])  # brown-blue shift: Lab chroma ~11 from the face
    rgb = np.clip(np.round(rgb), 0, 255).astype(np.uint8)
    k = int(round(inset * PPM))
    mask = np.zeros((h, w), bool)
    mask[k:-k, k:-k] = True
    return rgb, mask, {n: (x0, x1, bw - inset) for n, (x0, x1, bw) in bands.items()}, H


@pytest.mark.parametrize("seed,rim_mm", [(3, 1.0), (5, 1.0), (7, 0.8), (3, 1.2)])
def test_smooth_rim_along_the_edge_is_not_unfused_but_root_bands_are(seed, rim_mm):
    # truth by construction (rimmed_face); sizes against the drawn rectangles (analytic geometry)
    rgb, mask, bands, H = rimmed_face(seed=seed, rim_mm=rim_mm)
    dets = segment(rgb, mask, px_per_mm=PPM, photo_px_per_mm=PPM)
    unfused = [d for d in dets if d.kind == "unfused"]
    # nothing called unfused within the rim (the top 1.5 mm of the face)
    assert not [d for d in unfused if d.features["cy_mm"] < 1.5], [round(d.features["cy_mm"], 2) for d in unfused]
    for name, (x0, x1, width) in bands.items():
        d, dist = nearest(unfused, (x0 + x1) / 2, H - width / 2)
        assert d is not None and dist < 1.0, name
        # greatest dimension within the evaluation's tolerance (max(0.15 mm, 5 %))
        assert abs(d.features["greatest_mm"] - (x1 - x0)) <= greatest_tolerance_mm(x1 - x0), name
        # width: the 0.8 px blur and the half-contrast outline move each side by under a pixel or two
        assert abs(d.features["width_mm"] - width) <= 0.25, (name, d.features["width_mm"], width)


def edge_band_face(*, seed, contrast, H=8.0, W=40.0, band=(10.0, 30.0), band_mm=1.25, inset=0.25):
    """A grain face with an untinted band along its bottom (root) edge whose grain keeps ``contrast`` of the face's.

    The band is ``band_mm`` deep from the specimen's edge, the mask leaves the
    pipeline's 0.25 mm edge band out, so under 1 mm of it is seen: a strip
    along the edge.  Returns the RGB face and its mask.
    """
    h, w = int(H * PPM), int(W * PPM)
    g = grain((h, w), seed=seed)
    m = np.zeros((h, w), bool)
    m[int(round((H - band_mm) * PPM)) :, int(band[0] * PPM) : int(band[1] * PPM)] = True
    g = np.where(m, 150 + (g - 150) * contrast, g)
    k = int(round(inset * PPM))
    mask = np.zeros((h, w), bool)
    mask[k:-k, k:-k] = True
    return to_rgb(g), mask


@pytest.mark.parametrize("seed", [2, 4, 6])
def test_smooth_wall_strip_along_the_edge_is_unfused_but_a_worn_edge_is_not(seed):
    # truth by construction (edge_band_face): a 20 mm band at the root edge, under 1 mm of it inside the mask.
    # With no grain left (5 % contrast: a smooth wall) it is lack of fusion at the root, tinted or not; with
    # half the grain (a worn or blurred edge) it is the edge itself and is not reported.  The wall's greatest
    # dimension is checked against the drawn 20 mm within the evaluation's tolerance (max(0.15 mm, 5 %)).
    rgb, mask = edge_band_face(seed=seed, contrast=0.05)
    unfused = [d for d in segment(rgb, mask, px_per_mm=PPM, photo_px_per_mm=PPM) if d.kind == "unfused"]
    d, dist = nearest(unfused, 20.0, 7.3)
    assert d is not None and dist < 1.0, [(round(u.features["cx_mm"], 1), round(u.features["cy_mm"], 1)) for u in unfused]
    assert abs(d.features["greatest_mm"] - 20.0) <= greatest_tolerance_mm(20.0), d.features["greatest_mm"]
    rgb, mask = edge_band_face(seed=seed, contrast=0.5)
    worn = [d for d in segment(rgb, mask, px_per_mm=PPM, photo_px_per_mm=PPM) if d.kind == "unfused"]
    assert not worn, [(round(u.features["greatest_mm"], 1), round(u.features["cy_mm"], 1)) for u in worn]


def glinting_inclusion_face(*, seed, ring=True):
    """Grain with a 3.2 x 2.0 mm elliptical imperfection: a dark rim split top and bottom by 0.7 mm of grain
    around a bright, tinted 2.0 x 1.1 mm floor (a slag inclusion's glint). ``ring=False`` leaves only the floor."""
    shape = (int(10 * PPM), int(30 * PPM))
    g = grain(shape, seed=seed)
    outer, inner = np.zeros(shape, bool), np.zeros(shape, bool)
    rr, cc = draw.ellipse(5 * PPM, 15 * PPM, 1.0 * PPM, 1.6 * PPM, shape=shape)
    outer[rr, cc] = True
    rr, cc = draw.ellipse(5 * PPM, 15 * PPM, 0.55 * PPM, 1.0 * PPM, shape=shape)
    inner[rr, cc] = True
    if ring:
        split = np.abs(np.arange(shape[1])[None, :] / PPM - 15.0) > 0.35
        g = paint(g, outer & ~inner & split, 80.0)
    g = paint(g, inner, 175.0)
    rgb = to_rgb(g).astype(np.float32)
    rgb[inner] += np.array([22.0, 4.0, -18.0])  # Lab chroma well above the face's
    return np.clip(rgb, 0, 255).astype(np.uint8)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_bright_floor_between_dark_rim_pieces_is_one_imperfection(seed):
    # truth by construction (glinting_inclusion_face): one imperfection of greatest dimension 3.2 mm (the drawn
    # ellipse's major axis, analytic geometry), not two rim pieces and an 'unfused' floor
    dets = run(glinting_inclusion_face(seed=seed))
    assert [d.kind for d in dets if d.kind == "unfused"] == []
    assert len(dets) == 1, [(d.kind, round(d.features["greatest_mm"], 2)) for d in dets]
    assert abs(dets[0].features["greatest_mm"] - 3.2) <= greatest_tolerance_mm(3.2)
    # the same tinted smooth patch with no dark rim around it stays a smooth region of its own
    alone = run(glinting_inclusion_face(seed=seed, ring=False))
    assert [d.kind for d in alone] == ["unfused"]


@pytest.mark.parametrize("seed", [1, 5])
def test_dark_line_hugging_the_face_edge_is_a_crack_to_confirm(seed):
    # truth by construction: a 15 mm dark line 0.3 px wide drawn just inside the mask's top edge (as the face's
    # shadow reads when the outline lies a little outside the edge) is reported, but under the judge's default
    # 0.5 confidence (surfaces.limits.DEFAULT_MIN_CONFIDENCE) so it goes to review; the same line 3 mm in is a
    # confident crack of its drawn length (analytic: 15 mm, within max(0.15 mm, 5 %))
    from surfaces.limits import DEFAULT_MIN_CONFIDENCE

    H, W, k = 8.0, 40.0, int(round(0.25 * PPM))
    mask = np.zeros((int(H * PPM), int(W * PPM)), bool)
    mask[k:-k, k:-k] = True
    for row_mm, confident in ((0.25 + 0.1, False), (3.0, True)):
        g = grain(mask.shape, seed=seed)
        r = int(round(row_mm * PPM))
        g[r : r + 2, int(10 * PPM) : int(25 * PPM)] = 60.0
        cracks = [d for d in segment(to_rgb(g), mask, px_per_mm=PPM, photo_px_per_mm=PPM) if d.kind == "crack"]
        assert len(cracks) == 1, (row_mm, [(d.kind, round(d.features["greatest_mm"], 1)) for d in cracks])
        assert abs(cracks[0].features["greatest_mm"] - 15.0) <= greatest_tolerance_mm(15.0)
        assert (cracks[0].confidence >= DEFAULT_MIN_CONFIDENCE) is confident, (row_mm, cracks[0].confidence)


def test_label_medians_equal_scipys():
    # reference library: scipy.ndimage.median on the same labels and values
    from scipy import ndimage as ndi

    from surfaces.segment import label_medians

    rng = np.random.default_rng(5)
    lab, n = ndi.label(rng.random((300, 260)) > 0.55)
    for values in (rng.random((300, 260)).astype(np.float32), rng.integers(0, 9, (300, 260)).astype(np.float64)):
        want = np.asarray(ndi.median(values, lab, np.arange(1, n + 1)), float)
        np.testing.assert_allclose(label_medians(values, lab, n), want, rtol=0, atol=1e-6)
    one = np.zeros((50, 50), np.int32)
    one[10:14, 20:26] = 1  # a single small region in a large array
    vals = rng.random((50, 50))
    assert label_medians(vals, one, 1)[0] == pytest.approx(float(np.median(vals[one == 1])))


def calm_end_face(*, seed, calm=0.45, H=9.0, W=120.0, band=(100.0, 112.0), band_mm=2.5, tint=(14.0, 6.0, -6.0)):
    """A grain face whose grain falls to ``calm`` of the middle's over the last 35 mm at each end (light
    falling off along a long face), with a smooth band (``band`` mm along, ``band_mm`` deep from the
    bottom edge, grain at 10 %, RGB offset ``tint``) in one calm end; ``band=None``: no band."""
    h, w = int(H * PPM), int(W * PPM)
    x = np.arange(w) / PPM
    f = calm + (1 - calm) * np.clip(np.minimum(x, W - x) / 35.0, 0, 1)
    g = 150 + (grain((h, w), seed=seed, sd=14.0) - 150) * f[None, :]
    rgb = to_rgb(g).astype(np.float32)
    if band is not None:
        m = np.zeros((h, w), bool)
        m[int(round((H - band_mm) * PPM)) :, int(band[0] * PPM) : int(band[1] * PPM)] = True
        rgb[m] = 140.0 + np.asarray(tint, np.float32) + (rgb[m] - 150) * 0.1
    return np.clip(rgb, 0, 255).astype(np.uint8)


@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize("tint", [(14.0, 6.0, -6.0), (0.0, 0.0, 0.0)], ids=["tinted", "grey"])
@pytest.mark.parametrize("calm", [0.45, 1.0], ids=["calm-ends", "even"])
def test_smooth_band_in_a_calm_end_is_found_at_its_length(seed, tint, calm):
    # truth by construction (calm_end_face): a 12 mm smooth band along the root edge at X 100..112 mm,
    # in an end whose grain is under half the middle's.  Measured against the whole face's texture the
    # calm end itself reads as smooth and swallows the band (the band was not found at all); against the
    # face's level along the weld it is found at its length, within the evaluation's tolerance
    # (max(0.15 mm, 5 %)), evenly lit or not.
    rgb = calm_end_face(seed=seed, tint=tint, calm=calm)
    unfused = [d for d in run(rgb) if d.kind == "unfused"]
    d, dist = nearest(unfused, 106.0, 7.8)
    assert d is not None and dist < 1.5, [(round(u.features["cx_mm"], 1), round(u.features["greatest_mm"], 1)) for u in unfused]
    assert abs(d.features["greatest_mm"] - 12.0) <= greatest_tolerance_mm(12.0), d.features["greatest_mm"]
    assert len(unfused) == 1  # the calm ends themselves are not lack of fusion


def test_calm_ends_alone_are_not_unfused():
    # the same faces with no band (truth by construction: nothing to find)
    for seed in (1, 2, 3):
        dets = run(calm_end_face(seed=seed, band=None))
        assert not [d for d in dets if d.kind == "unfused"], [(d.kind, round(d.features["greatest_mm"], 1)) for d in dets]


# the sizes are those bench.generated_set drew for these photos (mp_range 2-4, set seeds 60606 and 90909)
@pytest.mark.parametrize("seed, mp", [(60634, 2.47840563108765), (90925, 2.2153271460324477)])
def test_side_wall_band_shaded_darker_in_part_is_found_at_its_length(tmp_path, seed, mp):
    # truth by construction (surfaces.synth, seeded): a nick-break face with a brown side-wall band of
    # lack of fusion (16.2 and 11.2 mm along).  Part of each band is shaded darker than the face and is
    # found as a dark region that the region model, rightly, does not call slag; that region used to
    # keep the smooth search out, so the band was measured at 4.9 and 2.4 mm.  Now it is found at its
    # length within issue 2's 10 %.
    import json

    from surfaces import bench, evaluate
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    path = render_fracture(seed, test="nick-break", megapixels=mp).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    a = assess_path(str(path), bench._settings_for_truth(truth)).assessment
    m = evaluate.match(a, truth)
    band = m[m.truth_kind == "unfused"]
    assert len(band) == 1 and bool(band.matched.iloc[0]) and band.det_kind.iloc[0] == "unfused", band.to_dict("records")
    t, d = float(band.truth_along_mm.iloc[0]), float(band.det_along_mm.iloc[0])
    assert abs(d - t) < 0.1 * t, (t, d)


@pytest.mark.parametrize("seed", [2, 4, 6])
def test_tinted_strip_along_the_edge_is_unfused_only_when_smooth(seed):
    # truth by construction (edge_band_face plus an oxide-like colour shift, Lab chroma ~11 from the face, over
    # the band): a 20 mm strip at the root edge, under 1 mm of it inside the mask.  Smooth (15 % of the grain)
    # it is lack of fusion, found at the drawn 20 mm within the evaluation's tolerance (max(0.15 mm, 5 %));
    # keeping the face's grain it is the edge's colour cast or shadow and is not reported (it used to be,
    # as a 20 mm lack of fusion).
    def tinted(contrast):
        rgb, mask = edge_band_face(seed=seed, contrast=contrast)
        band = np.zeros(rgb.shape[:2], bool)
        band[int(round((8.0 - 1.25) * PPM)) :, int(10 * PPM) : int(30 * PPM)] = True
        f = rgb.astype(np.float32)
        f[band] += np.array([18.0, 4.0, -14.0])
        return np.clip(np.round(f), 0, 255).astype(np.uint8), mask

    rgb, mask = tinted(0.15)
    unfused = [d for d in segment(rgb, mask, px_per_mm=PPM, photo_px_per_mm=PPM) if d.kind == "unfused"]
    d, dist = nearest(unfused, 20.0, 7.3)
    assert d is not None and dist < 1.0, [(round(u.features["cx_mm"], 1), round(u.features["cy_mm"], 1)) for u in unfused]
    assert abs(d.features["greatest_mm"] - 20.0) <= greatest_tolerance_mm(20.0), d.features["greatest_mm"]
    rgb, mask = tinted(1.0)
    cast = [d for d in segment(rgb, mask, px_per_mm=PPM, photo_px_per_mm=PPM) if d.kind == "unfused"]
    assert not cast, [(round(u.features["greatest_mm"], 1), round(u.features["cy_mm"], 1)) for u in cast]


def noisy_wall_band_face(*, seed, band=True):
    """scikit-image's gravel photo as the face's grain (10 x 50 mm) with a 25 mm untinted wall band 1 mm wide
    across its middle (x 10-35 mm, y 4.5-5.5 mm): flat, slightly darker, carrying only pixel noise about as
    strong as the grain's own finest detail (a smooth wall seen through a noisy camera)."""
    shape = (int(10 * PPM), int(50 * PPM))
    g = gravel(shape, sd=14.0)
    if band:
        rng = np.random.default_rng(seed)
        m = np.zeros(shape, bool)
        m[int(4.5 * PPM) : int(5.5 * PPM), int(10 * PPM) : int(35 * PPM)] = True
        g = np.where(m, 140.0 + rng.normal(0.0, 9.0, shape), g)
    return to_rgb(g, blur_px=0.6)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_untinted_wall_band_with_pixel_noise_is_found_calm_along_the_weld(seed):
    # truth by construction: the band above, 25 mm along the weld.  Its pixel noise gives it most of the
    # face's fine-scale texture, so the grain-based smooth search does not see it; calm along the weld at
    # 0.15-0.4 mm it is reported as lack of fusion, at a confidence under the limit sets' default 0.5 (it can
    # send a coupon to review, not reject it alone), at its length within issue 2's 10 %.  The same gravel
    # face without the band gets no such detection.
    rgb = noisy_wall_band_face(seed=seed)
    dets = segment(rgb, None, px_per_mm=PPM, photo_px_per_mm=8.0)
    calm = [d for d in dets if d.features.get("source") == "calm"]
    d, dist = nearest(calm, 22.5, 5.0)
    assert d is not None and dist < 2.0, [(d.kind, round(d.features["greatest_mm"], 1)) for d in dets]
    assert d.kind == "unfused" and d.confidence < 0.5
    along = (d.contour[:, 0].max() - d.contour[:, 0].min()) / PPM
    assert abs(along - 25.0) < 0.1 * 25.0, along
    plain = segment(noisy_wall_band_face(seed=seed, band=False), None, px_per_mm=PPM, photo_px_per_mm=8.0)
    assert not [d for d in plain if d.features.get("source") == "calm"]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_column_percentile_equals_numpys_nanpercentile(dtype):
    # reference library: NumPy's nanpercentile (default linear method) on the same arrays, equal to the
    # last bit, with ties, single values and mostly-NaN columns
    from surfaces.segment import _column_percentile

    rng = np.random.default_rng(7)
    for _ in range(300):
        h, w = int(rng.integers(1, 120)), int(rng.integers(1, 40))
        t = rng.gamma(2.0, 3.0, (h, w)).astype(dtype)
        if rng.random() < 0.4:
            t = np.round(t, 1)
        keep = rng.random((h, w)) < rng.uniform(0.05, 1.0)
        keep[int(rng.integers(0, h)), :] = True
        t = np.where(keep, t, np.nan)
        for q in (10, 25, 33, 50, 75, 90, 97):
            ref = np.nanpercentile(t, q, axis=0)
            got = _column_percentile(t, q)
            assert got.dtype == ref.dtype and np.array_equal(got, ref), (q, h, w)



# photos bench.generated_set draws right at a limit (set seed, index among its at-limit photos)
@pytest.mark.parametrize("set_seed, j, whole", [(31337, 3, True), (20261, 4, False)])
def test_grained_patch_taken_for_lack_of_fusion_sends_to_review_not_reject(tmp_path, set_seed, j, whole):
    # truth by construction (surfaces.synth through bench's at-limit jobs; dev2 limit_036 and test
    # limit_037): one pore within 0.08 mm of a preset's limit and no lack of fusion.  Bright grained patches
    # on a coloured face were reported as lack of fusion at 1.0, rejecting dev2 limit_036, a borderline
    # accept.  Lack of fusion is a smooth surface (issue 2's description of the kind; common practice): what
    # the smooth search takes that keeps nearly all its ring's grain stays reported, under the limit sets'
    # default confidence 0.5 (review, never reject alone), and that borderline coupon goes to review.  (Test
    # limit_037 stays rejected for another reason, a pore measured 0.47 mm over its size; only its patch is
    # checked here.)
    import json

    from surfaces import bench, evaluate
    from surfaces.limits import judge_assessment, list_presets
    from surfaces.pipeline import assess_path

    job = bench._at_limit_jobs(tmp_path, n=j + 1, seed=set_seed, start=33)[j]
    path = Path(bench._render_one(job))
    truth = json.loads(path.with_name(path.stem + ".truth.json").read_text())
    a = assess_path(str(path), bench._settings_for_truth(truth)).assessment
    assert not [i for i in truth["imperfections"] if i["kind"] == "unfused"]
    m = evaluate.match(a, truth)
    false_ids = {int(x.det_id) for _, x in m.iterrows() if x.det_id == x.det_id and int(x.det_id) >= 0 and not x.matched}
    grained = [i for i in a["imperfections"] if i["kind"] == "unfused" and int(i["id"]) in false_ids]
    assert all(i["confidence"] < 0.5 for i in grained), [(i["greatest_mm"], i["confidence"]) for i in grained]
    for ls in list_presets() if whole else ():
        if ls.applies_to(a["test"]):
            tv = evaluate.truth_band(truth, limit_set=ls, test=a["test"], nominal=dict(a.get("nominal") or {}))
            if tv["borderline"]:
                assert judge_assessment(a, ls)["verdict"]["result"] == "review", ls.name


def _assess_generated(tmp_path, seed, test, megapixels):
    """Assess the seeded photo of :func:`surfaces.synth.render_fracture` (truth by construction) with the
    settings its truth implies: the assessment and its match to the truth (:func:`surfaces.evaluate.match`)."""
    import json

    from surfaces import bench, evaluate
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    path = render_fracture(seed, test=test, megapixels=megapixels).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    a = assess_path(str(path), bench._settings_for_truth(truth)).assessment
    return a, evaluate.match(a, truth)


def test_grey_wall_band_hidden_in_camera_noise_on_a_12_mp_photo_is_not_passed(tmp_path):
    # truth by construction (surfaces.synth, seeded; the 12 MP photo generated_set drew for seed 70737, a
    # fresh set): a grey side-wall band of lack of fusion 7.5 mm along inside a fillet-break face.  Its camera
    # noise leaves it half the face's fine texture and 0.345 of its calm along the weld; neither search
    # started a region on it, and the coupon was accepted under ISO 5817 level C, which permits no lack of
    # fusion (REFERENCES.md).  It is now found (calm along the weld) and the coupon goes to review.
    from surfaces.limits import judge_assessment, load_limit_set

    a, m = _assess_generated(tmp_path, 70737, "fillet-break", 12.0)
    band = m[m.truth_kind == "unfused"]
    assert len(band) == 1 and bool(band.matched.iloc[0]) and band.det_kind.iloc[0] == "unfused", band.to_dict("records")
    assert judge_assessment(a, load_limit_set("iso-5817-c-fillet-break"))["verdict"]["result"] != "accept"


def test_faint_crack_on_a_coarse_face_is_sent_to_review_not_passed(tmp_path):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 90105 in a fresh
    # set): a fillet-break face at 8 px/mm with one crack 4.8 x 0.48 mm.  On that coarse face its ridge
    # response peaked at 6.9 robust sigmas, under the 8 a line must reach to start, and it was no darker than
    # the dark search's seed: nothing was found, and the coupon was accepted under every preset, all of which
    # permit no crack (REFERENCES.md).  A line peaking at 6-8 sigma is now reported for review only.
    from surfaces.limits import judge_assessment, list_presets
    from surfaces.segment import FAINT_LINE_CONFIDENCE

    a, m = _assess_generated(tmp_path, 90105, "fillet-break", 3.744277639527323)
    crack = m[m.truth_kind == "crack"]
    assert len(crack) == 1 and bool(crack.matched.iloc[0]) and crack.det_kind.iloc[0] == "crack", crack.to_dict("records")
    assert crack.det_confidence.iloc[0] <= FAINT_LINE_CONFIDENCE < 0.5  # review, not a reject on its own
    for ls in list_presets():
        if ls.applies_to("fillet-break"):
            assert judge_assessment(a, ls)["verdict"]["result"] == "review", ls.name


def test_pore_at_the_darkest_spot_of_a_long_band_of_dark_grain_is_found(tmp_path):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 101016 in a fresh
    # set): a fillet-break face whose deep grain along the bead's shadow forms one dark region 120 mm long,
    # with a pore 1.79 x 0.52 mm at its darkest spot.  The darkest fifth of that region lay in several pieces;
    # they were opened together and only the largest kept, so the pore was lost: nothing found, and the coupon
    # accepted under API 1104 (gas pocket over 1/16 in) and ISO 5817 B (REFERENCES.md).  Each piece is now
    # traced on its own, darkest first.
    from surfaces.limits import judge_assessment, load_limit_set

    a, m = _assess_generated(tmp_path, 101016, "fillet-break", 2.302791280917833)
    pore = m[m.truth_kind == "pore"]
    assert len(pore) == 1 and bool(pore.matched.iloc[0]), pore.to_dict("records")
    assert pore.det_kind.iloc[0] in ("pore", "inclusion") and pore.det_confidence.iloc[0] >= 0.5
    for name in ("api-1104-break", "iso-5817-b-fillet-break"):
        assert judge_assessment(a, load_limit_set(name))["verdict"]["result"] != "accept", name


def test_faintly_tinted_root_band_under_both_seeds_is_sent_to_review(tmp_path):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 191919 in a fresh
    # set): a fillet-break face with a brown root band of lack of fusion 12.5 x 2.5 mm.  It stood at 0.73 of
    # the face's fine texture and 6 colour units from the face's, under both the smooth search's and the
    # colour search's seeds: nothing was found, and the coupon was accepted under all seven fillet-break
    # presets, every one of which rejects lack of fusion (REFERENCES.md).  Both cues together now give a band
    # reported for review only.
    from surfaces.limits import judge_assessment, list_presets
    from surfaces.segment import FAINT_TINT_CONFIDENCE

    a, m = _assess_generated(tmp_path, 191919, "fillet-break", 3.494071106701832)
    band = m[m.truth_kind == "unfused"]
    assert len(band) == 1 and bool(band.matched.iloc[0]) and band.det_kind.iloc[0] == "unfused", band.to_dict("records")
    assert band.det_confidence.iloc[0] <= FAINT_TINT_CONFIDENCE < 0.5
    assert 0.8 * band.truth_along_mm.iloc[0] <= band.det_along_mm.iloc[0] <= 1.1 * band.truth_along_mm.iloc[0]
    for ls in list_presets():
        if ls.applies_to("fillet-break"):
            assert judge_assessment(a, ls)["verdict"]["result"] != "accept", ls.name
