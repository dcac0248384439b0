"""Score an assessment against the ground truth of a synthetic (or annotated) photo.

Used by ``surfaces bench`` and by the accuracy tests; the runtime never
imports it.

Truth format (schema ``surfaces.truth/1``, written by :mod:`surfaces.synth`)::

    {"H_plane_to_photo": 3x3, "px_per_mm_face": float,
     "face": {"polygon_mm", "polygon_px", "length_mm", "width_mm", "area_mm2"},
     "imperfections": [{"kind", "centroid_mm", "centroid_px", "bbox_px",
                        "greatest_mm", "width_mm", "along_mm", "across_mm",
                        "area_mm2", "starts_at_edge"}, ...]}

``centroid_mm`` is in the marker plane (the frame ``H_plane_to_photo``
maps from).

Bend coupons
------------
On a curved bend coupon the truth ``face`` is the inspected arc (true arc
length and area), while the photo shows the cylinder further on, and
nothing in it marks where the inspected arc ends.  The tool reports the
convex surface it sees, projected onto the card's plane, so the face is
scored against ``face["visible"]`` (the drawn strip, projected: written by
the generator; replayed from the seed for older truth files, see
:func:`visible_face`).  Imperfection sizes are true arc lengths; an
assessment made without a bend radius reports projected lengths and is
scored against the truth's ``projected`` sizes.

Matching
--------
Each detection's ``centroid_px`` is mapped to the plane with
``inv(H_plane_to_photo)`` and compared with the truth ``centroid_mm``.  A
pair is admissible when their distance is at most
``max(MATCH_MIN_MM, greatest_mm / 2)`` of the truth imperfection (a detection
whose centre lies inside the truth region, roughly).  Pairs are taken
greedily by increasing distance, each truth and each detection at most once.
Kinds need not agree for a match: kind agreement is scored separately, so a
pore reported as an inclusion is *found* but *misclassified*.

Scores
------
* recall of kind ``k``: truth imperfections of kind ``k`` matched to a
  detection **of kind k**, over truth imperfections of kind ``k``
  (``found_any``: matched to a detection of any kind);
* precision of kind ``k``: detections of kind ``k`` matched to truth of kind
  ``k``, over detections of kind ``k``;
* both per size bucket (:data:`SIZE_BUCKETS_MM`); recall is bucketed by the
  truth size, precision by the measured size;
* greatest-dimension error of matched pairs (median and 95th percentile of
  the absolute error, and the fraction within
  ``max(GREATEST_TOL_MM, GREATEST_TOL_REL * truth)``).
"""

from __future__ import annotations

import math
from typing import Iterable

import numpy as np
import pandas as pd

from .geometry import apply_h
from .model import KINDS, SurfacesError

__all__ = [
    "GREATEST_TOL_MM",
    "GREATEST_TOL_REL",
    "MATCH_COLUMNS",
    "MATCH_MIN_MM",
    "SIZE_BUCKETS_MM",
    "TruthError",
    "bucket_label",
    "match",
    "photo_scores",
    "scores",
    "truth_band",
    "truth_table",
    "truth_verdict",
    "visible_face",
]

MATCH_MIN_MM: float = 1.0
#: Acceptable greatest-dimension error: max(0.15 mm, 5 %) of the true size.
GREATEST_TOL_MM: float = 0.15
GREATEST_TOL_REL: float = 0.05
#: Bucket edges in mm: <0.5, 0.5-1, 1-2, 2-4, >4.
SIZE_BUCKETS_MM: tuple[float, ...] = (0.5, 1.0, 2.0, 4.0)

MATCH_COLUMNS: tuple[str, ...] = (
    "truth_index", "det_id", "matched", "truth_kind", "det_kind", "same_kind",
    "dist_mm", "tol_mm",
    "truth_greatest_mm", "det_greatest_mm", "greatest_err_mm", "greatest_ok",
    "truth_width_mm", "det_width_mm", "truth_along_mm", "det_along_mm",
    "truth_area_mm2", "det_area_mm2", "det_confidence",
    "truth_bucket", "det_bucket",
)  # fmt: skip


class TruthError(SurfacesError):
    """A truth file that cannot be used for scoring."""


