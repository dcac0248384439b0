"""The fracture-face finder (surfaces.face.find_face) against truth known by construction.

Two kinds of scene:

* analytic: a granular texture filling a known polygon (rectangle, trapezoid)
  on a plain background, drawn in the plane and photographed through a known
  homography; the truth area is the polygon's shoelace area;
* rendered fracture photos from :mod:`surfaces.synth` (truth written by the
  generator), calibrated from their own reference mark as the pipeline does.

Areas found are also checked against reference libraries on the same data:
OpenCV's ``contourArea`` on the face outline and scikit-image's ``regionprops``
on the face mask.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
from skimage.measure import regionprops

from surfaces.face import find_face
from surfaces.geometry import apply_h
from surfaces.model import Calibration, FaceError

#: plane (X, Y) mm -> photo (x, y) px: about 12 px/mm with some perspective
H_PLANE_TO_PHOTO = np.array([[12.0, 0.9, 180.0], [-0.7, 12.4, 140.0], [6e-5, 1.2e-4, 1.0]])
PHOTO_WH = (2000, 1500)
CANVAS_PX_PER_MM = 20.0
CANVAS_LO = (-15.0, -12.0)  # plane mm of the canvas's top-left pixel edge
CANVAS_MM = (175.0, 130.0)


def shoelace(poly) -> float:
    """Polygon area (analytic geometry: the shoelace formula)."""
    p = np.asarray(poly, float)
    x, y = p[:, 0], p[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def _canvas_to_plane() -> np.ndarray:
    s = 1.0 / CANVAS_PX_PER_MM
    return np.array([[s, 0, CANVAS_LO[0] + 0.5 * s], [0, s, CANVAS_LO[1] + 0.5 * s], [0, 0, 1.0]])


def _to_canvas(poly_mm) -> np.ndarray:
    return (np.asarray(poly_mm, float) - CANVAS_LO) * CANVAS_PX_PER_MM - 0.5


def _texture(rng, shape, *, grain_px: float, mean: float, std: float) -> np.ndarray:
    """Isotropic granular texture: white noise low-passed at the grain size."""
    t = cv2.GaussianBlur(rng.normal(0, 1, shape).astype(np.float32), (0, 0), grain_px)
    return mean + std * t / (t.std() + 1e-9)


def analytic_photo(face_mm=None, *, seed=0, band=None, grain_std=28.0, rough=None, band_value=140.0, table=95.0,
                   shadow=None, disc=None, plate=None):
    """Photo (rgb, gray) and calibration of a textured polygon on a plain, shaded background.

    ``band``: (x0, x1, y_edge, width, inward) mm - an untextured strip of the
    face along its straight edge ``y = y_edge`` (a smooth lack-of-fusion band),
    still part of the face.
    ``rough``: (x0, x1, factor) mm - the grain between X = x0 and x1 is
    ``factor`` times stronger (a stretch of the face rougher than its ends),
    same mean brightness.
    ``band_value``: the band's grey level; ``table``: the background's level.
    ``shadow``: (x0, x1, y_edge, width, outward, value) mm - a plain strip of grey ``value``
    just outside the straight edge ``y = y_edge`` (the gap or shadow beside a coupon's edge).
    ``disc``: (x, y, r, value) mm - an untextured disc of grey ``value`` in the face (a large pore).
    ``plate``: (polygon, std) - a polygon around the face with a weaker grain of ``std`` grey
    levels (the plate and bead of the specimen carrying the face).
    """
    rng = np.random.default_rng(seed)
    w, h = int(CANVAS_MM[0] * CANVAS_PX_PER_MM), int(CANVAS_MM[1] * CANVAS_PX_PER_MM)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    canvas = table + 20.0 * xx / w - 10.0 * yy / h  # plain table, gently shaded
    if shadow is not None:
        sx0, sx1, sy, sw, sout, sval = shadow
        strip = [(sx0, sy), (sx1, sy), (sx1, sy + sout * sw), (sx0, sy + sout * sw)]
        sm = np.zeros((h, w), np.uint8)
        cv2.fillPoly(sm, [np.round(_to_canvas(strip) * 16).astype(np.int32)], 1, shift=4)
        canvas[sm > 0] = sval
    if plate is not None:
        pm = np.zeros((h, w), np.uint8)
        cv2.fillPoly(pm, [np.round(_to_canvas(plate[0]) * 16).astype(np.int32)], 1, shift=4)
        ptex = _texture(rng, (h, w), grain_px=0.15 * CANVAS_PX_PER_MM, mean=125.0, std=plate[1])
        canvas = np.where(pm > 0, ptex, canvas)
    if face_mm is not None:
        m = np.zeros((h, w), np.uint8)
        cv2.fillPoly(m, [np.round(_to_canvas(face_mm) * 16).astype(np.int32)], 1, shift=4)
        tex = _texture(rng, (h, w), grain_px=0.15 * CANVAS_PX_PER_MM, mean=150.0, std=grain_std)
        if rough is not None:
            rx0, rx1, factor = rough
            c0, c1 = (np.array([rx0, rx1]) - CANVAS_LO[0]) * CANVAS_PX_PER_MM
            sel = (xx >= c0) & (xx < c1)
            tex[sel] = 150.0 + factor * (tex[sel] - 150.0)
        if band is not None:
            x0, x1, y_edge, bw, inward = band
            bm = np.zeros((h, w), np.uint8)
            strip = [(x0, y_edge), (x1, y_edge), (x1, y_edge + inward * bw), (x0, y_edge + inward * bw)]
            cv2.fillPoly(bm, [np.round(_to_canvas(strip) * 16).astype(np.int32)], 1, shift=4)
            tex[bm > 0] = band_value  # smooth, no grain
        if disc is not None:
            dx, dy, dr, dval = disc
            (cx, cy), = _to_canvas([(dx, dy)])
            tex[(xx - cx) ** 2 + (yy - cy) ** 2 <= (dr * CANVAS_PX_PER_MM) ** 2] = dval
        canvas = np.where(m > 0, tex, canvas)
    canvas = cv2.GaussianBlur(canvas.astype(np.float32), (0, 0), 0.8)  # optics, and no aliasing on the way down
    M = H_PLANE_TO_PHOTO @ _canvas_to_plane()
    photo = cv2.warpPerspective(canvas, M, PHOTO_WH, flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
    photo = photo + rng.normal(0, 1.5, photo.shape).astype(np.float32)  # sensor noise
    gray = np.clip(np.round(photo), 0, 255).astype(np.uint8)
    rgb = np.repeat(gray[..., None], 3, axis=2)
    calib = Calibration(
        method="px-per-mm", H=np.linalg.inv(H_PLANE_TO_PHOTO), uncertainty_pct=0.5, tilt_deg=None, marker_mm=None
    )
    return rgb, gray, calib


def plane_outline(face, calib) -> np.ndarray:
    """The face's outline in plane mm (from its photo-pixel polygon)."""
    return apply_h(calib.H, face.polygon_px)


def iou_plane(poly_a, poly_b, *, px_per_mm=20.0) -> float:
    lo = np.minimum(poly_a.min(0), poly_b.min(0)) - 1
    hi = np.maximum(poly_a.max(0), poly_b.max(0)) + 1
    w, h = (np.ceil((hi - lo) * px_per_mm)).astype(int) + 1
    ma, mb = np.zeros((h, w), np.uint8), np.zeros((h, w), np.uint8)
    cv2.fillPoly(ma, [np.round((poly_a - lo) * px_per_mm * 16).astype(np.int32)], 1, shift=4)
    cv2.fillPoly(mb, [np.round((poly_b - lo) * px_per_mm * 16).astype(np.int32)], 1, shift=4)
    return float((ma & mb).sum() / max((ma | mb).sum(), 1))


RECT = [(30.0, 40.0), (140.0, 40.0), (140.0, 50.0), (30.0, 50.0)]
TRAPEZOID = [(25.0, 38.0), (145.0, 40.5), (145.0, 48.5), (25.0, 52.0)]  # 14 mm wide tapering to 8 mm


@pytest.mark.parametrize("poly", [RECT, TRAPEZOID], ids=["rectangle", "trapezoid"])
def test_area_of_a_known_polygon(poly):
    rgb, gray, calib = analytic_photo(poly, seed=3)
    face = find_face(rgb, gray, calib, test="fillet-break")
    truth = shoelace(poly)  # analytic geometry
    assert face.area_mm2 == pytest.approx(truth, rel=0.03)
    assert iou_plane(plane_outline(face, calib), np.asarray(poly)) > 0.93
    # the weld axis is the polygon's long side (X), the face length its X extent
    assert face.length_mm == pytest.approx(poly[1][0] - poly[0][0], rel=0.03)


def test_tapered_face_is_not_a_rectangle():
    """A tapered face keeps its taper: the mask leaves out the corners a rectangle would add."""
    rgb, gray, calib = analytic_photo(TRAPEZOID, seed=4)
    face = find_face(rgb, gray, calib)
    bbox_area = face.length_mm * face.width_mm
    truth = shoelace(TRAPEZOID)
    # the bounding rectangle would be ~ (14 / 11 - 1) = 27 % too large (analytic geometry)
    assert bbox_area > 1.15 * truth
    assert face.area_mm2 == pytest.approx(truth, rel=0.03)
    assert not face.mask.all()
    wide, narrow = face.mask[:, :5].sum(axis=0).mean(), face.mask[:, -5:].sum(axis=0).mean()
    assert narrow / wide == pytest.approx(8.0 / 14.0, abs=0.08)  # the two end widths (analytic)


def test_area_agrees_with_opencv_and_skimage_on_the_same_outline():
    rgb, gray, calib = analytic_photo(TRAPEZOID, seed=5)
    face = find_face(rgb, gray, calib)
    # OpenCV contourArea on the outline taken back to the plane (reference library)
    cv_area = abs(cv2.contourArea(plane_outline(face, calib).astype(np.float64).reshape(-1, 1, 2).astype(np.float32)))
    assert cv_area == pytest.approx(face.area_mm2, rel=0.005)
    # scikit-image regionprops area of the mask, pixel pitch from the face image (reference library)
    (props,) = regionprops(face.mask.astype(np.uint8))
    pitch = (face.length_mm / face.image.shape[1]) * (face.width_mm / face.image.shape[0])
    assert props.area * pitch == pytest.approx(face.area_mm2, rel=0.02)
    assert face.mask.shape == face.image.shape[:2]


@pytest.mark.parametrize("x1", [72.0, 110.0], ids=["third", "two-thirds"])
def test_smooth_band_along_the_root_stays_in_the_face(x1):
    """An untextured strip along the straight edge is part of the face (lack of fusion along the root)."""
    band = (35.0, x1, 50.0, 2.5, -1.0)  # along y = 50 (RECT's lower edge), 2.5 mm into the face
    rgb, gray, calib = analytic_photo(RECT, seed=6, band=band)
    face = find_face(rgb, gray, calib)
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert iou_plane(plane_outline(face, calib), np.asarray(RECT)) > 0.93
    assert face.mask.mean() > 0.93  # a rectangle's outline fills its own bounding box


@pytest.mark.parametrize(
    "rough", [(65.0, 105.0, 1.6), (50.0, 120.0, 1.5)], ids=["middle-third", "middle-two-thirds"]
)
def test_face_rougher_in_its_middle_keeps_its_calm_ends(rough):
    """A stretch of the face rougher than the rest (defects, a coarser break) is neither the face nor a
    sign that the face is the specimen: the ends, calmer but of the face's brightness and texture, stay."""
    rgb, gray, calib = analytic_photo(RECT, seed=12, rough=rough)
    face = find_face(rgb, gray, calib)
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert face.length_mm == pytest.approx(RECT[1][0] - RECT[0][0], rel=0.03)  # the polygon's X extent
    assert iou_plane(plane_outline(face, calib), np.asarray(RECT)) > 0.93


@pytest.mark.parametrize("factor", [2.0, 3.0], ids=["ends-4x-calmer", "ends-9x-calmer"])
def test_face_much_calmer_at_its_ends_is_followed_to_them(factor):
    """Ends 4 and 9 times calmer (in texture energy) than the middle, of the face's brightness and
    bounded by its long edges (light falling off along a long face, a finer break there): the ends
    are where the texture falls to the plain table's, not where it falls to half the middle's
    (the rough middle alone is 55 % short, and what lies beyond it is never looked at)."""
    rgb, gray, calib = analytic_photo(RECT, seed=12, rough=(60.0, 110.0, factor))
    face = find_face(rgb, gray, calib)
    assert face.length_mm == pytest.approx(RECT[1][0] - RECT[0][0], rel=0.03)  # the polygon's X extent
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert iou_plane(plane_outline(face, calib), np.asarray(RECT)) > 0.93


def _calm_end_profiles(q=10.0):
    """Constructed profiles along a face (q samples per mm): a middle textured at 100 up to X = 30 mm,
    a calm end at 8 up to X = 50 mm, plain surroundings at 0.05 beyond (blurred steps, Gaussian
    CDF: the half-way level between two plateaus sits at their step, analytic); brightness 150 on the
    face, 60 beyond it."""
    from scipy.special import ndtr

    x = np.arange(800) / q
    tex = 0.05 + 92.0 * (1 - ndtr((x - 30.0) / 0.3)) + 7.95 * (1 - ndtr((x - 50.0) / 0.3))  # (scipy CDF)
    bright = 60.0 + 90.0 * (1 - ndtr((x - 50.0) / 0.2))
    return x, tex, bright


def test_faint_end_follows_a_calm_end_to_the_surroundings():
    """From an end found where the middle's texture halves (X = 30 mm), the end moves out over the
    calm stretch to X = 50 mm, the half-way level between the calm end and the surroundings."""
    from surfaces.face import _faint_end

    q = 10.0
    x, tex, bright = _calm_end_profiles(q)
    start = float(np.interp(-50.0, -tex[:400], np.arange(400)))  # the middle's half level, at its step
    assert start / q == pytest.approx(30.0, abs=0.1)
    pos = _faint_end(tex, bright, np.zeros_like(tex), start, +1, out_level=0.05, inner_i=150.0, outer_i=60.0,
                     q=q, persist=20)
    assert pos / q == pytest.approx(50.0, abs=0.15)
    # mirrored: the same walk outwards to lower X
    pos_l = _faint_end(tex[::-1], bright[::-1], np.zeros_like(tex), len(tex) - 1 - start, -1, out_level=0.05,
                       inner_i=150.0, outer_i=60.0, q=q, persist=20)
    assert (len(tex) - 1 - pos_l) / q == pytest.approx(50.0, abs=0.15)


def test_faint_end_passes_a_pore_at_the_end_and_works_without_a_brightness_step():
    """A dark pore 2.5 mm across sitting at the end of the calm stretch (X 46..48.5 mm, at the table's
    brightness and untextured) is passed over: the end stays at X = 50 mm. With a table as bright as
    the face (no brightness step to go by) the texture alone places the end there too."""
    from surfaces.face import _faint_end

    q = 10.0
    x, tex, bright = _calm_end_profiles(q)
    pore = (x >= 46.0) & (x < 48.5)
    kw = dict(out_level=0.05, q=q, persist=20)
    pos = _faint_end(np.where(pore, 0.05, tex), np.where(pore, 60.0, bright), np.zeros_like(tex), 300.0, +1,
                     inner_i=150.0, outer_i=60.0, **kw)
    assert pos / q == pytest.approx(50.0, abs=0.15)
    even = np.full_like(bright, 150.0)
    pos = _faint_end(tex, even, np.zeros_like(tex), 300.0, +1, inner_i=150.0, outer_i=145.0, **kw)
    assert pos / q == pytest.approx(50.0, abs=0.15)


def test_faint_end_does_not_walk_onto_plate_table_or_shadow():
    """The same calm stretch is not face when the texture beside the long edges is as strong (a
    textured plate or table carries it across), when it is of the surroundings' brightness, or when
    the surroundings are textured too (no room for a faint level between them): the end stays."""
    from surfaces.face import _faint_end

    q = 10.0
    x, tex, bright = _calm_end_profiles(q)
    start = 300.0
    kw = dict(inner_i=150.0, outer_i=60.0, q=q, persist=20)
    beside = np.where((x > 30.0) & (x < 50.0), 8.0, 0.0)
    assert _faint_end(tex, bright, beside, start, +1, out_level=0.05, **kw) == start
    dark = np.where(x > 30.5, 60.0, bright)  # a shadow (or the table) right after the end
    assert _faint_end(tex, dark, np.zeros_like(tex), start, +1, out_level=0.05, **kw) == start
    assert _faint_end(tex, bright, np.zeros_like(tex), start, +1, out_level=30.0, **kw) == start  # 100 < 4 x 30
    # and it never moves an end inwards
    assert _faint_end(tex, bright, np.zeros_like(tex), 520.0, -1, out_level=0.05, **kw) == 520.0


def _bright_zone_profiles(q=10.0, zone_tex=40.0):
    """Constructed profiles along a face: a middle textured at 100 and of brightness 150 up to X = 30 mm,
    then a zone of the break much brighter (220) than the middle and than the surroundings (60), textured
    at ``zone_tex``, up to X = 50 mm; plain surroundings (0.05) beyond (Gaussian-CDF steps, as above)."""
    from scipy.special import ndtr

    x = np.arange(800) / q
    zone = zone_tex - 0.05
    tex = 0.05 + (100.0 - zone) * (1 - ndtr((x - 30.0) / 0.3)) + zone * (1 - ndtr((x - 50.0) / 0.3))
    bright = 60.0 + 90.0 * (1 - ndtr((x - 30.0) / 0.2)) + 160.0 * (ndtr((x - 30.0) / 0.2) - ndtr((x - 50.0) / 0.2))
    return x, tex, bright


def test_faint_end_follows_a_brighter_zone_whose_texture_is_the_faces():
    """A zone of the break brighter than the face's middle and its surroundings (a shinier stretch),
    textured at 40 % of the middle and untextured beside the long edges, is face: the end moves from
    X = 30 mm out to its end at X = 50 mm (the half-way level, analytic). The same zone is not taken when
    the texture beside the long edges is more than a quarter of it (a textured plate or table there), or
    when it is textured at only 20 % of the middle: its brightness then ends the face, as before."""
    from surfaces.face import _faint_end

    q = 10.0
    kw = dict(out_level=0.05, inner_i=150.0, outer_i=60.0, q=q, persist=20)
    x, tex, bright = _bright_zone_profiles(q)
    pos = _faint_end(tex, bright, np.zeros_like(tex), 300.0, +1, **kw)
    assert pos / q == pytest.approx(50.0, abs=0.15)
    beside = np.where((x > 30.0) & (x < 50.0), 12.0, 0.0)  # 40 < 4 x 12
    assert _faint_end(tex, bright, beside, 300.0, +1, **kw) == 300.0
    x, tex, bright = _bright_zone_profiles(q, zone_tex=20.0)
    assert _faint_end(tex, bright, np.zeros_like(tex), 300.0, +1, **kw) == 300.0


@pytest.mark.parametrize("seed, megapixels, defects", [
    (55151, 3.0, [{"kind": "pore", "d_mm": 2.30}]),  # set 5151's first at-limit photo
    (70731, 3.1102811775697026, None),  # set 70707's photo 24
])
def test_face_with_a_brighter_stretch_is_found_to_its_end(tmp_path, seed, megapixels, defects):
    # truth by construction (surfaces.synth, seeded; photos generated_set drew): fillet-break faces whose
    # break turns brighter and calmer over its last 25-30 mm, brighter than the plate or table beyond.
    # Their texture went on, but the end stopped where the brightness changed: 21 % and 10 % of the face
    # were left out, with no warning (imperfections there would have gone unmeasured). The faces found
    # now are the truth's (areas by OpenCV's fillPoly on the photo's pixel grid).
    a, truth, true_m, found_m = _assess_rendered(tmp_path, seed, "fillet-break", megapixels, defects=defects)
    assert (true_m & found_m).sum() >= 0.95 * true_m.sum(), (true_m & found_m).sum() / true_m.sum()
    assert found_m.sum() <= 1.05 * true_m.sum(), found_m.sum() / true_m.sum()


def test_smooth_rim_brighter_than_the_face_beside_a_shadow_stays_in_the_face():
    """A smooth rim along the edge, a little brighter than the face's middle, with a dark gap beyond it
    and a table nearly as bright as the face further out: the rim is face up to the dark gap (the
    surroundings' level is the gap's, not the far table's)."""
    band = (30.0, 140.0, 40.0, 2.0, +1.0)  # along y = 40 (RECT's upper edge), 2 mm into the face
    shadow = (25.0, 145.0, 40.0, 2.5, -1.0, 100.0)  # 2.5 mm dark gap above that edge
    rgb, gray, calib = analytic_photo(RECT, seed=13, band=band, band_value=158.0, table=128.0, shadow=shadow)
    face = find_face(rgb, gray, calib)
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert face.width_mm == pytest.approx(RECT[2][1] - RECT[1][1], rel=0.06)  # the polygon's Y extent


def test_large_pore_at_an_end_does_not_end_the_face():
    """A 4.6 mm smooth dark disc (a large pore) reaching to 0.1 mm from the face's end, across two
    thirds of its width: the texture stays on the rows beside it, so the end is the polygon's, not
    the pore's far side (the pore and the strip beyond it would be cut off, never looked at)."""
    disc = (137.6, 45.0, 2.3, 110.0)  # RECT ends at X = 140; the disc spans X 135.3..139.9, Y 42.7..47.3
    rgb, gray, calib = analytic_photo(RECT, seed=14, disc=disc)
    face = find_face(rgb, gray, calib)
    assert face.length_mm == pytest.approx(RECT[1][0] - RECT[0][0], rel=0.03)  # the polygon's X extent
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    # the whole disc lies inside the outline (analytic: its centre and its far rim)
    outline = plane_outline(face, calib).astype(np.float32).reshape(-1, 1, 2)
    for pt in [(137.6, 45.0), (139.5, 45.0)]:
        assert cv2.pointPolygonTest(outline, pt, False) > 0


def test_face_found_from_a_stretch_of_it_is_followed_to_its_ends(monkeypatch):
    """When the rough search returns only a stretch of the face (a long smooth defect or a calmer
    stretch split its texture), the outline follows the texture past the stretch to the real ends."""
    from surfaces import face as face_mod

    rgb, gray, calib = analytic_photo(RECT, seed=15)
    # the rough frame: X 110..140 of RECT (X 30..140, Y 40..50): centre, axis, length, width, fill, where
    monkeypatch.setattr(face_mod, "_coarse_face", lambda *a, **k: (np.array([125.0, 45.0]), 0.0, 30.0, 10.0, 1.0, "photo"))
    face = find_face(rgb, gray, calib)
    assert face.length_mm == pytest.approx(RECT[1][0] - RECT[0][0], rel=0.03)  # the polygon's X extent
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert iou_plane(plane_outline(face, calib), np.asarray(RECT)) > 0.93


def test_end_at_the_local_half_level_of_a_calmer_rim():
    """An end whose texture is lower just inside it than in the middle is placed at the half-way
    level of its own rim: a blurred step (Gaussian CDF, symmetric about the step, so its half-way
    level sits at the step: analytic) from 0 outside to 10 inside, rising to 30 over the middle."""
    from scipy.special import ndtr

    from surfaces.face import _local_half_level

    q = 10.0  # samples per mm
    x = np.arange(400) / q  # mm
    edge, sigma = 8.0, 0.4
    prof = 10.0 * ndtr((x - edge) / sigma) + 20.0 * ndtr((x - 14.0) / 1.0)  # (scipy reference CDF)
    # the middle's half-way level (15) is crossed about 5 mm inside the end
    start = float(np.interp(15.0, prof[:250], np.arange(250)))
    assert start / q > edge + 3.0
    pos = _local_half_level(prof, start, 0.0, -1, q=q)
    assert start / q - pos / q > 0  # moved outwards only
    # walking out from a crossing 5 mm inside, the local level is still the middle's rise: the
    # end moves towards the step; from a crossing 1.5 mm inside it reaches it
    pos2 = _local_half_level(prof, (edge + 1.5) * q, 0.0, -1, q=q)
    assert pos2 / q == pytest.approx(edge, abs=0.1)
    # never inwards, and not over an outside as textured as half the rim
    assert _local_half_level(prof, edge * q, 0.0, -1, q=q) <= edge * q + 1e-9
    assert _local_half_level(prof, (edge + 1.5) * q, 6.0, -1, q=q) == (edge + 1.5) * q


def test_edge_line_is_not_pulled_out_by_a_lone_stretch():
    """Stretch positions of a long edge (analytic: points on y = 353 - 0.005 x, with the noise of
    a break): a lone stretch 6 mm outside (plate or table texture rose there) plus one just past the
    tolerance do not make an "outer group" and do not move the edge half-way out to the stray one;
    stretches outside that agree with each other (the real edge beyond a smooth root band over most
    of its length) still do."""
    from surfaces.face import _edge_line

    q = 10.0
    x = np.arange(10) * 20.0 + 132.5
    y = 353.0 - 0.005 * x + np.array([6.0, -0.5, 1.9, 2.3, -2.7, 0.6, 0.6, 0.6, 0.8, 0.0])
    y[-1] = 412.0  # 6 mm outside a lower (y_hi) edge: inward is -y
    a, b = _edge_line(x, y, -1.0, q=q)
    assert np.median(y[:-1] - a * x[:-1]) == pytest.approx(b, abs=1.0)  # the main group's offset (0.1 mm)
    # a band along the middle 6 stretches of an upper (y_lo) edge: its inner side at y = 100, the edge at y = 80
    y2 = np.r_[np.full(2, 80.0), np.full(6, 100.0), np.full(2, 80.0)] + np.array([0.4, -0.3, 0.2, 0.0, -0.2, 0.3, 0.5, -0.4, 0.1, 0.0])
    a2, b2 = _edge_line(x, y2, +1.0, q=q)
    assert a2 * x.mean() + b2 == pytest.approx(80.0, abs=1.0)


def test_face_band_inside_a_region_too_wide_for_a_face(monkeypatch):
    """When the region found is the specimen (a 40 mm wide plate with a weaker grain around the
    face, too wide for a fillet-break face), the face is the finely textured band along it: the
    outline is the polygon's (analytic geometry), not a refusal and not the plate."""
    from surfaces import face as face_mod

    plate = ([(20.0, 25.0), (150.0, 25.0), (150.0, 65.0), (20.0, 65.0)], 9.0)
    rgb, gray, calib = analytic_photo(RECT, seed=17, plate=plate)
    # the rough frame: the whole plate (X 20..150, Y 25..65): centre, axis, length, width, fill, where
    monkeypatch.setattr(face_mod, "_coarse_face", lambda *a, **k: (np.array([85.0, 45.0]), 0.0, 130.0, 40.0, 1.0, "photo"))
    face = find_face(rgb, gray, calib, test="fillet-break")
    assert face.width_mm == pytest.approx(RECT[2][1] - RECT[1][1], rel=0.06)  # the polygon's Y extent
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.04)  # analytic geometry
    assert iou_plane(plane_outline(face, calib), np.asarray(RECT)) > 0.9


