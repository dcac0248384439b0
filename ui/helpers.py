"""Small helpers for the page that need no Streamlit: names, upload checks, wording, pictures.

Nothing here analyses a photo; the pictures are the core's overlay
(:func:`surfaces.report.render_overlay`) cropped for zooming, and the
rectified face with numbered boxes drawn from the imperfection table.
"""

from __future__ import annotations

import math
import re
import unicodedata
from pathlib import Path

import cv2
import numpy as np

from surfaces.model import PhotoError, SurfacesError

#: Largest upload the page accepts, MB (the CLI starts the server with the same cap).
MAX_UPLOAD_MB: int = 60
PHOTO_TYPES: tuple[str, ...] = ("jpg", "jpeg", "png", "tif", "tiff")
#: Widest picture sent to the browser: Streamlit scales anything wider down itself
#: (``MAXIMUM_CONTENT_WIDTH`` = 1460 px in 1.67), which costs a decode and re-encode per rerun.
SHOW_PX: int = 1460

#: Verdict words and icons (Material Symbols shipped with Streamlit) and a
#: colour name from Streamlit's Markdown palette; the word and the icon shape
#: carry the meaning, the colour only repeats it.
VERDICT_LOOK: dict[str, tuple[str, str, str, str]] = {
    "accept": ("ACCEPT", ":material/check_circle:", "blue", "every rule of the limit set passes"),
    "reject": ("REJECT", ":material/block:", "red", "at least one rule fails"),
    "review": ("REVIEW", ":material/pending:", "orange", "the tool cannot decide: an inspector must look"),
}

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_name(name: str | None, *, default: str = "photo", max_len: int = 80) -> str:
    """A file name safe to show and to use on disk: letters, digits, ``.``, ``_``, ``-`` only.

    Folders are dropped (``../../x.jpg`` -> ``x.jpg``), accents are folded to
    ASCII, other characters become ``_``, leading dots are removed (no hidden
    files) and the result is cut to ``max_len`` keeping the suffix.
    """
    text = str(name or "")
    text = re.split(r"[\\/]", text)[-1]
    text = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode("ascii")
    text = _UNSAFE.sub("_", text).strip("._-")
    text = re.sub(r"_+", "_", text)
    if not text:
        text = default
    if len(text) > max_len:
        suffix = Path(text).suffix[:10]
        text = text[: max_len - len(suffix)] + suffix
    return text


def stem(name: str) -> str:
    return Path(safe_name(name)).stem or "photo"


def check_upload(data: bytes, name: str, *, max_mb: int = MAX_UPLOAD_MB) -> None:
    """Refuse an upload that is empty or larger than the page's cap (before decoding)."""
    if len(data) == 0:
        raise PhotoError(f"photo '{name}' is empty (0 bytes): copy the file from the camera again")
    if len(data) > max_mb * 1024 * 1024:
        raise PhotoError(f"photo '{name}' is {len(data) / 2**20:.0f} MB, over the page's {max_mb} MB limit: "
                         "export it again as a JPEG at normal quality")


# --------------------------------------------------------------------------- wording

_CLI_WORDS = (
    (r"give --roi X0,Y0,X1,Y1 \([^)]*\)", "draw a rough box around it below"),
    (r"give --roi (around|tightly around|inside)", r"draw the face box \1"),
    (r"or give --px-per-mm or --ruler", "or type the scale by hand below"),
    (r"give --px-per-mm or --ruler", "type the scale by hand below"),
    (r"--roi", "the face box"), (r"--px-per-mm", "the typed scale"), (r"--marker-mm", "the marker size"),
    (r"--former-mm", "the former diameter"), (r"--thickness-mm", "the thickness"),
    (r"--bend-angle", "the bend angle"), (r"--min-size-mm", "the smallest size reported"),
)


def page_wording(message: str) -> str:
    """A core message with the command-line option names replaced by the page's own controls."""
    out = str(message)
    for pattern, repl in _CLI_WORDS:
        out = re.sub(pattern, repl, out)
    return out


def fmt_pm(v, u, nd: int = 2) -> str:
    """``1.23 ± 0.05`` (1-sigma), ``-`` when missing."""
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(v):
        return "-"
    try:
        u = float(u)
    except (TypeError, ValueError):
        u = float("nan")
    return f"{v:.{nd}f} ± {u:.{nd}f}" if math.isfinite(u) else f"{v:.{nd}f}"


def calibration_hints(calibration: dict) -> list[str]:
    """Plain-language advice when the photo's scale is weak, beyond the core's own warnings.

    Thresholds are the page's own rules of thumb (common practice for
    photographing a target): a scale known to better than 1.5 %, a marker of
    at least 10 px per square, a camera within 20 degrees of square-on.  A
    topic the core already warned about is not repeated.
    """
    hints: list[str] = []
    said = " ".join(calibration.get("warnings") or []).lower()
    method = calibration.get("method")
    if method in ("px-per-mm", "ruler"):
        hints.append("The scale was typed by hand: there is no perspective correction, so hold the camera "
                     "square to the face and keep the ruler or card on the face plane.")
        return hints
    unc = calibration.get("uncertainty_pct")
    if unc is not None and unc > 1.5 and "uncertain" not in said:
        hints.append(f"The scale is uncertain by {unc:.1f} % (1 sigma): sizes near a limit will come out as "
                     "REVIEW. Put the card right beside the face and fill more of the frame with both.")
    markers = calibration.get("markers") or []
    if any((m.get("module_px") or 99) < 10 for m in markers) and "too small" not in said:
        hints.append("The marker is small in the photo (under 10 px per square): move closer or print a bigger card.")
    tilt = calibration.get("tilt_deg")
    if tilt is not None and tilt > 20 and "tilt" not in said:
        hints.append(f"The camera is about {tilt:.0f}° from square-on: hold it straight above the face.")
    return hints


