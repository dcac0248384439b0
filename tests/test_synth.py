"""The synthetic photo generator: its truth must be what it drew.

Checks are against sources outside the generator: OpenCV's own ArUco
detector and marker drawing, scikit-image's region measurements and polygon
tests on the same outlines, finite differences, and analytic geometry.
"""

from __future__ import annotations

import csv
import json
import math

import cv2
import numpy as np
import pytest
from skimage import draw, measure

from surfaces.model import SurfacesError
from surfaces.synth import SCHEMA, SynthError, generate_set, marker_image, render_bend, render_fracture

DICT = cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50)


def _detector():
    prm = cv2.aruco.DetectorParameters()
    prm.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    return cv2.aruco.ArucoDetector(DICT, prm)


def _apply(H, pts):
    pts = np.asarray(pts, float).reshape(-1, 2)
    q = np.c_[pts, np.ones(len(pts))] @ np.asarray(H).T
    return q[:, :2] / q[:, 2:3]


@pytest.fixture(scope="module")
def fillet():
    return render_fracture(11, test="fillet-break", megapixels=2.5)


@pytest.fixture(scope="module")
def bend():
    return render_bend(12, curvature=True, megapixels=2.5)


# --------------------------------------------------------------------------- determinism
def test_same_seed_same_photo_and_truth(fillet):
    again = render_fracture(11, test="fillet-break", megapixels=2.5)
    assert np.array_equal(again.rgb, fillet.rgb)
    assert json.dumps(again.truth, sort_keys=True) == json.dumps(fillet.truth, sort_keys=True)


def test_other_seed_other_photo(fillet):
    other = render_fracture(12, test="fillet-break", megapixels=2.5)
    assert other.rgb.shape != fillet.rgb.shape or not np.array_equal(other.rgb, fillet.rgb)
    assert other.truth["H_plane_to_photo"] != fillet.truth["H_plane_to_photo"]


# --------------------------------------------------------------------------- markers
@pytest.mark.parametrize(
    "make",
    [
        lambda: render_fracture(3, test="fillet-break", megapixels=3, tilt_deg=25),
        lambda: render_fracture(4, test="nick-break", megapixels=2, n_markers=2),
        lambda: render_bend(5, curvature=True, megapixels=3, tilt_deg=18, n_markers=2),
        lambda: render_bend(6, curvature=False, megapixels=4, marker_mm=10),
    ],
)
def test_truth_corners_where_opencv_finds_the_markers(make):
    photo = make()
    # source: OpenCV's ArucoDetector.detectMarkers on the rendered photo
    corners, ids, _ = _detector().detectMarkers(cv2.cvtColor(photo.rgb, cv2.COLOR_RGB2GRAY))
    assert ids is not None
    found = {int(i): c.reshape(4, 2) for i, c in zip(ids.ravel(), corners)}
    assert set(found) == {m["id"] for m in photo.truth["markers"]}
    H = np.array(photo.truth["H_plane_to_photo"])
    for m in photo.truth["markers"]:
        truth_px = np.array(m["corners_px"])
        # the truth homography maps the marker's plane corners onto its truth pixels
        assert np.allclose(_apply(H, m["corners_mm"]), truth_px, atol=1e-6)
        assert np.abs(found[m["id"]] - truth_px).max() < 1.0


def test_plane_frame_is_marker_zero():
    photo = render_fracture(7, megapixels=2, marker_mm=22.0)
    c = np.array(photo.truth["markers"][0]["corners_mm"])
    # analytic: the plane frame is the first marker's own (origin top-left, X along its top edge)
    assert np.allclose(c, [[0, 0], [22, 0], [22, 22], [0, 22]], atol=1e-9)


