"""surfaces.card: the printed card measured after rasterising the PDF (poppler) at 300 dpi."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import cv2
import numpy as np
import pytest

from surfaces.card import CHECK_SQUARE_MM, marker_modules, write_card
from surfaces.model import SurfacesError

DPI = 300
PX_PER_MM = DPI / 25.4  # 1 in = 25.4 mm exactly (ISO 80000-3 / international inch)

needs_poppler = pytest.mark.skipif(
    shutil.which("pdftoppm") is None,
    reason="pdftoppm (Debian package poppler-utils) is not installed: cannot rasterise the card",
)


def rasterise(pdf: Path, tmp_path: Path) -> np.ndarray:
    """Page 1 of ``pdf`` as a grey image at 300 dpi, rendered by poppler's pdftoppm."""
    out = tmp_path / "page"
    subprocess.run(["pdftoppm", "-r", str(DPI), "-gray", "-png", "-f", "1", "-l", "1", "-singlefile", str(pdf), str(out)],
                   check=True, capture_output=True)
    img = cv2.imread(str(out) + ".png", cv2.IMREAD_GRAYSCALE)
    assert img is not None
    return img


def detect(gray: np.ndarray):
    """OpenCV's own ArUco detector (reference library) with sub-pixel corner refinement."""
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50), params)
    corners, ids, _ = det.detectMarkers(gray)
    return corners, ids


@needs_poppler
@pytest.mark.parametrize("marker_mm, marker_id", [(20.0, 0), (35.0, 7), (12.5, 49)])
def test_marker_found_with_its_id_and_side(tmp_path, marker_mm, marker_id):
    pdf = write_card(tmp_path / "card.pdf", marker_mm=marker_mm, marker_id=marker_id)
    gray = rasterise(pdf, tmp_path)
    # A4 at 300 dpi: 210 x 297 mm -> 2480 x 3508 px (ISO 216)
    assert abs(gray.shape[1] - 2480) <= 1 and abs(gray.shape[0] - 3508) <= 1
    corners, ids = detect(gray)
    assert ids is not None and ids.ravel().tolist() == [marker_id]
    c = corners[0].reshape(4, 2).astype(float)
    sides = np.hypot(*(np.roll(c, -1, axis=0) - c).T)
    want = marker_mm * PX_PER_MM
    assert np.all(np.abs(sides / want - 1) < 0.01), (sides, want)
    # the pattern itself: sample the module centres of the rasterised marker
    # and compare with OpenCV's bit pattern
    m = (c[1] - c[0]) / 6.0
    n = (c[3] - c[0]) / 6.0
    got = np.array([[gray[int(round(p[1])), int(round(p[0]))] < 128
                     for p in (c[0] + (j + 0.5) * m + (i + 0.5) * n for j in range(6))] for i in range(6)])
    np.testing.assert_array_equal(got, marker_modules(marker_id))


@needs_poppler
def test_quiet_zone_is_white(tmp_path):
    pdf = write_card(tmp_path / "card.pdf", marker_mm=20.0)
    gray = rasterise(pdf, tmp_path)
    corners, _ = detect(gray)
    c = corners[0].reshape(4, 2)
    x0, y0 = c.min(axis=0)
    x1, y1 = c.max(axis=0)
    module = 20.0 / 6 * PX_PER_MM
    pad = int(1.9 * module)  # the card promises two modules of white
    ring = gray[int(y0) - pad : int(y1) + pad, int(x0) - pad : int(x1) + pad].copy()
    ring[pad - 3 : -pad + 3, pad - 3 : -pad + 3] = 255  # blank the marker itself (plus 3 px)
    assert ring.min() > 200


