"""Reports of one assessment: overlay PNG, JSON, CSV and PDF; batch summaries.

Everything here is a pure function of an assessment dict (the JSON contract
in DEVELOPERS.md) and the photo pixels; the ``write_*`` helpers write
atomically and refuse to overwrite an existing file unless ``force`` is given.

Overlay conventions (our own):

* each kind has a colour from a colour-blind-safe set **and** its own line
  pattern and marker shape, so kind is never told by colour alone;
* dismissed detections are grey and dotted with a crossed marker;
* imperfections added by a reviewer carry an ``m`` after their number;
* the verdict is written out in words in the top banner; the footer holds a
  scale bar in mm (valid on the face plane) and the legend.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Iterable

import cv2
import numpy as np
import pandas as pd

from .atomic import write_bytes_atomic, write_text_atomic
from .model import SurfacesError

__all__ = [
    "CAUTIONS",
    "KIND_STYLES",
    "OverlayLayout",
    "batch_csv",
    "batch_pdf",
    "coupon_pdf",
    "dumps_json",
    "jsonable",
    "overlay_layout",
    "render_overlay",
    "table_csv",
    "write_csv",
    "write_json",
    "write_overlay_png",
    "write_pdf",
]

try:  # the limits module owns the wording when it is there
    from .limits import CAUTIONS as _LIMITS_CAUTIONS  # type: ignore[attr-defined]
except Exception:  # pragma: no cover - depends on a parallel module
    _LIMITS_CAUTIONS = None

_OWN_CAUTIONS: tuple[str, ...] = (
    "This tool assists a qualified inspector; it does not replace one.",
    "Verify every limit against the edition of the code or standard in force for the work.",
    "Final acceptance rests with qualified personnel under the applicable local codes and contracts.",
)

#: Cautions printed on every report.
CAUTIONS: tuple[str, ...] = tuple(_LIMITS_CAUTIONS) if _LIMITS_CAUTIONS else _OWN_CAUTIONS

#: The short caution in the footer of every PDF page (the full list is in the body).
FOOTER_CAUTION = (
    "CAUTION: this report assists a qualified inspector. Verify every limit against the code edition in "
    "force; final acceptance is by qualified personnel under the local codes and contracts."
)

# --------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------

#: Top-level order of the assessment JSON (DEVELOPERS.md); other keys follow sorted.
CONTRACT_ORDER: tuple[str, ...] = (
    "schema", "tool", "photo", "test", "settings", "nominal", "calibration", "face",
    "imperfections", "limits", "verdict", "warnings", "cautions",
)


def jsonable(obj: Any) -> Any:
    """Convert ``obj`` to plain JSON types.

    numpy scalars and arrays become Python numbers and lists, tuples become
    lists, NaN and infinities become ``None``, paths and other objects their
    text.  Dict order is kept.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, pd.DataFrame):
        return jsonable(obj.to_dict(orient="records"))
    if obj is pd.NA or obj is pd.NaT:
        return None
    if isinstance(obj, (datetime, pd.Timestamp)):
        return obj.isoformat()
    if hasattr(obj, "__dataclass_fields__"):
        from dataclasses import asdict

        return jsonable(asdict(obj))
    return str(obj)


def dumps_json(assessment: dict, *, indent: int | None = 2) -> str:
    """Assessment as JSON text: contract key order, numpy converted, NaN -> null."""
    data = jsonable(assessment)
    if isinstance(data, dict):
        ordered = {k: data[k] for k in CONTRACT_ORDER if k in data}
        ordered.update({k: data[k] for k in sorted(data) if k not in ordered})
        data = ordered
    return json.dumps(data, indent=indent, ensure_ascii=False, allow_nan=False) + "\n"


def write_json(path: str | os.PathLike, assessment: dict, *, force: bool = False):
    """Write the assessment JSON atomically (see :func:`dumps_json`)."""
    return write_text_atomic(path, dumps_json(assessment), force=force)


# --------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------

#: Columns of the per-imperfection CSV (units in the names).
CSV_COLUMNS: tuple[str, ...] = (
    "id", "kind", "iso6520", "status", "source", "confidence",
    "greatest_mm", "greatest_u_mm", "width_mm", "width_u_mm",
    "along_mm", "along_u_mm", "across_mm", "across_u_mm",
    "area_mm2", "area_u_mm2",
    "x0_mm", "x1_mm", "y0_mm", "y1_mm", "cx_mm", "cy_mm",
    "dist_root_mm", "dist_end_mm", "dist_edge_mm", "at_edge", "at_root", "cause",
    "centroid_x_px", "centroid_y_px",
)


def _imperfections(assessment: dict) -> list[dict]:
    rows = assessment.get("imperfections") or []
    if isinstance(rows, pd.DataFrame):
        rows = rows.to_dict(orient="records")
    return [dict(r) for r in rows]


def _csv_value(v: Any) -> Any:
    v = jsonable(v)
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(round(v, 6))
    return v


def table_csv(assessment: dict) -> str:
    """One CSV row per imperfection, units in the column names.

    The photo SHA-256 leads every row so rows from many CSVs can be joined.
    """
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(("photo_sha256",) + CSV_COLUMNS)
    sha = (assessment.get("photo") or {}).get("sha256", "")
    for r in _imperfections(assessment):
        c = r.get("centroid_px") or [None, None]
        r = {**r, "centroid_x_px": c[0], "centroid_y_px": c[1]}
        w.writerow([sha] + [_csv_value(r.get(k)) for k in CSV_COLUMNS])
    return buf.getvalue()


def write_csv(path: str | os.PathLike, assessment: dict, *, force: bool = False):
    """Write :func:`table_csv` atomically."""
    return write_text_atomic(path, table_csv(assessment), force=force)


# --------------------------------------------------------------------------
# Overlay
# --------------------------------------------------------------------------

# A colour-blind-safe set (hues after Okabe & Ito 2008, "Color Universal
# Design"); the assignment to kinds, line patterns and markers is our own.
_BLACK = (0, 0, 0)
_WHITE = (255, 255, 255)
_GREY = (205, 205, 205)
_FACE_RGB = (0, 158, 115)  # bluish green
_VERDICT_RGB = {
    "accept": ((0, 158, 115), _WHITE),
    "reject": ((213, 94, 0), _WHITE),
    "review": ((240, 228, 66), _BLACK),
}


@dataclass(frozen=True)
class KindStyle:
    """How one kind is drawn: colour, dash pattern (in line widths), marker."""

    rgb: tuple[int, int, int]
    dash: tuple[float, ...] | None  # on, off, on, off ... in line widths; None = solid
    marker: str  # circle, square, triangle, diamond, plus
    label: str