def test_marker_image_is_opencvs_own():
    img = marker_image(17, 120)
    # source: cv2.aruco.generateImageMarker, and OpenCV's detector reads the id back
    assert np.array_equal(img, cv2.aruco.generateImageMarker(DICT, 17, 120, borderBits=1))
    # at 588 px OpenCV's own drawing puts the inner edges one pixel off its 98 px module grid; ours keeps
    # every module 98 whole pixels (OpenCV's 6 px pattern scaled), as the card's vector PDF prints it
    opencv = cv2.aruco.generateImageMarker(DICT, 17, 588, borderBits=1)
    exact = np.kron(cv2.aruco.generateImageMarker(DICT, 17, 6, borderBits=1), np.ones((98, 98), np.uint8))
    assert not np.array_equal(opencv, exact) and np.array_equal(marker_image(17, 588), exact)
    for side in (18, 60, 294, 600):
        assert np.array_equal(marker_image(5, side)[:: side // 6, :: side // 6], cv2.aruco.generateImageMarker(DICT, 5, 6))
    canvas = np.full((240, 240), 255, np.uint8)
    canvas[60:180, 60:180] = img
    _, ids, _ = _detector().detectMarkers(canvas)
    assert ids is not None and ids.ravel().tolist() == [17]
    with pytest.raises(SurfacesError, match="outside DICT_4X4_50"):
        marker_image(50, 60)


# --------------------------------------------------------------------------- scale
@pytest.mark.parametrize("which", ["fillet", "bend"])
def test_px_per_mm_face_is_sqrt_det_jacobian(which, request):
    photo = request.getfixturevalue(which)
    H = np.array(photo.truth["H_plane_to_photo"])
    X, Y = photo.truth["face"]["centroid_mm"]
    # analytic: central finite differences of the plane->photo map, independent of geometry.jacobian
    h = 1e-4
    dx = (_apply(H, [[X + h, Y]]) - _apply(H, [[X - h, Y]]))[0] / (2 * h)
    dy = (_apply(H, [[X, Y + h]]) - _apply(H, [[X, Y - h]]))[0] / (2 * h)
    fd = math.sqrt(abs(dx[0] * dy[1] - dx[1] * dy[0]))
    assert photo.truth["px_per_mm_face"] == pytest.approx(fd, rel=1e-6)


def test_requested_scale_and_tilt_are_met():
    photo = render_fracture(8, test="nick-break", megapixels=6, px_per_mm=20.0, tilt_deg=15.0)
    assert photo.truth["px_per_mm_face"] == pytest.approx(20.0, rel=1e-6)
    assert photo.truth["tilt_deg"] == 15.0


@pytest.mark.parametrize("seed", [41, 42, 43])
@pytest.mark.parametrize("kind", ["fillet-break", "nick-break", "bend"])
def test_face_and_card_are_inside_the_photo(seed, kind):
    photo = render_bend(seed, megapixels=1.0) if kind == "bend" else render_fracture(seed, test=kind, megapixels=1.0)
    w, h = photo.truth["photo_size"]
    pts = np.r_[np.array(photo.truth["face"]["polygon_px"]), *[np.array(m["corners_px"]) for m in photo.truth["markers"]]]
    assert (pts >= 0).all() and (pts[:, 0] <= w - 1).all() and (pts[:, 1] <= h - 1).all()
    # analytic: the face's plane outline maps onto its photo outline through the truth homography
    H = np.array(photo.truth["H_plane_to_photo"])
    assert np.allclose(_apply(H, photo.truth["face"]["polygon_mm"]), photo.truth["face"]["polygon_px"], atol=1e-6)


# --------------------------------------------------------------------------- imperfection sizes
def _poly_props(poly_mm, px_per_mm=200.0):
    """Rasterise an outline with scikit-image and measure it there (area, max Feret) in mm."""
    p = np.asarray(poly_mm)
    lo = p.min(0) - 0.1
    rr, cc = draw.polygon((p[:, 1] - lo[1]) * px_per_mm, (p[:, 0] - lo[0]) * px_per_mm)
    m = np.zeros((rr.max() + 3, cc.max() + 3), np.uint8)
    m[rr, cc] = 1
    rp = measure.regionprops(m)[0]
    return rp.area / px_per_mm**2, rp.feret_diameter_max / px_per_mm


def test_circle_pore_truth_is_analytic():
    d = 2.4
    photo = render_fracture(
        21, test="nick-break", megapixels=2, defects=[{"kind": "pore", "d_mm": d, "x_mm": 10.0, "y_mm": 4.0}],
        width_mm=10.0, length_mm=25.0,
    )  # fmt: skip
    (imp,) = photo.truth["imperfections"]
    assert imp["kind"] == "pore" and imp["iso6520"] == "2011"
    # analytic: a circle's greatest dimension is its diameter, its area pi r^2
    assert imp["greatest_mm"] == pytest.approx(d, abs=1e-12)
    assert imp["width_mm"] == pytest.approx(d, abs=1e-12)
    assert imp["area_mm2"] == pytest.approx(math.pi * (d / 2) ** 2, rel=1e-12)
    assert imp["along_mm"] == pytest.approx(d) and imp["across_mm"] == pytest.approx(d)
    # source: scikit-image regionprops on the truth outline rasterised at 200 px/mm
    area, feret = _poly_props(imp["polygon_mm"])
    assert area == pytest.approx(math.pi * (d / 2) ** 2, rel=0.01)
    assert feret == pytest.approx(d, rel=0.01)


def test_ellipse_pore_truth_is_analytic():
    a, b, ang = 1.6, 0.7, 30.0
    photo = render_fracture(
        22, test="nick-break", megapixels=2, width_mm=12.0, length_mm=25.0,
        defects=[{"kind": "pore", "shape": "ellipse", "a_mm": a, "b_mm": b, "angle_deg": ang, "x_mm": 12.0, "y_mm": 6.0}],
    )  # fmt: skip
    (imp,) = photo.truth["imperfections"]
    # analytic: ellipse area pi a b, max Feret 2a, min Feret 2b, bounding box of a rotated ellipse
    assert imp["area_mm2"] == pytest.approx(math.pi * a * b, rel=1e-12)
    assert imp["greatest_mm"] == pytest.approx(2 * a) and imp["width_mm"] == pytest.approx(2 * b)
    c, s = math.cos(math.radians(ang)), math.sin(math.radians(ang))
    assert imp["along_mm"] == pytest.approx(2 * math.hypot(a * c, b * s))
    assert imp["across_mm"] == pytest.approx(2 * math.hypot(a * s, b * c))
    area, feret = _poly_props(imp["polygon_mm"])  # source: scikit-image regionprops
    assert area == pytest.approx(math.pi * a * b, rel=0.01)
    assert feret == pytest.approx(2 * a, rel=0.01)


def test_irregular_outline_measures_agree_with_scikit_image(fillet):
    imps = [i for i in fillet.truth["imperfections"] if i["kind"] in ("inclusion", "unfused", "crack")]
    if not imps:  # the fixture's seed always has some; keep the check honest if it changes
        imps = render_fracture(5, megapixels=2, defects=[{"kind": "inclusion"}, {"kind": "unfused"}]).truth["imperfections"]
    for imp in imps:
        area, feret = _poly_props(imp["polygon_mm"], px_per_mm=100.0)
        # source: scikit-image regionprops; the rasterised outline is within a pixel or two
        assert area == pytest.approx(imp["area_mm2"], rel=0.05, abs=0.02)
        assert feret == pytest.approx(imp["greatest_mm"], rel=0.03, abs=0.03)


def test_imperfections_lie_inside_the_face(fillet, bend):
    for photo in (fillet, bend):
        face = np.array(photo.truth["face"]["polygon_mm"])
        for imp in photo.truth["imperfections"]:
            # source: skimage.measure.points_in_poly on the plane outlines; outlines that lie along
            # a face edge (root bands, corner cracks) are pulled 1 % towards their centre first
            c = np.array(imp["polygon_mm"])
            c = c.mean(0) + 0.99 * (c - c.mean(0))
            assert measure.points_in_poly(c, face).all()


def test_the_pore_is_drawn_where_the_truth_says():
    photo = render_fracture(
        23, test="nick-break", clean=True, megapixels=2, width_mm=12.0, length_mm=25.0, distractors=False,
        defects=[{"kind": "pore", "d_mm": 3.0, "x_mm": 12.0, "y_mm": 6.0}],
    )  # fmt: skip
    (imp,) = photo.truth["imperfections"]
    gray = cv2.cvtColor(photo.rgb, cv2.COLOR_RGB2GRAY).astype(float)
    H = np.array(photo.truth["H_plane_to_photo"])
    cx, cy = imp["centroid_mm"]
    # analytic: sample the photo on circles around the truth centre mapped through the truth homography
    t = np.linspace(0, 2 * np.pi, 180, endpoint=False)

    def ring(rad):
        p = _apply(H, np.c_[cx + rad * np.cos(t), cy + rad * np.sin(t)])
        return gray[np.round(p[:, 1]).astype(int), np.round(p[:, 0]).astype(int)]

    inside = np.concatenate([ring(r) for r in (0.3, 0.6, 0.9)])
    outside = np.concatenate([ring(r) for r in (1.9, 2.2)])
    assert np.median(inside) < 0.7 * np.median(outside)


def test_root_band_lies_along_the_root_edge():
    photo = render_fracture(
        24, test="nick-break", megapixels=2, width_mm=12.0, length_mm=26.0,
        defects=[{"kind": "unfused", "side": "root", "length_mm": 10.0, "width_mm": 1.2, "x_mm": 6.0}],
    )  # fmt: skip
    (imp,) = photo.truth["imperfections"]
    assert imp["iso6520"] == "4021" and imp["at_root"] is True
    f = imp["face_mm"]
    # analytic: the band starts on the straight root edge (y = 0 or y = width) and reaches at most its width in
    if photo.truth["face"]["root_side"] == "y0":
        assert f["y0"] == pytest.approx(0.0, abs=1e-9)
    else:
        assert f["y1"] == pytest.approx(12.0, abs=1e-9)
    assert imp["across_mm"] <= 1.2 * 1.4 + 1e-9
    assert imp["along_mm"] == pytest.approx(10.0, abs=1e-9)


# --------------------------------------------------------------------------- curvature
def test_bend_curvature_arc_versus_projection():
    R, L = 40.0, 70.0
    s_off, d = 20.0, 2.0  # pore centred 20 mm of arc from the apex
    photo = render_bend(
        31, curvature=True, radius_mm=R, length_mm=L, width_mm=20.0, megapixels=3,
        defects=[{"kind": "pore", "d_mm": d, "x_mm": L / 2 + s_off, "y_mm": 10.0}],
    )  # fmt: skip
    cur = photo.truth["curvature"]
    theta = L / R
    # analytic: arc R*theta, its projection 2 R sin(theta / 2)
    assert cur["arc_length_mm"] == pytest.approx(R * theta)
    assert cur["projected_length_mm"] == pytest.approx(2 * R * math.sin(theta / 2))
    assert photo.truth["face"]["length_mm"] == pytest.approx(L)
    face = np.array(photo.truth["face"]["polygon_mm"])
    ends = np.linalg.norm(face[1] - face[0])
    assert ends == pytest.approx(2 * R * math.sin(theta / 2), rel=1e-9)
    assert photo.truth["face"]["area_mm2"] == pytest.approx(L * 20.0)
    assert cur["projected_area_mm2"] == pytest.approx(2 * R * math.sin(theta / 2) * 20.0)
    (imp,) = photo.truth["imperfections"]
    # true sizes on the surface, projected ones as R sin(s/R) between the pore's ends
    assert imp["along_mm"] == pytest.approx(d)
    assert imp["greatest_mm"] == pytest.approx(d)
    proj = R * (math.sin((s_off + d / 2) / R) - math.sin((s_off - d / 2) / R))
    assert imp["projected"]["along_mm"] == pytest.approx(proj, rel=1e-4)
    assert imp["projected"]["across_mm"] == pytest.approx(d, rel=1e-4)
    assert imp["projected"]["along_mm"] < d


def test_flat_bend_projection_equals_truth():
    photo = render_bend(32, curvature=False, megapixels=2)
    assert photo.truth["curvature"]["enabled"] is False
    assert photo.truth["curvature"]["projected_length_mm"] == pytest.approx(photo.truth["face"]["length_mm"])
    for imp in photo.truth["imperfections"]:
        assert imp["projected"]["greatest_mm"] == pytest.approx(imp["greatest_mm"], rel=1e-9)


def _drawn_layers(monkeypatch, **kw):
    """Render a bend photo and keep the coupon layers the generator composited."""
    from surfaces.synth import _bend

    kept = []
    orig = _bend.BendBuilder.layers

    def spy(self, *a, **k):
        out = orig(self, *a, **k)
        kept.extend(out)
        return out

    monkeypatch.setattr(_bend.BendBuilder, "layers", spy)
    return render_bend(**kw), kept


@pytest.mark.parametrize("curved", [True, False])
def test_bend_truth_records_the_drawn_surface(monkeypatch, curved):
    R, L, W = 40.0, 70.0, 20.0
    photo, layers = _drawn_layers(monkeypatch, seed=34, curvature=curved, radius_mm=R, length_mm=L, width_mm=W,
                                  megapixels=2, defects="none")  # fmt: skip
    t = photo.truth
    vis = t["face"]["visible"]
    (layer,) = layers
    # source: OpenCV's contour of the coupon layer's coverage (alpha >= 0.5), mapped to face mm by its grid
    mask = (layer.alpha >= 0.5).astype(np.uint8)
    (cnt,) = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)[0]
    c0, r0, cw, ch = cv2.boundingRect(cnt)
    r = 1.0 / layer.A[0, 0]
    x0 = layer.A[0, 2] - 0.5 / r + c0 / r
    x1 = x0 + cw / r
    assert x0 == pytest.approx(vis["face_x0_mm"], abs=1.5 / r)
    assert x1 == pytest.approx(vis["face_x1_mm"], abs=1.5 / r)
    assert ch / r == pytest.approx(W, abs=1.5 / r)
    assert cv2.countNonZero(mask) / r**2 == pytest.approx(vis["area_mm2"], rel=0.01)
    # analytic geometry: the drawn strip is the cylinder out to phi either side of the apex, seen from
    # above; its projection is 2 R sin(phi) long, its arc 2 R phi, both centred on the inspected arc
    phi = math.radians(vis["half_angle_deg"])
    if curved:
        assert vis["length_mm"] == pytest.approx(2 * R * math.sin(phi), rel=1e-9)
        assert vis["arc_length_mm"] == pytest.approx(2 * R * phi, rel=1e-9)
        assert vis["surface_x0_mm"] + vis["surface_x1_mm"] == pytest.approx(L, rel=1e-9)
        assert vis["half_angle_deg"] > t["curvature"]["half_angle_deg"]
        assert vis["length_mm"] > t["curvature"]["projected_length_mm"]
    else:
        assert (vis["length_mm"], vis["arc_length_mm"], vis["surface_x0_mm"]) == pytest.approx((L, L, 0.0))
    assert vis["area_mm2"] == pytest.approx(vis["length_mm"] * W, rel=1e-12)
    # analytic: shoelace area of the plane outline (the plane frame is isometric to the face axes)
    x, y = np.array(vis["polygon_mm"]).T
    assert 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))) == pytest.approx(vis["area_mm2"], rel=1e-9)
    # the inspected arc is what the imperfections are placed on; the truth face stays that arc
    assert t["face"]["length_mm"] == pytest.approx(L) and t["face"]["area_mm2"] == pytest.approx(L * W)


