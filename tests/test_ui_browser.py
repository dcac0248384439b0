"""End to end in headless Chromium: upload, verdict, dismiss, re-judged verdict, save, PDF download.

Needs ``/usr/bin/chromium`` (Debian) and the Python ``playwright`` package;
skipped with the reason otherwise.  Screenshots go to ``$SURFACES_SCREENSHOTS``
(or a temporary folder).
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pandas as pd
import pytest

from conftest import full_screenshot
from test_ui_apptest import make_photos

pytestmark = pytest.mark.browser
ROOT = Path(__file__).resolve().parents[1]
VERDICT = re.compile(r"ACCEPT|REJECT|REVIEW")


def _deciding(path: Path, settings) -> bool:
    """True when the core's automatic verdict on ``path`` rests on at least one detection."""
    from surfaces.limits import load_limit_set
    from surfaces.pipeline import assess_path

    try:
        a = assess_path(path, settings).assessment
    except Exception:  # a photo the core cannot read is no use for this test
        return False
    return a["verdict"]["result"] != "accept" and bool(_deciding_ids(a))


def _photo(tmp_path_factory) -> Path:
    """A demo photo of a fillet-break coupon whose verdict a detection decides, else a synthetic one."""
    from surfaces.model import Settings

    try:
        from surfaces.demo import read_manifest, settings_for

        rows = [r for r in read_manifest(ROOT / "demo_images") if r["test"] == "fillet-break"]
    except Exception:
        rows = []
    for r in rows:
        s = settings_for(r)
        if s.limits in (None, "aws-d1.1-fillet-break") and _deciding(ROOT / "demo_images" / r["photo"],
                                                                      Settings(test="fillet-break")):
            return ROOT / "demo_images" / r["photo"]
    return make_photos(tmp_path_factory.mktemp("browser_photos"))["good"]


def _download(page, key: str) -> Path:
    with page.expect_download() as info:
        page.locator(f".st-key-{key} button").click()
    return Path(info.value.path())


def _deciding_ids(assessment: dict) -> list[int]:
    ids = set()
    for d in assessment["verdict"]["details"]:
        if d["status"] in ("fail", "review"):
            ids.update(int(i) for i in d.get("items") or [] if str(i).isdigit())
    return sorted(ids)


def test_upload_dismiss_save_and_download(page, tmp_path_factory, screenshot_dir, page_home):
    from playwright.sync_api import expect

    from surfaces import limits
    from surfaces.records import Store

    photo = _photo(tmp_path_factory)
    expect(page.get_by_role("heading", name="Assess a coupon")).to_be_visible()
    page.locator(".st-key-step_photo").get_by_text("Upload a photo", exact=True).click()
    page.get_by_test_id("stFileUploaderDropzoneInput").set_input_files(str(photo))
    verdict = page.locator(".st-key-verdict")
    face_failed = page.locator(".st-key-step_face_failed")
    expect(verdict.or_(face_failed)).to_be_visible(timeout=120_000)
    truth = photo.with_name(photo.stem + ".truth.json")
    if face_failed.is_visible() and truth.is_file() and "face_box_px" in json.loads(truth.read_text()):
        # the inspector's fallback: a rough box around the face
        for lab, v in zip(("left x", "top y", "right x", "bottom y"), json.loads(truth.read_text())["face_box_px"]):
            box = face_failed.get_by_label(f"Face box {lab} (px)")
            box.fill(str(int(v)))
            box.press("Enter")
        face_failed.get_by_role("button", name=re.compile("Run again with this box")).click()
    expect(verdict).to_contain_text(VERDICT, timeout=120_000)
    page.get_by_label("Coupon id").fill("BT-0001")
    page.get_by_label("Coupon id").press("Enter")
    page.get_by_label("Welder id").fill("W-BT")
    page.get_by_label("Welder id").press("Enter")
    expect(page.get_by_test_id("stApp")).to_have_attribute("data-test-script-state", "notRunning")
    full_screenshot(page, screenshot_dir / "1-after-upload.png")

    # what the tool decided, from the JSON download (the CLI contract)
    auto = json.loads(_download(page, "dl_json").read_text())
    ids = _deciding_ids(auto)
    assert auto["verdict"]["result"] != "accept" and ids, auto["verdict"]["reasons"]
    word = auto["verdict"]["result"].upper()
    expect(verdict).to_contain_text(word)

    app = page.get_by_test_id("stApp")
    for rid in ids:
        # each decision reruns the script; wait for it to finish before the next click
        expect(app).to_have_attribute("data-test-script-state", "notRunning")
        page.get_by_role("radiogroup", name=f"Decision on imperfection {rid}").get_by_text(
            "dismiss", exact=True).click()
    # while a rerun draws, the old and the new verdict box can both be on the page:
    # wait for the reviewed one, then for the old one to go
    expect(page.locator(".st-key-verdict", has_text="After your review")).to_have_count(1, timeout=60_000)
    expect(verdict).to_have_count(1, timeout=60_000)
    expect(app).to_have_attribute("data-test-script-state", "notRunning")
    table = pd.DataFrame(auto["imperfections"])
    table.loc[table["id"].isin(ids), "status"] = "dismissed"
    ls = limits.load_limit_set(auto["settings"]["limits"])
    ref = limits.judge(table, face=auto["face"], nominal=auto["nominal"], limit_set=ls, test=auto["test"])
    assert ref.result.upper() != word
    expect(verdict).to_contain_text("After your review")
    expect(verdict).to_contain_text(ref.result.upper())
    expect(page.locator(".st-key-verdict_auto")).to_contain_text(word)
    page.get_by_label("Zoom on").click()
    page.get_by_role("option", name=re.compile(rf"^{ids[0]} ·")).click()
    expect(page.get_by_test_id("stImageCaption").first).to_contain_text(f"imperfection {ids[0]}")
    full_screenshot(page, screenshot_dir / "2-after-dismiss.png")

    page.get_by_label("Reviewed by (your name)").fill("A. Inspector")
    page.get_by_label("Reviewed by (your name)").press("Enter")
    page.locator(".st-key-save button").click()
    expect(page.locator(".st-key-step_save")).to_contain_text("Saved as assessment", timeout=60_000)
    full_screenshot(page, screenshot_dir / "3-after-save.png")

    pdf = _download(page, "dl_pdf")
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF-")
    out = screenshot_dir / "report.pdf"
    out.write_bytes(data)
    if shutil.which("pdftoppm"):
        subprocess.run(["pdftoppm", "-png", "-r", "60", "-f", "1", "-l", "2", str(out),
                        str(screenshot_dir / "report")], check=True, timeout=60)

    with Store(page_home / "records.sqlite3") as s:
        a = s.get_assessment(s.assessment_ids()[-1])
    assert a["record"]["reviewer"] == "A. Inspector"
    assert a["verdict"]["result"] == ref.result
    assert a["record"]["automatic_verdict"]["result"] == auto["verdict"]["result"]