KIND_STYLES: dict[str, KindStyle] = {
    "pore": KindStyle((86, 180, 233), None, "circle", "pore (2011)"),
    "inclusion": KindStyle((240, 228, 66), (5.0, 2.5), "square", "slag inclusion (301)"),
    "unfused": KindStyle((204, 121, 167), (7.0, 2.5, 1.5, 2.5), "triangle", "lack of fusion (401)"),
    "crack": KindStyle((213, 94, 0), (2.5, 1.5), "diamond", "crack (100)"),
}
_OTHER_STYLE = KindStyle(_WHITE, None, "plus", "other")
_DISMISSED = KindStyle(_GREY, (1.0, 2.0), "cross", "dismissed by reviewer")


@dataclass(frozen=True)
class OverlayLayout:
    """Where the photo sits in the overlay image.

    A photo pixel ``(x, y)`` appears at ``(x * scale, y * scale + top)``.
    """

    scale: float
    top: int  # banner height, px
    photo_w: int
    photo_h: int
    footer: int  # footer height, px
    unit: float  # size unit for lines and text, px
    line: int
    font_scale: float


def overlay_layout(height: int, width: int, *, max_side: int = 2400) -> OverlayLayout:
    """Geometry of :func:`render_overlay` for a photo of ``height x width``."""
    if height < 1 or width < 1:
        raise SurfacesError("the photo is empty; load a real photo before drawing the overlay")
    scale = min(1.0, float(max_side) / max(height, width))
    pw, ph = max(1, round(width * scale)), max(1, round(height * scale))
    unit = max(pw, ph) / 1000.0
    line = max(1, round(1.6 * unit))
    # Hershey simplex cap height is about 22 px at scale 1: aim for ~1.8 % of the long side.
    font_scale = max(0.45, 18.0 * unit / 22.0)
    text_h = cv2.getTextSize("Ag", cv2.FONT_HERSHEY_SIMPLEX, font_scale, 1)[0][1]
    top = int(round(text_h * 4.2))
    footer = int(round(text_h * 2.4)) * _legend_rows(pw, font_scale, line) + int(round(text_h * 1.4))
    return OverlayLayout(scale, top, pw, ph, footer, unit, line, font_scale)


def _legend_entries() -> list[tuple[KindStyle, str, bool]]:
    out = [(s, s.label, False) for s in KIND_STYLES.values()]
    out.append((_DISMISSED, _DISMISSED.label, False))
    out.append((KindStyle(_WHITE, None, "plus", ""), "3m = added by reviewer", True))
    out.append((KindStyle(_FACE_RGB, None, "none", ""), "face outline", False))
    return out


def _legend_item_widths(font_scale: float, line: int) -> list[int]:
    thick = max(1, line)
    sw = int(round(75 * font_scale))
    return [
        sw + cv2.getTextSize(label, cv2.FONT_HERSHEY_SIMPLEX, font_scale, thick)[0][0] + sw // 2
        for _, label, _ in _legend_entries()
    ]


def _scalebar_width(pw: int) -> int:
    return int(pw * 0.30)


def _legend_rows(pw: int, font_scale: float, line: int) -> int:
    avail = max(1, pw - _scalebar_width(pw))
    rows, x = 1, 0
    for w in _legend_item_widths(font_scale, line):
        if x and x + w > avail:
            rows, x = rows + 1, 0
        x += w
    return rows


def _ascii(text: Any) -> str:
    """Text for OpenCV's Hershey fonts (ASCII only)."""
    return _to_charset(str(text), "ascii")


_REPLACE = {
    "\u00b1": "+/-", "\u2264": "<=", "\u2265": ">=", "\u2212": "-", "\u2013": "-", "\u2014": "-",
    "\u2018": "'", "\u2019": "'", "\u201c": '"', "\u201d": '"', "\u2026": "...", "\u00d7": "x",
    "\u00b2": "2", "\u00b0": " deg", "\u00b5": "u", "\u03bc": "u", "\u2248": "~", "\u2192": "->",
    "\u00a0": " ", "\u2009": " ", "\u2022": "-", "\u2260": "!=",
}
# Latin-1 has these; keep them in the PDF.
_LATIN1_KEEP = {"\u00b1", "\u00b2", "\u00b0", "\u00b5", "\u00d7", "\u00a0"}


def _to_charset(text: str, charset: str) -> str:
    out = []
    for ch in text:
        if charset == "latin-1" and ch in _LATIN1_KEEP:
            out.append(ch)
        elif ch in _REPLACE:
            out.append(_REPLACE[ch])
        else:
            out.append(ch)
    return "".join(out).encode(charset, errors="replace").decode(charset)


def _dash_runs(pts: np.ndarray, pattern: tuple[float, ...], closed: bool) -> list[np.ndarray]:
    """Split a polyline into the 'on' pieces of a dash pattern (lengths in px)."""
    if closed:
        pts = np.vstack([pts, pts[:1]])
    seg = np.diff(pts, axis=0)
    lengths = np.hypot(seg[:, 0], seg[:, 1])
    cum = np.r_[0.0, np.cumsum(lengths)]
    total = cum[-1]
    if total <= 0:
        return [pts[:1]]
    period = sum(pattern)
    runs = []
    start = 0.0
    k = 0
    while start < total:
        length = pattern[k % len(pattern)]
        end = min(total, start + length)
        if k % 2 == 0:
            ts = np.r_[start, cum[(cum > start) & (cum < end)], end]
            xs = np.interp(ts, cum, pts[:, 0])
            ys = np.interp(ts, cum, pts[:, 1])
            runs.append(np.c_[xs, ys])
        start = end
        k += 1
        if period <= 0:
            break
    return runs