@pytest.mark.parametrize("kw", [{"seed": 35}, {"seed": 36, "width_mm": 25.0}, {"seed": 37, "radius_mm": 50.0, "length_mm": 60.0}])
def test_old_bend_truth_without_the_drawn_surface_is_replayed_from_its_seed(kw):
    from surfaces.synth._bend import visible_face

    photo = render_bend(curvature=True, megapixels=1, defects="none", distractors=False, **kw)
    t = json.loads(json.dumps(photo.truth))
    recorded = t["face"].pop("visible")
    again = visible_face(t)
    assert again is not None and again.pop("replayed") is True
    assert again.keys() == recorded.keys()
    for k, v in recorded.items():
        if isinstance(v, float):
            assert again[k] == pytest.approx(v, rel=1e-12, abs=1e-9), k
    assert np.allclose(again["polygon_px"], recorded["polygon_px"], atol=1e-6)
    # a drawn size the seed's draws do not reproduce: the drawn surface cannot be told
    t["curvature"]["thickness_mm"] += 0.01
    assert visible_face(t) is None


def test_a_fully_fixed_bend_is_not_replayed():
    from surfaces.synth._bend import visible_face

    # every size fixed: every fitting attempt reproduces them, each with its own drawn extent, so
    # the replay cannot tell which one was used and returns None rather than a guess
    photo = render_bend(38, curvature=True, radius_mm=30.0, thickness_mm=10.0, width_mm=38.0, length_mm=40.0,
                        megapixels=1, defects="none")  # fmt: skip
    t = json.loads(json.dumps(photo.truth))
    assert t["face"].pop("visible")["length_mm"] > t["curvature"]["projected_length_mm"]
    assert visible_face(t) is None