def bucket_label(size_mm: float) -> str:
    """Size bucket of a greatest dimension: ``<0.5``, ``0.5-1``, ``1-2``, ``2-4``, ``>4`` (mm).

    Lower edges are inclusive: 0.5 mm falls in ``0.5-1``.

    Examples
    --------
    >>> [bucket_label(v) for v in (0.2, 0.5, 1.5, 3.99, 4.0)]
    ['<0.5', '0.5-1', '1-2', '2-4', '>4']
    """
    if size_mm is None or not math.isfinite(size_mm):
        return ""
    edges = SIZE_BUCKETS_MM
    if size_mm < edges[0]:
        return f"<{edges[0]:g}"
    for lo, hi in zip(edges, edges[1:]):
        if size_mm < hi:
            return f"{lo:g}-{hi:g}"
    return f">{edges[-1]:g}"


def _bucket_order() -> list[str]:
    e = SIZE_BUCKETS_MM
    return [f"<{e[0]:g}"] + [f"{a:g}-{b:g}" for a, b in zip(e, e[1:])] + [f">{e[-1]:g}"]


def greatest_tolerance_mm(truth_mm: float) -> float:
    """max(0.15 mm, 5 % of the true greatest dimension)."""
    return max(GREATEST_TOL_MM, GREATEST_TOL_REL * float(truth_mm))


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f


def _H(truth: dict) -> np.ndarray:
    try:
        H = np.asarray(truth["H_plane_to_photo"], dtype=np.float64)
    except (KeyError, TypeError, ValueError):
        raise TruthError("the truth has no usable H_plane_to_photo (3x3): regenerate it with surfaces.synth") from None
    if H.shape != (3, 3) or not np.isfinite(H).all() or abs(np.linalg.det(H)) < 1e-300:
        raise TruthError("the truth's H_plane_to_photo is not an invertible 3x3 matrix")
    return H


def _detections(assessment: dict) -> list[dict]:
    rows = assessment.get("imperfections") or []
    return [r for r in rows if str(r.get("status") or "auto") != "dismissed"]


_SIZE_KEYS = ("greatest_mm", "width_mm", "along_mm", "across_mm", "area_mm2")


def _projected_lengths(assessment: dict, truth: dict) -> bool:
    """True when the assessment's lengths along a curved bend coupon are projected, not true arc lengths.

    The tool corrects for curvature only when it knows the outer radius
    (``outer_radius_mm``, or ``former_diameter_mm`` with
    ``nominal.thickness_mm``); without it its sizes are as seen on the
    card's plane, like the truth's ``projected`` sizes.
    """
    if not (truth.get("curvature") or {}).get("enabled") or assessment.get("test", "bend") != "bend":
        return False
    st = assessment.get("settings")
    if not isinstance(st, dict):
        return False  # unknown: score as true surface lengths
    from types import SimpleNamespace

    from .bend import outer_radius

    keys = ("outer_radius_mm", "former_diameter_mm", "bend_angle_deg")
    try:
        R, _, _ = outer_radius(SimpleNamespace(nominal=st.get("nominal") or {}, **{k: st.get(k) for k in keys}))
    except SurfacesError:
        return True
    return R is None