def _polyline(img, pts, rgb, thick, dash, *, closed=True, halo=True):
    pts = np.asarray(pts, dtype=np.float64).reshape(-1, 2)
    if len(pts) == 0:
        return
    if len(pts) == 1:
        c = tuple(int(round(v)) for v in pts[0])
        if halo:
            cv2.circle(img, c, thick * 2 + 1, _BLACK, -1, cv2.LINE_AA)
        cv2.circle(img, c, thick * 2, rgb, -1, cv2.LINE_AA)
        return
    if dash is None:
        runs = [np.vstack([pts, pts[:1]]) if closed else pts]
    else:
        # gaps widened by the line width: round line ends would close them
        unit = max(thick, 2)
        pattern = tuple(d * unit + (thick + 2 if k % 2 else 0) for k, d in enumerate(dash))
        runs = _dash_runs(pts, pattern, closed)
    ints = [np.round(r).astype(np.int32).reshape(-1, 1, 2) for r in runs if len(r) >= 2]
    if halo:
        cv2.polylines(img, ints, False, _BLACK, thick + 2 * max(1, thick // 2), cv2.LINE_AA)
    cv2.polylines(img, ints, False, rgb, thick, cv2.LINE_AA)


def _marker(img, center, size, shape, rgb, thick):
    """A filled symbol with a dark rim (filled so it is never read as an outline)."""
    x, y = center
    s = size
    if shape == "none":
        return
    if shape == "circle":
        cv2.circle(img, (int(round(x)), int(round(y))), int(round(s)) + 1, _BLACK, -1, cv2.LINE_AA)
        cv2.circle(img, (int(round(x)), int(round(y))), int(round(s)), rgb, -1, cv2.LINE_AA)
        return
    if shape in ("plus", "cross"):
        d = s if shape == "plus" else s * 0.85
        if shape == "plus":
            segs = [((x - d, y), (x + d, y)), ((x, y - d), (x, y + d))]
        else:
            segs = [((x - d, y - d), (x + d, y + d)), ((x - d, y + d), (x + d, y - d))]
        t = max(2, thick + 1)
        for col, tt in ((_BLACK, t + 2), (rgb, t)):
            for a, b in segs:
                pa = (int(round(a[0])), int(round(a[1])))
                pb = (int(round(b[0])), int(round(b[1])))
                cv2.line(img, pa, pb, col, tt, cv2.LINE_AA)
        return
    if shape == "square":
        poly = [(x - s, y - s), (x + s, y - s), (x + s, y + s), (x - s, y + s)]
    elif shape == "triangle":
        poly = [(x, y - s * 1.2), (x + s * 1.15, y + s * 0.85), (x - s * 1.15, y + s * 0.85)]
    else:  # diamond
        poly = [(x, y - s * 1.3), (x + s, y), (x, y + s * 1.3), (x - s, y)]
    p = np.round(np.array(poly)).astype(np.int32).reshape(-1, 1, 2)
    cv2.polylines(img, [p], True, _BLACK, 3, cv2.LINE_AA)
    cv2.fillPoly(img, [p], rgb, cv2.LINE_AA)


def _text(img, text, org, font_scale, rgb, *, thick=1, halo=True):
    org = (int(org[0]), int(org[1]))
    text = _ascii(text)
    if halo:
        cv2.putText(img, text, org, cv2.FONT_HERSHEY_SIMPLEX, font_scale, _BLACK, thick + 2 * max(1, thick), cv2.LINE_AA)
    cv2.putText(img, text, org, cv2.FONT_HERSHEY_SIMPLEX, font_scale, rgb, thick, cv2.LINE_AA)


def _fit_text(text: str, max_w: int, font_scale: float, thick: int) -> str:
    text = _ascii(text)
    if cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, font_scale, thick)[0][0] <= max_w:
        return text
    while text and cv2.getTextSize(text + "...", cv2.FONT_HERSHEY_SIMPLEX, font_scale, thick)[0][0] > max_w:
        text = text[:-1]
    return text + "..."


def _shrink_to_fit(text: str, max_w: int, font_scale: float, thick: int, *, smallest: float = 0.6) -> tuple[str, float]:
    """``text`` in the largest of a few type sizes (down to ``smallest`` x) that fits
    ``max_w``; cut with "..." only when even that one does not."""
    text = _ascii(text)
    fsz = font_scale
    for f in (1.0, 0.85, 0.72, smallest):
        fsz = max(0.4, font_scale * f)
        if cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, fsz, thick)[0][0] <= max_w:
            return text, fsz
    return _fit_text(text, max_w, fsz, thick), fsz


def _nice_bar_mm(px_per_mm: float, max_px: float) -> float | None:
    """Largest round length (1, 2, 5 x 10^k mm) whose bar fits in ``max_px``."""
    if not px_per_mm or not math.isfinite(px_per_mm) or px_per_mm <= 0:
        return None
    best = None
    for k in range(-2, 5):
        for m in (1, 2, 5):
            mm = m * 10.0**k
            if mm * px_per_mm <= max_px:
                best = mm
    return best


def _verdict(assessment: dict) -> tuple[str, list[str]]:
    v = assessment.get("verdict") or {}
    result = str(v.get("result") or "review").lower()
    reasons = [str(r) for r in (v.get("reasons") or [])]
    return result, reasons


def _style_for(row: dict) -> tuple[KindStyle, bool]:
    dismissed = str(row.get("status", "")) == "dismissed"
    if dismissed:
        return _DISMISSED, True
    return KIND_STYLES.get(str(row.get("kind", "")), _OTHER_STYLE), False


def _row_points(row: dict) -> np.ndarray:
    pts = row.get("outline_px")
    if pts is not None and len(pts) > 0:
        return np.asarray(pts, dtype=np.float64).reshape(-1, 2)
    bb = row.get("bbox_px")
    if bb is not None and len(bb) == 4:
        x0, y0, x1, y1 = map(float, bb)
        return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])
    c = row.get("centroid_px")
    if c is not None and len(c) == 2:
        return np.asarray([c], dtype=np.float64)
    return np.zeros((0, 2))


def _overlaps(box, boxes) -> bool:
    return any(box[0] < b[2] and b[0] < box[2] and box[1] < b[3] and b[1] < box[3] for b in boxes)


def _place_label(v, lab_w, text_h, msize, lw, width, height, placed, obstacles=()):
    """Marker position ``(x, baseline y)`` for a label beside outline ``v``.

    Candidates around the outline (right, left, above, below, then further
    out) are tried nearest first; a candidate must not overlap a label
    already placed and preferably no other outline.  Falls back to the
    nearest candidate that fits on the photo.
    """
    box_w = 2 * msize + lw * 4 + lab_w
    step = text_h * 1.6
    x0, x1 = float(v[:, 0].min()), float(v[:, 0].max())
    y0, y1 = float(v[:, 1].min()), float(v[:, 1].max())
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    cands = []
    for k in range(8):
        d = k * step
        cands += [
            (x1 + lw * 2 + msize + d, y0 + text_h / 2), (x1 + lw * 2 + msize + d, y1),
            (x0 - box_w - lw * 2 - d, y0 + text_h / 2), (x0 - box_w - lw * 2 - d, y1),
            (cx - box_w / 2, y0 - lw * 3 - d), (cx - box_w / 2, y1 + text_h + lw * 3 + d),
        ]
    cands.sort(key=lambda c: math.hypot(c[0] + box_w / 2 - cx, c[1] - text_h / 2 - cy))
    fallback = None
    for x, y in cands:
        y = min(max(y, text_h + 2.0), height - 2.0)
        if x - msize < 0 or x + box_w > width:
            continue
        box = (x - msize, y - text_h - lw * 2, x + box_w, y + lw * 2)
        if _overlaps(box, placed):
            continue
        if fallback is None:
            fallback = (x, y, box)
        if not _overlaps(box, obstacles):
            placed.append(box)
            return x, y
    if fallback is None:  # crowded: the outline's top-left, inside the photo
        x = min(max(x0, float(msize)), max(float(msize), width - box_w))
        y = min(max(y0, text_h + 2.0), height - 2.0)
        fallback = (x, y, (x - msize, y - text_h, x + box_w, y))
    placed.append(fallback[2])
    return fallback[0], fallback[1]