def test_corner_crack_starts_at_an_edge():
    photo = render_bend(33, curvature=False, megapixels=2, width_mm=20.0, defects=[{"kind": "crack", "length_mm": 4.0, "edge": "y0"}])
    (imp,) = photo.truth["imperfections"]
    assert imp["starts_at_edge"] is True
    assert imp["face_mm"]["y0"] == pytest.approx(0.0, abs=1e-9)


# --------------------------------------------------------------------------- files and contract
def test_truth_contract_and_files(tmp_path, fillet):
    t = fillet.truth
    assert t["schema"] == SCHEMA and t["scene"] == "fracture" and t["test"] == "fillet-break"
    assert t["photo_size"] == [fillet.rgb.shape[1], fillet.rgb.shape[0]]
    for key in ("polygon_mm", "polygon_px", "length_mm", "width_mm", "area_mm2", "axis_deg", "root_side"):
        assert key in t["face"]
    # analytic: shoelace area of the plane outline (the plane is isometric to the face axes)
    x, y = np.array(t["face"]["polygon_mm"]).T
    assert 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))) == pytest.approx(t["face"]["area_mm2"], rel=1e-9)
    assert t["face"]["area_mm2"] == pytest.approx(t["face"]["length_mm"] * t["face"]["width_mm"], rel=1e-9)
    for imp in t["imperfections"]:
        for key in ("kind", "iso6520", "centroid_mm", "centroid_px", "bbox_px", "greatest_mm", "width_mm",
                    "along_mm", "across_mm", "area_mm2", "starts_at_edge", "polygon_mm"):  # fmt: skip
            assert key in imp
        assert imp["greatest_mm"] >= imp["width_mm"] > 0
    jpg = fillet.save(tmp_path / "a.jpg")
    png = fillet.save(tmp_path / "b.png")
    assert json.loads(jpg.with_suffix(".truth.json").read_text()) == json.loads(json.dumps(t))
    # source: OpenCV decodes our PNG to the same pixels
    back = cv2.cvtColor(cv2.imread(str(png)), cv2.COLOR_BGR2RGB)
    assert np.array_equal(back, fillet.rgb)
    assert cv2.imread(str(jpg)).shape == fillet.rgb.shape
    with pytest.raises(SynthError, match=r"\.jpg, \.jpeg or \.png"):
        fillet.save(tmp_path / "c.tif")