def test_rim_of_the_face_brightness_must_end_in_a_step():
    """Brightness across a long edge (analytic profiles): the face at 150 up to sample 100, then
    either a flat rim of the face's brightness 15 samples wide ending in a sharp step to the
    surroundings' 95 (a smooth rim of the face: the edge moves out to the rim's end), or a plain
    strip shading linearly from 150 to 95 over 60 samples (a plate or bead in shade: its first
    samples are as close to the face's brightness, but it ends in no step, and the edge stays)."""
    from surfaces.face import _same_brightness_reach

    i = np.arange(300, dtype=float)
    rim = np.where(i < 115, 150.0, 95.0)
    rim = cv2.GaussianBlur(rim.reshape(1, -1), (0, 0), 1.0).ravel()  # a sharp step (1 sample blur)
    ramp = np.where(i < 100, 150.0, np.maximum(150.0 - (i - 100) * 55.0 / 60.0, 95.0))
    assert _same_brightness_reach(rim, 100.0, 150.0, 95.0, +1, 30) == pytest.approx(114.5, abs=1.5)
    assert _same_brightness_reach(ramp, 100.0, 150.0, 95.0, +1, 30) == 100.0


def test_no_face_raises_with_advice():
    rgb, gray, calib = analytic_photo(None, seed=7)
    with pytest.raises(FaceError, match="--roi"):
        find_face(rgb, gray, calib)