def match(assessment: dict, truth: dict) -> pd.DataFrame:
    """Pair truth imperfections with detections, one to one.

    Parameters
    ----------
    assessment : dict
        The assessment (JSON contract); rows with status ``dismissed`` are
        left out.
    truth : dict
        The photo's truth (``surfaces.truth/1``).  On a curved bend coupon
        assessed without a bend radius (lengths projected, see the module
        notes) the truth's ``projected`` sizes are used.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`MATCH_COLUMNS`: one row per truth imperfection (matched
        or missed; ``det_id`` is ``-1`` when missed) followed by one row per
        unmatched detection (``truth_index`` ``-1``).  Sizes in mm.

    Examples
    --------
    >>> truth = {"H_plane_to_photo": [[10, 0, 0], [0, 10, 0], [0, 0, 1]],
    ...          "imperfections": [{"kind": "pore", "centroid_mm": [5, 5], "greatest_mm": 1.0}]}
    >>> ass = {"imperfections": [{"id": 1, "kind": "pore", "centroid_px": [52, 50],
    ...                           "greatest_mm": 1.1}]}
    >>> m = match(ass, truth)
    >>> bool(m.loc[0, "matched"]), round(float(m.loc[0, "dist_mm"]), 3)
    (True, 0.2)
    """
    H = _H(truth)
    Hinv = np.linalg.inv(H)
    tru = list(truth.get("imperfections") or [])
    if _projected_lengths(assessment, truth):
        tru = [{**t, **{k: v for k, v in (t.get("projected") or {}).items() if k in _SIZE_KEYS}} for t in tru]
    dets = _detections(assessment)
    t_xy = np.array([[_num(c) for c in (t.get("centroid_mm") or [np.nan, np.nan])] for t in tru], float).reshape(-1, 2)
    d_px = np.array([[_num(c) for c in (d.get("centroid_px") or [np.nan, np.nan])] for d in dets], float).reshape(-1, 2)
    d_xy = apply_h(Hinv, d_px) if len(d_px) else np.zeros((0, 2))
    t_g = np.array([_num(t.get("greatest_mm")) for t in tru], float)
    tol = np.maximum(MATCH_MIN_MM, np.nan_to_num(t_g, nan=0.0) / 2.0)
    pairs = []
    if len(tru) and len(dets):
        dist = np.hypot(t_xy[:, None, 0] - d_xy[None, :, 0], t_xy[:, None, 1] - d_xy[None, :, 1])
        ii, jj = np.nonzero(np.nan_to_num(dist, nan=np.inf) <= tol[:, None])
        pairs = sorted(zip(dist[ii, jj].tolist(), ii.tolist(), jj.tolist()))
    t_to_d: dict[int, tuple[int, float]] = {}
    used_d: set[int] = set()
    for dd, i, j in pairs:
        if i in t_to_d or j in used_d:
            continue
        t_to_d[i] = (j, dd)
        used_d.add(j)

    rows = []
    for i, t in enumerate(tru):
        tg = t_g[i]
        row = {
            "truth_index": i, "det_id": -1, "matched": False, "truth_kind": str(t.get("kind") or ""),
            "det_kind": "", "same_kind": False, "dist_mm": np.nan, "tol_mm": float(tol[i]),
            "truth_greatest_mm": tg, "det_greatest_mm": np.nan, "greatest_err_mm": np.nan, "greatest_ok": False,
            "truth_width_mm": _num(t.get("width_mm")), "det_width_mm": np.nan,
            "truth_along_mm": _num(t.get("along_mm")), "det_along_mm": np.nan,
            "truth_area_mm2": _num(t.get("area_mm2")), "det_area_mm2": np.nan, "det_confidence": np.nan,
            "truth_bucket": bucket_label(tg), "det_bucket": "",
        }  # fmt: skip
        if i in t_to_d:
            j, dd = t_to_d[i]
            d = dets[j]
            dg = _num(d.get("greatest_mm"))
            err = dg - tg
            row.update(
                det_id=int(_num(d.get("id"))) if math.isfinite(_num(d.get("id"))) else j + 1,
                matched=True, det_kind=str(d.get("kind") or ""), dist_mm=float(dd),
                det_greatest_mm=dg, greatest_err_mm=err,
                greatest_ok=bool(math.isfinite(err) and abs(err) <= greatest_tolerance_mm(tg)),
                det_width_mm=_num(d.get("width_mm")), det_along_mm=_num(d.get("along_mm")),
                det_area_mm2=_num(d.get("area_mm2")), det_confidence=_num(d.get("confidence")),
                det_bucket=bucket_label(dg),
            )  # fmt: skip
            row["same_kind"] = row["det_kind"] == row["truth_kind"]
        rows.append(row)
    for j, d in enumerate(dets):
        if j in used_d:
            continue
        dg = _num(d.get("greatest_mm"))
        rows.append({
            "truth_index": -1, "det_id": int(_num(d.get("id"))) if math.isfinite(_num(d.get("id"))) else j + 1,
            "matched": False, "truth_kind": "", "det_kind": str(d.get("kind") or ""), "same_kind": False,
            "dist_mm": np.nan, "tol_mm": np.nan, "truth_greatest_mm": np.nan, "det_greatest_mm": dg,
            "greatest_err_mm": np.nan, "greatest_ok": False, "truth_width_mm": np.nan,
            "det_width_mm": _num(d.get("width_mm")), "truth_along_mm": np.nan, "det_along_mm": _num(d.get("along_mm")),
            "truth_area_mm2": np.nan, "det_area_mm2": _num(d.get("area_mm2")),
            "det_confidence": _num(d.get("confidence")), "truth_bucket": "", "det_bucket": bucket_label(dg),
        })  # fmt: skip
    df = pd.DataFrame(rows, columns=list(MATCH_COLUMNS))
    return df.astype({"truth_index": int, "det_id": int, "matched": bool, "same_kind": bool, "greatest_ok": bool})