def render_overlay(photo_rgb: np.ndarray, assessment: dict, *, max_side: int = 2400) -> np.ndarray:
    """Draw the assessment on the photo.

    Parameters
    ----------
    photo_rgb : (H, W, 3) uint8 ndarray
        The photo after EXIF orientation (the frame of every ``*_px`` value).
    assessment : dict
        The assessment (JSON contract).
    max_side : int, keyword-only
        Longest side of the drawn photo; larger photos are scaled down.

    Returns
    -------
    (H', W', 3) uint8 ndarray
        RGB image: a banner with the verdict in words on top, the photo with
        the face outline and numbered imperfection outlines, and a footer with
        a scale bar in mm (at the face plane) and the legend.  See
        :func:`overlay_layout` for where the photo lands.
    """
    rgb = np.asarray(photo_rgb)
    if rgb.ndim == 2:
        rgb = np.repeat(rgb[:, :, None], 3, axis=2)
    if rgb.ndim != 3 or rgb.shape[2] < 3:
        raise SurfacesError(f"overlay needs an RGB photo, got an array of shape {rgb.shape}")
    rgb = rgb[:, :, :3]
    if rgb.dtype != np.uint8:
        rgb = np.clip(rgb, 0, 255).astype(np.uint8)
    H, W = rgb.shape[:2]
    lay = overlay_layout(H, W, max_side=max_side)
    s, top = lay.scale, lay.top
    photo = rgb if s == 1.0 else cv2.resize(rgb, (lay.photo_w, lay.photo_h), interpolation=cv2.INTER_AREA)
    canvas = np.full((top + lay.photo_h + lay.footer, lay.photo_w, 3), 32, np.uint8)
    canvas[top : top + lay.photo_h] = photo
    view = canvas[top : top + lay.photo_h]  # draw photo-frame items in this view
    fs, lw = lay.font_scale, lay.line
    tthick = max(1, round(lw * 0.9))

    def to_view(pts):
        return np.asarray(pts, dtype=np.float64).reshape(-1, 2) * s

    face = assessment.get("face") or {}
    poly = face.get("polygon_px")
    if poly is not None and len(poly) >= 2:
        _polyline(view, to_view(poly), _FACE_RGB, lw, None)

    rows = _imperfections(assessment)
    # Draw dismissed first so live detections sit on top.
    order = sorted(range(len(rows)), key=lambda i: str(rows[i].get("status")) != "dismissed")
    text_h = cv2.getTextSize("0", cv2.FONT_HERSHEY_SIMPLEX, fs, tthick)[0][1]
    msize = max(3, round(text_h * 0.38))
    drawn = []
    for i in order:  # outlines first, so no outline crosses a label drawn later
        r = rows[i]
        style, dismissed = _style_for(r)
        pts = _row_points(r)
        if len(pts) == 0:
            continue
        v = to_view(pts)
        _polyline(view, v, style.rgb, lw, style.dash)
        drawn.append((r, i, style, dismissed, v))
    placed: list[tuple[float, float, float, float]] = []
    obstacles = [(float(v[:, 0].min()) - lw, float(v[:, 1].min()) - lw, float(v[:, 0].max()) + lw,
                  float(v[:, 1].max()) + lw) for *_, v in drawn]
    for r, i, style, dismissed, v in drawn:
        label = str(r.get("id", i + 1)) + ("m" if str(r.get("source")) == "manual" else "")
        lab_w = cv2.getTextSize(label, cv2.FONT_HERSHEY_SIMPLEX, fs, tthick)[0][0]
        mx, my = _place_label(v, lab_w, text_h, msize, lw, lay.photo_w, lay.photo_h, placed, obstacles)
        mc = np.array([mx, my - text_h / 2])
        near = v[int(np.argmin(np.hypot(*(v - mc).T)))]
        if np.hypot(*(near - mc)) > msize * 1.5:  # leader line: which outline this label names
            _polyline(view, np.array([mc, near]), style.rgb, max(1, lw // 2), None, closed=False)
        _marker(view, tuple(mc), msize, style.marker, style.rgb, max(1, lw - 1 if lw > 2 else lw))
        _text(view, label, (mx + msize + lw * 2, my), fs, style.rgb if not dismissed else _GREY, thick=tthick)

    # Banner: verdict in words plus the first reason.
    result, reasons = _verdict(assessment)
    bg, fg = _VERDICT_RGB.get(result, _VERDICT_RGB["review"])
    canvas[:top] = bg
    big = fs * 1.35
    bthick = max(1, round(lw * 1.2))
    word = result.upper()
    pad = int(round(text_h * 0.8))
    line1_y = int(round(top * 0.46))
    cv2.putText(canvas, word, (pad, line1_y), cv2.FONT_HERSHEY_SIMPLEX, big, fg, bthick + 1, cv2.LINE_AA)
    ww = cv2.getTextSize(word, cv2.FONT_HERSHEY_SIMPLEX, big, bthick + 1)[0][0]
    first = reasons[0] if reasons else ("no reason given" if result != "accept" else "within the limits")
    more = f"  (+{len(reasons) - 1} more)" if len(reasons) > 1 else ""
    # the deciding reason should be read whole (it names the limit): a smaller
    # type before it is cut
    rest, rfs = _shrink_to_fit(f"- {first}{more}", lay.photo_w - ww - 3 * pad, fs, tthick)
    cv2.putText(canvas, rest, (ww + 2 * pad, line1_y), cv2.FONT_HERSHEY_SIMPLEX, rfs, fg, tthick, cv2.LINE_AA)
    lim = assessment.get("limits") or {}
    photo_meta = assessment.get("photo") or {}
    n_live = sum(1 for r in rows if str(r.get("status")) != "dismissed")
    sub = (
        f"{photo_meta.get('name', '')}  |  {assessment.get('test', '')}  |  "
        f"{n_live} imperfection(s)  |  limits: {lim.get('name') or lim.get('title') or 'none'}"
    )
    sub, sfs = _shrink_to_fit(sub, lay.photo_w - 2 * pad, fs * 0.85, max(1, tthick - 1))
    cv2.putText(canvas, sub, (pad, int(round(top * 0.84))), cv2.FONT_HERSHEY_SIMPLEX, sfs, fg, max(1, tthick - 1),
                cv2.LINE_AA)

    # Footer: scale bar then legend.
    fy0 = top + lay.photo_h
    row_h = int(round(text_h * 2.4))
    cal = assessment.get("calibration") or {}
    ppm = cal.get("px_per_mm")
    bar_area = _scalebar_width(lay.photo_w)
    bar_mm = _nice_bar_mm(float(ppm) * s if ppm else 0.0, bar_area - 2 * pad)
    by = fy0 + int(round(text_h * 1.2))
    if bar_mm is not None:
        bar_px = bar_mm * float(ppm) * s
        x0 = pad
        bh = max(3, round(text_h * 0.5))
        n_blocks = 5 if bar_mm * 10 % 5 == 0 else 4
        for k in range(n_blocks):
            xa = x0 + bar_px * k / n_blocks
            xb = x0 + bar_px * (k + 1) / n_blocks
            cv2.rectangle(canvas, (int(round(xa)), by), (int(round(xb)), by + bh), _WHITE if k % 2 == 0 else _BLACK, -1)
        cv2.rectangle(canvas, (x0, by), (int(round(x0 + bar_px)), by + bh), _WHITE, 1)
        label = f"{bar_mm:g} mm at the face"
        _text(canvas, label, (x0, by + bh + text_h + lw * 2), fs * 0.85, _WHITE, thick=max(1, tthick - 1), halo=False)
    else:
        _text(canvas, "no scale", (pad, by + text_h), fs, _WHITE, thick=tthick, halo=False)

    x = bar_area
    y = fy0 + int(round(text_h * 1.6))
    widths = _legend_item_widths(fs, lw)
    sw = int(round(75 * fs))
    for (style, label, manual), w in zip(_legend_entries(), widths):
        if x > bar_area and x + w > lay.photo_w:
            x, y = bar_area, y + row_h
        yc = y - text_h // 2
        if style.marker != "none" and not manual:
            seg = np.array([[x, yc], [x + sw * 0.5, yc]], dtype=np.float64)
            _polyline(canvas, seg, style.rgb, lw, style.dash, closed=False)
            _marker(canvas, (x + sw * 0.68, yc), msize, style.marker, style.rgb, max(1, lw - 1 if lw > 2 else lw))
        elif manual:
            pass
        else:
            seg = np.array([[x, yc], [x + sw * 0.9, yc]], dtype=np.float64)
            _polyline(canvas, seg, style.rgb, lw, None, closed=False)
        tx = x + sw if not manual else x
        _text(canvas, label, (tx, y), fs * 0.85, _WHITE, thick=max(1, tthick - 1), halo=False)
        x += w
    return canvas


def overlay_png(photo_rgb: np.ndarray, assessment: dict, *, max_side: int = 2400) -> bytes:
    """:func:`render_overlay` encoded as PNG bytes."""
    img = render_overlay(photo_rgb, assessment, max_side=max_side)
    ok, buf = cv2.imencode(".png", cv2.cvtColor(img, cv2.COLOR_RGB2BGR))
    if not ok:  # pragma: no cover
        raise SurfacesError("could not encode the overlay as PNG")
    return buf.tobytes()


def write_overlay_png(
    path: str | os.PathLike, photo_rgb: np.ndarray, assessment: dict, *, force: bool = False,
    max_side: int = 2400,
):
    """Write the overlay PNG atomically."""
    return write_bytes_atomic(path, overlay_png(photo_rgb, assessment, max_side=max_side), force=force)


# --------------------------------------------------------------------------
# PDF
# --------------------------------------------------------------------------


def _pdf_text(text: Any) -> str:
    return _to_charset("" if text is None else str(text), "latin-1")


def _fmt(v: Any, nd: int = 2) -> str:
    v = jsonable(v)
    if v is None or v == "":
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, float)):
        return f"{v:.{nd}f}"
    return str(v)


