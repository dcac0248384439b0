"""Matching detections to truth, on hand-made truth/assessment pairs.

Expected values are worked out by hand from analytic geometry (distances in
the plane, a homography applied to known points); limit values come from
../shared/REFERENCES.md.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from surfaces import evaluate as ev
from surfaces.geometry import apply_h

# plane mm -> photo px at 10 px/mm, origin shifted by (100, 50) px
H_SCALE = [[10.0, 0.0, 100.0], [0.0, 10.0, 50.0], [0.0, 0.0, 1.0]]


def _truth(imps, H=H_SCALE, **face):
    f = {"polygon_mm": [[0, 0], [100, 0], [100, 10], [0, 10]], "length_mm": 100.0, "width_mm": 10.0,
         "area_mm2": 1000.0}
    f.update(face)
    return {"schema": "surfaces.truth/1", "H_plane_to_photo": H, "px_per_mm_face": 10.0, "face": f,
            "imperfections": imps}


def _t(kind, x, y, g, **kw):
    d = {"kind": kind, "centroid_mm": [x, y], "greatest_mm": g, "width_mm": kw.pop("w", g),
         "along_mm": kw.pop("along", g), "across_mm": kw.pop("across", g), "area_mm2": kw.pop("area", g * g)}
    d.update(kw)
    return d


def _d(i, kind, x_mm, y_mm, g, H=H_SCALE, **kw):
    """A detection whose centroid is the plane point (x_mm, y_mm) seen through H."""
    px = apply_h(np.asarray(H, float), [[x_mm, y_mm]])[0]
    d = {"id": i, "kind": kind, "centroid_px": [float(px[0]), float(px[1])], "greatest_mm": g,
         "width_mm": g, "along_mm": kw.pop("along", g), "area_mm2": g * g, "confidence": 0.9, "status": "auto"}
    d.update(kw)
    return d


def test_exact_match_distance_is_analytic():
    # analytic geometry: (10.3, 5) vs (10, 5) is 0.3 mm apart in the plane
    m = ev.match({"imperfections": [_d(1, "pore", 10.3, 5.0, 1.1)]}, _truth([_t("pore", 10, 5, 1.0)]))
    assert len(m) == 1
    r = m.iloc[0]
    assert r["matched"] and r["same_kind"] and r["det_id"] == 1
    assert r["dist_mm"] == pytest.approx(0.3, abs=1e-9)
    assert r["greatest_err_mm"] == pytest.approx(0.1, abs=1e-12)
    # 0.1 mm error on a 1 mm pore is within max(0.15 mm, 5 %)
    assert r["greatest_ok"]


def test_tolerance_is_max_of_1mm_and_half_greatest():
    big = _truth([_t("inclusion", 50, 5, 4.0)])  # tolerance 2 mm
    assert ev.match({"imperfections": [_d(1, "inclusion", 51.9, 5, 4)]}, big).iloc[0]["matched"]
    assert not ev.match({"imperfections": [_d(1, "inclusion", 52.1, 5, 4)]}, big).iloc[0]["matched"]
    small = _truth([_t("pore", 50, 5, 0.4)])  # tolerance 1 mm (not 0.2)
    assert ev.match({"imperfections": [_d(1, "pore", 50.9, 5, 0.4)]}, small).iloc[0]["matched"]
    m = ev.match({"imperfections": [_d(1, "pore", 51.1, 5, 0.4)]}, small)
    # a miss gives a truth row and a false-detection row
    assert list(m["truth_index"]) == [0, -1] and list(m["det_id"]) == [-1, 1]
    assert not m["matched"].any()


def test_perspective_homography_maps_back_to_the_plane():
    # analytic geometry: a strongly tilted camera; detections placed by H on
    # the same plane points must come back to them through inv(H)
    H = np.array([[9.0, 1.2, 300.0], [-0.8, 11.0, 200.0], [0.0009, 0.0012, 1.0]])
    truth = _truth([_t("pore", 20, 8, 1.0), _t("pore", 80, 3, 1.0)], H=H.tolist())
    ass = {"imperfections": [_d(7, "pore", 80.2, 3.0, 1.0, H=H), _d(3, "pore", 20.0, 7.5, 1.0, H=H)]}
    m = ev.match(ass, truth)
    got = dict(zip(m["truth_index"], m["det_id"]))
    assert got == {0: 3, 1: 7}
    d = dict(zip(m["truth_index"], m["dist_mm"]))
    assert d[0] == pytest.approx(0.5, abs=1e-9) and d[1] == pytest.approx(0.2, abs=1e-9)


def test_one_to_one_greedy_by_distance_not_by_order():
    # truth A at x=10, B at x=11.5; detection d1 at 10.9 (0.9 from A, 0.6 from B),
    # d2 at 9.5 (0.5 from A).  Sorted pairs: A-d2 0.5, B-d1 0.6, A-d1 0.9 -> A-d2, B-d1.
    truth = _truth([_t("pore", 10, 5, 0.8), _t("pore", 11.5, 5, 0.8)])
    ass = {"imperfections": [_d(1, "pore", 10.9, 5, 0.8), _d(2, "pore", 9.5, 5, 0.8)]}
    m = ev.match(ass, truth)
    assert dict(zip(m["truth_index"], m["det_id"])) == {0: 2, 1: 1}
    # one detection between two truths: only the nearer one is matched
    m = ev.match({"imperfections": [_d(1, "pore", 10.9, 5, 0.8)]}, truth)
    assert m.set_index("truth_index").loc[1, "det_id"] == 1
    assert m.set_index("truth_index").loc[0, "det_id"] == -1
    # two detections on one truth: the farther one is a false detection
    m = ev.match({"imperfections": [_d(1, "pore", 10.1, 5, 0.8), _d(2, "pore", 10.4, 5, 0.8)]},
                 _truth([_t("pore", 10, 5, 0.8)]))
    assert m.loc[m["truth_index"] == 0, "det_id"].item() == 1
    assert m.loc[m["truth_index"] == -1, "det_id"].item() == 2


def test_dismissed_rows_are_not_scored():
    ass = {"imperfections": [_d(1, "pore", 10, 5, 1.0, status="dismissed"), _d(2, "pore", 40, 5, 1.0)]}
    m = ev.match(ass, _truth([_t("pore", 10, 5, 1.0)]))
    assert list(m["det_id"]) == [-1, 2]


def test_empty_inputs_keep_columns():
    m = ev.match({"imperfections": []}, _truth([]))
    assert list(m.columns) == list(ev.MATCH_COLUMNS) and len(m) == 0
    s = ev.scores(m)
    assert s["n_truth"] == 0 and s["greatest"]["frac_within"] is None


def test_bad_truth_is_a_clear_error():
    with pytest.raises(ev.TruthError, match="H_plane_to_photo"):
        ev.match({"imperfections": []}, {"imperfections": []})
    with pytest.raises(ev.TruthError, match="invertible"):
        ev.match({"imperfections": []}, _truth([], H=[[0, 0, 0], [0, 0, 0], [0, 0, 0]]))


def test_scores_hand_counted():
    # truth: 3 pores (0.6, 1.5, 3.0 mm), 1 inclusion 2 mm, 1 unfused band 20 mm long
    truth = _truth([
        _t("pore", 10, 5, 0.6), _t("pore", 20, 5, 1.5), _t("pore", 30, 5, 3.0),
        _t("inclusion", 40, 5, 2.0), _t("unfused", 70, 1, 20.0, along=20.0, across=2.0),
    ])  # fmt: skip
    ass = {"imperfections": [
        _d(1, "pore", 10.1, 5, 0.70),        # pore found, err +0.10 (ok: tol 0.15)
        _d(2, "inclusion", 20.0, 5.2, 1.8),  # pore found as inclusion, err +0.30 (not ok: tol 0.15)
        # pore at 30 missed
        _d(3, "inclusion", 40, 5, 2.05),     # inclusion found, err +0.05 (ok)
        _d(4, "unfused", 71, 1, 18.0, along=18.0),  # unfused found, length err 10 %
        _d(5, "pore", 90, 5, 0.8),           # false pore
    ]}  # fmt: skip
    m = ev.match(ass, truth)
    s = ev.scores(m, min_mm={"pore": 0.5})
    p = s["kinds"]["pore"]["all"]
    assert (p["n_truth"], p["found"], p["found_any"]) == (3, 1, 2)
    assert p["recall"] == pytest.approx(1 / 3) and p["recall_any_kind"] == pytest.approx(2 / 3)
    assert (p["n_detected"], p["correct"]) == (2, 1) and p["precision"] == pytest.approx(0.5)
    inc = s["kinds"]["inclusion"]["all"]
    assert inc["recall"] == 1.0 and inc["precision"] == pytest.approx(0.5)  # one of two is a pore
    assert inc["precision_any_kind"] == 1.0
    assert s["kinds"]["pore"]["buckets"]["2-4"]["n_truth"] == 1
    assert s["kinds"]["pore"]["buckets"]["2-4"]["found"] == 0
    assert s["kinds"]["pore"]["at_least"]["n_truth"] == 3
    g = s["greatest"]
    assert g["n"] == 4
    # abs errors 0.10, 0.30, 0.05, 2.0 -> median 0.2; within: 0.10 (1 mm: tol 0.15), 0.05 -> 2 of 4
    assert g["median_abs_err_mm"] == pytest.approx(0.2)
    assert g["frac_within"] == pytest.approx(0.5)
    assert s["unfused_length"]["median_rel_err"] == pytest.approx(0.1)
    assert s["false_detections"] == 1 and s["missed"] == 1


def test_greatest_tolerance_edges():
    # max(0.15 mm, 5 %): 0.15 mm up to 3 mm, then 5 % of the true size
    assert ev.greatest_tolerance_mm(1.0) == pytest.approx(0.15)
    assert ev.greatest_tolerance_mm(3.0) == pytest.approx(0.15)
    assert ev.greatest_tolerance_mm(10.0) == pytest.approx(0.5)


def test_photo_scores_percent_errors():
    truth = _truth([])
    ass = {"calibration": {"px_per_mm": 10.05}, "face": {"area_mm2": 960.0, "length_mm": 99.0}}
    s = ev.photo_scores(ass, truth)
    assert s["px_per_mm_err_pct"] == pytest.approx(0.5)
    assert s["face_area_err_pct"] == pytest.approx(-4.0)
    assert s["face_length_err_pct"] == pytest.approx(-1.0)


def _bend_truth(imps=(), **visible):
    """A curved bend truth: inspected arc 60 x 20 mm (R = 40 mm), drawn strip 80 mm projected."""
    R, L, W = 40.0, 60.0, 20.0
    Lp = 2 * R * math.sin(L / (2 * R))
    t = _truth(list(imps), polygon_mm=[[0, 0], [Lp, 0], [Lp, W], [0, W]], length_mm=L, width_mm=W, area_mm2=L * W)
    t.update(scene="bend", test="bend", curvature={"enabled": True, "radius_mm": R, "projected_length_mm": Lp})
    if visible is not None:
        v = {"length_mm": 80.0, "width_mm": W, "area_mm2": 80.0 * W, "surface_x0_mm": -20.0, "surface_x1_mm": 80.0}
        v.update(visible)
        t["face"]["visible"] = v
    return t


def test_bend_face_is_scored_against_the_drawn_surface():
    ass = {"calibration": {"px_per_mm": 10.0}, "face": {"area_mm2": 1560.0, "length_mm": 78.0}}
    s = ev.photo_scores(ass, _bend_truth())
    # by hand: 1560 / (80 x 20) - 1 = -2.5 %; 78 / 80 - 1 = -2.5 % (the inspected arc would give +30 %)
    assert s["face_truth"] == "visible"
    assert s["face_area_err_pct"] == pytest.approx(-2.5) and s["face_length_err_pct"] == pytest.approx(-2.5)
    # an older curved-bend truth without the drawn strip and without a seed to replay: not scored
    old = _bend_truth()
    del old["face"]["visible"]
    s = ev.photo_scores(ass, old)
    assert s["face_truth"] == "unknown" and s["face_area_err_pct"] is None and s["face_length_err_pct"] is None
    # a fracture face (or a flat coupon) is what the photo shows: scored against the face itself
    s = ev.photo_scores(ass, _truth([]))
    assert s["face_truth"] == "face" and s["face_area_err_pct"] == pytest.approx(56.0)


def test_bend_sizes_projected_when_the_tool_had_no_radius():
    imp = _t("crack", 30, 10, 4.0, along=4.0, projected={"greatest_mm": 3.6, "along_mm": 3.6, "width_mm": 0.3})
    truth = _bend_truth([imp])
    det = _d(1, "crack", 30, 10, 3.62)
    plain = {"test": "bend", "settings": {"nominal": {"thickness_mm": 10.0}}, "imperfections": [det]}
    m = ev.match(plain, truth)
    assert m.loc[0, "truth_greatest_mm"] == 3.6 and m.loc[0, "truth_along_mm"] == 3.6 and m.loc[0, "greatest_ok"]
    # with the radius (or former + thickness) the tool reports true arc lengths: scored against them
    for st in ({"outer_radius_mm": 40.0}, {"former_diameter_mm": 60.0, "nominal": {"thickness_mm": 10.0}}):
        m = ev.match({**plain, "settings": st}, truth)
        assert m.loc[0, "truth_greatest_mm"] == 4.0 and not m.loc[0, "greatest_ok"]
    # a flat coupon, or an assessment that does not say how it was made: true sizes
    flat = {**truth, "curvature": {"enabled": False}}
    assert ev.match(plain, flat).loc[0, "truth_greatest_mm"] == 4.0
    assert ev.match({"imperfections": [det]}, truth).loc[0, "truth_greatest_mm"] == 4.0


def test_projected_check_agrees_with_the_tools_own_radius_rule():
    from dataclasses import asdict

    from surfaces.bend import outer_radius
    from surfaces.model import Settings

    truth = _bend_truth()
    for kw in ({}, {"outer_radius_mm": 30.0}, {"former_diameter_mm": 40.0}, {"former_diameter_mm": 40.0, "nominal": {"thickness_mm": 8.0}},
               {"nominal": {"thickness_mm": 8.0}}, {"bend_angle_deg": 120.0, "outer_radius_mm": 25.0}):  # fmt: skip
        st = Settings(test="bend", **kw)
        projected = ev._projected_lengths({"test": "bend", "settings": asdict(st)}, truth)
        assert projected == (outer_radius(st)[0] is None), kw


def test_bend_truth_table_measures_x_from_the_surface_seen_and_corners_are_long_edges():
    # a crack 0.4 mm from the inspected arc's start (surface x 0.4..2.4) and one from the y = 0 edge
    c1 = _t("crack", 5, 10, 2.0, face_mm={"cx": 1.4, "cy": 10.0, "x0": 0.4, "x1": 2.4, "y0": 9.9, "y1": 10.1})
    c2 = _t("crack", 30, 1, 2.0, starts_at_edge=True, face_mm={"cx": 30.0, "cy": 1.0, "x0": 29.9, "x1": 30.1, "y0": 0.0, "y1": 2.0})
    tab = ev.truth_table(_bend_truth([c1, c2]))
    r1, r2 = tab.iloc[0], tab.iloc[1]
    # by hand: the surface seen starts 20 mm of arc before the inspected arc, and is 100 mm long
    assert r1["x0_mm"] == pytest.approx(20.4) and r1["cx_mm"] == pytest.approx(21.4)
    assert r1["dist_end_mm"] == pytest.approx(20.4)
    assert not r1["at_edge"] and r2["at_edge"] and r2["dist_edge_mm"] == pytest.approx(0.0)
    # without the drawn strip (and no seed): face x as recorded, but the end is still not a corner
    old = _bend_truth([c1])
    del old["face"]["visible"]
    r = ev.truth_table(old).iloc[0]
    assert r["x0_mm"] == pytest.approx(0.4) and r["dist_end_mm"] == pytest.approx(0.4) and not r["at_edge"]
    # measure.py's own rule on a bend coupon (edges_only): the same 0.5 mm band, long edges only
    from surfaces.measure import EDGE_BAND_MM

    assert r["dist_end_mm"] <= EDGE_BAND_MM


def test_truth_table_face_axes_and_verdict():
    # face rotated 30 degrees in the plane, origin at (5, 7): a pore at face (x, y) = (40, 4)
    a = math.radians(30)
    ux, uy = np.array([math.cos(a), math.sin(a)]), np.array([-math.sin(a), math.cos(a)])
    o = np.array([5.0, 7.0])
    poly = [o, o + 100 * ux, o + 100 * ux + 10 * uy, o + 10 * uy]
    c = o + 40 * ux + 4 * uy
    truth = _truth([_t("pore", *c, 3.0, starts_at_edge=False)])
    truth["face"] = {"polygon_mm": [list(p) for p in poly], "length_mm": 100.0, "width_mm": 10.0,
                     "area_mm2": 1000.0}
    tab = ev.truth_table(truth)
    r = tab.iloc[0]
    assert r["cx_mm"] == pytest.approx(40.0) and r["cy_mm"] == pytest.approx(4.0)
    assert r["x0_mm"] == pytest.approx(38.5) and r["y1_mm"] == pytest.approx(5.5)
    assert r["greatest_u_mm"] == 0.0 and r["status"] == "confirmed"
    from surfaces.limits import load_limit_set

    ls = load_limit_set("aws-d1.1-fillet-break")
    # REFERENCES.md, AWS D1.1 fillet break: no pore or inclusion over 3/32 in (2.38 mm)
    assert ev.truth_verdict(truth, limit_set=ls, test="fillet-break")["result"] == "reject"
    truth["imperfections"][0]["greatest_mm"] = 2.0
    assert ev.truth_verdict(truth, limit_set=ls, test="fillet-break")["result"] == "accept"
    truth["imperfections"] = []
    assert ev.truth_verdict(truth, limit_set=ls, test="fillet-break")["result"] == "accept"


def test_truth_table_uses_face_transform_and_exact_extents():
    # analytic geometry: A maps face mm to plane mm (rotation 90 degrees + shift)
    A = [[0.0, -1.0, 50.0], [1.0, 0.0, 10.0], [0.0, 0.0, 1.0]]
    c_plane = [50.0 - 3.0, 10.0 + 20.0]  # face (x, y) = (20, 3)
    truth = _truth([_t("inclusion", *c_plane, 2.0, along=2.0, across=0.6)])
    truth["face"]["A_face_to_plane"] = A
    truth["face"]["root_side"] = "y0"
    r = ev.truth_table(truth).iloc[0]
    assert (r["cx_mm"], r["cy_mm"]) == pytest.approx((20.0, 3.0))
    assert r["y0_mm"] == pytest.approx(2.7) and r["dist_root_mm"] == pytest.approx(2.7)
    assert not r["at_root"]
    # exact extents given by the generator win over centroid +/- half sizes
    truth["imperfections"][0]["face_mm"] = {"cx": 20.0, "cy": 3.0, "x0": 19.5, "x1": 21.5, "y0": 0.2, "y1": 0.8}
    r = ev.truth_table(truth).iloc[0]
    assert r["x0_mm"] == 19.5 and r["y0_mm"] == 0.2 and r["at_root"] and r["at_edge"]


@pytest.mark.parametrize(
    "d_mm, result, border",
    [
        (1.0, "accept", False),
        (2.30, "accept", True),  # 2.30 + 0.15 > 2.38
        (2.42, "reject", True),  # 2.42 - 0.15 < 2.38
        (3.6, "reject", False),  # 3.6 - 5 % = 3.42 > 2.38
    ],
)
def test_truth_band_marks_sizes_within_tolerance_of_a_limit(d_mm, result, border):
    # REFERENCES.md, AWS D1.1 fillet break: no pore over 3/32 in (2.38 mm exactly)
    from surfaces.limits import load_limit_set

    truth = _truth([_t("pore", 40, 5, d_mm, starts_at_edge=False)])
    b = ev.truth_band(truth, limit_set=load_limit_set("aws-d1.1-fillet-break"), test="fillet-break")
    assert b["result"] == result and b["borderline"] is border


# --------------------------------------------------------------------------- the bench's use of the scores


def test_bench_targets_met_and_not_met():
    from surfaces import bench

    rep = {
        "speed": {"cpu_count": 2, "repeat": 3, "sizes": [
            {"mp_nominal": 12.0, "megapixels": 12.0, "median_s": 0.8, "worst_s": 0.9, "cold_s": 1.5,
             "floor_median_s": 0.2, "floor_ratio": 4.0, "peak_mb": 1500.0},
        ], "batch": {"ratio": 1.7, "megapixels": 4.0, "one": {"photos": 6, "photos_per_s": 1.0},
                     "two": {"photos": 6, "photos_per_s": 1.7}}},
        "accuracy": {"generated": {"n_false_accepts": 1, "borderline": {"n": 4, "review": 3, "items": []}}},
    }
    got = {t["target"]: t["met"] for t in bench.targets(rep)}
    assert got == {"speed_12mp_s": True, "floor_ratio_12mp": True, "memory_12mp_mb": False, "batch_ratio": True,
                   "false_accepts": False, "borderline_review": False}
    assert "NOT MET" in bench.format_table({"speed": rep["speed"], "targets": bench.targets(rep)})


def test_bench_floor_and_memory_are_measured(tmp_path):
    import cv2

    from surfaces import bench

    p = tmp_path / "a.png"
    cv2.imwrite(str(p), np.full((300, 400, 3), 128, np.uint8))
    assert bench.floor_time(p) > 0
    assert bench.peak_rss_mb() > 10  # an interpreter with numpy loaded holds more than 10 MB
    with pytest.raises(bench.BenchError, match="cannot decode"):
        (tmp_path / "b.png").write_bytes(b"not an image")
        bench.floor_time(tmp_path / "b.png")


def test_bench_bad_option_is_one_line(capsys):
    from surfaces.cli import main

    assert main(["bench", "--sizes", "3,x"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err and "--sizes" in err[-1]
