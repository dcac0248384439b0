"""The inspector's review of one assessment, as pure functions on dicts.

The page keeps, per assessment, the automatic imperfection list (as found)
and a small *review* record: one decision per detection (keep as found,
confirm, dismiss), an optional new kind and new sizes, imperfections the
inspector added by hand, a name and a note.  :func:`reviewed_records`
turns the automatic list plus the review into the reviewed list (the
table contract of DEVELOPERS.md, ``status`` and ``source`` set), and
:func:`reviewed_assessment` judges that list again with
:func:`surfaces.limits.judge_assessment` (dismissed rows are not judged).
Nothing here re-runs the image analysis.

Sizes a reviewer types carry the same uncertainty model as the measured
ones (:func:`surfaces.measure.edge_sigma_mm` for the edge placement,
the calibration's relative scale uncertainty), so a typed size is never
shown or judged as exact.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np

from surfaces.geometry import apply_h
from surfaces.limits import judge_assessment
from surfaces.measure import EDGE_BAND_MM, edge_sigma_mm
from surfaces.model import KINDS, WORK_PX_PER_MM, SurfacesError
from surfaces.segment import ISO6520

#: Decisions offered per detection, and the ``status`` each one gives.
DECISIONS: tuple[str, ...] = ("as found", "confirm", "dismiss")
_DECISION_STATUS = {"as found": "auto", "confirm": "confirmed", "dismiss": "dismissed"}


class ReviewError(SurfacesError):
    """A review input that cannot be used (size not positive, position off the face...)."""


@dataclass
class Edit:
    """The inspector's decision on one automatic detection."""

    decision: str = "as found"
    kind: str | None = None  # None = as found
    greatest_mm: float | None = None  # None = as measured
    width_mm: float | None = None


@dataclass
class Review:
    """Everything the inspector changed on one assessment."""

    edits: dict[int, Edit] = field(default_factory=dict)
    manual: list[dict] = field(default_factory=list)
    reviewer: str = ""
    note: str = ""

    def edit(self, rid: int) -> Edit:
        return self.edits.setdefault(int(rid), Edit())

    @property
    def touched(self) -> bool:
        """True once the inspector changed anything that reaches the verdict or the record."""
        changed = any(e != Edit() for e in self.edits.values())
        return changed or bool(self.manual) or bool(self.note.strip())


