"""The page's logic under Streamlit's own test harness (no server, no browser).

Photos come from :mod:`surfaces.synth` (seeded; their scale and face are known
by construction).  Reference verdicts come from :func:`surfaces.limits.judge`
on the same table, called here directly.
"""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import cv2
import numpy as np
import pandas as pd
import pytest
from streamlit.testing.v1 import AppTest

ROOT = Path(__file__).resolve().parents[1]
APP = str(ROOT / "ui" / "app.py")  # absolute: AppTest resolves paths against this file


# --------------------------------------------------------------------------- photos


def make_photos(folder: Path) -> dict[str, Path]:
    """Write the test photos into ``folder``; returns name -> path.

    good.jpg     fillet-break face beside a 20 mm marker, two pores
    nomarker.jpg the same photo with the marker painted over in card white
    """
    from surfaces.synth import render_fracture

    folder.mkdir(parents=True, exist_ok=True)
    out = {"good": folder / "good.jpg", "nomarker": folder / "nomarker.jpg", "truth": folder / "good.truth.json"}
    if all(p.exists() for p in out.values()):
        return out
    sp = render_fracture(11, megapixels=4, tilt_deg=3, marker_mm=20, px_per_mm=8, length_mm=100, width_mm=10,
                         defects=[{"kind": "pore", "d_mm": 3.5, "x_mm": 30, "y_mm": 5},
                                  {"kind": "pore", "d_mm": 2.5, "x_mm": 60, "y_mm": 4.5}],
                         distractors=False)
    out["good"].write_bytes(sp.jpeg_bytes())
    from surfaces.geometry import apply_h

    face_px = apply_h(np.array(sp.truth["H_plane_to_photo"]), np.array(sp.truth["face"]["polygon_mm"]))
    box = [int(v) for v in (*(face_px.min(axis=0) - 20), *(face_px.max(axis=0) + 20))]  # truth by construction
    out["truth"].write_text(json.dumps({"px_per_mm_face": sp.truth["px_per_mm_face"], "face_box_px": box}))
    rgb = np.array(sp.rgb, copy=True)
    for m in sp.truth["markers"]:
        quad = np.asarray(m["corners_px"], dtype=np.float64)
        c = quad.mean(axis=0)
        grown = (c + (quad - c) * 1.6).round().astype(np.int32)  # the marker and its white margin
        cv2.fillConvexPoly(rgb, grown, (236, 236, 232))
    ok, buf = cv2.imencode(".jpg", cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 92])
    out["nomarker"].write_bytes(buf.tobytes())
    return out


@pytest.fixture(scope="session")
def photos(tmp_path_factory) -> dict[str, Path]:
    return make_photos(tmp_path_factory.mktemp("ui_photos"))


@pytest.fixture
def at(tmp_path, monkeypatch):
    """A fresh page session with its own records database and limits folder."""
    monkeypatch.setenv("SURFACES_DB", str(tmp_path / "records.sqlite3"))
    monkeypatch.setenv("SURFACES_HOME", str(tmp_path))
    app = AppTest.from_file(APP, default_timeout=180)
    app.session_state["src"] = "Upload a photo"  # start without the demo photo
    app.run()
    assert not app.exception, app.exception
    return app


def upload(at: AppTest, path: Path, name: str | None = None, data: bytes | None = None) -> AppTest:
    """Upload a photo; when the page cannot find the face by itself, give it the face box as an inspector would."""
    if at.radio(key="src").value != "Upload a photo":
        at.radio(key="src").set_value("Upload a photo").run()
    at.file_uploader(key="upload").set_value((name or path.name, data if data is not None else path.read_bytes(),
                                              "image/jpeg"))
    at.run()
    assert not at.exception, at.exception
    truth = path.with_name(path.stem + ".truth.json")
    if data is None and truth.is_file() and any("face" in e for e in errors(at)):
        # the scale is still shown when only the face is missing
        assert {m.label: m.value for m in at.metric}.get("Reference marker") == "found"
        give_face_box(at, json.loads(truth.read_text())["face_box_px"], "failed")
    return at


