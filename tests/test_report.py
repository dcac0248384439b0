"""Reports: overlay marks, JSON/CSV contract, PDF content, atomic writes."""

from __future__ import annotations

import copy
import hashlib
import io
import json
import re
import math
import shutil
import subprocess

import numpy as np
import pytest

# ---------------------------------------------------------------------------
# A hand-made assessment that follows the DEVELOPERS.md contract exactly, on a
# synthetic photo whose truth is known by construction.
# ---------------------------------------------------------------------------

PX_PER_MM = 12.0  # by construction of the synthetic photo
FACE_X0, FACE_Y0 = 150.0, 300.0  # face top-left in photo px (x, y)
FACE_LEN_MM, FACE_W_MM = 60.0, 10.0


def synthetic_photo(width: int = 1000, height: int = 700, seed: int = 0) -> np.ndarray:
    """Grey 'steel' with a lighter face band and dark round pores (known positions)."""
    rng = np.random.default_rng(seed)
    img = np.full((height, width, 3), 120, np.uint8)
    img += rng.integers(0, 12, size=img.shape, dtype=np.uint8)
    x0, y0 = int(FACE_X0), int(FACE_Y0)
    x1, y1 = int(FACE_X0 + FACE_LEN_MM * PX_PER_MM), int(FACE_Y0 + FACE_W_MM * PX_PER_MM)
    img[y0:y1, x0:x1] = 170
    return img


def _circle_outline(cx: float, cy: float, r: float, n: int = 24) -> list[list[float]]:
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return [[float(cx + r * np.cos(a)), float(cy + r * np.sin(a))] for a in t]


def _row(i: int, kind: str, cx_mm: float, cy_mm: float, d_mm: float, *, status="auto", source="auto",
         iso="2011", confidence=0.9) -> dict:
    cx_px = FACE_X0 + cx_mm * PX_PER_MM
    cy_px = FACE_Y0 + cy_mm * PX_PER_MM
    r_px = d_mm / 2 * PX_PER_MM
    return {
        "id": i, "kind": kind, "iso6520": iso, "confidence": confidence,
        "greatest_mm": d_mm, "greatest_u_mm": 0.05, "width_mm": d_mm * 0.9, "width_u_mm": 0.05,
        "along_mm": d_mm, "along_u_mm": 0.05, "across_mm": d_mm, "across_u_mm": 0.05,
        "area_mm2": math.pi * d_mm**2 / 4, "area_u_mm2": 0.1,
        "x0_mm": cx_mm - d_mm / 2, "x1_mm": cx_mm + d_mm / 2, "y0_mm": cy_mm - d_mm / 2,
        "y1_mm": cy_mm + d_mm / 2, "cx_mm": cx_mm, "cy_mm": cy_mm,
        "dist_root_mm": float("nan"), "dist_end_mm": min(cx_mm, FACE_LEN_MM - cx_mm),
        "dist_edge_mm": min(cy_mm, FACE_W_MM - cy_mm), "at_edge": False, "at_root": False, "cause": "",
        "centroid_px": [cx_px, cy_px], "bbox_px": [cx_px - r_px, cy_px - r_px, cx_px + r_px, cy_px + r_px],
        "outline_px": _circle_outline(cx_px, cy_px, r_px), "source": source, "status": status,
    }