NO_MARKER_HINTS: tuple[str, ...] = (
    "Is the whole marker in the picture, with its white margin?",
    "Is it big enough? It should be at least 60 px across (about a tenth of the picture's short side is safe).",
    "Is it sharp? Hold still and tap the screen on the card to focus; a blurred marker cannot be read.",
    "Is there glare? Turn the card or the light so no bright reflection covers the black squares.",
    "No card at hand? Enter the scale by hand (photo pixels per mm) below: sizes will then not be "
    "corrected for perspective.",
)


# --------------------------------------------------------------------------- pictures


def encode_jpeg(rgb: np.ndarray, *, quality: int = 88) -> bytes:
    """RGB array -> JPEG bytes (the page sends bytes so the browser gets one small file)."""
    ok, buf = cv2.imencode(".jpg", cv2.cvtColor(np.ascontiguousarray(rgb), cv2.COLOR_RGB2BGR),
                           [cv2.IMWRITE_JPEG_QUALITY, quality])
    if not ok:  # pragma: no cover
        raise SurfacesError("could not encode a picture for the page")
    return buf.tobytes()


def zoom_box(bbox_px, photo_wh: tuple[int, int], *, zoom: float) -> tuple[int, int, int, int]:
    """A crop box (photo px) centred on ``bbox_px``, ``zoom`` times tighter than the whole photo.

    The box is landscape (4:3 or the photo's own wider ratio, so the overlay's
    banner and legend fit across it), never smaller than the imperfection plus
    a margin, and stays inside the photo.
    """
    W, H = photo_wh
    aspect = max(W / H, 4 / 3)
    x0, y0, x1, y1 = (float(v) for v in bbox_px)
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    w = max(W / max(zoom, 1.0), (x1 - x0) * 1.6, 40.0)
    h = max(H / max(zoom, 1.0), (y1 - y0) * 1.6, 40.0)
    if w / h > aspect:
        h = w / aspect
    else:
        w = h * aspect
    return _inside(cx, cy, w, h, W, H)


def _inside(cx: float, cy: float, w: float, h: float, W: int, H: int) -> tuple[int, int, int, int]:
    """The box of size w x h centred near (cx, cy), shifted (and at most cut) to lie inside the photo."""
    w, h = min(w, W), min(h, H)
    left = int(round(min(max(cx - w / 2, 0), W - w)))
    top = int(round(min(max(cy - h / 2, 0), H - h)))
    return left, top, int(round(left + w)), int(round(top + h))


def margin_box(bbox_px, photo_wh: tuple[int, int], *, margin: float = 0.08,
               min_aspect: float = 4 / 3) -> tuple[int, int, int, int]:
    """``bbox_px`` grown by ``margin`` of its long side, and widened to at least ``min_aspect`` (width/height)."""
    W, H = photo_wh
    x0, y0, x1, y1 = (float(v) for v in bbox_px)
    m = margin * max(x1 - x0, y1 - y0, 1.0)
    w, h = max(x1 - x0, 1.0) + 2 * m, max(y1 - y0, 1.0) + 2 * m
    w = max(w, h * min_aspect)
    h = max(h, w * 0.3)  # a long face still gets some height
    return _inside((x0 + x1) / 2, (y0 + y1) / 2, w, h, W, H)