def give_face_box(at: AppTest, box, key: str) -> None:
    for lab, v in zip(("left x", "top y", "right x", "bottom y"), box):
        at.number_input(key=f"roi_{lab}_{key}").set_value(int(v))
    at.button(key=f"roi_run_{key}").click().run()
    assert not at.exception, at.exception


def current_work(at: AppTest):
    return at.session_state["works"][at.session_state["current"]]


def verdict_words(at: AppTest) -> tuple[str | None, str | None]:
    """(big verdict, small automatic verdict) as shown on the page."""
    big = small = None
    for m in at.markdown:
        v = m.value
        for word in ("ACCEPT", "REJECT", "REVIEW"):
            if f"**{word}**" in v:
                if v.startswith("## ") and big is None:
                    big = word
                elif v.startswith("#### ") and small is None:
                    small = word
    return big, small


def errors(at: AppTest) -> list[str]:
    return [e.value for e in at.error]


# --------------------------------------------------------------------------- tests


def test_calibration_feedback_found_marker(at, photos):
    upload(at, photos["good"])
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Reference marker"] == "found"
    truth = json.loads(photos["truth"].read_text())["px_per_mm_face"]
    shown = float(metrics["Scale at the face (px/mm)"])
    # truth by construction of the synthetic photo: its scale at the face centre
    assert shown == pytest.approx(truth, rel=0.03)
    assert metrics["Scale uncertainty (1σ)"].startswith("± ")
    assert not errors(at)
    assert verdict_words(at)[0] in ("ACCEPT", "REJECT", "REVIEW")


def test_demo_photo_is_a_worked_example(tmp_path, monkeypatch):
    from surfaces.demo import read_manifest

    rows = read_manifest(ROOT / "demo_images")
    monkeypatch.setenv("SURFACES_DB", str(tmp_path / "records.sqlite3"))
    at = AppTest.from_file(APP, default_timeout=180).run()
    assert not at.exception, at.exception
    assert at.radio(key="src").value == "Demo photo"
    first = next(r for r in rows if r["photo"] == at.selectbox(key="demo").value)
    assert at.text_input(key="c_id").value == first["coupon_id"]  # coupon details come with the photo
    assert at.selectbox(key="c_test").value == first["test"]
    first_errors, big = errors(at), verdict_words(at)[0]
    # leaving the demo clears its coupon id, so a real coupon is never filed under it
    at.radio(key="src").set_value("Upload a photo").run()
    assert at.text_input(key="c_id").value == ""
    if big is None and any("face" in e for e in first_errors):
        pytest.xfail(f"the core could not find the face on the first demo photo by itself: {first_errors}")
    assert big in ("ACCEPT", "REJECT", "REVIEW")


def test_no_marker_gives_advice_and_the_typed_scale_works(at, photos):
    upload(at, photos["nomarker"])
    errs = errors(at)
    assert any("no reference marker" in e for e in errs), errs
    page_text = " ".join(m.value for m in at.markdown)
    assert "glare" in page_text and "blurred" in page_text  # the retake advice is on the page
    assert verdict_words(at) == (None, None)  # no verdict without a scale
    at.number_input(key="px_per_mm").set_value(8.0).run()
    assert not at.exception
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Reference marker"] == "not used"
    assert metrics["Scale at the face (px/mm)"] == "8.00"
    text = " ".join(i.value for i in at.info)
    assert "no perspective correction" in text


def _deciding_ids(assessment: dict) -> list[int]:
    ids = set()
    for d in assessment["verdict"]["details"]:
        if d["status"] in ("fail", "review"):
            ids.update(int(i) for i in d.get("items") or [] if str(i).isdigit())
    return sorted(ids)