def _pm(row: dict, key: str, ukey: str, nd: int = 2) -> str:
    v, u = jsonable(row.get(key)), jsonable(row.get(ukey))
    if v is None:
        return "-"
    if u is None:
        return f"{v:.{nd}f}"
    return f"{v:.{nd}f} \u00b1 {u:.{nd}f}"


def _record_info(assessment: dict, reviewer: str | None, reviewed_at: str | None, coupon: dict | None):
    rec = assessment.get("record") or {}
    cp = dict(rec.get("coupon") or {})
    cp.update(assessment.get("coupon") or {})
    if coupon:
        cp.update({k: v for k, v in coupon.items() if v not in (None, "")})
    rev = assessment.get("review") or {}
    auto = rev.get("automatic_verdict") or rec.get("automatic_verdict") or {}
    changes = rev.get("changes") or {}
    return {
        "coupon": cp,
        "reviewer": reviewer or rec.get("reviewer") or rev.get("reviewer"),
        "reviewed_at": reviewed_at or rec.get("reviewed_at") or rev.get("reviewed_at"),
        "review_note": rec.get("review_note") or rev.get("note"),
        "created_at": rec.get("created_at") or assessment.get("created"),
        "record_id": rec.get("id"),
        # the tool's own result before a person reviewed it (kept in the record, never overwritten)
        "automatic_result": auto.get("result"),
        "changes": ", ".join(f"{n} {k}" for k, n in changes.items() if n) or None,
    }


def _cautions(assessment: dict) -> list[str]:
    out: list[str] = []
    for c in list(CAUTIONS) + [str(c) for c in (assessment.get("cautions") or [])]:
        if c not in out:
            out.append(c)
    return out