def test_faint_face_is_refused_not_guessed():
    """A face whose grain barely exceeds the sensor noise: the finder asks for a box instead of guessing."""
    rgb, gray, calib = analytic_photo(RECT, seed=11, grain_std=2.0)
    with pytest.raises(FaceError, match="--roi"):
        find_face(rgb, gray, calib)


def test_roi_outside_the_photo_is_refused():
    rgb, gray, calib = analytic_photo(RECT, seed=8)
    with pytest.raises(FaceError, match="outside the photo"):
        find_face(rgb, gray, calib, roi=(5000, 5000, 6000, 6000))


def test_roi_finds_the_same_face():
    rgb, gray, calib = analytic_photo(RECT, seed=9)
    box = apply_h(H_PLANE_TO_PHOTO, np.array([[20.0, 30.0], [150.0, 60.0]]))
    (x0, y0), (x1, y1) = box.min(0), box.max(0)
    face = find_face(rgb, gray, calib, roi=(x0, y0, x1, y1))
    assert face.method == "roi-box"
    assert face.area_mm2 == pytest.approx(shoelace(RECT), rel=0.03)  # analytic geometry


@pytest.mark.parametrize(
    "test, seed, tilt",
    [("fillet-break", 4101, 8.0), ("nick-break", 4102, 18.0)],
)
def test_rendered_fracture_photo(test, seed, tilt):
    """A generated photo, calibrated from its own mark: face area within 5 % of the generator's truth."""
    from surfaces.calibrate import calibrate
    from surfaces.photo import load_photo
    from surfaces.synth import render_fracture

    sp = render_fracture(seed, test=test, megapixels=2.5, tilt_deg=tilt)
    photo = load_photo(sp.jpeg_bytes(), name=f"{test}-{seed}.jpg")
    calib = calibrate(photo, marker_mm=sp.truth["marker_mm"])
    face = find_face(photo.rgb, photo.gray, calib, test=test)
    truth = sp.truth["face"]
    assert face.area_mm2 == pytest.approx(truth["area_mm2"], rel=0.05)  # truth by construction
    # outline against the truth polygon, both in the generator's plane
    Ht = np.linalg.inv(np.asarray(sp.truth["H_plane_to_photo"]))
    assert iou_plane(apply_h(Ht, face.polygon_px), np.asarray(truth["polygon_mm"]), px_per_mm=10) > 0.9
    assert math.isfinite(face.confidence) and 0 < face.confidence <= 1