def test_dismissing_the_deciding_detection_rejudges_without_rerunning(at, photos, monkeypatch):
    import surfaces.pipeline as pipeline
    from surfaces import limits

    calls = []
    real = pipeline.assess

    def counting(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "assess", counting)
    upload(at, photos["good"], name="dismiss-test.jpg")
    w = current_work(at)
    ls = limits.load_limit_set(w.settings.limits)
    auto = w.auto(w.settings, ls)
    ids = _deciding_ids(auto)
    assert auto["verdict"]["result"] != "accept" and ids, (
        "the pipeline found no deciding detection on the synthetic photo with two pores: "
        f"{auto['verdict']['reasons']}")
    n_calls = len(calls)
    before, _ = verdict_words(at)
    assert before == auto["verdict"]["result"].upper()
    for rid in ids:
        at.radio(key=f"rv_{w.key}_{rid}_dec").set_value("dismiss").run()
        assert not at.exception
    table = pd.DataFrame(auto["imperfections"])
    table.loc[table["id"].isin(ids), "status"] = "dismissed"
    # reference: the core's judge on the same table with those rows dismissed
    ref = limits.judge(table, face=auto["face"], nominal=auto["nominal"], limit_set=ls, test=auto["test"])
    big, small = verdict_words(at)
    assert big == ref.result.upper()
    assert small == auto["verdict"]["result"].upper()  # the automatic result stays on the page
    assert big != small
    assert len(calls) == n_calls  # the review only re-judged
    shown = at.dataframe[0].value
    assert set(shown.loc[shown["review"] == "DISMISSED", "#"]) == {str(i) for i in ids}


def test_save_keeps_automatic_and_reviewed_results(at, photos):
    from surfaces.records import Store

    upload(at, photos["good"], name="save-test.jpg")
    w = current_work(at)
    at.text_input(key="c_id").input("T-0001").run()
    at.text_input(key="c_welder").input("W-17").run()
    rows = w.auto_base["imperfections"]
    assert rows, "the pipeline found nothing on the synthetic photo with two pores"
    rid = int(rows[0]["id"])
    at.radio(key=f"rv_{w.key}_{rid}_dec").set_value("dismiss").run()
    at.text_input(key="reviewer").input("A. Inspector").run()
    at.text_area(key=f"note_{w.key}").input("pore 1 is a surface mark").run()
    assert not at.button(key="save").disabled
    at.button(key="save").click().run()
    assert not at.exception
    ok = [s.value for s in at.success]
    assert any("Saved as assessment" in s for s in ok), (ok, errors(at))
    with Store() as s:  # SURFACES_DB from the fixture
        ids = s.assessment_ids()
        assert len(ids) == 1
        a = s.get_assessment(ids[0])
    rec = a["record"]
    assert rec["reviewer"] == "A. Inspector" and rec["review_note"] == "pore 1 is a surface mark"
    assert rec["coupon"]["id"] == "T-0001" and rec["coupon"]["welder"] == "W-17"
    assert [r["status"] for r in a["automatic_imperfections"]] == ["auto"] * len(rows)
    assert {r["id"]: r["status"] for r in a["imperfections"]}[rid] == "dismissed"
    assert a["review"]["automatic_verdict"]["result"] == rec["automatic_verdict"]["result"]
    # saving again without a change is not offered; a new change is
    assert at.button(key="save").disabled
    at.radio(key=f"rv_{w.key}_{rid}_dec").set_value("confirm").run()
    assert not at.button(key="save").disabled


BAD = {
    "not-an-image.jpg": b"this is a shopping list, not a photo\n" * 40,
    "empty.jpg": b"",
}