@needs_poppler
def test_check_square_measures_50_mm(tmp_path):
    pdf = write_card(tmp_path / "card.pdf")
    gray = rasterise(pdf, tmp_path)
    dark = (gray < 128).astype(np.uint8)
    contours, _ = cv2.findContours(dark, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    want = CHECK_SQUARE_MM * PX_PER_MM
    boxes = [cv2.boundingRect(cn) for cn in contours]
    squares = [b for b in boxes if abs(b[2] - want) < 0.05 * want and abs(b[3] - want) < 0.05 * want]
    assert len(squares) == 1, boxes
    _, _, w, h = squares[0]
    assert abs(w / want - 1) < 0.004 and abs(h / want - 1) < 0.004  # within 0.2 mm of 50 mm


@needs_poppler
def test_scale_bar_ticks_every_10_mm(tmp_path):
    pdf = write_card(tmp_path / "card.pdf")
    gray = rasterise(pdf, tmp_path)
    dark = gray < 128
    # the bar's base line is the only dark row run of about 100 mm
    runs = dark.sum(axis=1)
    base_rows = np.nonzero(np.abs(runs - 100 * PX_PER_MM) < 0.03 * 100 * PX_PER_MM)[0]
    assert len(base_rows) > 0
    base = int(base_rows.min())
    row = dark[base - int(4.2 * PX_PER_MM)]  # 4.2 mm above: only the 10 mm ticks (5 mm long) reach it
    cols = np.nonzero(row)[0]
    groups = np.split(cols, np.nonzero(np.diff(cols) > 3)[0] + 1)
    centres = np.array([g.mean() for g in groups])
    assert len(centres) == 11
    np.testing.assert_allclose(np.diff(centres), 10 * PX_PER_MM, atol=1.5)  # 10 mm within 0.13 mm
    assert abs((centres[-1] - centres[0]) / (100 * PX_PER_MM) - 1) < 0.002


@pytest.mark.skipif(shutil.which("pdftotext") is None, reason="pdftotext (poppler-utils) is not installed")
def test_card_text_states_size_id_and_print_check(tmp_path):
    pdf = write_card(tmp_path / "card.pdf", marker_mm=25.0, marker_id=3)
    text = subprocess.run(["pdftotext", str(pdf), "-"], check=True, capture_output=True, text=True).stdout
    flat = " ".join(text.split())
    for needle in ("25 mm", "twenty-five millimetres", "id 3", "number three", "DICT_4X4_50",
                   "50 mm", "0.5 mm", "100 %", "Actual size", "fit to page", "same height", "30 degrees", "glare"):
        assert needle in flat, needle


def test_refuses_to_overwrite_and_writes_atomically(tmp_path):
    path = tmp_path / "card.pdf"
    write_card(path)
    first = path.read_bytes()
    assert first.startswith(b"%PDF-")
    with pytest.raises(SurfacesError) as ei:
        write_card(path, marker_mm=30.0)
    assert "already exists" in str(ei.value) and "\n" not in str(ei.value)
    assert path.read_bytes() == first  # untouched
    write_card(path, marker_mm=30.0, force=True)
    assert path.read_bytes() != first
    assert sorted(p.name for p in tmp_path.iterdir()) == ["card.pdf"]  # no temporary file left


@pytest.mark.parametrize("kw", [{"marker_id": 50}, {"marker_id": -1}, {"marker_mm": 0}, {"marker_mm": 500.0},
                                {"marker_mm": "big"}, {"marker_id": 1.5}])
def test_bad_options(tmp_path, kw):
    with pytest.raises(SurfacesError):
        write_card(tmp_path / "c.pdf", **kw)
    assert not (tmp_path / "c.pdf").exists()


def test_bad_paths(tmp_path):
    with pytest.raises(SurfacesError):
        write_card(tmp_path)  # a folder
    with pytest.raises(SurfacesError):
        write_card(tmp_path / "no" / "such" / "card.pdf")


def test_marker_modules_match_opencv_pattern():
    # reference: OpenCV's own marker image at 60 px (10 px per module), sampled at module centres
    big = cv2.aruco.generateImageMarker(cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50), 11, 60)
    want = big[5::10, 5::10] < 128
    np.testing.assert_array_equal(marker_modules(11), want)
    border = marker_modules(11)
    assert border[0].all() and border[-1].all() and border[:, 0].all() and border[:, -1].all()


@needs_poppler
def test_card_photographed_gives_its_scale(tmp_path):
    """The card as printed, 'photographed' by a known similarity, measured by calibrate()."""
    from surfaces.calibrate import calibrate

    pdf = write_card(tmp_path / "card.pdf", marker_mm=20.0, marker_id=4)
    page = rasterise(pdf, tmp_path).astype(np.float32)
    s, angle = 6.0, 20.0  # photo px per mm, turn of the card in the photo
    c, si = np.cos(np.radians(angle)), np.sin(np.radians(angle))
    # page px (centres at integers) -> mm -> photo px
    page_to_mm = np.array([[1 / PX_PER_MM, 0, 0.5 / PX_PER_MM], [0, 1 / PX_PER_MM, 0.5 / PX_PER_MM], [0, 0, 1]])
    mm_to_photo = np.array([[s * c, -s * si, 300.0], [s * si, s * c, -150.0], [0, 0, 1]])
    page = cv2.GaussianBlur(page, (0, 0), 0.5 * PX_PER_MM / s)  # optics: no aliasing when reducing
    photo = cv2.warpPerspective(page, mm_to_photo @ page_to_mm, (1600, 1400), flags=cv2.INTER_LINEAR, borderValue=255)
    cal = calibrate(np.clip(photo, 0, 255).astype(np.uint8))
    assert [m.marker_id for m in cal.markers] == [4]
    # analytic: a similarity has the same scale s everywhere
    assert abs(cal.px_per_mm_at(800, 700) / s - 1) < 0.003