def _ratio(num: int, den: int) -> float | None:
    return None if den == 0 else num / den


def _pr(m: pd.DataFrame, kind: str, *, min_mm: float | None = None, bucket: str | None = None) -> dict:
    """Recall / precision counts for one kind, optionally restricted by size."""
    t = m[m["truth_index"] >= 0]
    t = t[t["truth_kind"] == kind]
    d = m[m["det_id"] >= 0]
    d = d[d["det_kind"] == kind]
    if min_mm is not None:
        t = t[t["truth_greatest_mm"] >= min_mm]
        d = d[d["det_greatest_mm"] >= min_mm]
    if bucket is not None:
        t = t[t["truth_bucket"] == bucket]
        d = d[d["det_bucket"] == bucket]
    found = int((t["matched"] & t["same_kind"]).sum())
    found_any = int(t["matched"].sum())
    correct = int((d["matched"] & d["same_kind"]).sum())
    real = int(d["matched"].sum())
    return {
        "n_truth": int(len(t)), "found": found, "found_any": found_any,
        "recall": _ratio(found, len(t)), "recall_any_kind": _ratio(found_any, len(t)),
        "n_detected": int(len(d)), "correct": correct, "real": real,
        "precision": _ratio(correct, len(d)), "precision_any_kind": _ratio(real, len(d)),
    }  # fmt: skip


def _quantile(x: np.ndarray, q: float) -> float | None:
    x = x[np.isfinite(x)]
    return None if x.size == 0 else float(np.quantile(x, q))


def scores(matches: pd.DataFrame | Iterable[pd.DataFrame], *, min_mm: dict | None = None) -> dict:
    """Recall, precision and size errors from :func:`match` output.

    Parameters
    ----------
    matches : DataFrame or iterable of DataFrames
        One photo's matches or many (concatenated).
    min_mm : dict, optional
        Per kind, a smallest truth/measured size for an extra
        ``kinds[k]["at_least"]`` entry (e.g. ``{"pore": 0.5}``).

    Returns
    -------
    dict
        ``kinds``: per kind ``all`` (counts, recall, precision), ``buckets``
        (same per size bucket) and ``at_least`` (when asked);
        ``greatest``: ``n``, ``median_abs_err_mm``, ``p95_abs_err_mm``,
        ``frac_within`` (within max(0.15 mm, 5 %)), ``median_rel_err``;
        ``unfused_length``: relative error of ``along_mm`` for matched unfused
        regions (``median``, ``max``); ``false_detections``: unmatched
        detections; ``missed``: unmatched truth.
    """
    if not isinstance(matches, pd.DataFrame):
        parts = [m for m in matches]
        m = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=list(MATCH_COLUMNS))
    else:
        m = matches
    kinds_seen = [k for k in KINDS if k in set(m["truth_kind"]) | set(m["det_kind"])]
    out_k = {}
    for k in kinds_seen:
        entry = {"all": _pr(m, k), "buckets": {b: _pr(m, k, bucket=b) for b in _bucket_order()}}
        if min_mm and k in min_mm:
            entry["at_least"] = {"min_mm": float(min_mm[k]), **_pr(m, k, min_mm=float(min_mm[k]))}
        out_k[k] = entry
    pairs = m[m["matched"]]
    err = (pairs["det_greatest_mm"] - pairs["truth_greatest_mm"]).to_numpy(float)
    rel = err / pairs["truth_greatest_mm"].to_numpy(float) if len(pairs) else np.zeros(0)
    uf = pairs[(pairs["truth_kind"] == "unfused")]
    uf_rel = (np.abs(uf["det_along_mm"] - uf["truth_along_mm"]) / uf["truth_along_mm"]).to_numpy(float)
    return {
        "kinds": out_k,
        "greatest": {
            "n": int(len(pairs)),
            "median_abs_err_mm": _quantile(np.abs(err), 0.5),
            "p95_abs_err_mm": _quantile(np.abs(err), 0.95),
            "median_rel_err": _quantile(rel, 0.5),
            "frac_within": _ratio(int(pairs["greatest_ok"].sum()), len(pairs)),
        },
        "unfused_length": {
            "n": int(np.isfinite(uf_rel).sum()),
            "median_rel_err": _quantile(uf_rel, 0.5),
            "max_rel_err": None if not np.isfinite(uf_rel).any() else float(np.nanmax(uf_rel)),
        },
        "false_detections": int(((m["truth_index"] < 0) & (m["det_id"] >= 0)).sum()),
        "missed": int(((m["truth_index"] >= 0) & ~m["matched"]).sum()),
        "n_truth": int((m["truth_index"] >= 0).sum()),
        "n_detected": int((m["det_id"] >= 0).sum()),
    }