def test_region_labelling_matches_opencvs_32_bit_labels_and_survives_overflow():
    """The face search labels its candidate regions with 16-bit labels while they suffice.

    Reference: OpenCV's own ``connectedComponentsWithStats`` with 32-bit labels on
    the same input (same labels, statistics and centroids); a dotted plane with more
    regions than 16 bits can number still gets every one of them.
    """
    from surfaces.face import _components

    rng = np.random.default_rng(5)
    blobs = (cv2.GaussianBlur(rng.random((400, 600)).astype(np.float32), (0, 0), 3) > 0.5).astype(np.uint8)
    dots = np.zeros((800, 800), np.uint8)
    dots[::3, ::3] = 1  # 267 x 267 isolated dots: more than 65535 regions
    for img in (blobs, dots):
        n, lab, stats, cents = _components(img)
        n_ref, lab_ref, stats_ref, cents_ref = cv2.connectedComponentsWithStats(img, connectivity=8, ltype=cv2.CV_32S)
        assert n == n_ref and np.array_equal(lab, lab_ref)
        assert np.array_equal(stats, stats_ref) and np.allclose(cents, cents_ref)
    assert _components(dots)[0] - 1 == 267 * 267


def _card_scene(table: float, *, s: float = 4.0):
    """A coarse plane view (``s`` px/mm) of a 60 x 90 mm paper card (grey 240) on a table of grey ``table``:
    a 10 mm marker near one corner, a printed scale of ticks along the far end (truth by construction)."""
    h, w = int(160 * s), int(200 * s)
    val = np.full((h, w), table, np.float32)
    x0, y0 = 50.0, 30.0  # card's top-left corner, mm
    val[int(y0 * s) : int((y0 + 90) * s), int(x0 * s) : int((x0 + 60) * s)] = 240.0
    mx, my = x0 + 8.0, y0 + 8.0  # marker's top-left, mm
    val[int(my * s) : int((my + 10) * s), int(mx * s) : int((mx + 10) * s)] = 20.0
    for k in range(40):  # ticks 1 mm apart, 3 mm long, 75 mm from the marker
        xt = x0 + 10.0 + k
        val[int((y0 + 83) * s) : int((y0 + 86) * s), int(xt * s) : int(xt * s) + 1] = 30.0
    quad = np.array([[mx, my], [mx + 10, my], [mx + 10, my + 10], [mx, my + 10]]) * s
    card = np.zeros((h, w), bool)
    card[int(y0 * s) : int((y0 + 90) * s), int(x0 * s) : int((x0 + 60) * s)] = True
    return val, quad, card, s