def make_assessment(*, result: str = "reject", rows: list[dict] | None = None, sha: str | None = None,
                    name: str = "CPN-0042.jpg", width: int = 1000, height: int = 700) -> dict:
    """An assessment dict following the JSON contract in DEVELOPERS.md (invented coupon)."""
    if rows is None:
        rows = [
            _row(1, "pore", 10.0, 5.0, 2.5),
            _row(2, "inclusion", 25.0, 4.0, 3.0, iso="301"),
            _row(3, "unfused", 40.0, 6.0, 4.0, iso="401"),
            _row(4, "crack", 52.0, 5.0, 2.0, iso="100"),
            _row(5, "pore", 18.0, 7.0, 1.0, status="dismissed"),
            _row(6, "pore", 33.0, 2.5, 1.2, source="manual", status="confirmed"),
        ]
    reasons = {
        "reject": ["crack 4: any crack rejects (ISO 6520-1 100)", "pore 1: 2.50 \u00b1 0.05 mm > 2.0 mm"],
        "accept": [],
        "review": ["pore 1: 2.00 \u00b1 0.05 mm is within its uncertainty of the 2.0 mm limit"],
    }[result]
    fx1, fy1 = FACE_X0 + FACE_LEN_MM * PX_PER_MM, FACE_Y0 + FACE_W_MM * PX_PER_MM
    return {
        "schema": "surfaces.assessment/1",
        "tool": {"name": "surfaces", "version": "0.1.0"},
        "photo": {"name": name, "sha256": sha or hashlib.sha256(name.encode()).hexdigest(),
                  "width": width, "height": height},
        "test": "fillet-break",
        "settings": {"test": "fillet-break", "min_size_mm": 0.3, "limits": "demo-fillet", "nominal": {"throat_mm": 10.0}},
        "nominal": {"throat_mm": 10.0, "length_mm": FACE_LEN_MM},
        "calibration": {"method": "marker", "px_per_mm": PX_PER_MM, "uncertainty_pct": 0.6, "tilt_deg": 4.2,
                        "marker_mm": 20.0, "markers": [{"id": 7, "corners_px": [[40, 40], [280, 40], [280, 280], [40, 280]],
                                                         "side_px": 240.0, "module_px": 40.0}],
                        "consistency_pct": None, "warnings": ["marker near the photo edge"]},
        "face": {"length_mm": FACE_LEN_MM, "width_mm": FACE_W_MM, "area_mm2": FACE_LEN_MM * FACE_W_MM,
                 "polygon_px": [[FACE_X0, FACE_Y0], [fx1, FACE_Y0], [fx1, fy1], [FACE_X0, fy1]],
                 "method": "auto", "root_side": "y0", "warnings": []},
        "imperfections": rows,
        "limits": {"name": "demo-fillet", "title": "Demo fillet break limits", "version": "1",
                   "source": "invented for tests", "edition": "n/a",
                   "confidence_notes": ["pore limit: from memory"]},
        "verdict": {"result": result, "reasons": reasons, "details": [{"rule": "max_pore_mm", "id": 1, "value_mm": 2.5}]},
        "warnings": ["demo warning"],
        "cautions": ["Verify limits against the code edition in force."],
    }


# ---------------------------------------------------------------------------
# Tests
# ---------------------------------------------------------------------------

from surfaces import report  # noqa: E402
from surfaces.atomic import OutputExistsError, write_bytes_atomic, write_text_atomic  # noqa: E402
from surfaces.model import SurfacesError  # noqa: E402

HAVE_PDFTOTEXT = shutil.which("pdftotext") is not None
HAVE_PDFTOPPM = shutil.which("pdftoppm") is not None


def _near(px, rgb, tol=40) -> bool:
    return bool(np.all(np.abs(np.asarray(px, int) - np.asarray(rgb, int)) <= tol))


def _at(img, lay, x, y):
    """Overlay pixel of photo point (x, y) (see OverlayLayout)."""
    return img[int(round(y * lay.scale)) + lay.top, int(round(x * lay.scale))]


def test_overlay_marks_each_outline_in_its_kind_colour():
    photo = synthetic_photo()
    a = make_assessment()
    img = report.render_overlay(photo, a)
    lay = report.overlay_layout(*photo.shape[:2])
    assert img.shape[1] == photo.shape[1] and img.shape[0] == lay.top + photo.shape[0] + lay.footer
    for row in a["imperfections"]:
        x, y = row["outline_px"][0]  # first vertex: every dash pattern starts 'on' there
        want = report._DISMISSED.rgb if row["status"] == "dismissed" else report.KIND_STYLES[row["kind"]].rgb
        got = _at(img, lay, x, y)
        assert _near(got, want), (row["id"], row["kind"], got, want)
        # by construction the photo there is plain grey: the mark changed it
        assert not _near(photo[int(round(y)), int(round(x))], want, tol=20)
    # face outline, midway along the top edge (by construction of the fixture)
    # (labels may cover a few points of it)
    xs = np.linspace(FACE_X0 + 5, FACE_X0 + FACE_LEN_MM * PX_PER_MM - 5, 60)
    on = [_near(_at(img, lay, x, FACE_Y0 + FACE_W_MM * PX_PER_MM), report._FACE_RGB) for x in xs]
    assert np.mean(on) > 0.8
    # away from every mark the photo is unchanged
    assert np.array_equal(_at(img, lay, 900, 650), photo[650, 900])