# --------------------------------------------------------------------------- per photo


def visible_face(truth: dict) -> tuple[dict | None, str]:
    """The truth face the tool's face is compared with, and where it came from.

    Returns ``(face, source)``: ``face["visible"]`` and ``"visible"`` when
    the truth records the drawn surface (bend coupons); for an older bend
    truth file without it, the drawn strip replayed from the seed by the
    generator (``"replayed"``), or ``(None, "unknown")`` when that cannot be
    told; otherwise the truth face itself (``"face"``: a fracture face, a
    flat bend coupon or an annotated photo, where what is seen is the face).
    """
    tf = truth.get("face") or {}
    if isinstance(tf.get("visible"), dict):
        return tf["visible"], "visible"
    if truth.get("scene") == "bend" and (truth.get("curvature") or {}).get("enabled"):
        try:
            from .synth._bend import visible_face as replay
        except ImportError:  # pragma: no cover - the generator ships with the source tree
            return None, "unknown"
        v = replay(truth)
        return (v, "replayed") if v is not None else (None, "unknown")
    return tf, "face"


def photo_scores(assessment: dict, truth: dict) -> dict:
    """Calibration and face errors of one assessment against its truth.

    Returns ``px_per_mm`` (tool), ``px_per_mm_truth``, ``px_per_mm_err_pct``
    (signed, percent of truth), ``face_area_mm2``, ``face_area_truth_mm2``,
    ``face_area_err_pct``, the same for face length, and ``face_truth``: the
    truth face compared with (:func:`visible_face`; on a curved bend coupon
    the drawn surface projected onto the card's plane, as the tool measures
    it; the face figures are None when it is ``unknown``).
    """
    cal = assessment.get("calibration") or {}
    face = assessment.get("face") or {}
    tf, source = visible_face(truth)
    tf = tf or {}
    out = {}

    def pct(a, b):
        a, b = _num(a), _num(b)
        return (a - b) / b * 100.0 if math.isfinite(a) and math.isfinite(b) and b != 0 else None

    out["px_per_mm"] = _num(cal.get("px_per_mm"))
    out["px_per_mm_truth"] = _num(truth.get("px_per_mm_face"))
    out["px_per_mm_err_pct"] = pct(out["px_per_mm"], out["px_per_mm_truth"])
    out["face_area_mm2"] = _num(face.get("area_mm2"))
    out["face_area_truth_mm2"] = _num(tf.get("area_mm2"))
    out["face_area_err_pct"] = pct(out["face_area_mm2"], out["face_area_truth_mm2"])
    out["face_length_mm"] = _num(face.get("length_mm"))
    out["face_length_truth_mm"] = _num(tf.get("length_mm"))
    out["face_length_err_pct"] = pct(out["face_length_mm"], out["face_length_truth_mm"])
    out["face_truth"] = source
    return out


# --------------------------------------------------------------------------- truth verdict