@pytest.mark.parametrize("table", [90.0, 205.0, 220.0], ids=["dark-table", "beige-table", "pale-table"])
def test_card_mask_covers_the_whole_card_also_on_a_pale_table(table):
    """The card's paper, scale included, is kept out of the face search however pale the table: on a
    table within a quarter of the paper's grey, the first flood runs into the table and is taken again
    within a narrower grey range (it used to fall back to a square 2.6 marker sides across, which
    left the printed scale, a textured strip, to be taken for the face)."""
    from surfaces.face import _card_mask

    val, quad, card, s = _card_scene(table)
    mask = _card_mask(val, quad, s)
    assert mask[card].mean() > 0.99  # the whole card, its far end's print too
    # and little of the table: the card plus the closing margin (4 mm) all round, analytic
    assert mask.sum() <= ((60 + 2 * 5) * (90 + 2 * 5)) * s * s


def test_card_mask_does_not_take_a_pale_plate_touching_the_card():
    """A pale plate (grey 215, 80 x 40 mm) touching the card's side on a dark table: a flood within a
    quarter of the paper's grey takes card and plate together (an L-shape, far from the rectangle a
    card is); the card is then taken within a narrower range, and the plate stays searchable."""
    from surfaces.face import _card_mask

    val, quad, card, s = _card_scene(90.0)
    plate = np.zeros_like(card)
    plate[int(40 * s) : int(80 * s), int(110 * s) : int(190 * s)] = True  # from the card's right side (X = 110)
    val[plate] = 215.0
    mask = _card_mask(val, quad, s)
    assert mask[card].mean() > 0.99
    far = plate.copy()
    far[:, : int(120 * s)] = False  # beyond the closing margin next to the card
    assert mask[far].mean() < 0.01