def face_with_boxes(face_rgb: np.ndarray, records: list[dict], *, px_per_mm: float,
                    length_mm: float, width_mm: float, styles: dict) -> np.ndarray:
    """The rectified face with a numbered box per imperfection (from the table's face-mm extents).

    Dismissed rows get a thin dotted grey box and their number in brackets,
    so the state is not told by colour alone.
    """
    img = np.array(face_rgb, dtype=np.uint8, copy=True)
    h, w = img.shape[:2]
    sx, sy = w / max(length_mm, 1e-9), h / max(width_mm, 1e-9)
    big = max(2, int(round(min(h, w) / 120)))
    fs = max(0.45, min(h, w) / 500)
    for r in records:
        try:
            x0, x1, y0, y1 = (float(r[k]) for k in ("x0_mm", "x1_mm", "y0_mm", "y1_mm"))
        except (KeyError, TypeError, ValueError):
            continue
        if not all(math.isfinite(v) for v in (x0, x1, y0, y1)):
            continue
        p0 = (int(round(x0 * sx)) - 3, int(round(y0 * sy)) - 3)
        p1 = (int(round(x1 * sx)) + 3, int(round(y1 * sy)) + 3)
        dismissed = r.get("status") == "dismissed"
        style = styles.get(str(r.get("kind")))
        colour = (205, 205, 205) if dismissed or style is None else tuple(int(c) for c in style.rgb)
        if dismissed:
            _dotted_rect(img, p0, p1, colour, max(1, big // 2))
        else:
            cv2.rectangle(img, p0, p1, (0, 0, 0), big + 2, cv2.LINE_AA)
            cv2.rectangle(img, p0, p1, colour, big, cv2.LINE_AA)
        label = f"({r.get('id')})" if dismissed else f"{r.get('id')}{'m' if r.get('source') == 'manual' else ''}"
        org = (p0[0], max(12, p0[1] - 4))
        cv2.putText(img, label, org, cv2.FONT_HERSHEY_SIMPLEX, fs, (0, 0, 0), big + 2, cv2.LINE_AA)
        cv2.putText(img, label, org, cv2.FONT_HERSHEY_SIMPLEX, fs, colour, max(1, big - 1), cv2.LINE_AA)
    return img


def _dotted_rect(img, p0, p1, colour, thick, step: int = 6) -> None:
    (x0, y0), (x1, y1) = p0, p1
    for a, b in (((x0, y0), (x1, y0)), ((x1, y0), (x1, y1)), ((x1, y1), (x0, y1)), ((x0, y1), (x0, y0))):
        n = max(1, int(math.hypot(b[0] - a[0], b[1] - a[1]) // step))
        for i in range(0, n, 2):
            t0, t1 = i / n, min(1.0, (i + 1) / n)
            q0 = (int(a[0] + (b[0] - a[0]) * t0), int(a[1] + (b[1] - a[1]) * t0))
            q1 = (int(a[0] + (b[0] - a[0]) * t1), int(a[1] + (b[1] - a[1]) * t1))
            cv2.line(img, q0, q1, colour, thick, cv2.LINE_AA)


def fit_width(rgb: np.ndarray, *, max_w: int = 2400, min_h: int = 0) -> np.ndarray:
    """Scale an image so it is at most ``max_w`` wide (and at least ``min_h`` tall when given)."""
    h, w = rgb.shape[:2]
    s = min(1.0, max_w / w)
    if min_h and h * s < min_h:
        s = min(max_w / w, min_h / h)
    if abs(s - 1.0) < 1e-3:
        return rgb
    interp = cv2.INTER_AREA if s < 1 else cv2.INTER_NEAREST
    return cv2.resize(np.ascontiguousarray(rgb), (max(1, int(w * s)), max(1, int(h * s))), interpolation=interp)


def zoomed_assessment(assessment: dict, *, left: float, top: float, factor: float) -> dict:
    """The assessment with every photo-pixel coordinate moved into a crop scaled by ``factor``.

    A photo pixel ``(x, y)`` lands at ``((x - left) * factor, (y - top) * factor)``;
    the photo scale (px/mm) is multiplied by ``factor`` so the overlay's scale
    bar stays true.  Used to draw the core's overlay sharply on a zoomed crop.
    """
    import copy

    def move(pts):
        if pts is None:
            return None
        a = np.asarray(pts, dtype=np.float64)
        if a.size == 0:
            return pts
        flat = a.reshape(-1, 2)
        flat = (flat - [left, top]) * factor
        return flat.reshape(a.shape).tolist()

    out = copy.deepcopy(assessment)
    for r in out.get("imperfections") or []:
        for k in ("outline_px", "centroid_px"):
            if r.get(k) is not None:
                r[k] = move(r[k])
        if r.get("bbox_px") is not None:
            r["bbox_px"] = move(np.asarray(r["bbox_px"], float).reshape(2, 2))
            r["bbox_px"] = [v for p in r["bbox_px"] for v in p]
    face = out.get("face") or {}
    if face.get("polygon_px") is not None:
        face["polygon_px"] = move(face["polygon_px"])
    cal = out.get("calibration") or {}
    for m in cal.get("markers") or []:
        if m.get("corners_px") is not None:
            m["corners_px"] = move(m["corners_px"])
        for k in ("side_px", "module_px"):
            if m.get(k) is not None:
                m[k] = float(m[k]) * factor
    if cal.get("px_per_mm") is not None:
        cal["px_per_mm"] = float(cal["px_per_mm"]) * factor
    return out


def zoom_view(photo_rgb: np.ndarray, assessment: dict, box, *, render, long_side: int = 1600) -> np.ndarray:
    """The crop ``box`` (photo px) enlarged to ``long_side`` with the overlay drawn on it by ``render``."""
    x0, y0, x1, y1 = (int(v) for v in box)
    crop = np.ascontiguousarray(photo_rgb[y0:y1, x0:x1])
    h, w = crop.shape[:2]
    factor = long_side / max(h, w, 1)
    big = cv2.resize(crop, (max(1, round(w * factor)), max(1, round(h * factor))),
                     interpolation=cv2.INTER_CUBIC if factor > 1 else cv2.INTER_AREA)
    return render(big, zoomed_assessment(assessment, left=x0, top=y0, factor=factor))