def _f(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f


def _scale_u(assessment: dict) -> float:
    """Relative 1-sigma scale uncertainty of the calibration (fraction)."""
    pct = _f((assessment.get("calibration") or {}).get("uncertainty_pct"))
    return pct / 100.0 if math.isfinite(pct) else 0.0


def _edge_sigma(assessment: dict, kind: str) -> float:
    cal = assessment.get("calibration") or {}
    ppm = _f(cal.get("px_per_mm"))
    work = _f((assessment.get("face") or {}).get("px_per_mm"))
    if not math.isfinite(ppm) or ppm <= 0:
        raise ReviewError("the assessment has no photo scale; assess the photo again before reviewing")
    return edge_sigma_mm(kind, photo_px_per_mm=ppm, work_px_per_mm=work if work > 0 else WORK_PX_PER_MM)


def length_u_mm(assessment: dict, kind: str, value_mm: float) -> float:
    """1-sigma uncertainty of a length between two edges (the model of :mod:`surfaces.measure`)."""
    return math.hypot(value_mm * _scale_u(assessment), math.sqrt(2) * _edge_sigma(assessment, kind))


def _check_size(name: str, v: float | None) -> float | None:
    if v is None:
        return None
    f = _f(v)
    if not (math.isfinite(f) and 0 < f < 5000):
        raise ReviewError(f"{name} = {v!r}: give a positive size in mm")
    return f


def _apply_edit(row: dict, e: Edit, assessment: dict) -> dict:
    r = dict(row)
    if e.decision not in _DECISION_STATUS:
        raise ReviewError(f"decision {e.decision!r}: choose one of {', '.join(DECISIONS)}")
    changed = False
    kind = e.kind if e.kind not in (None, "") else r.get("kind")
    if kind not in KINDS:
        raise ReviewError(f"kind {kind!r}: choose one of {', '.join(KINDS)}")
    if kind != r.get("kind"):
        r["kind"], r["iso6520"], changed = kind, ISO6520[kind], True
    g_old, w_old = _f(r.get("greatest_mm")), _f(r.get("width_mm"))
    g_new = _check_size("greatest dimension", e.greatest_mm)
    w_new = _check_size("width", e.width_mm)
    if g_new is not None and not (math.isfinite(g_old) and math.isclose(g_new, g_old, abs_tol=5e-3)):
        changed = True
    else:
        g_new = g_old
    if w_new is not None and not (math.isfinite(w_old) and math.isclose(w_new, w_old, abs_tol=5e-3)):
        changed = True
    else:
        w_new = w_old
    if math.isfinite(g_new) and math.isfinite(w_new) and w_new > g_new:
        raise ReviewError(f"imperfection {r.get('id')}: the width {w_new:g} mm is larger than the "
                          f"greatest dimension {g_new:g} mm; the width is the smaller size")
    if changed and (g_new != g_old or w_new != w_old):
        _resize(r, g_old, w_old, g_new, w_new, assessment)
    if changed:
        r["status"] = "edited"
    else:
        r["status"] = _DECISION_STATUS[e.decision]
    if e.decision == "dismiss":
        r["status"] = "dismissed"
    return r


def _resize(r: dict, g_old, w_old, g_new, w_new, assessment: dict) -> None:
    """Scale the measured extents to the reviewer's sizes, keeping the shape and the centre.

    The extents along and across the weld scale with the greatest dimension;
    the area with the product of both ratios.  Uncertainties follow the
    measurement model for the new sizes.
    """
    kg = g_new / g_old if g_old and math.isfinite(g_old) and g_old > 0 else 1.0
    kw = w_new / w_old if w_old and math.isfinite(w_old) and w_old > 0 else 1.0
    kind = str(r.get("kind"))
    r["greatest_mm"], r["width_mm"] = g_new, w_new
    r["greatest_u_mm"] = length_u_mm(assessment, kind, g_new)
    r["width_u_mm"] = length_u_mm(assessment, kind, w_new)
    for key, c0, c1, cen in (("along_mm", "x0_mm", "x1_mm", "cx_mm"), ("across_mm", "y0_mm", "y1_mm", "cy_mm")):
        v = _f(r.get(key))
        if math.isfinite(v):
            r[key] = v * kg
            r[key.replace("_mm", "_u_mm")] = length_u_mm(assessment, kind, v * kg)
        a, b, c = _f(r.get(c0)), _f(r.get(c1)), _f(r.get(cen))
        if all(math.isfinite(t) for t in (a, b, c)):
            r[c0], r[c1] = c - (c - a) * kg, c + (b - c) * kg
    area = _f(r.get("area_mm2"))
    if math.isfinite(area):
        r["area_mm2"] = area * kg * kw
        r["area_u_mm2"] = _area_u(assessment, kind, r["area_mm2"], _ellipse_perimeter(g_new, w_new))
    _edge_distances(r, assessment)


def _ellipse_perimeter(a_mm: float, b_mm: float) -> float:
    # Ramanujan's first approximation for the perimeter of an ellipse with
    # axes a, b (analytic geometry; error < 0.4 % for any aspect ratio).
    a, b = a_mm / 2, b_mm / 2
    return math.pi * (3 * (a + b) - math.sqrt((3 * a + b) * (a + 3 * b)))


def _area_u(assessment: dict, kind: str, area: float, perimeter: float) -> float:
    return math.hypot(2 * area * _scale_u(assessment), perimeter * _edge_sigma(assessment, kind))


def _edge_distances(r: dict, assessment: dict) -> None:
    """Distances to the ends, long edges and root, as :mod:`surfaces.measure` defines them."""
    face = assessment.get("face") or {}
    L, W = _f(face.get("length_mm")), _f(face.get("width_mm"))
    x0, x1, y0, y1 = (_f(r.get(k)) for k in ("x0_mm", "x1_mm", "y0_mm", "y1_mm"))
    if not all(math.isfinite(v) for v in (L, W, x0, x1, y0, y1)):
        return
    dist_end = min(x0, L - x1)
    dist_edge = min(y0, W - y1)
    side = face.get("root_side")
    dist_root = y0 if side == "y0" else (W - y1 if side == "y1" else float("nan"))
    r["dist_end_mm"], r["dist_edge_mm"], r["dist_root_mm"] = dist_end, dist_edge, dist_root
    r["at_edge"] = bool(dist_edge <= EDGE_BAND_MM or dist_end <= EDGE_BAND_MM)
    r["at_root"] = bool(dist_root <= EDGE_BAND_MM) if side in ("y0", "y1") else bool(dist_edge <= EDGE_BAND_MM)


def face_mm_to_photo(assessment: dict, pts_mm: np.ndarray) -> np.ndarray:
    """Face-axes mm ``(x along, y across)`` -> photo pixels ``(x, y)``.

    Uses the face frame and the calibration stored in the assessment
    (``face.A_face_to_plane`` maps face-image pixels to plane mm, and
    ``calibration.H_px_to_mm`` maps photo pixels to plane mm).
    """
    face, cal = assessment.get("face") or {}, assessment.get("calibration") or {}
    A, H, ppm = face.get("A_face_to_plane"), cal.get("H_px_to_mm"), _f(face.get("px_per_mm"))
    if A is None or H is None or not ppm > 0:
        raise ReviewError("the assessment has no face frame; assess the photo again to add imperfections")
    colrow = np.asarray(pts_mm, dtype=np.float64).reshape(-1, 2) * ppm - 0.5
    return apply_h(np.linalg.inv(np.asarray(H, float)) @ np.asarray(A, float), colrow)


def manual_record(assessment: dict, *, kind: str, x_mm: float, y_mm: float, along_mm: float,
                  across_mm: float, rid: int) -> dict:
    """An imperfection the tool missed, typed by the inspector.

    Parameters
    ----------
    assessment : dict
        The assessment (JSON contract) it belongs to (face size and frame,
        calibration).
    kind : str
        One of :data:`surfaces.model.KINDS`.
    x_mm, y_mm : float, keyword-only
        Centre in face axes: along the weld from the face start, across it
        from the ``y = 0`` edge.
    along_mm, across_mm : float, keyword-only
        Extent along and across the weld; the outline is the ellipse with
        these axes.
    rid : int
        Its id in the reviewed list.
    """
    if kind not in KINDS:
        raise ReviewError(f"kind {kind!r}: choose one of {', '.join(KINDS)}")
    a_len = _check_size("length along the weld", along_mm)
    c_len = _check_size("height across the weld", across_mm)
    face = assessment.get("face") or {}
    L, W = _f(face.get("length_mm")), _f(face.get("width_mm"))
    x, y = _f(x_mm), _f(y_mm)
    if not (math.isfinite(x) and math.isfinite(y) and 0 <= x <= L and 0 <= y <= W):
        raise ReviewError(f"position ({x_mm}, {y_mm}) mm is off the face (0..{L:.1f} along, 0..{W:.1f} "
                          "across): give the centre in face millimetres")
    g, w = max(a_len, c_len), min(a_len, c_len)
    t = np.linspace(0, 2 * np.pi, 48, endpoint=False)
    ell = np.c_[x + a_len / 2 * np.cos(t), y + c_len / 2 * np.sin(t)]
    outline = face_mm_to_photo(assessment, ell)
    centre = face_mm_to_photo(assessment, np.array([[x, y]]))[0]
    area = math.pi * a_len * c_len / 4  # area of an ellipse with these axes (analytic geometry)
    r = {
        "id": int(rid), "kind": kind, "iso6520": ISO6520[kind], "confidence": 1.0,
        "greatest_mm": g, "greatest_u_mm": length_u_mm(assessment, kind, g),
        "width_mm": w, "width_u_mm": length_u_mm(assessment, kind, w),
        "along_mm": a_len, "along_u_mm": length_u_mm(assessment, kind, a_len),
        "across_mm": c_len, "across_u_mm": length_u_mm(assessment, kind, c_len),
        "area_mm2": area, "area_u_mm2": _area_u(assessment, kind, area, _ellipse_perimeter(a_len, c_len)),
        "x0_mm": x - a_len / 2, "x1_mm": x + a_len / 2, "y0_mm": y - c_len / 2, "y1_mm": y + c_len / 2,
        "cx_mm": x, "cy_mm": y, "cause": "",
        "centroid_px": [round(float(centre[0]), 2), round(float(centre[1]), 2)],
        "bbox_px": [round(float(outline[:, 0].min()), 1), round(float(outline[:, 1].min()), 1),
                    round(float(outline[:, 0].max()), 1), round(float(outline[:, 1].max()), 1)],
        "outline_px": [[round(float(px), 1), round(float(py), 1)] for px, py in outline],
        "source": "manual", "status": "confirmed",
    }
    _edge_distances(r, assessment)
    return r


def next_manual_id(auto_records: list[dict], review: Review) -> int:
    ids = [int(r["id"]) for r in auto_records] + [int(r["id"]) for r in review.manual]
    return max(ids, default=0) + 1


def reviewed_records(auto_records: list[dict], review: Review, assessment: dict) -> list[dict]:
    """The automatic list with the review applied, then the manual additions."""
    out = []
    for row in auto_records:
        e = review.edits.get(int(row["id"]))
        out.append(_apply_edit(row, e, assessment) if e is not None else dict(row))
    out.extend(dict(m) for m in review.manual)
    return out


def reviewed_assessment(auto_assessment: dict, review: Review, limit_set, *,
                        reviewed_at: str | None = None) -> dict:
    """Judge the reviewed list again; the automatic result is kept under ``review``.

    Returns a new assessment dict (the JSON contract) whose ``imperfections``
    are the reviewed list and whose ``verdict`` comes from
    :func:`surfaces.limits.judge_assessment`; ``review`` holds the reviewer,
    the time, the note, what changed and the automatic verdict.
    """
    auto_records = list(auto_assessment.get("imperfections") or [])
    rows = reviewed_records(auto_records, review, auto_assessment)
    draft = copy.deepcopy({k: v for k, v in auto_assessment.items() if k != "review"})
    draft["imperfections"] = rows
    out = judge_assessment(draft, limit_set)
    counts = {s: sum(1 for r in rows if r.get("status") == s) for s in ("confirmed", "dismissed", "edited")}
    counts["added"] = len(review.manual)
    out["review"] = {
        "reviewer": review.reviewer.strip() or None,
        "reviewed_at": reviewed_at or datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "note": review.note.strip() or None,
        "changes": counts,
        "automatic_verdict": copy.deepcopy(auto_assessment.get("verdict")),
        "automatic_imperfections": len(auto_records),
    }
    return out