def test_other_views_render(page, screenshot_dir):
    from playwright.sync_api import expect

    sidebar = page.get_by_test_id("stSidebar")
    for label, shot, last in (("Limit sets", "4-limit-sets.png", "Save as my own set"),
                              ("Welder histories", "5-histories.png", "Open it"),
                              ("Batch of photos", "6-batch.png", "Assess and save all")):
        sidebar.get_by_text(label, exact=True).click()
        expect(page.get_by_role("heading", name=label)).to_be_visible()
        expect(page.get_by_test_id("stApp")).to_have_attribute("data-test-script-state", "notRunning")
        load = page.get_by_role("button", name="Load the demo coupons")
        if label == "Welder histories" and load.is_visible():
            # an empty store (this test run on its own): the page offers the demo shop's records
            load.click()
        if last:
            expect(page.get_by_role("button", name=re.compile(last))).to_be_visible()
        expect(page.get_by_test_id("stException")).to_have_count(0)
        full_screenshot(page, screenshot_dir / shot)


def test_first_view_is_a_worked_example_and_a_bad_upload_keeps_it(page, screenshot_dir, tmp_path):
    from playwright.sync_api import expect

    if not (ROOT / "demo_images" / "manifest.csv").is_file():
        pytest.skip("no demo photos installed (demo_images/manifest.csv)")
    verdict = page.locator(".st-key-verdict")
    face_failed = page.locator(".st-key-step_face_failed")
    expect(verdict.or_(face_failed)).to_be_visible(timeout=120_000)
    if face_failed.is_visible():
        full_screenshot(page, screenshot_dir / "0-first-view-no-face.png")
        pytest.xfail("the core could not find the face on the first demo photo by itself (the page offers the box)")
    expect(verdict).to_contain_text(VERDICT)  # the demo photo is assessed at once
    expect(page.get_by_label("Coupon id")).not_to_have_value("")
    full_screenshot(page, screenshot_dir / "0-first-view.png")
    shown = VERDICT.search(verdict.inner_text()).group(0)
    bad = tmp_path / "holiday.jpg"
    bad.write_bytes(b"this is a shopping list, not a photo\n" * 40)
    page.locator(".st-key-step_photo").get_by_text("Upload a photo", exact=True).click()
    page.get_by_test_id("stFileUploaderDropzoneInput").set_input_files(str(bad))
    expect(page.get_by_test_id("stAlertContentError").first).to_contain_text("holiday.jpg")
    expect(page.get_by_test_id("stException")).to_have_count(0)
    expect(page.get_by_text("last photo that worked")).to_be_visible()
    expect(verdict).to_contain_text(shown)  # the earlier result is still there
    full_screenshot(page, screenshot_dir / "7-bad-upload.png")
