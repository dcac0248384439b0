"""Bend coupons end to end on seeded synthetic photos: recall, false finds, sizes, edge flags, verdicts.

The photos come from :func:`surfaces.synth.render_bend` (truth known by
construction: true arc lengths on a cylinder of the stated radius, grinding
marks, orange peel, specks and smudges, tilted camera, JPEG).  Each runs
through the whole pipeline (calibration from the printed marker, coupon
finder, openings, curvature correction, measurement, limits engine).

Figures asserted (the acceptance figures of the bend-face issue):

* cracks of 1 mm and longer found, as cracks: recall >= 0.95;
* at most one false discontinuity per coupon on average;
* greatest dimension within max(0.2 mm, 10 %) of the truth (true surface
  length) for at least 90 % of the matched discontinuities;
* the edge/corner flag set for at least 95 % of the cracks that start at a
  long edge;
* never ``accept`` where the truth, judged by the same limits engine
  (AWS D1.1 4.9.3.3 bend preset, ../shared/REFERENCES.md), rejects;
* the face area within 5 % of the surface drawn in the photo, projected
  onto the card's plane (``truth["face"]["visible"]``; the accuracy test's
  target, not met on every coupon yet, so marked xfail).

Run ``python -m pytest tests/test_bend_eval.py -q -s`` to see the table.

Matching: a detection's photo position is the centroid of its ``outline_px``
polygon, mapped into the marker plane with the inverse of the truth
``H_plane_to_photo``, within max(1 mm, greatest / 2) of the truth
``centroid_mm``, pairs taken greedily by distance.  (The table's
``centroid_px`` is computed by ``measure`` from the curvature-corrected
centroid and is not a photo position on a curved coupon; see
``test_bend.py::test_measure_centroid_px_is_the_photo_position``.)
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from surfaces.evaluate import photo_scores, truth_band
from surfaces.geometry import apply_h
from surfaces.limits import load_limit_set
from surfaces.model import Settings
from surfaces.photo import load_photo
from surfaces.pipeline import assess
from surfaces.shapes import polygon_features
from surfaces.synth import render_bend

pytestmark = pytest.mark.slow

CURVED_SEEDS = tuple(range(1, 13))
FLAT_SEEDS = (51, 52)
PRESET = "aws-d1.1-bend"


def _defects(seed: int) -> list[dict]:
    """Four cracks of 1-6 mm (half of them from a long edge), one under 1 mm, one pore or slag."""
    rng = np.random.default_rng(1000 + seed)
    out = [{"kind": "crack", "length_mm": float(rng.uniform(1.0, 6.0)), "edge": str(e)} for e in rng.choice(["", "", "y0", "y1"], size=4)]
    out.append({"kind": "crack", "length_mm": float(rng.uniform(0.5, 1.0))})
    out.append({"kind": str(rng.choice(["pore", "inclusion"]))})
    return out


def _render(seed: int, curvature: bool):
    rng = np.random.default_rng(2000 + seed)
    defects = _defects(seed)
    width = float(rng.uniform(15, 40))
    last = None
    for k in range(len(defects)):  # drop defects that do not fit a small coupon
        try:
            return render_bend(seed, curvature=curvature, megapixels=2.5, defects=defects[: len(defects) - k], width_mm=width)
        except Exception as e:  # noqa: BLE001 - the generator's own "does not fit" message
            last = e
    raise AssertionError(f"synthetic bend photo {seed} could not be rendered: {last}")


def _outline_centroid(row) -> np.ndarray:
    f = polygon_features(np.asarray(row["outline_px"], float), px_per_mm=1.0)
    return np.array([f["cx_mm"], f["cy_mm"]])


def _one(seed: int, curvature: bool) -> dict:
    sp = _render(seed, curvature)
    truth = sp.truth
    photo = load_photo(sp.jpeg_bytes())
    c = truth.get("curvature") or {}
    thickness = c.get("thickness_mm") or truth["params"]["coupon_thickness_mm"]
    settings = Settings(
        test="bend",
        marker_mm=truth["marker_mm"],
        limits=PRESET,
        former_diameter_mm=2 * c["former_radius_mm"] if c.get("enabled") else None,
        nominal={"thickness_mm": thickness},
    )
    res = assess(photo, settings)
    rows = res.assessment["imperfections"]
    Hinv = np.linalg.inv(np.asarray(truth["H_plane_to_photo"], float))
    dxy = [apply_h(Hinv, [_outline_centroid(r)])[0] for r in rows]
    tru = truth["imperfections"]
    pairs = []
    for i, t in enumerate(tru):
        tol = max(1.0, t["greatest_mm"] / 2)
        for j, d in enumerate(dxy):
            dist = float(np.hypot(*(np.asarray(t["centroid_mm"]) - d)))
            if dist <= tol:
                pairs.append((dist, i, j))
    t_to_d, used = {}, set()
    for _, i, j in sorted(pairs):
        if i not in t_to_d and j not in used:
            t_to_d[i] = j
            used.add(j)
    matched = []
    for i, t in enumerate(tru):
        r = rows[t_to_d[i]] if i in t_to_d else None
        matched.append({
            "seed": seed, "kind": t["kind"], "greatest": t["greatest_mm"], "edge": bool(t["starts_at_edge"]),
            "found": r is not None, "det_kind": r["kind"] if r else "",
            "det_greatest": r["greatest_mm"] if r else math.nan, "det_at_edge": bool(r["at_edge"]) if r else False,
        })  # fmt: skip
    band = truth_band(truth, limit_set=load_limit_set(PRESET), test="bend", nominal={"thickness_mm": thickness})
    return {
        "seed": seed,
        "curved": curvature,
        "matched": matched,
        "false": len(rows) - len(used),
        "verdict": res.assessment["verdict"]["result"],
        "truth_verdict": band["result"],
        "borderline": band["borderline"],
        "notes": [w for w in res.assessment["warnings"] if "coupon" in w or "surface" in w],
        "face": photo_scores(res.assessment, truth),
    }


@pytest.fixture(scope="module")
def results() -> list[dict]:
    out = [_one(s, True) for s in CURVED_SEEDS] + [_one(s, False) for s in FLAT_SEEDS]
    _print_summary(out)
    return out


def _tol(g: float) -> float:
    return max(0.2, 0.1 * g)  # the size tolerance


def _figures(results):
    rows = [m for r in results for m in r["matched"]]
    cracks = [m for m in rows if m["kind"] == "crack" and m["greatest"] >= 1.0]
    found = [m for m in rows if m["found"]]
    edge = [m for m in rows if m["kind"] == "crack" and m["edge"]]
    return {
        "photos": len(results),
        "cracks_1mm": len(cracks),
        "recall_crack_1mm": sum(m["det_kind"] == "crack" for m in cracks) / max(len(cracks), 1),
        "found_any_1mm": sum(m["found"] for m in cracks) / max(len(cracks), 1),
        "false_per_coupon": sum(r["false"] for r in results) / len(results),
        "size_ok": sum(abs(m["det_greatest"] - m["greatest"]) <= _tol(m["greatest"]) for m in found) / max(len(found), 1),
        "size_err_median": float(np.median([abs(m["det_greatest"] - m["greatest"]) for m in found])) if found else math.nan,
        "edge_cracks": len(edge),
        "edge_flag_ok": sum(m["det_at_edge"] for m in edge) / max(len(edge), 1),
        "verdict_agree": sum(r["verdict"] == r["truth_verdict"] for r in results) / len(results),
        "wrong_accept": sum(r["verdict"] == "accept" and r["truth_verdict"] != "accept" for r in results),
    }


def _print_summary(results):
    print()
    for r in results:
        miss = [m for m in r["matched"] if not m["found"]]
        print(f"seed {r['seed']:3d} {'curved' if r['curved'] else 'flat  '} truth {len(r['matched'])} missed {len(miss)} "
              f"false {r['false']} verdict {r['verdict']} (truth {r['truth_verdict']}{', borderline' if r['borderline'] else ''}) "
              f"face area {r['face']['face_area_err_pct']:+.1f} % ({r['face']['face_truth']})")
    for k, v in _figures(results).items():
        print(f"  {k}: {v:.3f}" if isinstance(v, float) else f"  {k}: {v}")


def test_crack_recall(results):
    f = _figures(results)
    assert f["cracks_1mm"] >= 30
    assert f["recall_crack_1mm"] >= 0.95, f


def test_false_discontinuities_per_coupon(results):
    f = _figures(results)
    assert f["false_per_coupon"] <= 1.0, f


def test_greatest_dimension_error(results):
    f = _figures(results)
    assert f["size_ok"] >= 0.9, f


def test_edge_flag(results):
    f = _figures(results)
    assert f["edge_cracks"] >= 10
    assert f["edge_flag_ok"] >= 0.95, f


def test_no_wrong_accept(results):
    # safety: a coupon the truth rejects must never be accepted (review is allowed)
    bad = [r["seed"] for r in results if r["verdict"] == "accept" and r["truth_verdict"] != "accept"]
    assert not bad, bad


def test_curved_coupons_are_corrected_and_flat_ones_say_projected(results):
    for r in results:
        if r["curved"]:
            assert any("corrected to the curved surface" in n for n in r["notes"]), r["notes"]
        else:
            # flat coupons are rendered without curvature and assessed without a former: projected
            assert any("projected" in n for n in r["notes"]), r["notes"]


def test_face_is_scored_against_the_surface_the_photo_shows(results):
    # the truth face of a bend photo is the drawn convex surface, projected onto the card's plane
    # (what the tool measures), not the inspected arc, which nothing in the photo marks
    assert all(r["face"]["face_truth"] == "visible" for r in results), [r["face"]["face_truth"] for r in results]


def test_face_area_within_five_percent_of_the_drawn_surface(results):
    # the accuracy target of tests/test_accuracy.py (face area within 5 %, every photo), on these coupons: met
    # since 3406fbc (seed 1 was +6.8 %: its card's marker had been drawn with OpenCV's raster, one pixel off
    # inside, which moved the scale; now -0.3 %, the worst -3.7 %)
    errs = {r["seed"]: r["face"]["face_area_err_pct"] for r in results}
    bad = {s: round(e, 1) for s, e in errs.items() if e is None or abs(e) > 5.0}
    assert not bad, f"face area off by more than 5 % on seeds {bad} of {len(errs)}"
