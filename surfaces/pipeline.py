"""One assessment, stage by stage: photo -> calibration -> face -> segments -> table -> verdict.

:func:`assess` returns a :class:`Result` carrying every stage's output and
the assessment dictionary of the JSON contract (see DEVELOPERS.md).  The CLI,
the page and the batch runner all call it.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import cv2
import numpy as np
import pandas as pd

from . import __version__
from .calibrate import calibrate, plane_centroid_px
from .face import find_face
from .limits import CAUTIONS, default_preset_for, judge, load_limit_set
from .measure import TABLE_COLUMNS, measure
from .model import TEST_TYPES, Calibration, Face, Photo, Settings, SurfacesError
from .photo import load_photo
from .segment import Detection, segment

SCHEMA = "surfaces.assessment/1"


@dataclass
class Result:
    photo: Photo
    settings: Settings
    calibration: Calibration
    face: Face
    detections: list[Detection]
    table: pd.DataFrame
    assessment: dict
    timings: dict = field(default_factory=dict)


def _check_settings(s: Settings) -> None:
    if s.test not in TEST_TYPES:
        raise SurfacesError(f"unknown test type {s.test!r}: choose one of {', '.join(TEST_TYPES)}")
    if not (math.isfinite(s.min_size_mm) and 0 < s.min_size_mm <= 20):
        raise SurfacesError(f"--min-size-mm {s.min_size_mm!r}: give a size between 0 and 20 mm")
    for k, v in (s.nominal or {}).items():
        if v is not None and not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise SurfacesError(f"nominal {k} = {v!r}: give a positive number of millimetres")


def assess(photo: Photo, settings: Settings, *, progress: Callable[[str, float], None] | None = None) -> Result:
    """Assess one photo with ``settings``; raises :class:`SurfacesError` on bad input."""
    import time

    _check_settings(settings)
    say = progress or (lambda msg, frac: None)
    t = {}
    t0 = time.perf_counter()
    say("calibrating scale from the reference mark", 0.1)
    calib = calibrate(
        photo,
        marker_mm=settings.marker_mm,
        px_per_mm=settings.px_per_mm,
        ruler=settings.ruler,
        face_hint_px=_roi_centre(settings.roi),
    )
    t["calibrate_s"] = time.perf_counter() - t0
    say("finding the face", 0.35)
    t1 = time.perf_counter()
    if settings.test == "bend":
        from . import bend

        face = bend.find_coupon(photo.rgb, photo.gray, calib, roi=settings.roi)
    else:
        face = find_face(photo.rgb, photo.gray, calib, roi=settings.roi, test=settings.test)
    t["face_s"] = time.perf_counter() - t1
    # "at the face" is the image of the face's centroid in the plane; under perspective
    # the mean of the photo vertices is elsewhere, and the scale changes across a tilted face
    centre = plane_centroid_px(calib, face.polygon_px)
    ppm_photo = calib.px_per_mm_at(float(centre[0]), float(centre[1]))
    if calib.markers:
        # the scale's uncertainty where it is used: at the face, not at the marker
        from dataclasses import replace

        from .calibrate import scale_uncertainty_pct

        calib = replace(calib, uncertainty_pct=float(scale_uncertainty_pct(calib, float(centre[0]), float(centre[1]))))
    say("finding imperfections", 0.55)
    t2 = time.perf_counter()
    length_factor = None
    if settings.test == "bend":
        dets, face, length_factor, bend_notes = bend.detect(face, settings, photo_px_per_mm=ppm_photo)
    else:
        dets = segment(
            face.image,
            _inset(face.mask, int(round(EDGE_INSET_MM * face.px_per_mm))),
            px_per_mm=face.px_per_mm,
            photo_px_per_mm=ppm_photo,
            min_size_mm=settings.min_size_mm,
            test=settings.test,
        )
        bend_notes = []
    from .segment import RESOLVE_PX

    if settings.min_size_mm * ppm_photo < RESOLVE_PX:
        bend_notes.append(
            f"at {ppm_photo:.1f} px/mm the photo resolves imperfections down to about {RESOLVE_PX / ppm_photo:.2f} mm, "
            f"coarser than the {settings.min_size_mm:g} mm asked for: retake closer to see smaller ones"
        )
    t["segment_s"] = time.perf_counter() - t2
    say("measuring", 0.8)
    t3 = time.perf_counter()
    table = measure(
        dets, face, calib, photo_px_per_mm=ppm_photo, length_factor=length_factor, edges_only=settings.test == "bend"
    )
    t["measure_s"] = time.perf_counter() - t3
    limit_set = load_limit_set(settings.limits or default_preset_for(settings.test))
    assessment = build_assessment(photo, settings, calib, face, table, ppm_photo, limit_set, extra_warnings=bend_notes)
    t["total_s"] = time.perf_counter() - t0
    say("done", 1.0)
    return Result(photo, settings, calib, face, dets, table, assessment, t)


#: the outermost band of the face is left to the face's own edge (its shadow and
#: the edge's localisation error would otherwise read as a thin dark line)
EDGE_INSET_MM = 0.25


def _inset(mask: np.ndarray, k: int) -> np.ndarray:
    """The face mask eroded by ``k`` pixels, so a band along every edge (slanted ones too) is left out."""
    if k <= 0 or min(mask.shape) <= 4 * k:
        return mask.copy()
    return cv2.erode(mask.astype(np.uint8), np.ones((2 * k + 1, 2 * k + 1), np.uint8),
                     borderType=cv2.BORDER_CONSTANT, borderValue=0) > 0


def assess_path(path: str | Path, settings: Settings, **kw) -> Result:
    return assess(load_photo(path), settings, **kw)


def _roi_centre(roi):
    if not roi:
        return None
    a = np.asarray(roi, dtype=float).reshape(-1, 2)
    return tuple(float(v) for v in a.mean(axis=0))


def _jsonable(v):
    if isinstance(v, (np.floating, float)):
        f = float(v)
        return None if not math.isfinite(f) else round(f, 4)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    if isinstance(v, np.ndarray):
        return [_jsonable(x) for x in v.tolist()]
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, dict):
        return {k: _jsonable(x) for k, x in v.items()}
    return v


def table_records(table: pd.DataFrame) -> list[dict]:
    # column by column: a DataFrame's own row-by-row conversion took longer than the rest of the record
    cols = [c for c in TABLE_COLUMNS if c in table.columns]
    values = [table[c].tolist() for c in cols]
    return [_jsonable(dict(zip(cols, row))) for row in zip(*values)] if cols else [{} for _ in range(len(table))]


def records_table(records: list[dict]) -> pd.DataFrame:
    """Imperfection records (JSON) back to a table; missing columns filled."""
    df = pd.DataFrame(records)
    for c in TABLE_COLUMNS:
        if c not in df.columns:
            df[c] = np.nan if c.endswith(("_mm", "_mm2")) else None
    df = df[list(TABLE_COLUMNS) + [c for c in df.columns if c not in TABLE_COLUMNS]]
    for c in df.columns:
        if c.endswith(("_mm", "_mm2")) or c == "confidence":
            df[c] = pd.to_numeric(df[c], errors="coerce")
    return df


def judge_records(assessment: dict, limit_set) -> dict:
    """The verdict of an assessment dict's own (stored, rounded) imperfections.

    Judging the stored numbers, not the unrounded table, is what lets a
    saved record be re-judged to exactly the same reasons.
    """
    table = records_table(assessment["imperfections"])
    if len(table):
        table = table[table["status"] != "dismissed"]
    return judge(
        table,
        face={k: assessment["face"][k] for k in ("length_mm", "width_mm", "area_mm2", "unseen") if k in assessment["face"]},
        nominal=dict(assessment.get("nominal") or {}),
        limit_set=limit_set,
        test=assessment["test"],
    ).to_dict()


def build_assessment(photo, settings, calib, face, table, ppm_photo, limit_set, *, extra_warnings=()) -> dict:
    warnings = list(calib.warnings) + list(face.warnings) + list(extra_warnings)
    from .limits import to_toml

    limits_info = limit_set.summary() if hasattr(limit_set, "summary") else {"name": limit_set.name}
    limits_info = dict(limits_info, toml=to_toml(limit_set))
    a = _jsonable(
        {
            "schema": SCHEMA,
            "tool": {"name": "surfaces", "version": __version__},
            "photo": {"name": photo.name, "sha256": photo.sha256, "width": photo.width, "height": photo.height},
            "test": settings.test,
            "settings": asdict(settings),
            "nominal": dict(settings.nominal or {}),
            "calibration": {
                "method": calib.method,
                "px_per_mm": ppm_photo,
                "uncertainty_pct": calib.uncertainty_pct,
                "tilt_deg": calib.tilt_deg,
                "marker_mm": calib.marker_mm,
                "markers": [
                    {"id": m.marker_id, "corners_px": m.corners_px, "side_px": m.side_px, "module_px": m.module_px}
                    for m in calib.markers
                ],
                "consistency_pct": calib.consistency_pct,
                "H_px_to_mm": calib.H,
                "warnings": list(calib.warnings),
            },
            "face": {
                "length_mm": face.length_mm,
                "width_mm": face.width_mm,
                "area_mm2": face.area_mm2,
                "polygon_px": face.polygon_px,
                "method": face.method,
                "root_side": face.root_side,
                "confidence": face.confidence,
                "px_per_mm": face.px_per_mm,
                "A_face_to_plane": face.A_face_to_plane,
                "warnings": list(face.warnings),
                "unseen": list(face.unseen),
            },
            "imperfections": table_records(table),
            "limits": limits_info,
            "verdict": None,
            "warnings": warnings,
            "cautions": list(CAUTIONS),
        }
    )
    a["verdict"] = _jsonable(judge_records(a, limit_set))
    return a