def _assess_rendered(tmp_path, seed, test, megapixels, roi=None, defects=None):
    """Assess a seeded photo of :func:`surfaces.synth.render_fracture` (truth by construction; ``defects``
    as the generator takes them), with the settings its truth implies (and ``roi``): the assessment, the
    truth, and the truth's and the found face's masks on the photo's pixel grid (OpenCV's ``fillPoly``,
    1/8 px vertices)."""
    import dataclasses
    import json

    from surfaces import bench
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    kw = {} if defects is None else {"defects": defects}
    path = render_fracture(seed, test=test, megapixels=megapixels, **kw).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    settings = bench._settings_for_truth(truth)
    if roi is not None:
        settings = dataclasses.replace(settings, roi=roi)
    a = assess_path(str(path), settings).assessment
    w, h = a["photo"]["width"], a["photo"]["height"]

    def raster(poly):
        m = np.zeros((h, w), np.uint8)
        cv2.fillPoly(m, [np.round(np.asarray(poly, float) * 8).astype(np.int32)], 1, shift=3)
        return m.astype(bool)

    return a, truth, raster(truth["face"]["polygon_px"]), raster(a["face"]["polygon_px"])


def test_card_mask_holds_at_the_cards_edge_where_the_table_is_brighter_than_the_paper():
    """A sheet brighter than the card (grey 250 against the paper's 240) under the card's right side, on a
    table of grey 150 (truth by construction): every grey range below the paper's level runs from the
    paper into the sheet (card and sheet together are too large and not a card's rectangle), and the mask
    used to fall back to a square 2.6 marker sides across, leaving the card's far end and its printed
    scale, a textured strip, to the face search.  The paper is now flooded within the card's own edges
    (OpenCV's Canny edges as the flood's barrier): the whole card, and none of the sheet beyond it."""
    from surfaces.face import _card_mask

    val, quad, card, s = _card_scene(150.0)
    sheet = np.zeros_like(card)
    sheet[:, int(100 * s) :] = True  # from 10 mm inside the card's right side (X = 110) to the plane's end
    val[sheet & ~card] = 250.0
    val = val + np.random.default_rng(3).normal(0.0, 1.5, val.shape).astype(np.float32)  # paper and table grain
    mask = _card_mask(val, quad, s)
    assert mask[card].mean() > 0.99
    far = sheet & ~card
    far[:, : int(120 * s)] = False  # beyond the closing margin next to the card
    assert mask[far].mean() < 0.01