@pytest.mark.parametrize("name", ["not-an-image.jpg", "empty.jpg", "truncated.jpg", "huge.jpg"])
def test_bad_upload_gives_a_message_and_keeps_earlier_work(at, photos, name):
    upload(at, photos["good"])
    first = current_work(at)
    good = photos["good"].read_bytes()
    data = {"truncated.jpg": good[: len(good) // 2],
            "huge.jpg": good + b"\0" * (61 * 2**20)}.get(name, BAD.get(name))
    upload(at, photos["good"], name=name, data=data)
    errs = errors(at)
    assert len(errs) >= 1 and all("Traceback" not in e for e in errs)
    words = {"not-an-image.jpg": "not", "empty.jpg": "empty", "truncated.jpg": "trunc", "huge.jpg": "60 MB"}[name]
    assert any(words in e.lower() or words in e for e in errs), errs
    assert current_work(at) is first  # the earlier work is still the one shown
    assert any("last photo that worked" in c.value for c in at.caption)
    assert verdict_words(at)[0] is not None


def test_limit_set_editor_validates_and_saves(at, tmp_path):
    at.radio(key="view").set_value("Limit sets").run()
    assert not at.exception
    pick = at.selectbox(key="ls_pick").value
    area = at.text_area(key=f"ls_text_{pick}")
    text = area.value
    assert "[[rule]]" in text
    bad = text.replace("[[rule]]", "[[rule]]\nmax = \"three mm\"", 1)
    area.input(bad).run()
    at.button(key="ls_check").click().run()
    errs = errors(at)
    assert errs and ("line" in errs[0] or "rule" in errs[0]), errs
    at.text_area(key=f"ls_text_{pick}").input(text).run()
    at.text_input(key="ls_new_name").input("shop-copy").run()
    at.button(key="ls_save").click().run()
    assert not errors(at), errors(at)
    saved = tmp_path / "limits" / "shop-copy.toml"
    assert saved.is_file()
    from surfaces.limits import load_limit_set

    assert load_limit_set("shop-copy", folder=tmp_path / "limits").rules  # readable back


# --------------------------------------------------------------------------- review helpers (no page)


def _plane_assessment():
    """A hand-made assessment: photo = plane at 10 px/mm, face frame = plane at 16 px/mm, no tilt."""
    return {
        "schema": "surfaces.assessment/1", "test": "fillet-break",
        "calibration": {"px_per_mm": 10.0, "uncertainty_pct": 1.0,
                        "H_px_to_mm": [[0.1, 0, 0], [0, 0.1, 0], [0, 0, 1]]},
        "face": {"length_mm": 100.0, "width_mm": 10.0, "area_mm2": 1000.0, "px_per_mm": 16.0,
                 "root_side": "y0", "A_face_to_plane": [[1 / 16, 0, 1 / 32], [0, 1 / 16, 1 / 32], [0, 0, 1]]},
        "imperfections": [],
    }


def test_manual_record_geometry():
    from ui.review import manual_record

    a = _plane_assessment()
    r = manual_record(a, kind="pore", x_mm=20.0, y_mm=5.0, along_mm=2.0, across_mm=1.0, rid=7)
    # analytic geometry: ellipse area pi*a*b/4 with full axes; with these frames face mm = plane mm
    assert r["area_mm2"] == pytest.approx(math.pi * 2.0 * 1.0 / 4)
    assert r["greatest_mm"] == 2.0 and r["width_mm"] == 1.0
    assert r["centroid_px"] == pytest.approx([200.0, 50.0], abs=0.01)  # 10 px/mm
    assert r["bbox_px"] == pytest.approx([190.0, 45.0, 210.0, 55.0], abs=0.05)
    assert r["dist_root_mm"] == pytest.approx(4.5) and r["dist_end_mm"] == pytest.approx(19.0)
    assert r["source"] == "manual" and r["status"] == "confirmed" and r["iso6520"] == "2011"
    assert r["greatest_u_mm"] > 0  # never exact
    with pytest.raises(Exception, match="off the face"):
        manual_record(a, kind="pore", x_mm=120.0, y_mm=5.0, along_mm=1, across_mm=1, rid=8)


def test_edit_rescales_and_dismiss_excludes():
    from ui.review import Edit, Review, reviewed_records

    a = _plane_assessment()
    row = {"id": 1, "kind": "pore", "iso6520": "2011", "confidence": 0.9, "greatest_mm": 2.0, "greatest_u_mm": 0.1,
           "width_mm": 1.0, "width_u_mm": 0.1, "along_mm": 2.0, "along_u_mm": 0.1, "across_mm": 1.0,
           "across_u_mm": 0.1, "area_mm2": 1.5, "area_u_mm2": 0.2, "x0_mm": 9.0, "x1_mm": 11.0, "y0_mm": 4.5,
           "y1_mm": 5.5, "cx_mm": 10.0, "cy_mm": 5.0, "source": "auto", "status": "auto"}
    rv = Review(edits={1: Edit(greatest_mm=4.0)})
    (out,) = reviewed_records([row], rv, a)
    assert out["status"] == "edited" and out["greatest_mm"] == 4.0
    assert out["along_mm"] == pytest.approx(4.0) and (out["x0_mm"], out["x1_mm"]) == pytest.approx((8.0, 12.0))
    assert out["area_mm2"] == pytest.approx(3.0)
    rv = Review(edits={1: Edit(decision="dismiss", kind="crack")})
    (out,) = reviewed_records([row], rv, a)
    assert out["status"] == "dismissed" and out["kind"] == "crack" and out["iso6520"] == "100"
    assert row["status"] == "auto"  # the automatic row is not changed


@pytest.mark.parametrize("raw,safe", [
    ("../../etc/passwd", "passwd"), ("C:\\Users\\x\\weld 1.JPG", "weld_1.JPG"), (".hidden.jpg", "hidden.jpg"),
    ("Schweißnaht été.png", "Schweinaht_ete.png"), ("", "photo"), ("a" * 300 + ".jpg", "a" * 76 + ".jpg"),
])
def test_safe_name(raw, safe):
    from ui.helpers import safe_name

    assert safe_name(raw) == safe


def test_saved_record_reopens_with_its_review(at, photos):
    upload(at, photos["good"], name="reopen-test.jpg")
    w = current_work(at)
    rows = w.auto_base["imperfections"]
    assert rows, "the pipeline found nothing on the synthetic photo with two pores"
    rid = int(rows[0]["id"])
    at.text_input(key="c_id").input("T-0002").run()
    at.text_input(key="c_welder").input("W-21").run()
    at.radio(key=f"rv_{w.key}_{rid}_dec").set_value("dismiss").run()
    at.text_input(key="reviewer").input("B. Checker").run()
    at.button(key="save").click().run()
    assert any("Saved as assessment" in s.value for s in at.success)
    verdict_after = verdict_words(at)
    at.radio(key="src").set_value("Demo photo").run()  # another photo is now the page's input
    at.radio(key="view").set_value("Welder histories").run()
    assert not at.exception
    assert at.selectbox(key="hist_welder").value == "W-21"
    at.button(key="hist_open_btn").click().run()
    assert not at.exception, at.exception
    assert at.radio(key="view").value == "Assess a coupon"
    w2 = current_work(at)
    assert w2.origin == "record" and w2.saved_id == w.saved_id
    assert w2.review.edits[rid].decision == "dismiss"  # the review came back from the record
    assert verdict_words(at) == verdict_after
    at.run()  # and it stays shown on the next rerun
    assert current_work(at) is w2


def test_batch_assesses_saves_and_reports_bad_files(at, photos):
    from surfaces.records import Store

    at.radio(key="view").set_value("Batch of photos").run()
    at.file_uploader(key="batch_upload").set_value([
        ("../coupon A1.jpg", photos["good"].read_bytes(), "image/jpeg"),
        ("broken.jpg", b"not a photo at all", "image/jpeg"),
    ])
    at.run()
    at.text_input(key="b_welder").input("W-30").run()
    at.button(key="b_run").click().run()
    assert not at.exception, at.exception
    df = at.session_state["batch_rows"]
    by_photo = dict(zip(df["photo"], df["status"]))
    assert set(by_photo) == {"coupon_A1.jpg", "broken.jpg"}  # names sanitised before they touch the disk
    assert by_photo["broken.jpg"] == "error"
    if by_photo["coupon_A1.jpg"] == "error":  # the batch has no face box to fall back on
        msg = df.loc[df["photo"] == "coupon_A1.jpg", "error"].iloc[0]
        assert "\n" not in msg and "Traceback" not in msg
        pytest.xfail(f"the core could not assess the synthetic photo on its own: {msg}")
    assert "broken.jpg" in " ".join(str(e) for e in df["error"].fillna(""))
    with Store() as s:
        h = s.history()
    assert list(h["coupon_id"]) == ["coupon_A1"] and list(h["welder"]) == ["W-30"]


def test_adding_a_missed_crack_is_judged(at, photos):
    from surfaces import limits

    upload(at, photos["good"], name="add-test.jpg")
    w = current_work(at)
    ls = limits.load_limit_set(w.settings.limits)
    auto = w.auto(w.settings, ls)
    face = auto["face"]
    k = w.key
    at.selectbox(key=f"add_kind_{k}").set_value("crack")
    at.number_input(key=f"add_x_{k}").set_value(round(face["length_mm"] / 3, 1))
    at.number_input(key=f"add_y_{k}").set_value(round(face["width_mm"] / 2, 1))
    at.number_input(key=f"add_a_{k}").set_value(4.0)
    at.number_input(key=f"add_b_{k}").set_value(0.3)
    next(b for b in at.button if b.label == "Add this imperfection").click().run()
    assert not at.exception and not errors(at), errors(at)
    (m,) = w.review.manual
    assert m["kind"] == "crack" and m["source"] == "manual" and m["greatest_mm"] == pytest.approx(4.0)
    shown = at.dataframe[0].value
    assert f"{m['id']}m" in set(shown["#"])
    # reference: the core's judge on the automatic table plus the added row
    table = pd.DataFrame(auto["imperfections"] + [m])
    ref = limits.judge(table, face=face, nominal=auto["nominal"], limit_set=ls, test=auto["test"])
    assert verdict_words(at)[0] == ref.result.upper()
    # the set forbids cracks (../shared/REFERENCES.md: crack 100 "not permitted" in ISO 5817, "no cracks" in
    # ASME IX QW-182), so a 4 mm crack typed by the inspector can never leave the verdict at accept
    assert any(r.check == "not_permitted" and "crack" in r.kinds for r in ls.rules)
    assert ref.result != "accept"


def test_histories_with_the_demo_records(at):
    from surfaces.records import Store

    at.radio(key="view").set_value("Welder histories").run()
    at.button(key="load_demo").click().run()
    assert not at.exception, at.exception
    assert not errors(at), errors(at)
    with Store() as s:
        hist = s.history()
    assert len(hist) >= 2
    counts = hist["welder"].value_counts()
    who = counts.index[0]  # the welder with the most attempts in the invented demo shop
    at.selectbox(key="hist_welder").set_value(who).run()
    metrics = {m.label: m.value for m in at.metric}
    assert int(metrics["Attempts"]) == counts.iloc[0]
    mine = hist[hist["welder"] == who]
    for word in ("accept", "reject", "review"):
        assert int(metrics[word.upper()]) == int((mine["result"] == word).sum())
    order = next(m.value for m in at.markdown if m.value.startswith("**Attempts in order:**"))
    assert order.count("→") == counts.iloc[0] - 1
    stats = next(d.value for d in at.dataframe if "reject rate (%)" in d.value.columns)
    assert "n_assessments" in stats.columns
    assert stats["n_assessments"].sum() == len(hist.drop_duplicates(["photo_sha256", "coupon_id"]))


def test_face_box_runs_again_and_back(at, photos):
    upload(at, photos["good"], name="facebox-test.jpg")
    w = current_work(at)
    box = [v + d for v, d in zip(json.loads(photos["truth"].read_text())["face_box_px"], (-30, -30, 30, 30))]
    give_face_box(at, box, w.key)
    assert not errors(at), errors(at)
    w2 = current_work(at)
    assert w2 is not w and w2.settings.roi == pytest.approx(tuple(box))
    assert w2.auto_base["face"]["method"] == "roi-box"
    assert any("(roi-box)" in m.value for m in at.markdown)
    at.button(key=f"roi_auto_{w2.key}").click().run()
    assert not at.exception
    assert w2.sha256 not in at.session_state["roi"]  # the box is gone: the next analysis is automatic again


def test_page_wording_names_the_page_controls():
    from ui.helpers import page_wording

    msg = page_wording("could not find the face automatically: give --roi X0,Y0,X1,Y1 (a rough box around "
                       "the face in photo pixels)")
    assert "--" not in msg and "box" in msg
    assert page_wording("no marker: retake it, or give --px-per-mm or --ruler") == \
        "no marker: retake it, or type the scale by hand below"
