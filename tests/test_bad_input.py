"""Bad input through the real command line (``python -m surfaces`` in a subprocess) and the page.

Every refusal must be exit code 2 with ONE line on stderr that starts with
``surfaces:``, names the file and says what to do, never a traceback.  The
files are built in a temporary folder by the helpers below (also used by
test_fuzz.py and test_faults.py): their defects are known by construction;
marker patterns are OpenCV's own DICT_4X4_50 (``cv2.aruco.generateImageMarker``),
the realistic photo is :func:`surfaces.synth.render_fracture` (seeded).  Awkward but valid inputs (16-bit, CMYK) must be
assessed like their 8-bit RGB original.

The table of messages is docs/bad_input.md.
"""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image

REPO = Path(__file__).resolve().parents[1]
DICT = cv2.aruco.getPredefinedDictionary(cv2.aruco.DICT_4X4_50)


# --------------------------------------------------------------------------- running the real command line


def cli(*args: str | os.PathLike, cwd: Path | None = None, env: dict | None = None,
        timeout: float = 600) -> subprocess.CompletedProcess:
    """``python -m surfaces ARGS`` in a fresh interpreter (the real command line)."""
    e = dict(os.environ if env is None else env)
    e["PYTHONPATH"] = str(REPO) + (os.pathsep + e["PYTHONPATH"] if e.get("PYTHONPATH") else "")
    return subprocess.run([sys.executable, "-m", "surfaces", *map(str, args)], cwd=cwd or REPO, env=e,
                          capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def assert_refused(proc: subprocess.CompletedProcess, *names: str, words: tuple[str, ...] = ()) -> str:
    """Exit 2, ONE line on stderr starting ``surfaces:``, naming each of ``names``, no traceback."""
    err = proc.stderr
    assert proc.returncode == 2, (proc.returncode, err[-3000:])
    assert "Traceback" not in err, err[-3000:]
    lines = err.strip("\n").split("\n")
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("surfaces: "), line
    for n in names:
        assert n in line, (n, line)
    for w in words:
        assert w in line, (w, line)
    return line


# --------------------------------------------------------------------------- scenes


def texture(h: int, w: int, seed: int = 0) -> np.ndarray:
    """A mottled grey bench surface, (h, w, 3) uint8 (blurred seeded noise)."""
    rng = np.random.default_rng(seed)
    base = rng.normal(0, 1, (h, w)).astype(np.float32)
    base = cv2.GaussianBlur(base, (0, 0), 6)
    base = 110 + 40 * base / (base.std() + 1e-6)
    fine = rng.normal(0, 6, (h, w)).astype(np.float32)
    g = np.clip(base + fine, 0, 255).astype(np.uint8)
    return np.dstack([g, g, g])


def paste_marker(img: np.ndarray, marker_id: int, side_px: int, x: int, y: int) -> np.ndarray:
    """Paste OpenCV's marker ``marker_id`` (``side_px`` square) with a white margin at (x, y) top-left.

    Parts falling outside ``img`` are cut off by the frame, as in a photo.
    """
    m = cv2.aruco.generateImageMarker(DICT, int(marker_id), int(side_px))
    pad = max(side_px // 4, 8)
    card = np.full((side_px + 2 * pad, side_px + 2 * pad), 245, np.uint8)
    card[pad:pad + side_px, pad:pad + side_px] = m
    card = np.dstack([card] * 3)
    H, W = img.shape[:2]
    x0, y0 = x - pad, y - pad
    cx0, cy0 = max(0, -x0), max(0, -y0)
    cx1 = min(card.shape[1], W - x0)
    cy1 = min(card.shape[0], H - y0)
    if cx1 > cx0 and cy1 > cy0:
        img[y0 + cy0:y0 + cy1, x0 + cx0:x0 + cx1] = card[cy0:cy1, cx0:cx1]
    return img


def save_rgb(path: Path, rgb: np.ndarray, **kw) -> Path:
    Image.fromarray(np.ascontiguousarray(rgb)).save(path, **kw)
    return path


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG chunk layout and CRC-32 over type + data: ISO/IEC 15948 (PNG) section 5.3
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def png_claiming(width: int, height: int) -> bytes:
    """A tiny, well-formed PNG whose header claims ``width`` x ``height`` grey pixels."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(b"\0" * 64))
            + _png_chunk(b"IEND", b""))


def good_jpeg_bytes(h: int = 600, w: int = 800, seed: int = 3) -> bytes:
    ok, buf = cv2.imencode(".jpg", texture(h, w, seed), [cv2.IMWRITE_JPEG_QUALITY, 90])
    assert ok
    return buf.tobytes()


def good_png_bytes(h: int = 400, w: int = 400, seed: int = 4) -> bytes:
    ok, buf = cv2.imencode(".png", texture(h, w, seed))
    assert ok
    return buf.tobytes()


def make_bad_photos(folder: Path) -> dict[str, Path]:
    """Every bad photo of the table in docs/bad_input.md, by case name."""
    folder.mkdir(parents=True, exist_ok=True)
    out: dict[str, Path] = {}

    def put(case: str, name: str, data: bytes) -> None:
        (folder / name).write_bytes(data)
        out[case] = folder / name

    put("empty", "empty.jpg", b"")
    put("text-as-jpg", "notes.jpg", b"coupon 12, welder B: redo the root pass\n" * 20)
    jpg = good_jpeg_bytes()
    put("truncated-jpeg", "cut.jpg", jpg[: len(jpg) // 2])
    png = good_png_bytes()
    bad = bytearray(png)
    bad[len(bad) // 2] ^= 0x55  # inside the IDAT data: its CRC no longer matches
    put("corrupt-png", "crc.png", bytes(bad))
    put("truncated-png", "cut.png", png[: len(png) * 2 // 3])
    put("bomb", "bomb.png", png_claiming(100_000, 100_000))  # 10^10 pixels claimed in 100 bytes
    put("over-limit", "huge.png", png_claiming(9000, 8000))  # 72 MP, over the 60 MP limit
    save_rgb(folder / "dot.png", np.zeros((1, 1, 3), np.uint8))
    out["1x1"] = folder / "dot.png"
    rng = np.random.default_rng(1)
    frames = [Image.fromarray(rng.integers(0, 256, (300, 300), dtype=np.uint8)) for _ in range(3)]
    frames[0].save(folder / "anim.gif", save_all=True, append_images=frames[1:])
    out["animated-gif"] = folder / "anim.gif"
    put("heic", "IMG_0001.HEIC", struct.pack(">I", 24) + b"ftypheic" + b"\0\0\0\0" + b"mif1heic" + b"\0" * 64)

    scene = texture(1200, 1600, seed=5)
    save_rgb(folder / "nomarker.jpg", scene, quality=92)
    out["no-marker"] = folder / "nomarker.jpg"
    two = paste_marker(scene.copy(), 3, 240, 150, 150)
    two = paste_marker(two, 7, 120, 1200, 800)  # same plane, half the printed size
    save_rgb(folder / "twosizes.png", two)
    out["two-marker-sizes"] = folder / "twosizes.png"
    half = paste_marker(scene.copy(), 3, 240, -120, 400)  # left half cut by the frame edge
    save_rgb(folder / "halfmarker.png", half)
    out["marker-half-out"] = folder / "halfmarker.png"
    one = paste_marker(scene.copy(), 3, 240, 150, 150)
    save_rgb(folder / "onemarker.png", one)
    out["one-marker"] = folder / "onemarker.png"
    return out


# --------------------------------------------------------------------------- the cases


# (case, words the message must contain besides the file name)
PHOTO_CASES = [
    ("empty", ("empty", "0 bytes")),
    ("text-as-jpg", ("not a readable image",)),
    ("truncated-jpeg", ("truncated or damaged",)),
    ("corrupt-png", ("damaged", "checksum")),
    ("truncated-png", ("truncated or damaged",)),
    ("bomb", ("far too many pixels",)),
    ("over-limit", ("9000 x 8000", "limit")),
    ("1x1", ("1 x 1 px", "too small")),
    ("animated-gif", ("3 frames",)),
    ("heic", ("HEIC", "JPEG")),
    ("missing", ("not found",)),
    ("folder", ("folder",)),
    ("no-marker", ("no reference marker",)),
    ("marker-half-out", ("no reference marker",)),
    ("two-marker-sizes", ("disagree", "--marker-mm")),
    ("roi-outside", ("--roi", "outside the photo")),
    ("bend-no-coupon", ("--roi",)),
]
NAMELESS = {  # stage messages that name the photo only because the CLI puts its name in front
    "two-marker-sizes": "calibrate.py's 'markers disagree' CalibrationError does not name the photo file",
    "roi-outside": "face.py's '--roi lies outside the photo' FaceError does not name the photo file",
    "bend-no-coupon": "bend.py's 'could not find the bend coupon' FaceError does not name the photo file",
}


@pytest.fixture(scope="module")
def bad(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("bad_photos")
    files = make_bad_photos(folder)
    files["missing"] = folder / "not-there.jpg"
    sub = folder / "coupon-folder"
    sub.mkdir()
    files["folder"] = sub
    files["roi-outside"] = files["one-marker"]
    files["bend-no-coupon"] = files["one-marker"]
    return files


def _argv(case: str, path: Path) -> list[str]:
    if case == "roi-outside":
        return ["assess", str(path), "--test", "fillet-break", "--roi", "5000,5000,6000,6000"]
    if case == "bend-no-coupon":  # a marker on a bare bench: no coupon to find
        return ["assess", str(path), "--test", "bend"]
    return ["assess", str(path), "--test", "fillet-break"]


@pytest.fixture(scope="module")
def photo_runs(bad) -> dict:
    """Every case through the real CLI once (in parallel: each is its own process)."""
    with ThreadPoolExecutor(6) as ex:
        futs = {case: ex.submit(cli, *_argv(case, bad[case])) for case, _ in PHOTO_CASES}
        return {case: f.result() for case, f in futs.items()}


@pytest.mark.parametrize("case, words", [
    (c, w) for c, w in PHOTO_CASES])
def test_bad_photo_exit_2_one_line_names_file(bad, photo_runs, case, words):
    proc = photo_runs[case]
    name = bad[case].name
    assert_refused(proc, name, words=words)


@pytest.mark.parametrize("case", sorted(NAMELESS))
def test_nameless_messages_still_one_clear_line(photo_runs, case):
    # Whatever the file naming, the refusal itself is clean: exit 2, one line, says what to do.
    line = assert_refused(photo_runs[case])
    assert "give" in line or "cover" in line, line


def test_bad_photo_writes_no_output(bad, tmp_path):
    out = tmp_path / "out.json"
    proc = cli("assess", bad["truncated-jpeg"], "--test", "fillet-break", "--json", out, "--pdf", tmp_path / "o.pdf")
    assert_refused(proc, "cut.jpg")
    assert list(tmp_path.iterdir()) == []  # no report, no temporary file left


# --------------------------------------------------------------------------- usage errors


@pytest.mark.parametrize("argv", [
    ["assess", "x.jpg"],  # --test missing
    ["assess", "x.jpg", "--test", "fillet-break", "--roi", "a,b"],
    ["assess", "x.jpg", "--test", "fillet-break", "--marker-mm", "-3"],
])
def test_bad_option_values_one_line(argv):
    assert_refused(cli(*argv))


def test_roi_with_wrong_count_is_one_line(bad):
    assert_refused(cli("assess", bad["one-marker"], "--test", "fillet-break", "--roi", "1,2,3"),
                   words=("--roi", "4 numbers", "not 3"))


# --------------------------------------------------------------------------- valid but awkward photos


@pytest.fixture(scope="module")
def deep_photos(tmp_path_factory) -> dict[str, Path]:
    """One synthetic face photo (surfaces.synth, seeded) as 8-bit RGB, 16-bit RGB, 16-bit grey and CMYK."""
    from surfaces.synth import render_fracture

    folder = tmp_path_factory.mktemp("deep")
    sp = render_fracture(11, megapixels=2, aspect=1.5, tilt_deg=3, marker_mm=20, px_per_mm=5.5, length_mm=100,
                         width_mm=10, defects=[{"kind": "pore", "d_mm": 3.5, "x_mm": 30, "y_mm": 5}],
                         distractors=False)
    bgr = cv2.cvtColor(sp.rgb, cv2.COLOR_RGB2BGR)
    out = {k: folder / n for k, n in (("rgb8", "ref8.png"), ("rgb16", "c16.png"), ("grey16", "g16.png"),
                                      ("cmyk-jpeg", "cmyk.jpg"), ("cmyk-tiff", "cmyk.tif"))}
    cv2.imwrite(str(out["rgb8"]), bgr)
    # x 257 maps 0..255 onto 0..65535 exactly (255 * 257 = 65535): the loader divides by 257 back
    cv2.imwrite(str(out["rgb16"]), bgr.astype(np.uint16) * 257)
    cv2.imwrite(str(out["grey16"]), cv2.cvtColor(sp.rgb, cv2.COLOR_RGB2GRAY).astype(np.uint16) * 257)
    Image.fromarray(sp.rgb).convert("CMYK").save(out["cmyk-jpeg"], quality=95)
    Image.fromarray(sp.rgb).convert("CMYK").save(out["cmyk-tiff"])
    (folder / "roi.txt").write_text(_truth_roi(sp.truth))
    return out


def _truth_roi(truth: dict) -> str:
    """A box around the true face (synth truth: face polygon in mm through H_plane_to_photo) plus a margin.

    Given as --roi so these runs test the loader's conversions, not the automatic face search.
    """
    H = np.asarray(truth["H_plane_to_photo"], float)
    P = np.asarray(truth["face"]["polygon_mm"], float)
    q = np.c_[P, np.ones(len(P))] @ H.T
    q = q[:, :2] / q[:, 2:]
    lo, hi = q.min(axis=0) - 30, q.max(axis=0) + 30
    return ",".join(f"{v:.0f}" for v in (*lo, *hi))


def roi_of(deep_photos) -> str:
    return (deep_photos["rgb8"].parent / "roi.txt").read_text()


@pytest.fixture(scope="module")
def deep_runs(deep_photos, tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("deep_json")

    def run(key):
        js = folder / f"{key}.json"
        proc = cli("assess", deep_photos[key], "--test", "fillet-break", "--roi", roi_of(deep_photos), "--json", js,
                   "-q")
        return proc, (json.loads(js.read_text()) if js.exists() else None)

    with ThreadPoolExecutor(5) as ex:
        futs = {k: ex.submit(run, k) for k in deep_photos}
        return {k: f.result() for k, f in futs.items()}


def test_8bit_reference_is_assessed(deep_runs):
    proc, a = deep_runs["rgb8"]
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    assert a["verdict"]["result"] in ("accept", "reject", "review")
    assert a["calibration"]["method"] == "marker"


@pytest.mark.parametrize("key", ["rgb16", "grey16", "cmyk-tiff"])
def test_16bit_and_cmyk_tiff_assessed_exactly_like_8bit(deep_runs, key):
    # 16-bit = 8-bit x 257 and lossless CMYK TIFF hold the same picture: the loader's
    # documented conversions (divide by 257; Pillow's CMYK formula) give back the 8-bit
    # pixels, so the measured scale, face and table must match the 8-bit run.
    proc, a = deep_runs[key]
    ref = deep_runs["rgb8"][1]
    assert proc.returncode == 0, proc.stderr
    assert (a["photo"]["width"], a["photo"]["height"]) == (ref["photo"]["width"], ref["photo"]["height"])
    assert a["calibration"]["markers"] == ref["calibration"]["markers"]  # the marker is found on grey alone
    if key == "grey16":  # grey loses the colour cues the face finder uses: the scale at its centre moves a little
        assert a["calibration"]["px_per_mm"] == pytest.approx(ref["calibration"]["px_per_mm"], rel=1e-3)
        return
    assert a["calibration"]["px_per_mm"] == pytest.approx(ref["calibration"]["px_per_mm"], rel=1e-6)
    assert a["face"]["length_mm"] == pytest.approx(ref["face"]["length_mm"], rel=1e-6)
    assert a["verdict"] == ref["verdict"]
    assert a["imperfections"] == ref["imperfections"]


def test_cmyk_jpeg_assessed_within_uncertainty(deep_runs):
    # A CMYK JPEG is lossy and converted without a profile: same scale within its stated 1-sigma.
    proc, a = deep_runs["cmyk-jpeg"]
    ref = deep_runs["rgb8"][1]
    assert proc.returncode == 0, proc.stderr
    c = a["calibration"]
    assert abs(c["px_per_mm"] - ref["calibration"]["px_per_mm"]) <= c["uncertainty_pct"] / 100 * c["px_per_mm"]
    assert a["verdict"]["result"] in ("accept", "reject", "review")


def test_loader_notes_say_what_was_converted(deep_photos):
    from surfaces.photo import load_photo

    assert any("257" in n for n in load_photo(deep_photos["rgb16"]).notes)
    assert any("CMYK" in n for n in load_photo(deep_photos["cmyk-jpeg"]).notes)
    ref = load_photo(deep_photos["rgb8"]).rgb
    assert np.array_equal(load_photo(deep_photos["rgb16"]).rgb, ref)


# --------------------------------------------------------------------------- limit files


from test_judge_cli import GOOD as GOOD_LIMITS  # noqa: E402 - the same small valid set as the judge tests

LIMIT_CASES = [  # (case, old, new, words)
    ("malformed-toml", 'tests = ["fillet-break"]', 'tests = ["fillet-break"', ("not valid TOML",)),
    ("unknown-top-key", 'tests = ["fillet-break"]', 'tests = ["fillet-break"]\ncolour = "red"',
     ("unknown key 'colour'",)),
    ("unknown-rule-key", 'max = "2 mm"', 'maximum = "2 mm"', ("rule 'pores'", "unknown key 'maximum'", "line 9")),
    ("negative", 'max = "2 mm"', 'max = "-2 mm"', ("'max'", "negative", "line 9")),
    ("non-numeric", 'max = "2 mm"', 'max = "two mm"', ("'max'", "not a number")),
    ("missing-unit", 'max = "2 mm"', "max = 2", ("'max'", "missing unit")),
    ("wrong-unit", 'max = "2 mm"', 'max = "2 cm"', ("unit 'cm'",)),
    ("negative-count", 'check = "max_size"\nkinds = ["pore"]\nmax = "2 mm"',
     'check = "max_count"\nkinds = ["pore"]\nmax_count = -1', ("'max_count'", "negative")),
    ("bad-confidence", 'tests = ["fillet-break"]', 'tests = ["fillet-break"]\nmin_confidence = "high"',
     ("min_confidence",)),
    ("no-rules", GOOD_LIMITS[GOOD_LIMITS.index("[[rule]]"):], "", ("no [[rule]]",)),
    ("not-utf8", None, None, ("cannot be read",)),
]


@pytest.fixture(scope="module")
def limit_runs(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("limits")
    paths = {}
    for case, old, new, _ in LIMIT_CASES:
        p = folder / f"{case}.toml"
        if old is None:
            p.write_bytes(GOOD_LIMITS.encode("utf-8").replace(b"shop-fillet", b"shop-\xff\xfe"))
        else:
            assert old in GOOD_LIMITS, case
            p.write_text(GOOD_LIMITS.replace(old, new))
        paths[case] = p
    with ThreadPoolExecutor(6) as ex:
        futs = {case: ex.submit(cli, "limits", "check", p) for case, p in paths.items()}
        return {case: (paths[case], f.result()) for case, f in futs.items()}


def test_good_limit_file_passes(tmp_path):
    p = tmp_path / "good.toml"
    p.write_text(GOOD_LIMITS)
    proc = cli("limits", "check", p)
    assert proc.returncode == 0 and proc.stdout.startswith("ok: shop-fillet"), proc.stderr


@pytest.mark.parametrize("case, words", [(c, w) for c, _, _, w in LIMIT_CASES])
def test_bad_limit_file_names_file_and_key(limit_runs, case, words):
    path, proc = limit_runs[case]
    assert_refused(proc, str(path), words=words)


def test_bad_limit_file_refused_by_assess(limit_runs, deep_photos, tmp_path):
    # the same one-line refusal when the limit file is given to an assessment, and no report written
    path, _ = limit_runs["negative"]
    proc = cli("assess", deep_photos["rgb8"], "--test", "fillet-break", "--roi", roi_of(deep_photos), "--limits", path,
               "--json", tmp_path / "a.json")
    assert_refused(proc, str(path), words=("negative",))
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- manifests


def _batch_folder(tmp_path: Path) -> Path:
    folder = tmp_path / "batch"
    folder.mkdir()
    for name in ("A-1.png", "A-2.png"):
        cv2.imwrite(str(folder / name), texture(40, 40, seed=len(name)))
    cv2.imwrite(str(tmp_path / "outside.png"), texture(40, 40, seed=9))
    return folder


MANIFEST_CASES = [  # (case, body, words)
    ("traversal", "photo,coupon_id\nA-1.png,C-1\n../outside.png,C-2\n", ("row 3", "outside the batch folder")),
    ("absolute-outside", "photo,coupon_id\n{outside},C-2\n", ("row 2", "outside the batch folder")),
    ("duplicate-coupon", "photo,coupon_id\nA-1.png,C-1\nA-2.png,C-1\n", ("row 3", "'C-1'", "row 2")),
    ("duplicate-photo", "photo,coupon_id\nA-1.png,C-1\nA-1.png,C-2\n", ("row 3", "already listed")),
    ("unknown-column", "photo,coupon,welder\nA-1.png,C-1,W\n", ("unknown column", "coupon")),
    ("no-photo-column", "file,coupon_id\nA-1.png,C-1\n", ("no 'photo' column",)),
    ("negative-size", "photo,coupon_id,throat_mm\nA-1.png,C-1,-4\n", ("row 2", "throat_mm", "positive")),
    ("text-size", "photo,coupon_id,wall_mm\nA-1.png,C-1,thick\n", ("row 2", "wall_mm", "not a number")),
    ("missing-photo", "photo,coupon_id\nA-9.png,C-9\n", ("row 2", "not found")),
    ("extra-cells", "photo,coupon_id\nA-1.png,C-1,W-3,x\n", ("row 2", "more cells")),
]


@pytest.mark.parametrize("case, body, words", MANIFEST_CASES)
def test_bad_manifest_names_the_row_and_touches_nothing(tmp_path, case, body, words):
    folder = _batch_folder(tmp_path)
    man = tmp_path / "manifest.csv"
    man.write_text(body.replace("{outside}", str(tmp_path / "outside.png")))
    db = tmp_path / "records.sqlite3"
    proc = cli("batch", folder, "--test", "fillet-break", "--manifest", man, "--db", db, "--quiet")
    assert_refused(proc, str(man), words=words)
    assert not db.exists()  # refused before the records store was opened


# --------------------------------------------------------------------------- the page


PAGE_CASES = [c for c, _ in PHOTO_CASES if c not in ("missing", "folder", "roi-outside", "bend-no-coupon")]


def test_page_names_each_bad_upload_and_never_shows_a_traceback(bad, tmp_path, monkeypatch):
    from streamlit.testing.v1 import AppTest

    from test_ui_apptest import APP, errors, upload

    monkeypatch.setenv("SURFACES_DB", str(tmp_path / "records.sqlite3"))
    monkeypatch.setenv("SURFACES_HOME", str(tmp_path))
    at = AppTest.from_file(APP, default_timeout=180)
    at.session_state["src"] = "Upload a photo"
    at.run()
    # the page words its advice for the page (no command-line flags): check the problem words only
    words = {c: tuple(x for x in w if not x.startswith("--")) for c, w in PHOTO_CASES}
    unnamed = []
    for case in PAGE_CASES:
        path = bad[case]
        # the uploader takes only photo suffixes: a GIF or HEIC arrives renamed, as a user would do
        name = path.name if path.suffix in (".jpg", ".png") else path.stem + "-renamed.jpg"
        upload(at, path, name=name)  # asserts the page raised nothing
        errs = errors(at)
        assert errs, case
        assert all("Traceback" not in e for e in errs), (case, errs)
        assert any(all(w in e for w in words[case]) for e in errs), (case, errs)
        if not any(name in e for e in errs):
            unnamed.append(case)
    # the same messages as the command line: only the known nameless ones miss the file name
    assert set(unnamed) <= set(NAMELESS), unnamed


# --------------------------------------------------------------------------- odd option values


@pytest.mark.parametrize("opts, words", [
    (["--roi", "nan,nan,nan,nan"], ("not finite",)),
    (["--ruler", "0,0,0,0,5"], ("0.0 px apart",)),
    (["--ruler", "0,0,100,0,inf"], ("finite",)),
    (["--marker-mm", "999999"], ("not plausible",)),
    (["--min-size-mm", "25"], ("between 0 and 20 mm",)),
    (["--roi", "0,0,5,5"], ("too small",)),
    (["--px-per-mm", "0.00001"], ("px",)),
])
def test_odd_option_values_one_line(deep_photos, opts, words):
    assert_refused(cli("assess", deep_photos["rgb8"], "--test", "fillet-break", *opts, "-q"), words=words)


# --------------------------------------------------------------------------- records database and other files


@pytest.mark.parametrize("argv, words", [
    (["records", "history"], ("not a usable records database", "--db")),
    (["records", "check"], ("not a usable records database",)),
    (["records", "show", "1"], ("not a usable records database",)),
])
def test_a_file_that_is_not_a_database(tmp_path, argv, words):
    db = tmp_path / "records.sqlite3"
    db.write_text("coupon list, not a database\n" * 20)
    before = db.read_bytes()
    assert_refused(cli(*argv, "--db", db), db.name, words=words)
    assert db.read_bytes() == before  # never "repaired" into an empty store


def test_judge_on_a_file_that_is_not_json(tmp_path):
    p = tmp_path / "report.json"
    p.write_bytes(b"%PDF-1.7 not an assessment")
    assert_refused(cli("judge", p, "--limits", "aws-d1.1-bend"), str(p), words=("not valid JSON", "line 1"))


def test_card_into_a_missing_folder(tmp_path):
    assert_refused(cli("card", "--out", tmp_path / "no" / "card.pdf"), str(tmp_path / "no"),
                   words=("does not exist",))