def test_face_beside_a_card_on_a_table_as_pale_as_its_paper_is_found_off_the_card(tmp_path):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 20268 in the
    # accuracy test's set): a nick-break face beside the card on a pale table lit unevenly, brighter than
    # the card's paper beyond it.  The card's mask fell back to a square around the marker, and the
    # printed scale 32 mm from it was taken for a face 21 x 1.8 mm (then refused as too small).  The face
    # found now is the truth's (areas by OpenCV's fillPoly on the photo's pixel grid).
    a, truth, true_m, found_m = _assess_rendered(tmp_path, 20268, "nick-break", 2.9064885958786855)
    assert (true_m & found_m).sum() >= 0.95 * true_m.sum(), (true_m & found_m).sum() / true_m.sum()
    assert found_m.sum() <= 1.1 * true_m.sum(), found_m.sum() / true_m.sum()


def test_face_ending_a_few_mm_from_the_card_does_not_run_on_onto_it(tmp_path):
    # truth by construction (surfaces.synth; the at-limit photo generated_set drew for seed 70707: a fillet
    # face 94 mm long, one 2.30 mm pore). The face's far end lies about 7 mm of smooth plate from the card.
    # Looking past that end for where the texture rises again, the fine pass found the card's print and
    # took the plate and the card into the face: 120 mm long, the marker's corner measured as a 2.8 mm pore
    # and the plate's edge as 7.9 mm of lack of fusion (a borderline accept rejected). The card's area is
    # now never face.
    a, truth, true_m, found_m = _assess_rendered(tmp_path, 120707, "fillet-break", 3.0,
                                                 defects=[{"kind": "pore", "d_mm": 2.30}])
    assert (true_m & found_m).sum() >= 0.95 * true_m.sum(), (true_m & found_m).sum() / true_m.sum()
    assert found_m.sum() <= 1.1 * true_m.sum(), found_m.sum() / true_m.sum()
    assert abs(a["face"]["length_mm"] - truth["face"]["length_mm"]) <= 0.03 * truth["face"]["length_mm"]
    assert [i["kind"] for i in a["imperfections"]].count("unfused") == 0


def test_a_rust_spot_taken_for_the_face_is_refused_not_passed(tmp_path):
    # truth by construction (surfaces.synth; the at-limit photo generated_set drew for seed 131313, a fresh
    # set): a fillet face 113 mm long with one 2.38 mm pore on a rusty plate. The face search took a rust
    # spot 4.1 x 3.8 mm on the plate for the face (outline confidence 0.91), found nothing on it, and the
    # coupon was accepted under every preset (four of them false accepts). No fracture face is that short
    # (common practice: tens of mm of weld, a nick-break specimen about an inch wide): refused, asking for --roi.
    import json

    from surfaces import bench
    from surfaces.model import FaceError
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    path = render_fracture(181316, test="fillet-break", megapixels=3.0,
                           defects=[{"kind": "pore", "d_mm": 2.38}]).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    with pytest.raises(FaceError, match=r"only 4\.\d x 3\.\d mm, shorter than any fillet-break face.*--roi"):
        assess_path(str(path), bench._settings_for_truth(truth))