def test_bad_options_get_one_line_errors():
    with pytest.raises(SynthError, match="n_markers"):
        render_fracture(1, n_markers=3)
    with pytest.raises(SynthError, match="defects="):
        render_fracture(1, defects="lots")
    with pytest.raises(SynthError, match="not a fracture test"):
        render_fracture(1, test="bend")
    with pytest.raises(SynthError, match="lower px_per_mm"):
        render_fracture(1, test="fillet-break", megapixels=1, px_per_mm=60, length_mm=150)
    with pytest.raises(SynthError, match="unknown keys"):
        render_bend(1, defects=[{"kind": "crack", "colour": "red"}])


def test_generate_set_writes_photos_truth_and_manifest(tmp_path):
    m = generate_set(tmp_path / "set", n=3, seed=4, scene="mixed", megapixels=(0.5, 0.8))
    rows = list(csv.DictReader(m.open()))
    assert len(rows) == 3
    for r in rows:
        img = cv2.imread(str(m.parent / r["file"]))
        t = json.loads((m.parent / r["truth"]).read_text())
        assert [img.shape[1], img.shape[0]] == t["photo_size"]
        assert int(r["n_imperfections"]) == len(t["imperfections"])
    with pytest.raises(SynthError, match="already exists"):
        generate_set(tmp_path / "set", n=1, seed=4)


def test_cli_writes_a_set(tmp_path):
    from surfaces.synth.__main__ import main

    assert main(["--out", str(tmp_path / "c"), "--n", "1", "--seed", "2", "--scene", "bend", "--mp-min", "0.5", "--mp-max", "0.6"]) == 0
    assert (tmp_path / "c" / "manifest.csv").exists()
    assert main(["--out", str(tmp_path / "c"), "--n", "1"]) == 2