def _to_face_mm(truth: dict):
    """A function mapping plane mm (N, 2) to face mm (x along, y across), and the face's L, W.

    Uses the truth face's ``A_face_to_plane`` (face mm -> plane mm) when
    present; otherwise the face polygon's first vertex is the origin and its
    longer adjacent side the x axis (a rectangle in plane mm).
    """
    tf = truth.get("face") or {}
    L, W = _num(tf.get("length_mm")), _num(tf.get("width_mm"))
    A = tf.get("A_face_to_plane")
    if A is not None:
        Ainv = np.linalg.inv(np.asarray(A, dtype=np.float64))
        return (lambda pts: apply_h(Ainv, pts)), L, W
    P = np.asarray(tf.get("polygon_mm") or [], dtype=np.float64).reshape(-1, 2)
    if len(P) < 3:
        raise TruthError("the truth face has neither A_face_to_plane nor polygon_mm: cannot use face axes")
    o = P[0]
    a, b = P[1] - P[0], P[-1] - P[0]
    if np.hypot(*b) > np.hypot(*a):
        a, b = b, a
    ux, uy = a / np.hypot(*a), b / np.hypot(*b)
    rel = P - o
    if not math.isfinite(L):
        L = float(np.ptp(rel @ ux))
    if not math.isfinite(W):
        W = float(np.ptp(rel @ uy))
    return (lambda pts: np.c_[(np.asarray(pts, float) - o) @ ux, (np.asarray(pts, float) - o) @ uy]), L, W


def truth_table(truth: dict, *, root_side: str | None = None) -> pd.DataFrame:
    """The truth imperfections as an imperfection table (contract columns, uncertainties 0).

    Face-axes extents come from the truth's ``face_mm`` (exact, written by
    the generator); without it, the centroid is mapped into face axes and
    the extents are the centroid +/- half ``along_mm`` / ``across_mm``.
    ``at_edge`` is the truth ``starts_at_edge`` or, when that is false or
    absent, the same 0.5 mm band the measurement uses (on a bend coupon
    along the long edges only, and x from the start of the surface seen,
    :func:`visible_face`, as the tool measures it); ``confidence`` is 1
    and ``status`` ``confirmed``.  ``root_side`` (``y0``/``y1``) defaults to
    the truth face's ``root_side``.
    """
    from .measure import EDGE_BAND_MM, TABLE_COLUMNS, empty_table

    tru = list(truth.get("imperfections") or [])
    if not tru:
        return empty_table()
    to_face, L, W = _to_face_mm(truth)
    root = root_side or (truth.get("face") or {}).get("root_side") or "unknown"
    bend = truth.get("test") == "bend" or truth.get("scene") == "bend"
    seen = None  # (start, length) of the bend surface seen, in the truth's surface x
    if bend:
        vis, _ = visible_face(truth)
        s0, s1 = _num((vis or {}).get("surface_x0_mm")), _num((vis or {}).get("surface_x1_mm"))
        if math.isfinite(s0) and math.isfinite(s1) and s1 > s0:
            seen = (s0, s1 - s0)
    rows = []
    for i, t in enumerate(tru, start=1):
        kind = str(t.get("kind") or "")
        if kind not in KINDS:
            raise TruthError(f"truth imperfection {i} has kind {kind!r}: expected one of {', '.join(KINDS)}")
        along, across = _num(t.get("along_mm")), _num(t.get("across_mm"))
        fm = t.get("face_mm")
        Lx = L
        if isinstance(fm, dict) and {"cx", "cy", "x0", "x1", "y0", "y1"} <= set(fm):
            cx, cy, x0, x1, y0, y1 = (_num(fm[k]) for k in ("cx", "cy", "x0", "x1", "y0", "y1"))
            if seen is not None:  # true surface x from the start of the surface seen, as the tool measures it
                cx, x0, x1, Lx = cx - seen[0], x0 - seen[0], x1 - seen[0], seen[1]
        else:
            cx, cy = (float(v) for v in to_face([t.get("centroid_mm")])[0])
            x0, x1 = cx - along / 2, cx + along / 2
            y0, y1 = cy - across / 2, cy + across / 2
        dist_end = min(x0, Lx - x1)
        dist_edge = min(y0, W - y1)
        dist_root = y0 if root == "y0" else (W - y1 if root == "y1" else float("nan"))
        # a bend coupon's corners are its long edges; the ends of the surface seen are not (as measure.py)
        at_end = dist_end <= EDGE_BAND_MM and not bend
        at_edge = bool(t.get("starts_at_edge")) or dist_edge <= EDGE_BAND_MM or at_end
        at_root = dist_root <= EDGE_BAND_MM if root in ("y0", "y1") else dist_edge <= EDGE_BAND_MM
        row = {c: None for c in TABLE_COLUMNS}
        row.update(
            id=i, kind=kind, iso6520=str(t.get("iso6520") or ""), confidence=1.0,
            greatest_mm=_num(t.get("greatest_mm")), width_mm=_num(t.get("width_mm")),
            along_mm=along, across_mm=across, area_mm2=_num(t.get("area_mm2")),
            x0_mm=x0, x1_mm=x1, y0_mm=y0, y1_mm=y1, cx_mm=cx, cy_mm=cy,
            dist_root_mm=dist_root, dist_end_mm=dist_end, dist_edge_mm=dist_edge,
            at_edge=bool(at_edge), at_root=bool(at_root), cause=str(t.get("cause") or ""),
            centroid_px=t.get("centroid_px"), bbox_px=t.get("bbox_px"), outline_px=[],
            source="manual", status="confirmed",
        )  # fmt: skip
        for col in ("greatest_u_mm", "width_u_mm", "along_u_mm", "across_u_mm", "area_u_mm2"):
            row[col] = 0.0
        rows.append(row)
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def truth_verdict(truth: dict, *, limit_set, test: str, nominal: dict | None = None) -> dict:
    """The verdict the truth deserves: the truth table judged by the same limits engine."""
    from .limits import judge

    tf = truth.get("face") or {}
    face = {k: _num(tf.get(k)) for k in ("length_mm", "width_mm", "area_mm2")}
    v = judge(truth_table(truth), face=face, nominal=dict(nominal or {}), limit_set=limit_set, test=test)
    return v.to_dict()