def _new_pdf(footer_text: str):
    from fpdf import FPDF
    from fpdf.fonts import FontFace

    class _Doc(FPDF):
        def footer(self):  # noqa: D401 - fpdf hook
            self.set_y(-14)
            self.set_draw_color(160, 160, 160)
            self.line(self.l_margin, self.get_y(), self.w - self.r_margin, self.get_y())
            self.set_font("helvetica", size=6.5)
            self.set_text_color(70, 70, 70)
            self.set_x(self.l_margin)
            self.multi_cell(self.w - self.l_margin - self.r_margin - 18, 3, _pdf_text(footer_text), align="L")
            self.set_xy(self.w - self.r_margin - 16, -13)
            self.cell(16, 3, f"page {self.page_no()}/{{nb}}", align="R")
            self.set_text_color(0, 0, 0)

    pdf = _Doc(orientation="P", unit="mm", format="A4")
    pdf.head_style = FontFace(emphasis="BOLD", fill_color=(205, 205, 205))
    pdf.set_auto_page_break(True, margin=18)
    pdf.set_margins(14, 12, 14)
    pdf.alias_nb_pages()
    pdf.set_creator("surfaces")
    return pdf


def _heading(pdf, text: str) -> None:
    if pdf.get_y() > pdf.h - 40:
        pdf.add_page()
    pdf.ln(2)
    pdf.set_font("helvetica", "B", 11)
    pdf.set_text_color(0, 0, 0)
    pdf.cell(0, 6, _pdf_text(text), new_x="LMARGIN", new_y="NEXT")
    pdf.set_draw_color(120, 120, 120)
    pdf.line(pdf.l_margin, pdf.get_y(), pdf.w - pdf.r_margin, pdf.get_y())
    pdf.ln(1)
    pdf.set_font("helvetica", size=9)


def _kv(pdf, pairs: Iterable[tuple[str, Any]], key_w: float = 42) -> None:
    pdf.set_font("helvetica", size=9)
    for k, v in pairs:
        pdf.set_font("helvetica", "B", 9)
        pdf.cell(key_w, 4.6, _pdf_text(k))
        pdf.set_font("helvetica", size=9)
        pdf.multi_cell(0, 4.6, _pdf_text("-" if v in (None, "") else v), new_x="LMARGIN", new_y="NEXT")


def _bullets(pdf, items: Iterable[str], *, size: float = 9) -> None:
    pdf.set_font("helvetica", size=size)
    for it in items:
        pdf.set_x(pdf.l_margin)
        pdf.cell(4, 4.4, "-")
        pdf.multi_cell(0, 4.4, _pdf_text(it), new_x="LMARGIN", new_y="NEXT")


def _pil(rgb: np.ndarray):
    from PIL import Image

    arr = np.asarray(rgb)
    if arr.ndim == 2:
        arr = np.repeat(arr[:, :, None], 3, axis=2)
    return Image.fromarray(np.ascontiguousarray(arr[:, :, :3].astype(np.uint8)))


def _image(pdf, rgb: np.ndarray, *, max_w: float, max_h: float, caption: str | None = None) -> None:
    h, w = rgb.shape[:2]
    ratio = min(max_w / w, max_h / h)
    iw, ih = w * ratio, h * ratio
    if pdf.get_y() + ih + 8 > pdf.h - pdf.b_margin:
        pdf.add_page()
    x = pdf.l_margin + (pdf.w - pdf.l_margin - pdf.r_margin - iw) / 2
    pdf.image(_pil(rgb), x=x, y=pdf.get_y(), w=iw, h=ih)
    pdf.set_y(pdf.get_y() + ih + 1)
    if caption:
        pdf.set_font("helvetica", "I", 7.5)
        pdf.multi_cell(0, 3.6, _pdf_text(caption), align="C", new_x="LMARGIN", new_y="NEXT")


def _verdict_box(pdf, result: str, reasons: list[str]) -> None:
    bg, fg = _VERDICT_RGB.get(result, _VERDICT_RGB["review"])
    pdf.set_fill_color(*bg)
    pdf.set_text_color(*fg)
    pdf.set_font("helvetica", "B", 16)
    pdf.cell(0, 10, f"  Verdict: {result.upper()}", fill=True, new_x="LMARGIN", new_y="NEXT")
    pdf.set_text_color(0, 0, 0)
    pdf.set_fill_color(255, 255, 255)
    pdf.ln(1)
    if reasons:
        _bullets(pdf, reasons)
    else:
        pdf.set_font("helvetica", size=9)
        pdf.cell(0, 4.6, "No reason recorded.", new_x="LMARGIN", new_y="NEXT")


def _imperfection_table(pdf, rows: list[dict]) -> None:
    if not rows:
        pdf.set_font("helvetica", size=9)
        pdf.cell(0, 5, "No imperfections found or added.", new_x="LMARGIN", new_y="NEXT")
        return
    head = ("No.", "kind", "ISO 6520-1", "greatest mm", "width mm", "along mm", "across mm",
            "area mm\u00b2", "conf.", "review")
    widths = (9, 17, 15, 26, 24, 19, 19, 20, 11, 22)
    pdf.set_font("helvetica", size=7.5)
    with pdf.table(col_widths=widths, text_align="CENTER", line_height=4.2, first_row_as_headings=True,
                   padding=0.6, headings_style=pdf.head_style, cell_fill_color=(238, 238, 238),
                   cell_fill_mode="ROWS") as table:
        hr = table.row()
        for h in head:
            hr.cell(_pdf_text(h))
        for r in rows:
            tr = table.row()
            label = str(r.get("id", "")) + (" (m)" if str(r.get("source")) == "manual" else "")
            cells = (
                label, r.get("kind", ""), r.get("iso6520", ""),
                _pm(r, "greatest_mm", "greatest_u_mm"), _pm(r, "width_mm", "width_u_mm"),
                _fmt(r.get("along_mm")), _fmt(r.get("across_mm")), _pm(r, "area_mm2", "area_u_mm2"),
                _fmt(r.get("confidence")), r.get("status", ""),
            )
            for c in cells:
                tr.cell(_pdf_text(c))
    pdf.set_font("helvetica", "I", 7)
    pdf.multi_cell(
        0, 3.4,
        "Sizes in mm on the face plane; \u00b1 is one standard uncertainty (1 sigma). "
        "Dismissed rows are not judged. (m) = added by the reviewer.",
        new_x="LMARGIN", new_y="NEXT",
    )