def test_a_face_outline_over_the_marker_is_refused(tmp_path):
    # truth by construction (surfaces.synth; the photo generated_set drew for seed 161616, a fresh set): a
    # fillet face near the card. The fine pass ran on past its end over the card: 195 mm for the face, the
    # marker's black read as a 27.7 mm slag inclusion, px/mm at the found centre 5.5 % off. A face outline
    # over the marker is certainly wrong: refused, asking for --roi.
    import json

    from surfaces import bench
    from surfaces.model import FaceError
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    path = render_fracture(161616, test="fillet-break", megapixels=3.2499642438005663).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    with pytest.raises(FaceError, match=r"runs onto the reference card .*--roi"):
        assess_path(str(path), bench._settings_for_truth(truth))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_edge_line_finds_the_edge_beyond_a_band_along_one_end_of_it(seed):
    """Stretch positions of a long edge (analytic: y = 200 + 0.004 x plus a break's 0.1 mm noise, q = 10 px/mm),
    with a smooth root band 1.1 mm wide along the first 20 of 30 stretches: there the texture edge lies on
    the band's inner side.  The band covers one end, so pairs across its end give a false slope and the
    stretches' spread holds the band's width; the edge is still the line of the 10 stretches beyond it
    (truth by construction).  A smooth wander of the edge itself (0.25 mm) does not move the line out."""
    from surfaces.face import _edge_line

    rng = np.random.default_rng(seed)
    q = 10.0
    x = np.arange(30) * 20.0 + 100.0
    edge = 200.0 + 0.004 * x
    y = edge + rng.normal(0.0, 1.0, x.size)
    y[:20] += 11.0  # an upper (y_lo) edge: inside is +y
    a, b = _edge_line(x, y, +1.0, q=q)
    assert np.max(np.abs(a * x + b - edge)) < 3.0, (a, b)  # within 0.3 mm of the edge along its whole length
    wander = edge + 2.5 * np.sin(x / 90.0) + rng.normal(0.0, 0.5, x.size)
    a, b = _edge_line(x, wander, +1.0, q=q)
    assert np.max(np.abs(a * x + b - edge)) < 3.0, (a, b)


def test_root_band_along_most_of_one_edge_stays_in_the_face(tmp_path):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 90930): a fillet
    # face 60 mm long with a brown lack-of-fusion band 1.3 mm wide along the root over 37 mm from near one
    # end.  The texture edge there lies on the band's inner side; the face used to be cut along it (area
    # 7.5 % short, 9 % of the band left inside, the band found as 1.9 mm).  Now the edge beyond the band
    # is kept: the face's area within issue 2's 5 % and the band found at its length within its 10 %.
    import json

    from surfaces import bench, evaluate
    from surfaces.pipeline import assess_path
    from surfaces.synth import render_fracture

    path = render_fracture(90930, test="fillet-break", megapixels=3.5113587603505456).save(tmp_path / "face.jpg")
    truth = json.loads(path.with_suffix(".truth.json").read_text())
    a = assess_path(str(path), bench._settings_for_truth(truth)).assessment
    true_area = float(truth["params"]["true_area_mm2"])
    assert abs(a["face"]["area_mm2"] - true_area) <= 0.05 * true_area, (a["face"]["area_mm2"], true_area)
    m = evaluate.match(a, truth)
    band = m[(m.truth_kind == "unfused") & (m.truth_along_mm > 30)]
    assert len(band) == 1 and bool(band.matched.iloc[0]) and band.det_kind.iloc[0] == "unfused", band.to_dict("records")
    t, d = float(band.truth_along_mm.iloc[0]), float(band.det_along_mm.iloc[0])
    assert abs(d - t) < 0.1 * t, (t, d)


@pytest.mark.parametrize(
    "zone, table, face, taken",
    [(110.0, 80.0, 150.0, True), (84.0, 80.0, 150.0, False), (110.0, 145.0, 150.0, False)],
    ids=["band", "wandering-edge", "table-like-face"],
)
def test_edge_beyond_a_band_only_where_the_band_is_not_the_surroundings(zone, table, face, taken):
    """Constructed brightness profiles of 10 stretches (q = 10 px/mm, an upper edge at row 50): six stretches
    have their texture edge 1.2 mm inside it (rows 50-61 at the zone's grey), four reach the edge.  The rows the
    edge line would add are face (a band: 110 between a 150 face and an 80 table) or the table itself (a
    wandering edge's crests made the outer group); face and table nearly alike leave nothing to tell by."""
    from surfaces.face import _zone_check

    q, h = 10.0, 200
    xb = np.arange(10) * 20.0 + 10.0
    vals = np.r_[np.full(6, 62.0), np.full(4, 50.0)]
    PI = np.full((h, 10), face)
    PI[:50] = table
    PI[50:62, :6] = zone
    main, outer = vals > 56.0, vals <= 56.0
    assert _zone_check(PI, xb, vals, +1.0, q=q, c0=90, c1=150)(0.0, 50.0, main, outer) is taken


@pytest.mark.parametrize("roi", [None, (480, 1200, 1260, 1650)])
def test_face_beside_a_bead_and_plate_as_smooth_as_each_other_is_the_textured_band(tmp_path, roi):
    # truth by construction (surfaces.synth, seeded; the photo generated_set drew for seed 60621): a fillet
    # face 60 x 5.6 mm between its bead and a plate of one grey, both smooth.  The coarse region took in
    # all three (21 mm across), the fine pass found no texture step across the weld there, and the face
    # was refused (outline confidence 0.45); given a rough box around face, bead and a plate margin (photo
    # px, drawn on this photo), the face was measured at 3.8 times its area.  Now the finely textured band
    # along it is fitted: the face found covers the truth face (areas by OpenCV's fillPoly on the photo's
    # pixel grid) and little more.
    a, truth, true_m, found_m = _assess_rendered(tmp_path, 60621, "fillet-break", 3.7489191253997998, roi=roi)
    assert (true_m & found_m).sum() >= 0.95 * true_m.sum(), (true_m & found_m).sum() / true_m.sum()
    assert found_m.sum() <= 1.2 * true_m.sum(), found_m.sum() / true_m.sum()
    assert abs(a["face"]["length_mm"] - truth["face"]["length_mm"]) <= 0.05 * truth["face"]["length_mm"]