def _scaled_truth_table(truth: dict, sign: int) -> pd.DataFrame:
    """Truth table with every size moved by ``sign`` x max(0.15 mm, 5 %)."""
    tab = truth_table(truth)
    if not len(tab):
        return tab
    tab = tab.copy()
    ratio = {}
    for col in ("greatest_mm", "width_mm", "along_mm", "across_mm"):
        v = pd.to_numeric(tab[col], errors="coerce").astype(float)
        tol = np.maximum(GREATEST_TOL_MM, GREATEST_TOL_REL * v)
        new = np.maximum(v + sign * tol, 0.0)
        ratio[col] = np.where(v > 0, new / v.where(v > 0, 1.0), 1.0)
        tab[col] = new
    a = pd.to_numeric(tab["area_mm2"], errors="coerce").astype(float)
    tab["area_mm2"] = a * ratio["greatest_mm"] * ratio["width_mm"]
    return tab


def truth_band(truth: dict, *, limit_set, test: str, nominal: dict | None = None) -> dict:
    """The truth verdict and whether it sits within measuring tolerance of a limit.

    The truth table is judged as it is, with every size shrunk by
    max(0.15 mm, 5 %) and with every size grown by as much.  When those
    verdicts differ the coupon is *borderline*: a tool measuring to that
    tolerance cannot decide it from the photo, and should say ``review``.

    Returns
    -------
    dict
        ``result`` (the truth verdict), ``low`` and ``high`` (verdicts of the
        shrunk and grown tables), ``borderline`` (bool), ``reasons``.
    """
    from .limits import judge

    tf = truth.get("face") or {}
    face = {k: _num(tf.get(k)) for k in ("length_mm", "width_mm", "area_mm2")}
    kw = {"face": face, "nominal": dict(nominal or {}), "limit_set": limit_set, "test": test}
    mid = judge(truth_table(truth), **kw)
    low = judge(_scaled_truth_table(truth, -1), **kw)
    high = judge(_scaled_truth_table(truth, +1), **kw)
    return {"result": mid.result, "low": low.result, "high": high.result,
            "borderline": len({low.result, mid.result, high.result}) > 1, "reasons": list(mid.reasons)}