def coupon_pdf(
    assessment: dict,
    photo_rgb: np.ndarray,
    *,
    face_rgb: np.ndarray | None = None,
    reviewer: str | None = None,
    reviewed_at: str | None = None,
    coupon: dict | None = None,
) -> bytes:
    """A per-coupon PDF report.

    Parameters
    ----------
    assessment : dict
        The assessment (JSON contract).  A ``record`` entry (as returned by
        :meth:`surfaces.records.Store.get_assessment`) supplies the coupon,
        reviewer and review time when they are not given here.
    photo_rgb : (H, W, 3) uint8 ndarray
        The photo; the overlay is drawn on it.
    face_rgb : (h, w, 3) uint8 ndarray, optional
        The rectified face image.
    reviewer, reviewed_at : str, optional
        Who reviewed the automatic result and when.
    coupon : dict, optional
        Coupon fields (id, welder, procedure, date...).

    Returns
    -------
    bytes
        The PDF file.
    """
    info = _record_info(assessment, reviewer, reviewed_at, coupon)
    cp = info["coupon"]
    result, reasons = _verdict(assessment)
    photo = assessment.get("photo") or {}
    tool = assessment.get("tool") or {}
    cautions = _cautions(assessment)
    pdf = _new_pdf(FOOTER_CAUTION)
    pdf.set_title(_pdf_text(f"Weld test face report {cp.get('id') or photo.get('name', '')}"))
    pdf.add_page()

    pdf.set_font("helvetica", "B", 15)
    pdf.cell(0, 8, "Weld test face report", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("helvetica", size=8)
    pdf.set_text_color(80, 80, 80)
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    pdf.cell(0, 4, _pdf_text(f"made {made} by {tool.get('name', 'surfaces')} {tool.get('version', '')}"),
             new_x="LMARGIN", new_y="NEXT")
    pdf.set_text_color(0, 0, 0)
    pdf.ln(1)
    test = assessment.get("test", "")
    date = cp.get("date") or (str(info["created_at"])[:10] if info["created_at"] else None)
    nominal = assessment.get("nominal") or {}
    nom = ", ".join(f"{k} {v:g}" if isinstance(v, (int, float)) else f"{k} {v}" for k, v in nominal.items() if v is not None)
    left = [("Coupon", cp.get("id")), ("Welder", cp.get("welder")), ("Procedure", cp.get("procedure")),
            ("Test", test), ("Date", date)]
    right = [("Process", cp.get("process")), ("Position", cp.get("position")), ("Material", cp.get("material")),
             ("Nominal", nom or None), ("Photo", photo.get("name"))]
    y0 = pdf.get_y()
    col_w = (pdf.w - pdf.l_margin - pdf.r_margin) / 2
    for i, pairs in enumerate((left, right)):
        pdf.set_y(y0)
        for k, v in pairs:
            pdf.set_x(pdf.l_margin + i * col_w)
            pdf.set_font("helvetica", "B", 9)
            pdf.cell(22, 5, _pdf_text(k))
            pdf.set_font("helvetica", size=9)
            pdf.cell(col_w - 22, 5, _pdf_text("-" if v in (None, "") else v)[:60], new_x="LMARGIN", new_y="NEXT")
    pdf.ln(2)
    _verdict_box(pdf, result, reasons)
    if info["automatic_result"] and info["automatic_result"] != result:
        pdf.set_font("helvetica", "B", 9)
        pdf.multi_cell(0, 4.6, _pdf_text(
            f"Automatic result before review: {info['automatic_result'].upper()}. The verdict above is the "
            f"reviewed one ({info['changes'] or 'no change recorded'}; reviewer: {info['reviewer'] or 'not named'})."),
            new_x="LMARGIN", new_y="NEXT")
    pdf.ln(1)
    pdf.set_font("helvetica", "B", 8.5)
    pdf.cell(0, 4.4, "Cautions", new_x="LMARGIN", new_y="NEXT")
    _bullets(pdf, cautions, size=8)
    pdf.ln(2)

    overlay = render_overlay(photo_rgb, assessment, max_side=1600)
    avail_h = pdf.h - pdf.b_margin - pdf.get_y() - 10
    _image(pdf, overlay, max_w=pdf.w - pdf.l_margin - pdf.r_margin, max_h=max(90.0, avail_h),
           caption="Photo with the face outline and the numbered imperfections (legend in the image).")

    if face_rgb is not None and np.asarray(face_rgb).size:
        _heading(pdf, "Rectified face")
        _image(pdf, np.asarray(face_rgb), max_w=pdf.w - pdf.l_margin - pdf.r_margin, max_h=60,
               caption="The face resampled square to its own axes (x along the weld, y across).")

    _heading(pdf, "Imperfections")
    _imperfection_table(pdf, _imperfections(assessment))

    lim = assessment.get("limits") or {}
    _heading(pdf, "Limit set")
    pairs = [("Name", lim.get("name")), ("Title", lim.get("title")), ("Version", lim.get("version")),
             ("Source", lim.get("source")), ("Clause", lim.get("clause")),
             ("Edition", lim.get("edition") or lim.get("edition_note")), ("Note", lim.get("note")),
             ("Read from", lim.get("origin"))]
    _kv(pdf, [(k, v) for k, v in pairs if v not in (None, "")] or [("Name", None)])
    rules = lim.get("rules") or []
    if rules:
        pdf.set_font("helvetica", size=7.5)
        with pdf.table(col_widths=(26, 22, 26, 46, 26, 18, 18), line_height=4.0, padding=0.6, text_align="LEFT",
                       headings_style=pdf.head_style, cell_fill_color=(238, 238, 238),
                       cell_fill_mode="ROWS") as table:
            hr = table.row()
            for h in ("rule", "check", "kinds", "limit", "clause", "confidence", "outcome"):
                hr.cell(h)
            for r in rules:
                tr = table.row()
                kinds = r.get("kinds")
                for v in (r.get("id"), r.get("check"), ", ".join(kinds) if isinstance(kinds, list) else kinds,
                          r.get("limit"), r.get("clause"), r.get("confidence"), r.get("outcome")):
                    tr.cell(_pdf_text("" if v is None else v))
        pdf.set_font("helvetica", "I", 7)
        pdf.multi_cell(
            0, 3.4,
            "Confidence: 'found' = taken from a public copy of the standard; 'memory' = recalled, not checked "
            "against a published copy; 'user'/'added' = set by the user. Check every value against the "
            "edition in force.", new_x="LMARGIN", new_y="NEXT",
        )
    notes = lim.get("confidence_notes")
    if notes:
        if isinstance(notes, str):
            notes = [notes]
        pdf.set_font("helvetica", "B", 9)
        pdf.cell(0, 4.6, "Confidence of the values", new_x="LMARGIN", new_y="NEXT")
        _bullets(pdf, [str(n) for n in notes], size=8)

    verdict = assessment.get("verdict") or {}
    details = [d for d in (verdict.get("details") or []) if isinstance(d, dict)]
    _heading(pdf, "Verdict details")
    pdf.set_font("helvetica", "B", 9)
    pdf.cell(0, 4.6, _pdf_text(f"Result: {result.upper()}"), new_x="LMARGIN", new_y="NEXT")
    _bullets(pdf, reasons or ["No reason recorded."])
    if details:
        pdf.ln(1)
        pdf.set_font("helvetica", size=7.5)
        with pdf.table(col_widths=(28, 22, 14, 50, 22, 28, 18), line_height=4.0, padding=0.6, text_align="LEFT",
                       headings_style=pdf.head_style, cell_fill_color=(238, 238, 238),
                       cell_fill_mode="ROWS") as table:
            hr = table.row()
            for h in ("rule", "check", "status", "limit", "imperfections", "clause", "confidence"):
                hr.cell(h)
            for d in details:
                tr = table.row()
                items = d.get("items")
                items = ", ".join(str(i) for i in items) if isinstance(items, list) else items
                for v in (d.get("rule"), d.get("check"), d.get("status"), d.get("limit"), items or "-",
                          d.get("clause"), d.get("confidence")):
                    tr.cell(_pdf_text("" if v is None else v))

    cal = assessment.get("calibration") or {}
    _heading(pdf, "Calibration")
    tilt = cal.get("tilt_deg")
    _kv(pdf, [
        ("Method", cal.get("method")),
        ("Scale at the face", f"{_fmt(cal.get('px_per_mm'), 3)} px/mm"),
        ("Scale uncertainty", f"{_fmt(cal.get('uncertainty_pct'), 2)} % (1 sigma)"),
        ("Camera tilt", "unknown" if tilt is None else f"{_fmt(tilt, 1)} deg"),
        ("Marker side", None if cal.get("marker_mm") is None else f"{_fmt(cal.get('marker_mm'), 2)} mm"),
        ("Marker consistency", None if cal.get("consistency_pct") is None else f"{_fmt(cal.get('consistency_pct'), 2)} %"),
    ])
    face = assessment.get("face") or {}
    warns: list[str] = []
    for w in ([str(w) for w in (cal.get("warnings") or [])] + [str(w) for w in (face.get("warnings") or [])]
              + [str(w) for w in (assessment.get("warnings") or [])]):
        if w not in warns:
            warns.append(w)
    if warns:
        pdf.set_font("helvetica", "B", 9)
        pdf.cell(0, 4.6, "Warnings", new_x="LMARGIN", new_y="NEXT")
        _bullets(pdf, warns, size=8.5)

    _heading(pdf, "Review and provenance")
    _kv(pdf, [
        ("Reviewer", info["reviewer"] or "not reviewed"),
        ("Review time", info["reviewed_at"]),
        ("Review note", info["review_note"]),
        ("Automatic result", (info["automatic_result"] or "").upper() or None),
        ("Review changes", info["changes"]),
        ("Record", info["record_id"]),
        ("Tool version", f"{tool.get('name', 'surfaces')} {tool.get('version', '')}"),
        ("Schema", assessment.get("schema")),
    ])
    pdf.set_font("helvetica", "B", 9)
    pdf.cell(42, 4.6, "Photo SHA-256")
    pdf.set_font("courier", size=7.5)
    pdf.cell(0, 4.6, _pdf_text(photo.get("sha256", "-")), new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("helvetica", size=9)
    _kv(pdf, [("Photo size", f"{photo.get('width', '-')} x {photo.get('height', '-')} px")])

    return bytes(pdf.output())


def write_pdf(path: str | os.PathLike, assessment: dict, photo_rgb: np.ndarray, *, force: bool = False,
              **kwargs) -> os.PathLike:
    """Write :func:`coupon_pdf` atomically (keyword options as there)."""
    return write_bytes_atomic(path, coupon_pdf(assessment, photo_rgb, **kwargs), force=force)


# --------------------------------------------------------------------------
# Batch summary
# --------------------------------------------------------------------------

#: Columns of the batch summary (``surfaces.batch.run_batch``).
BATCH_COLUMNS: tuple[str, ...] = (
    "photo", "coupon_id", "welder", "status", "result", "first_reason", "n_imperfections",
    "assessment_id", "photo_sha256", "error",
)


def batch_csv(rows: pd.DataFrame) -> str:
    """The batch summary table as CSV text (columns as given)."""
    df = rows.copy()
    for c in df.columns:
        if df[c].dtype == object:
            df[c] = df[c].map(lambda v: "" if v is None else v)
    return df.to_csv(index=False, lineterminator="\n")


def batch_pdf(rows: pd.DataFrame, *, title: str = "Batch summary") -> bytes:
    """A batch summary PDF: counts by result and one line per photo."""
    df = rows.copy()
    pdf = _new_pdf(FOOTER_CAUTION)
    pdf.add_page(orientation="L")
    pdf.set_font("helvetica", "B", 15)
    pdf.cell(0, 8, _pdf_text(title), new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("helvetica", size=8)
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    pdf.cell(0, 4, f"made {made}", new_x="LMARGIN", new_y="NEXT")
    pdf.ln(2)
    counts = []
    res = df["result"].fillna("") if "result" in df else pd.Series([""] * len(df))
    st = df["status"].fillna("") if "status" in df else pd.Series([""] * len(df))
    for name in ("accept", "reject", "review"):
        counts.append((name, int((res == name).sum())))
    counts.append(("error", int((st == "error").sum())))
    counts.append(("total", len(df)))
    _kv(pdf, [(k, v) for k, v in counts], key_w=24)
    pdf.ln(2)
    cols = [c for c in ("photo", "coupon_id", "welder", "status", "result", "n_imperfections", "first_reason",
                        "error") if c in df.columns]
    widths_map = {"photo": 40, "coupon_id": 28, "welder": 28, "status": 16, "result": 16,
                  "n_imperfections": 12, "first_reason": 80, "error": 49}
    heads = {"n_imperfections": "n", "first_reason": "first reason", "coupon_id": "coupon"}
    if cols and len(df):
        pdf.set_font("helvetica", size=7.5)
        with pdf.table(col_widths=tuple(widths_map[c] for c in cols), line_height=4.0, padding=0.6,
                       text_align="LEFT", headings_style=pdf.head_style, cell_fill_color=(238, 238, 238),
                       cell_fill_mode="ROWS") as table:
            hr = table.row()
            for c in cols:
                hr.cell(heads.get(c, c))
            for rec in df[cols].to_dict(orient="records"):
                tr = table.row()
                for c in cols:
                    v = jsonable(rec[c])
                    tr.cell(_pdf_text("" if v is None else (f"{v:g}" if isinstance(v, float) else v))[:160])
    else:
        pdf.cell(0, 5, "No photos in this batch.", new_x="LMARGIN", new_y="NEXT")
    _heading(pdf, "Cautions")
    _bullets(pdf, CAUTIONS)
    return bytes(pdf.output())