def _outline_coverage(kind: str) -> float:
    photo = synthetic_photo()
    row = _row(1, kind, 30.0, 5.0, 6.0)
    row["outline_px"] = _circle_outline(*row["centroid_px"], 6.0 / 2 * PX_PER_MM, n=720)
    img = report.render_overlay(photo, make_assessment(rows=[row]))
    lay = report.overlay_layout(*photo.shape[:2])
    rgb = report.KIND_STYLES[kind].rgb
    hits = [_near(_at(img, lay, x, y), rgb, tol=60) for x, y in row["outline_px"]]
    return float(np.mean(hits))


def test_kinds_differ_by_line_pattern_not_only_colour():
    # A solid outline is coloured all round; dashed patterns leave gaps.
    solid = _outline_coverage("pore")
    assert solid > 0.95
    dashed = {k: _outline_coverage(k) for k in ("inclusion", "unfused", "crack")}
    for k, cov in dashed.items():
        assert 0.3 < cov < 0.9, (k, cov)
    # and each kind has its own marker shape
    shapes = [s.marker for s in report.KIND_STYLES.values()]
    assert len(set(shapes)) == len(shapes)


def test_overlay_banner_colour_follows_verdict():
    photo = synthetic_photo()
    lay = report.overlay_layout(*photo.shape[:2])
    for result in ("accept", "reject", "review"):
        img = report.render_overlay(photo, make_assessment(result=result))
        bg = report._VERDICT_RGB[result][0]
        assert _near(img[2, -3], bg, tol=0), result  # banner corner, clear of text
        assert _near(img[lay.top - 2, lay.photo_w // 2], bg, tol=0)


def _bar_extent(img, lay) -> tuple[int, int, int]:
    """Row and first/last column of the scale bar (white/black blocks) in the footer."""
    foot = img[lay.top + lay.photo_h :, : report._scalebar_width(lay.photo_w)]
    white = np.all(foot == 255, axis=2)
    black = np.all(foot == 0, axis=2)
    bar = white | black
    rows = np.flatnonzero(bar.sum(axis=1) > 0.5 * bar.sum(axis=1).max())
    r = int(rows[len(rows) // 2])
    cols = np.flatnonzero(bar[r])
    return r, int(cols.min()), int(cols.max())


def test_scale_bar_length_in_mm_matches_calibration():
    photo = synthetic_photo()
    img = report.render_overlay(photo, make_assessment())
    lay = report.overlay_layout(*photo.shape[:2])
    _, c0, c1 = _bar_extent(img, lay)
    # analytic: a round 20 mm bar at 12 px/mm is 240 px (the largest 1-2-5 value within 30 % of 1000 px)
    assert report._nice_bar_mm(PX_PER_MM, 0.3 * 1000 - 2 * 10) == 20
    assert abs((c1 - c0) - 20 * PX_PER_MM) <= 2


def test_overlay_scales_down_large_photos_and_marks_follow():
    photo = np.full((3000, 4000, 3), 120, np.uint8)
    row = _row(1, "pore", 10.0, 5.0, 2.5)
    row["outline_px"] = [[2000.0 + 60 * np.cos(t), 1500.0 + 60 * np.sin(t)] for t in np.linspace(0, 6.28, 48)]
    a = make_assessment(rows=[row])
    img = report.render_overlay(photo, a, max_side=2000)
    lay = report.overlay_layout(3000, 4000, max_side=2000)
    assert lay.scale == pytest.approx(0.5)
    assert img.shape[1] == 2000
    x, y = row["outline_px"][0]
    assert _near(_at(img, lay, x, y), report.KIND_STYLES["pore"].rgb)
    # lines and text grow with the image (legible at this size)
    small = report.overlay_layout(700, 1000)
    assert lay.line > small.line and lay.font_scale > small.font_scale


def test_overlay_without_scale_or_imperfections_still_draws():
    a = make_assessment(result="accept", rows=[])
    a["calibration"]["px_per_mm"] = None
    img = report.render_overlay(synthetic_photo(), a)
    assert img.dtype == np.uint8 and img.ndim == 3
    with pytest.raises(SurfacesError):
        report.render_overlay(np.zeros((0, 0, 3), np.uint8), a)


def test_overlay_png_written_atomically(tmp_path):
    out = tmp_path / "o.png"
    report.write_overlay_png(out, synthetic_photo(), make_assessment())
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(OutputExistsError, match="--force"):
        report.write_overlay_png(out, synthetic_photo(), make_assessment())


def test_json_converts_numpy_and_nan_and_keeps_contract_order(tmp_path):
    a = make_assessment()
    a["imperfections"][0]["greatest_mm"] = np.float32(2.5)
    a["imperfections"][0]["id"] = np.int64(1)
    a["imperfections"][0]["at_edge"] = np.bool_(True)
    a["face"]["polygon_px"] = np.array(a["face"]["polygon_px"])
    a["extra"] = {"z": 1}
    text = report.dumps_json(a)
    back = json.loads(text)  # json.loads rejects NaN only if asked; check text directly
    assert "NaN" not in text and "Infinity" not in text
    assert back["imperfections"][0]["dist_root_mm"] is None  # NaN -> null
    assert back["imperfections"][0]["greatest_mm"] == 2.5 and back["imperfections"][0]["at_edge"] is True
    assert list(back)[: len(report.CONTRACT_ORDER)] == list(report.CONTRACT_ORDER)
    assert list(back)[-1] == "extra"
    assert report.dumps_json(a) == text  # stable
    p = tmp_path / "a.json"
    report.write_json(p, a)
    assert json.loads(p.read_text()) == back
    with pytest.raises(OutputExistsError):
        report.write_json(p, a)
    report.write_json(p, make_assessment(result="accept"), force=True)
    assert json.loads(p.read_text())["verdict"]["result"] == "accept"


def test_csv_one_row_per_imperfection_with_units(tmp_path):
    import pandas as pd

    a = make_assessment()
    text = report.table_csv(a)
    df = pd.read_csv(io.StringIO(text))
    assert len(df) == len(a["imperfections"])
    assert {"greatest_mm", "greatest_u_mm", "area_mm2", "centroid_x_px"} <= set(df.columns)
    unitless = {"id", "kind", "iso6520", "status", "source", "confidence", "at_edge", "at_root", "cause", "photo_sha256"}
    assert all(c in unitless or c.endswith(("_mm", "_mm2", "_px")) for c in df.columns)
    assert df["greatest_mm"].tolist() == pytest.approx([r["greatest_mm"] for r in a["imperfections"]])
    assert df["dist_root_mm"].isna().all()  # NaN written as empty
    assert (df["photo_sha256"] == a["photo"]["sha256"]).all()
    assert report.table_csv(make_assessment(rows=[])).count("\n") == 1  # header only
    p = tmp_path / "t.csv"
    report.write_csv(p, a)
    assert p.read_text() == text


def _pdf_text(pdf: bytes, tmp_path) -> str:
    p = tmp_path / "r.pdf"
    p.write_bytes(pdf)
    return subprocess.run(["pdftotext", "-layout", str(p), "-"], capture_output=True, text=True, check=True).stdout


def _pdf_pages(pdf: bytes, tmp_path) -> int:
    p = tmp_path / "pages.pdf"
    p.write_bytes(pdf)
    subprocess.run(["pdftoppm", "-r", "30", "-png", str(p), str(tmp_path / "pg")], check=True)
    return len(list(tmp_path.glob("pg*.png")))


def test_coupon_pdf_structure():
    pdf = report.coupon_pdf(make_assessment(), synthetic_photo())
    assert pdf.startswith(b"%PDF-") and pdf.rstrip().endswith(b"%%EOF")


@pytest.mark.skipif(not HAVE_PDFTOTEXT, reason="pdftotext (poppler-utils) not installed")
def test_coupon_pdf_text_has_verdict_reasons_cautions_hash(tmp_path):
    a = make_assessment()
    a["verdict"]["reasons"].append("slag 2: length \u2264 limit \u2014 check")  # outside latin-1: sanitised
    pdf = report.coupon_pdf(a, synthetic_photo(), face_rgb=synthetic_photo()[300:420, 150:870],
                            reviewer="Inspector Demo", reviewed_at="2026-12-01T10:00:00+00:00",
                            coupon={"id": "CPN-0042", "welder": "W-17", "procedure": "WPS-D-01", "date": "2026-12-01"})
    text = _pdf_text(pdf, tmp_path)
    flat = " ".join(text.split())
    assert "Verdict: REJECT" in flat
    for reason in a["verdict"]["reasons"][:2]:
        assert " ".join(reason.split()) in flat
    assert "length <= limit - check" in flat
    assert a["photo"]["sha256"] in flat
    for caution in report.CAUTIONS:
        assert " ".join(caution.split()) in flat
    for value in ("CPN-0042", "W-17", "WPS-D-01", "2026-12-01", "fillet-break", "Inspector Demo",
                  "demo-fillet", "invented for tests", "pore limit: from memory", "12.000 px/mm", "4.2 deg",
                  "marker near the photo edge", "surfaces 0.1.0"):
        assert value in flat, value
    assert "2.50 \u00b1 0.05" in flat  # greatest dimension with its uncertainty
    assert "dismissed" in flat and "confirmed" in flat


@pytest.mark.skipif(not (HAVE_PDFTOTEXT and HAVE_PDFTOPPM), reason="poppler-utils not installed")
def test_coupon_pdf_long_table_breaks_pages_and_keeps_cautions(tmp_path):
    rows = [_row(i, "pore", 1 + (i % 58), 1 + (i % 8), 0.8) for i in range(1, 91)]
    pdf = report.coupon_pdf(make_assessment(rows=rows), synthetic_photo())
    n = _pdf_pages(pdf, tmp_path)
    assert n >= 3
    if shutil.which("pdfinfo"):  # the page count poppler reads from the file itself
        info = subprocess.run(["pdfinfo", str(tmp_path / "pages.pdf")], capture_output=True, text=True).stdout
        assert re.search(r"^Pages:\s+(\d+)$", info, flags=re.M).group(1) == str(n)
    text = _pdf_text(pdf, tmp_path)
    pages = text.split("\f")[:n]
    # the caution footer is on every page (as text: pdftotext, poppler)
    assert all("qualified" in " ".join(p.split()) for p in pages)
    assert all(f"page {i}/{n}" in p for i, p in enumerate(pages, start=1))
    ids = {int(t) for t in re.findall(r"^\s*(\d+)\s+pore\s+2011", text, flags=re.M)}
    assert ids == set(range(1, 91))


def test_pdf_written_atomically(tmp_path):
    p = tmp_path / "c.pdf"
    report.write_pdf(p, make_assessment(), synthetic_photo())
    first = p.read_bytes()
    assert first.startswith(b"%PDF")
    with pytest.raises(OutputExistsError):
        report.write_pdf(p, make_assessment(result="accept"), synthetic_photo())
    assert p.read_bytes() == first


@pytest.mark.skipif(not HAVE_PDFTOTEXT, reason="pdftotext (poppler-utils) not installed")
def test_batch_summary_pdf_and_csv(tmp_path):
    import pandas as pd

    rows = pd.DataFrame([
        {"photo": "a.jpg", "coupon_id": "C-1", "welder": "W-1", "status": "done", "result": "reject",
         "first_reason": "crack 1", "n_imperfections": 3, "assessment_id": 1, "photo_sha256": "ab" * 32, "error": None},
        {"photo": "b.jpg", "coupon_id": "C-2", "welder": "W-2", "status": "error", "result": None,
         "first_reason": "", "n_imperfections": None, "assessment_id": None, "photo_sha256": None,
         "error": "b.jpg is not an image"},
    ])
    text = _pdf_text(report.batch_pdf(rows), tmp_path)
    flat = " ".join(text.split())
    assert "C-1" in flat and "b.jpg is not an image" in flat and "reject 1" in flat and "error 1" in flat
    assert "qualified personnel" in flat
    back = pd.read_csv(io.StringIO(report.batch_csv(rows)))
    assert back["coupon_id"].tolist() == ["C-1", "C-2"] and back.loc[1, "error"] == "b.jpg is not an image"


def test_atomic_write_never_silently_overwrites(tmp_path):
    p = tmp_path / "x.txt"
    write_text_atomic(p, "one")
    with pytest.raises(OutputExistsError, match="pass --force to replace it or choose another name"):
        write_text_atomic(p, "two")
    assert p.read_text() == "one"
    write_text_atomic(p, "three", force=True)
    assert p.read_text() == "three"
    assert sorted(x.name for x in tmp_path.iterdir()) == ["x.txt"]  # no temp files left
    with pytest.raises(SurfacesError, match="does not exist"):
        write_bytes_atomic(tmp_path / "missing" / "y.bin", b"1")
    with pytest.raises(SurfacesError, match="is a folder"):
        write_bytes_atomic(tmp_path, b"1", force=True)
    assert issubclass(OutputExistsError, SurfacesError)


def test_atomic_write_leaves_old_file_when_writing_fails(tmp_path, monkeypatch):
    import os as _os

    p = tmp_path / "keep.txt"
    write_text_atomic(p, "saved work")

    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(_os, "replace", broken_replace)
    with pytest.raises(SurfacesError, match="cannot write"):
        write_text_atomic(p, "new", force=True)
    monkeypatch.undo()
    assert p.read_text() == "saved work"
    assert sorted(x.name for x in tmp_path.iterdir()) == ["keep.txt"]


def test_crowded_labels_do_not_overlap():
    # 40 outlines on a 60 x 10 mm face: every label box must be clear of every other
    rows = [_row(i, ("pore", "inclusion", "unfused", "crack")[i % 4], 3 + (i * 2.3 % 54), 1.5 + (i * 1.7 % 7), 0.9) for i in range(1, 41)]
    placed: list = []
    lay = report.overlay_layout(700, 1000)
    for r in rows:
        v = np.asarray(r["outline_px"]) * lay.scale
        report._place_label(v, 20, 12, 4, lay.line, lay.photo_w, lay.photo_h, placed)
    assert len(placed) == 40
    for i, a in enumerate(placed):
        others = placed[:i] + placed[i + 1:]
        assert not report._overlaps(a, others), i
    # and the full drawing still works
    report.render_overlay(synthetic_photo(), make_assessment(rows=rows))


def test_banner_text_shrinks_before_it_is_cut():
    # The banner's reason names the limit at its end: a smaller type keeps it whole;
    # only text too long even then is cut (widths from OpenCV's own getTextSize).
    import cv2

    text = "single-size: pore 1: greatest 2.96 +/- 0.35 mm > 3/32 in (2.381 mm)"
    full = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, 1.0, 1)[0][0]
    got, fs = report._shrink_to_fit(text, int(full * 0.8), 1.0, 1)
    assert got == text and fs < 1.0
    assert cv2.getTextSize(got, cv2.FONT_HERSHEY_SIMPLEX, fs, 1)[0][0] <= int(full * 0.8)
    got, fs = report._shrink_to_fit(text, int(full * 0.3), 1.0, 1)
    assert got.endswith("...") and len(got) < len(text)
    assert report._shrink_to_fit(text, full + 5, 1.0, 1) == (text, 1.0)


@pytest.mark.skipif(not HAVE_PDFTOTEXT, reason="pdftotext (poppler-utils) not installed")
def test_reviewed_report_keeps_the_automatic_result_in_view(tmp_path):
    """A reviewer dismissed the detection that rejected the coupon: the report's verdict is the reviewed
    accept, and right under it the tool's own reject before review, with what changed and who changed it
    (the review block as ui.review.reviewed_assessment writes it)."""
    a = make_assessment(result="accept")
    a["review"] = {"reviewer": "Inspector Demo", "reviewed_at": "2026-12-02T10:00:00+00:00", "note": "lap, not a crack",
                   "changes": {"confirmed": 0, "dismissed": 1, "edited": 0, "added": 0},
                   "automatic_verdict": {"result": "reject", "reasons": ["crack 4: any crack rejects"]},
                   "automatic_imperfections": 6}
    flat = " ".join(_pdf_text(report.coupon_pdf(a, synthetic_photo()), tmp_path).split())
    assert "Verdict: ACCEPT" in flat
    assert "Automatic result before review: REJECT" in flat and "1 dismissed" in flat
    assert "Inspector Demo" in flat and "lap, not a crack" in flat
    # an unreviewed report has no such line
    plain = " ".join(_pdf_text(report.coupon_pdf(make_assessment(result="accept"), synthetic_photo()), tmp_path).split())
    assert "before review" not in plain
