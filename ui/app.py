"""The local page: assess a coupon photo, review it, save it, export it; batches, histories, limit sets.

Thin over the core package: the page collects inputs, calls
:mod:`surfaces.pipeline`, :mod:`surfaces.limits`, :mod:`surfaces.report`
and :mod:`surfaces.records`, and shows what they return.  The inspector's
review lives in :mod:`ui.review` (pure functions on the table); session
memory and the cached analysis in :mod:`ui.state`.

Start it with ``surfaces ui`` (listens on 127.0.0.1 only).
"""

from __future__ import annotations

import json
import logging
import math
import sys
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import streamlit as st  # noqa: E402

from surfaces import limits as L  # noqa: E402
from surfaces import report  # noqa: E402
from surfaces.model import KINDS, TEST_TYPES, CalibrationError, Settings, SurfacesError  # noqa: E402
from surfaces.photo import load_photo  # noqa: E402
from ui import helpers as H  # noqa: E402
from ui import review as R  # noqa: E402
from ui import state as S  # noqa: E402

log = logging.getLogger("surfaces.ui")

DEMO_DIR = ROOT / "demo_images"
TEST_NAMES = {
    "fillet-break": "Fillet-weld break test",
    "nick-break": "Nick-break test (pipe)",
    "bend": "Guided bend test",
}
KIND_NAMES = {"pore": "pore", "inclusion": "slag inclusion", "unfused": "lack of fusion", "crack": "crack"}
VIEWS = ("Assess a coupon", "Batch of photos", "Welder histories", "Limit sets")
SOURCES = ("Upload a photo", "Take a photo", "Demo photo")


# =========================================================================== small pieces


def demo_rows() -> list[dict]:
    """The demo photos with their coupon details (``demo_images/manifest.csv``), or [] when not installed."""
    try:
        from surfaces.demo import read_manifest

        return read_manifest(DEMO_DIR)
    except (ImportError, SurfacesError):
        return []


def apply_demo(row: dict) -> None:
    """Fill the coupon widgets with a demo row's details (before those widgets are drawn)."""
    from surfaces.demo import settings_for

    s = settings_for(row)
    ss = st.session_state
    for key, field in (("c_id", "coupon_id"), ("c_welder", "welder"), ("c_procedure", "procedure"),
                       ("c_process", "process"), ("c_position", "position"), ("c_material", "material")):
        ss[key] = row.get(field) or ""
    ss["c_test"] = s.test
    if s.limits:
        ss[f"c_limits_{s.test}"] = s.limits
    for key, field in (("c_thickness", "thickness_mm"), ("c_throat", "throat_mm"), ("c_wall", "wall_mm"),
                       ("c_length", "length_mm")):
        ss[key] = (s.nominal or {}).get(field)
    ss["c_bend_angle"], ss["c_former"] = s.bend_angle_deg, s.former_diameter_mm
    if s.marker_mm:
        ss["marker_mm"] = float(s.marker_mm)


@st.cache_resource(show_spinner=False)
def presets() -> list:
    """The shipped presets (read once per server; they do not change while it runs)."""
    return L.list_presets()


def limit_sets_for(test: str) -> list:
    """Presets and the user's own sets that apply to ``test``, the default first."""
    sets = [s for s in presets() + L.list_user_sets() if s.applies_to(test)]
    default = L.default_preset_for(test)
    sets.sort(key=lambda s: (s.name != default, s.kind != "preset", s.name))
    return sets


def flash(kind: str, text: str, *, where: str = "save") -> None:
    st.session_state.setdefault("flash", []).append((where, kind, text))


def show_flashes(where: str = "save") -> None:
    keep = []
    for w, kind, text in st.session_state.pop("flash", []):
        if w == where:
            getattr(st, kind)(text)
        else:
            keep.append((w, kind, text))
    st.session_state["flash"] = keep


def verdict_banner(verdict: dict, *, title: str, big: bool = True, key: str = "verdict") -> None:
    """The verdict in words with an icon (shape differs per result); every reason listed."""
    result = str((verdict or {}).get("result") or "review")
    word, icon, colour, meaning = H.VERDICT_LOOK.get(result, H.VERDICT_LOOK["review"])
    with st.container(border=True, key=key):
        st.caption(title)
        head = "##" if big else "####"
        st.markdown(f"{head} {icon} :{colour}[**{word}**]")
        st.markdown(f"*{meaning}*")
        for reason in verdict.get("reasons") or []:
            st.markdown(f"- {_md(reason)}")


def _md(text: str) -> str:
    """Plain text for Markdown (no links, no emphasis from the text itself)."""
    out = str(text)
    for ch in "\\`*_[]<>#|$~:":
        out = out.replace(ch, "\\" + ch)
    return out


def cautions_box(assessment: dict | None = None) -> None:
    items = list(L.CAUTIONS)
    for c in (assessment or {}).get("cautions") or []:
        if c not in items:
            items.append(c)
    with st.container(border=True, key="cautions"):
        st.markdown("**:material/info: Before you rely on this result**")
        st.markdown("- This tool assists a qualified inspector; it does not replace one.\n"
                    + "\n".join(f"- {_md(c)}" for c in items))


# =========================================================================== inputs


_DEMO_KEYS = ("c_id", "c_welder", "c_procedure", "c_process", "c_position", "c_material", "c_thickness",
              "c_throat", "c_wall", "c_length", "c_bend_angle", "c_former")


def _left_demo() -> None:
    """Leaving the demo: clear the coupon fields it filled, so a real coupon never gets a demo id."""
    if st.session_state.get("src") != SOURCES[2] and st.session_state.pop("_demo_applied", None):
        for key in _DEMO_KEYS:
            st.session_state[key] = None if key in ("c_thickness", "c_throat", "c_wall", "c_length",
                                                     "c_bend_angle", "c_former") else ""
        st.session_state["marker_mm"] = 20.0


def photo_input() -> tuple[bytes, str, str] | None:
    """The chosen photo as (bytes, safe name, origin) or None."""
    demos = demo_rows()
    if "src" not in st.session_state:
        st.session_state["src"] = SOURCES[2] if demos else SOURCES[0]
    src = st.radio("Where is the photo?", SOURCES, horizontal=True, key="src", on_change=_left_demo,
                   persist_state="page")
    if src == SOURCES[0]:
        up = st.file_uploader(
            f"Photo of the test face beside the reference card (JPEG, PNG or TIFF, up to {H.MAX_UPLOAD_MB} MB)",
            type=list(H.PHOTO_TYPES), key="upload", max_upload_size=H.MAX_UPLOAD_MB)
        if up is None:
            return None
        return up.getvalue(), H.safe_name(up.name), "upload"
    if src == SOURCES[1]:
        cam = st.camera_input("Point the camera square at the face, with the card beside it", key="camera")
        if cam is None:
            return None
        return cam.getvalue(), "camera.jpg", "camera"
    if not demos:
        st.info("No demo photos are installed here. Upload a photo instead.")
        return None
    by_name = {r["photo"]: r for r in demos}
    pick = st.selectbox("Demo photo (an invented shop's coupons, synthetic photos)", list(by_name), key="demo", persist_state="page",
                        format_func=lambda n: f"{by_name[n]['coupon_id']} · {TEST_NAMES.get(by_name[n]['test'])}"
                                              f" · {by_name[n]['date']}")
    row = by_name[pick]
    if st.session_state.get("_demo_applied") != pick:  # fill the coupon fields once per chosen photo
        apply_demo(row)
        st.session_state["_demo_applied"] = pick
    st.caption(f"What the demo shows: {row.get('note') or '-'}")
    path = DEMO_DIR / H.safe_name(pick)
    if path.parent != DEMO_DIR or not path.is_file():
        return None
    return path.read_bytes(), path.name, "demo"


def _num(col, label: str, key: str, *, default: float | None = None, min_value: float = 0.0, **kw):
    """A number input whose value lives in session state (so a demo photo can fill it without a warning)."""
    st.session_state.setdefault(key, default)
    return col.number_input(label, min_value=min_value, key=key, persist_state="page", **kw)


def coupon_and_settings() -> tuple[dict, Settings, object]:
    """Coupon fields, Settings and the chosen limit set from the widgets."""
    c1, c2, c3, c4 = st.columns(4)
    coupon = {
        "id": c1.text_input("Coupon id", key="c_id", persist_state="page", placeholder="stamped number, e.g. C-0417"),
        "welder": c2.text_input("Welder id", key="c_welder", persist_state="page"),
        "procedure": c3.text_input("Procedure (WPS)", key="c_procedure", persist_state="page"),
        "process": c4.text_input("Process", key="c_process", persist_state="page", placeholder="e.g. 135 or SMAW"),
        "position": c1.text_input("Position", key="c_position", persist_state="page", placeholder="e.g. PB / 2F"),
        "material": c2.text_input("Material", key="c_material", persist_state="page"),
    }
    test = c3.selectbox("Test", TEST_TYPES, format_func=TEST_NAMES.get, key="c_test", persist_state="page")
    sets = limit_sets_for(test)
    names = [s.name for s in sets]
    labels = {s.name: f"{s.title or s.name}" + ("" if s.kind == "preset" else "  (your own)") for s in sets}
    pick = c4.selectbox("Limit set", names, format_func=lambda n: labels.get(n, n), key=f"c_limits_{test}", persist_state="page")
    limit_set = next(s for s in sets if s.name == pick)
    nominal: dict = {}
    nominal["thickness_mm"] = _num(c1, "Plate / wall thickness t (mm)", "c_thickness", step=0.5)
    if test == "fillet-break":
        nominal["throat_mm"] = _num(c2, "Throat a (mm)", "c_throat", step=0.5)
    if test == "nick-break":
        nominal["wall_mm"] = _num(c2, "Pipe wall (mm)", "c_wall", step=0.5)
    bend_angle = former = None
    if test == "bend":
        bend_angle = _num(c2, "Bend angle (°)", "c_bend_angle", max_value=200.0, step=5.0)
        former = _num(c4, "Former diameter (mm)", "c_former", step=1.0)
    nominal["length_mm"] = _num(c3, "Length examined (mm, optional)", "c_length", step=5.0)
    nominal = {k: float(v) for k, v in nominal.items() if v not in (None, 0, 0.0)}
    with st.expander("Marker size and sensitivity"):
        a1, a2 = st.columns(2)
        marker_mm = _num(a1, "Printed marker side (mm)", "marker_mm", default=20.0, min_value=1.0,
                         max_value=1000.0, step=1.0,
                                    help="the black square of the card; the printed card's is 20 mm")
        min_size = a2.number_input("Smallest imperfection reported (mm)", min_value=0.05, max_value=20.0,
                                   value=0.3, step=0.05, key="min_size", persist_state="page")
    coupon.update({k: v for k, v in nominal.items()})
    coupon["test"] = test
    coupon = {k: (v.strip() if isinstance(v, str) else v) for k, v in coupon.items()}
    ppm = st.session_state.get("px_per_mm")
    settings = Settings(
        test=test, marker_mm=float(marker_mm), px_per_mm=float(ppm) if ppm else None,
        roi=None, min_size_mm=float(min_size), limits=limit_set.name, nominal=nominal,
        bend_angle_deg=float(bend_angle) if bend_angle else None,
        former_diameter_mm=float(former) if former else None,
    )
    return coupon, settings, limit_set


# =========================================================================== assess view


def view_assess() -> None:
    st.header("Assess a coupon")
    st.caption("Photograph the broken or bent face square-on with the printed card beside it, on the same "
               "plane. The page finds the scale, the face and the imperfections; you review and save.")
    with st.container(border=True, key="step_photo"):
        st.subheader("1 · Photo and coupon")
        picked = photo_input()
        coupon, settings, limit_set = coupon_and_settings()

    failure, bad_input = None, False
    hold = st.session_state.pop("_hold_current", False)  # a record was just opened: keep it shown
    if picked is not None:
        data, name, origin = picked
        try:
            failure = load_and_analyse(data, name, origin, coupon, settings, hold=hold)
        except SurfacesError as err:  # bad file: say so, keep earlier work
            bad_input = True
            st.error(f":material/error: {H.page_wording(str(err))}")

    w = S.current()
    if (failure or bad_input) and w is not None:
        st.caption(f"Below: the last photo that worked in this session ({w.name}). Your earlier work is kept.")
    left, right = st.columns([2, 3], gap="medium")
    with left:
        scale_panel(w, failure, picked is not None)
        if failure and failure[1] == "FaceError" and st.session_state.get("failed_photo"):
            sha, Wp, Hp = st.session_state["failed_photo"]
            with st.container(border=True, key="step_face_failed"):
                st.subheader("3 · Face region")
                st.error(f":material/error: {failure[0]}")
                st.markdown(f"Draw a rough box around the face in photo pixels (x to the right, y down from the "
                            f"top-left corner; this photo is {Wp} × {Hp}) and run again.")
                face_box_inputs(sha, Wp, Hp, (Wp * 0.25, Hp * 0.25, Wp * 0.75, Hp * 0.75), "failed")
    if w is None:
        if picked is None:
            with right:
                st.info("Choose a photo above to start. No card? Print one with `surfaces card --out card.pdf`.")
        return
    if picked is None or S.work_key(S.sha256(picked[0]), replace(
            settings, roi=st.session_state.get("roi", {}).get(S.sha256(picked[0])))) != w.key:
        # the shown work is an earlier one: judge it with its own test type
        shown_settings = replace(w.settings, limits=limit_set.name) if limit_set.applies_to(w.settings.test) \
            else w.settings
        if not limit_set.applies_to(w.settings.test):
            limit_set = L.load_limit_set(w.settings.limits or L.default_preset_for(w.settings.test))
    else:
        shown_settings = replace(settings, roi=w.settings.roi)
        w.coupon = coupon
    w.settings = shown_settings
    w.review.reviewer = st.session_state.get("reviewer") or ""
    auto = w.auto(shown_settings, limit_set)
    reviewed = R.reviewed_assessment(auto, w.review, limit_set)
    with left:
        face_panel(w, auto)
    with right:
        verdict_panel(w, auto, reviewed)
    pictures_panel(w, auto, reviewed)
    review_panel(w, auto)
    save_panel(w, auto, reviewed)


def load_and_analyse(data: bytes, name: str, origin: str, coupon: dict, settings: Settings, *,
                     hold: bool = False):
    """Make the input photo the current work (analysing it if new).

    Returns None, or (message, error class name) when the analysis failed.
    """
    H.check_upload(data, name)
    sha = S.sha256(data)

    roi = st.session_state.setdefault("roi", {}).get(sha)
    settings = replace(settings, roi=roi)
    key = S.work_key(sha, settings)
    ws = S.works()
    marker = (key, settings.key())
    if hold:
        st.session_state["last_input"] = marker
        return None
    if key in ws:
        if st.session_state.get("last_input") != marker:
            st.session_state["current"] = key
            st.session_state["last_input"] = marker
        ws[key].coupon = coupon
        return None
    failures = st.session_state.setdefault("failures", {})
    if key in failures:  # the same photo and settings failed before: say so again without re-running
        msg, kind, shape, cal = failures[key]
        st.session_state["failed_photo"], st.session_state["failed_cal"] = shape, cal
        st.session_state["last_input"] = marker
        return msg, kind
    photos = st.session_state.setdefault("photos", {})
    photo = photos.get(sha)
    if photo is None:
        photo = load_photo(data, name=name)
        photos.clear()  # keep one decoded photo: 12 MP is 48 MB of pixels
        photos[sha] = photo
    try:
        res = S.analyse(photo, settings)
    except SurfacesError as err:
        kind = type(err).__name__
        cal = _calibration_summary(photo, settings) if kind == "FaceError" else None
        shape = (sha, photo.width, photo.height)
        failures[key] = (H.page_wording(str(err)), kind, shape, cal)
        while len(failures) > 20:
            failures.pop(next(iter(failures)))
        return load_and_analyse(data, name, origin, coupon, settings)
    w = S.Work(key=key, name=name, sha256=sha, data=data, photo=photo, result=res,
               auto_base=res.assessment, settings=settings, coupon=coupon, origin=origin)
    S.add_work(w)
    st.session_state["last_input"] = marker
    return None


def scale_panel(w, failure, have_input: bool) -> None:
    with st.container(border=True, key="step_scale"):
        st.subheader("2 · Scale")
        failed_cal = st.session_state.get("failed_cal") if failure and failure[1] == "FaceError" else None
        if failure and failure[1] == "FaceError" and not failed_cal:
            st.info("The scale is measured together with the face: see 3 · Face region below.")
        elif failure and not failed_cal:
            st.error(f":material/error: {failure[0]}")
            if failure[1] == "CalibrationError":
                st.markdown("**What to check before retaking:**\n" + "\n".join(f"- {h}" for h in H.NO_MARKER_HINTS))
        elif failed_cal or w is not None:
            cal = failed_cal or w.auto_base.get("calibration") or {}
            if failed_cal:
                st.caption("Scale of the new photo (at its centre); its face is not found yet: see 3 · Face region.")
            calibration_metrics(cal)
        if have_input or w is not None:
            st.number_input("Scale typed by hand (photo pixels per mm), only when the photo has no marker",
                            min_value=0.0, value=None, step=0.1, key="px_per_mm", persist_state="page",
                            help="Measure a known length in the photo (e.g. a ruler) in pixels and divide by "
                                 "its millimetres. No perspective correction is made.")


def calibration_metrics(cal: dict) -> None:
    """Marker found or not, scale, tilt, uncertainty; the core's warnings and the page's hints."""
    markers = cal.get("markers") or []
    c = [*st.columns(2), *st.columns(2)]
    if cal.get("method") in ("marker", "markers") and markers:
        m = markers[0]
        c[0].metric("Reference marker", "found" if len(markers) == 1 else f"{len(markers)} found",
                    f"id {m.get('id')}, {m.get('side_px', 0):.0f} px across", delta_color="off", delta_arrow="off")
    else:
        c[0].metric("Reference marker", "not used", f"scale: {cal.get('method')}", delta_color="off",
                    delta_arrow="off")
    c[1].metric("Scale at the face (px/mm)", f"{cal.get('px_per_mm', float('nan')):.2f}")
    tilt = cal.get("tilt_deg")
    c[2].metric("Camera tilt", "unknown" if tilt is None else f"{tilt:.0f}°")
    c[3].metric("Scale uncertainty (1σ)", f"± {cal.get('uncertainty_pct', float('nan')):.2f} %")
    for warning in cal.get("warnings") or []:
        st.warning(f":material/warning: {warning}")
    for hint in H.calibration_hints(cal):
        st.info(f":material/lightbulb: {hint}")


def _calibration_summary(photo, settings: Settings) -> dict | None:
    """The calibration of a photo whose face was not found (the pipeline stops before reporting it)."""
    from surfaces.calibrate import calibrate

    try:
        cal = calibrate(photo, marker_mm=settings.marker_mm, px_per_mm=settings.px_per_mm, ruler=settings.ruler)
    except SurfacesError:
        return None
    return {"method": cal.method, "px_per_mm": cal.px_per_mm_at((photo.width - 1) / 2, (photo.height - 1) / 2),
            "uncertainty_pct": cal.uncertainty_pct, "tilt_deg": cal.tilt_deg, "warnings": list(cal.warnings),
            "markers": [{"id": m.marker_id, "side_px": m.side_px, "module_px": m.module_px} for m in cal.markers]}


def face_panel(w, auto: dict) -> None:
    face = auto.get("face") or {}
    with st.container(border=True, key="step_face"):
        st.subheader("3 · Face region")
        st.markdown(f"Face found: **{face.get('length_mm', 0):.1f} mm** along the weld × "
                    f"**{face.get('width_mm', 0):.1f} mm** across ({face.get('method')}); root side: "
                    f"{face.get('root_side', 'unknown')}.")
        for warning in face.get("warnings") or []:
            st.warning(f":material/warning: {warning}")
        poly = np.asarray(face.get("polygon_px") or [[0, 0]], dtype=float)
        if w.photo is None or w.result is None:
            return
        with st.expander("Adjust the face region (a box in photo pixels) and run again"):
            face_box_inputs(w.sha256, w.photo.width, w.photo.height, (*poly.min(axis=0), *poly.max(axis=0)), w.key)


def face_box_inputs(sha: str, Wp: int, Hp: int, box, key: str) -> None:
    """Four numbers for a face box (photo px) and the buttons to run again with it or without it."""
    cols = [*st.columns(2), *st.columns(2)]
    vals = []
    for col, lab, v, hi in zip(cols, ("left x", "top y", "right x", "bottom y"), box, (Wp, Hp, Wp, Hp)):
        vals.append(col.number_input(f"Face box {lab} (px)", min_value=0, max_value=int(hi),
                                     value=int(round(min(max(float(v), 0), hi))), step=10,
                                     key=f"roi_{lab}_{key}"))
    if st.button("Run again with this box", key=f"roi_run_{key}", icon=":material/crop:"):
        bx0, by0, bx1, by1 = vals
        if bx1 <= bx0 or by1 <= by0:
            st.error("The box needs left < right and top < bottom: check the four numbers.")
        else:
            st.session_state.setdefault("roi", {})[sha] = tuple(float(v) for v in vals)
            st.session_state.pop("last_input", None)
            st.rerun()
    if st.button("Back to the automatic outline", key=f"roi_auto_{key}",
                 disabled=st.session_state.get("roi", {}).get(sha) is None):
        st.session_state["roi"].pop(sha, None)
        st.session_state.pop("last_input", None)
        st.rerun()


def _overlay(w, reviewed: dict):
    """The core's overlay of the reviewed assessment (drawn again only when the review changes)."""
    sig = json.dumps([(r.get("id"), r.get("kind"), r.get("status"), r.get("greatest_mm"))
                      for r in reviewed.get("imperfections") or []] + [reviewed["verdict"]["result"]],
                     default=str)
    cache = w._judged.setdefault("_overlay", {})
    if cache.get("sig") != sig:
        img = report.render_overlay(w.photo.rgb, reviewed, max_side=H.SHOW_PX)
        cache.clear()
        cache.update(sig=sig, jpeg=H.encode_jpeg(H.fit_width(img, max_w=H.SHOW_PX)))
    return cache


def verdict_panel(w, auto: dict, reviewed: dict) -> None:
    with st.container(border=True, key="step_result"):
        st.subheader("4 · Result")
        if w.review.touched:
            verdict_banner(reviewed["verdict"], title="After your review", key="verdict")
            verdict_banner(auto["verdict"], title="Automatic result (kept in the record)", big=False,
                           key="verdict_auto")
        else:
            verdict_banner(auto["verdict"], title="Automatic result (not yet reviewed)", key="verdict")
        shown = set((auto.get("calibration") or {}).get("warnings") or []) | set(
            (auto.get("face") or {}).get("warnings") or [])
        for warning in auto.get("warnings") or []:
            if warning not in shown:
                st.warning(f":material/warning: {warning}")
        cautions_box(auto)


def pictures_panel(w, auto: dict, reviewed: dict) -> None:
    rows = reviewed.get("imperfections") or []
    with st.container(border=True, key="step_pictures"):
        st.subheader("Pictures and measurements")
        if w.photo is not None:
            tab_photo, tab_face = st.tabs(["Photo with numbered outlines", "Rectified face"])
            with tab_photo:
                opts = ["the face", "the whole photo"] + [
                    f"{r['id']} · {KIND_NAMES.get(r['kind'], r['kind'])}" for r in rows]
                z1, z2 = st.columns([3, 2])
                pick = z1.selectbox("Zoom on", opts, key=f"zoom_on_{w.key}")
                zoom = z2.slider("Zoom", 1, 12, 4, key=f"zoom_{w.key}", disabled=pick in opts[:2])
                if pick == opts[1]:
                    st.image(_overlay(w, reviewed)["jpeg"], caption=f"{w.name}: outlines numbered as in the table",
                             width="stretch", output_format="JPEG")
                else:
                    if pick == opts[0]:
                        poly = np.asarray((auto.get("face") or {}).get("polygon_px") or [[0, 0], [w.photo.width,
                                                                                                w.photo.height]])
                        bbox, z, what = [*poly.min(axis=0), *poly.max(axis=0)], None, "the face"
                    else:
                        row = rows[opts.index(pick) - 2]
                        bbox = row.get("bbox_px") or (list(row.get("centroid_px")) * 2)
                        z = zoom
                        what = (f"imperfection {row['id']} ({KIND_NAMES.get(row['kind'], row['kind'])}, "
                                f"{H.fmt_pm(row.get('greatest_mm'), row.get('greatest_u_mm'))} mm)")
                    box = (H.margin_box(bbox, (w.photo.width, w.photo.height)) if z is None
                           else H.zoom_box(bbox, (w.photo.width, w.photo.height), zoom=z))
                    view = _zoomed(w, reviewed, box)
                    st.image(view, caption=f"{what}; photo pixels x {box[0]}..{box[2]}, y {box[1]}..{box[3]}",
                             width="stretch", output_format="JPEG")
            with tab_face:
                if w.result is not None:
                    st.image(_face_picture(w, auto, rows),
                             caption="the face rectified to its own axes (along the weld → right); "
                                     "boxes numbered as in the table, dismissed ones in brackets",
                             width="stretch", output_format="JPEG")
                else:
                    st.info("The rectified face is not kept in the records; run the photo again to see it.")
        st.markdown(f"**Imperfections:** {sum(r.get('status') != 'dismissed' for r in rows)} judged, "
                    f"{sum(r.get('status') == 'dismissed' for r in rows)} dismissed. Sizes in mm on the face "
                    "plane, ± one standard uncertainty; a number with m was added by the inspector.")
        st.dataframe(imperfection_frame(rows), hide_index=True, width="stretch", key=f"table_{w.key}",
                     column_config={"review": st.column_config.TextColumn(width="medium"),
                                    "kind": st.column_config.TextColumn(width="medium")})


def _face_picture(w, auto: dict, rows: list[dict]) -> bytes:
    """JPEG of the rectified face with numbered boxes (drawn again only when the list changes)."""
    sig = json.dumps([(r.get("id"), r.get("kind"), r.get("status"), r.get("x0_mm"), r.get("x1_mm"))
                      for r in rows], default=str)
    cache = w._judged.setdefault("_face", {})
    if cache.get("sig") != sig:
        face = auto.get("face") or {}
        img = H.face_with_boxes(w.result.face.image, rows, px_per_mm=face.get("px_per_mm", 16),
                                length_mm=face.get("length_mm", 1), width_mm=face.get("width_mm", 1),
                                styles=report.KIND_STYLES)
        cache.clear()
        cache.update(sig=sig, jpeg=H.encode_jpeg(H.fit_width(img, max_w=H.SHOW_PX, min_h=240)))
    return cache["jpeg"]


def _zoomed(w, reviewed: dict, box) -> bytes:
    """JPEG of the core's overlay drawn on the enlarged crop ``box`` (kept until the review or box changes)."""
    sig = json.dumps([box, [(r.get("id"), r.get("kind"), r.get("status"), r.get("greatest_mm"))
                            for r in reviewed.get("imperfections") or []], reviewed["verdict"]["result"]],
                     default=str)
    cache = w._judged.setdefault("_zoom", {})
    if cache.get("sig") != sig:
        img = H.zoom_view(w.photo.rgb, reviewed, box, render=report.render_overlay, long_side=H.SHOW_PX)
        cache.clear()
        cache.update(sig=sig, jpeg=H.encode_jpeg(img))
    return cache["jpeg"]


def imperfection_frame(rows: list[dict]) -> pd.DataFrame:
    out = []
    for r in rows:
        out.append({
            "#": f"{r.get('id')}{'m' if r.get('source') == 'manual' else ''}",
            "kind": KIND_NAMES.get(r.get("kind"), r.get("kind")),
            "ISO 6520-1": r.get("iso6520"),
            "greatest (mm)": H.fmt_pm(r.get("greatest_mm"), r.get("greatest_u_mm")),
            "width (mm)": H.fmt_pm(r.get("width_mm"), r.get("width_u_mm")),
            "along weld (mm)": H.fmt_pm(r.get("along_mm"), r.get("along_u_mm")),
            "across (mm)": H.fmt_pm(r.get("across_mm"), r.get("across_u_mm")),
            "area (mm²)": H.fmt_pm(r.get("area_mm2"), r.get("area_u_mm2")),
            "confidence": None if r.get("confidence") is None else round(float(r["confidence"]), 2),
            "at edge/root": ", ".join(k for k in ("edge", "root") if r.get(f"at_{k}")) or "-",
            "review": {"auto": "as found", "confirmed": "confirmed", "dismissed": "DISMISSED",
                       "edited": "edited"}.get(r.get("status"), r.get("status")),
        })
    cols = ["#", "kind", "review", "greatest (mm)", "width (mm)", "along weld (mm)", "across (mm)",
            "area (mm²)", "confidence", "at edge/root", "ISO 6520-1"]
    return pd.DataFrame(out, columns=cols)


# --------------------------------------------------------------------------- review


def _on_decision(w, rid: int, wkey: str) -> None:
    w.review.edit(rid).decision = st.session_state[wkey]


def _on_kind(w, rid: int, wkey: str, found: str) -> None:
    v = st.session_state[wkey]
    w.review.edit(rid).kind = None if v == found else v


def _on_size(w, rid: int, wkey: str, attr: str, measured) -> None:
    v = st.session_state[wkey]
    same = v is None or (measured is not None and math.isfinite(float(measured)) and abs(v - float(measured)) < 5e-3)
    setattr(w.review.edit(rid), attr, None if same else float(v))


def _on_text(w, attr: str, wkey: str) -> None:
    setattr(w.review, attr, st.session_state[wkey] or "")


_REVIEW_COLS = [2.6, 3.0, 1.7, 1.1, 1.1]


def review_panel(w, auto: dict) -> None:
    rows = auto.get("imperfections") or []
    with st.container(border=True, key="step_review"):
        st.subheader("5 · Your review")
        st.caption("Confirm or dismiss each detection, change its kind or sizes, and add what the tool missed. "
                   "The verdict above is judged again at once from your list; the automatic result is kept.")
        if rows:
            head = st.columns(_REVIEW_COLS)
            for col, text in zip(head, ("imperfection", "decision", "kind", "greatest (mm)", "width (mm)")):
                col.markdown(f"**{text}**")
        for r in rows:
            rid = int(r["id"])
            e = w.review.edits.get(rid) or R.Edit()
            with st.container(key=f"rv_row_{rid}"):
                c = st.columns(_REVIEW_COLS, vertical_alignment="center")
                alt, alt_p = str(r.get("kind_alt") or ""), r.get("kind_alt_p")
                doubt = (f" · may be {KIND_NAMES.get(alt, alt)} ({float(alt_p):.2f})"
                         if alt in KIND_NAMES and alt_p is not None and math.isfinite(float(alt_p))
                         and float(alt_p) >= L.KIND_DOUBT_P else "")
                c[0].markdown(f"**{rid}** · {KIND_NAMES.get(r['kind'], r['kind'])} · "
                              f"{H.fmt_pm(r.get('greatest_mm'), r.get('greatest_u_mm'))} mm · "
                              f"confidence {float(r.get('confidence') or 0):.2f}{doubt}")
                k = f"rv_{w.key}_{rid}_dec"
                c[1].radio(f"Decision on imperfection {rid}", R.DECISIONS, index=R.DECISIONS.index(e.decision),
                           horizontal=True, key=k, label_visibility="collapsed",
                           on_change=_on_decision, args=(w, rid, k))
                k = f"rv_{w.key}_{rid}_kind"
                c[2].selectbox(f"Kind of imperfection {rid}", KINDS, index=KINDS.index(e.kind or r["kind"]),
                               format_func=KIND_NAMES.get, key=k, label_visibility="collapsed",
                               on_change=_on_kind, args=(w, rid, k, r["kind"]))
                for col, attr, col_name in ((c[3], "greatest_mm", "greatest_mm"), (c[4], "width_mm", "width_mm")):
                    k = f"rv_{w.key}_{rid}_{attr}"
                    measured = r.get(col_name)
                    value = getattr(e, attr) if getattr(e, attr) is not None else measured
                    col.number_input(f"{attr.replace('_mm', '').replace('_', ' ')} of imperfection {rid} (mm)",
                                     min_value=0.0, value=None if value is None else round(float(value), 2),
                                     step=0.05, format="%.2f", key=k, label_visibility="collapsed",
                                     on_change=_on_size, args=(w, rid, k, attr, measured))
        if not rows:
            st.markdown("The tool found no imperfection on this face.")
        for m in list(w.review.manual):
            c = st.columns([6, 1])
            c[0].markdown(f"**{m['id']}m** · {KIND_NAMES[m['kind']]} added by you · "
                          f"{m['along_mm']:.2f} × {m['across_mm']:.2f} mm at x {m['cx_mm']:.1f}, y {m['cy_mm']:.1f} mm")
            if c[1].button("Remove", key=f"rm_{w.key}_{m['id']}"):
                w.review.manual = [x for x in w.review.manual if x["id"] != m["id"]]
                st.rerun()
        face = auto.get("face") or {}
        with st.expander("Add an imperfection the tool missed"):
            st.caption("Give its centre in face millimetres (x along the weld from the face start, y across "
                       "from the edge drawn at the top of the rectified face) and its size; the outline is "
                       "an ellipse with those axes.")
            with st.form(key=f"add_{w.key}", clear_on_submit=False, border=False):
                f = st.columns(5)
                kind = f[0].selectbox("Kind", KINDS, format_func=KIND_NAMES.get, key=f"add_kind_{w.key}")
                x = f[1].number_input("Centre x (mm)", min_value=0.0,
                                      max_value=float(max(face.get("length_mm") or 0, 0.1)),
                                      value=round(float(face.get("length_mm") or 0) / 2, 1), key=f"add_x_{w.key}")
                y = f[2].number_input("Centre y (mm)", min_value=0.0,
                                      max_value=float(max(face.get("width_mm") or 0, 0.1)),
                                      value=round(float(face.get("width_mm") or 0) / 2, 1), key=f"add_y_{w.key}")
                a = f[3].number_input("Length along (mm)", min_value=0.01, value=1.0, step=0.1, key=f"add_a_{w.key}")
                b = f[4].number_input("Height across (mm)", min_value=0.01, value=1.0, step=0.1,
                                      key=f"add_b_{w.key}")
                if st.form_submit_button("Add this imperfection", icon=":material/add:"):
                    try:
                        rec = R.manual_record(auto, kind=kind, x_mm=x, y_mm=y, along_mm=a, across_mm=b,
                                              rid=R.next_manual_id(rows, w.review))
                    except SurfacesError as err:
                        st.error(str(err))
                    else:
                        w.review.manual.append(rec)
                        st.rerun()
        k1, k2 = st.columns([1, 2])
        k1.text_input("Reviewed by (your name)", key="reviewer", persist_state="page")
        k = f"note_{w.key}"
        k2.text_area("Review note", value=w.review.note, key=k, height=80, on_change=_on_text, args=(w, "note", k))


# --------------------------------------------------------------------------- save and export


def _review_fingerprint(reviewed: dict) -> str:
    rv = dict(reviewed.get("review") or {})
    rv.pop("reviewed_at", None)
    return json.dumps([reviewed.get("imperfections"), reviewed.get("verdict"), rv], sort_keys=True, default=str)


def _save(w, auto: dict, reviewed: dict) -> None:
    reviewer = w.review.reviewer.strip()
    coupon = {k: v for k, v in w.coupon.items() if v not in (None, "")}
    if not coupon.get("id"):
        coupon = None
    if w.data is None:
        flash("error", "This photo is no longer in memory (older than the last "
                       f"{S.MAX_WORKS} photos of the session): load it again to save it.")
        return
    try:
        with S.store() as s:
            if w.saved_id is None:
                w.saved_id = s.save_assessment(auto, w.data, coupon=coupon, actor=reviewer or "page user")
            if w.review.touched or reviewer:
                if not reviewer:
                    raise SurfacesError("enter your name under 'Reviewed by' to save your review")
                s.save_review(w.saved_id, reviewed, reviewer=reviewer, note=w.review.note.strip() or None)
                w.saved_review = _review_fingerprint(reviewed)
    except SurfacesError as err:
        flash("error", f"Not saved: {err}")
        return
    what = "with your review" if w.saved_review else "automatic result only"
    flash("success", f"Saved as assessment {w.saved_id} ({what}) in {S.db_path()}"
                     + ("" if coupon else ". No coupon id was given: enter one to file it under the coupon."))


def save_panel(w, auto: dict, reviewed: dict) -> None:
    with st.container(border=True, key="step_save"):
        st.subheader("6 · Save and export")
        show_flashes()
        reviewing = w.review.touched or bool(w.review.reviewer.strip())
        unsaved = w.saved_id is None or (reviewing and w.saved_review != _review_fingerprint(reviewed))
        if w.saved_id is not None:
            st.markdown(f"Record: assessment **{w.saved_id}**" + (" — your latest changes are not saved yet."
                                                                if unsaved else " — saved."))
        st.button("Save to the records" if w.saved_id is None else "Save the review again",
                  key="save", type="primary", icon=":material/save:", disabled=not unsaved,
                  on_click=_save, args=(w, auto, reviewed))
        base = H.stem(w.coupon.get("id") or w.name)
        photo_rgb = w.photo.rgb if w.photo is not None else None
        face_rgb = w.result.face.image if w.result is not None else None
        reviewer = w.review.reviewer.strip() or None
        coupon = {k: v for k, v in w.coupon.items() if v not in (None, "")}
        c = st.columns(3)
        if photo_rgb is not None:
            c[0].download_button(
                "Report (PDF)", data=lambda: report.coupon_pdf(reviewed, photo_rgb, face_rgb=face_rgb,
                                                               reviewer=reviewer, coupon=coupon),
                file_name=f"{base}-report.pdf", mime="application/pdf", key="dl_pdf", icon=":material/download:",
                on_click="ignore")
        c[1].download_button("Assessment (JSON)", data=lambda: report.dumps_json(reviewed),
                             file_name=f"{base}-assessment.json", mime="application/json", key="dl_json",
                             icon=":material/download:", on_click="ignore")
        c[2].download_button("Imperfection table (CSV)", data=lambda: report.table_csv(reviewed),
                             file_name=f"{base}-imperfections.csv", mime="text/csv", key="dl_csv",
                             icon=":material/download:", on_click="ignore")


# =========================================================================== other views


def view_limits() -> None:
    st.header("Limit sets")
    st.caption("The acceptance limits the verdict is judged against. Presets come with the tool; copy one, "
               "edit it and save it as your own. Check every value against the edition of the code in force.")
    sets = presets() + L.list_user_sets()
    names = [s.name for s in sets]
    pick = st.selectbox("Limit set", names, key="ls_pick",
                        format_func=lambda n: next(f"{s.title or s.name} ({s.name}, {s.kind})"
                                                   for s in sets if s.name == n))
    ls = next(s for s in sets if s.name == pick)
    st.markdown(f"**{_md(ls.title or ls.name)}** · version {_md(ls.version)} · for "
                f"{', '.join(TEST_NAMES.get(t, t) for t in ls.tests)}")
    st.markdown(f"Source: {_md(ls.source or 'not given')}" + (f", {_md(ls.clause)}" if ls.clause else "")
                + (f" · edition: {_md(ls.edition)}" if ls.edition else ""))
    if ls.note:
        st.info(ls.note)
    st.dataframe(pd.DataFrame([{
        "rule": r.id, "applies to": ", ".join(r.kinds), "check": r.check, "limit": r.limit_label(),
        "clause": r.clause, "confidence": r.confidence, "if broken": r.outcome, "note": r.note,
    } for r in ls.rules]), hide_index=True, width="stretch", key="ls_rules")
    st.caption("Confidence: 'found' = checked against a published copy; 'memory' = recalled, not checked; "
               "'added' = our own addition; 'user' = your own value.")
    st.subheader("Copy and edit")
    key = f"ls_text_{ls.name}"
    text = st.text_area("The set as TOML (edit it, then check it)", value=L.to_toml(ls) if not ls.text else ls.text,
                        height=360, key=key)
    new_name = st.text_input("Name of your copy", value=f"{ls.name}-mine" if ls.kind == "preset" else ls.name,
                             key="ls_new_name")
    c1, c2 = st.columns(2)
    check = c1.button("Check the text", key="ls_check", icon=":material/fact_check:")
    save = c2.button("Save as my own set", key="ls_save", icon=":material/save:")
    if check or save:
        try:
            parsed = L.parse_limit_set(text, origin="the text above")
        except SurfacesError as err:
            st.error(f":material/error: {err}")
            return
        st.success(f"The text is a valid limit set with {len(parsed.rules)} rule(s).")
        if save:
            try:
                path = L.save_user_set(parsed, H.safe_name(new_name, default="my-limits"),
                                       force=ls.kind == "user" and new_name == ls.name)
            except SurfacesError as err:
                st.error(f":material/error: {err}")
            else:
                st.success(f"Saved as '{H.safe_name(new_name)}' in {path}. It now appears in the limit-set "
                           "choice of the assessment.")


def view_histories() -> None:
    st.header("Welder histories")
    try:
        with S.store() as s:
            hist = s.history()
    except SurfacesError as err:
        st.error(f":material/error: {err}")
        return
    st.caption(f"Records: {S.db_path()}")
    if hist.empty:
        st.info("No saved assessments yet. Save one from 'Assess a coupon', or load the demo shop's "
                "coupons (invented welders, synthetic photos) into these records.")
        if demo_rows() and st.button("Load the demo coupons", key="load_demo", icon=":material/download:"):
            from surfaces.demo import ensure_demo

            bar = st.progress(0.0, text="assessing the demo photos")
            summary = ensure_demo(S.db_path(), progress=lambda done, total, cid: bar.progress(
                min(done / max(total, 1), 1.0), text=f"{done}/{total} {cid or ''}"))
            if summary is not None:
                flash("success", f"Loaded {len(summary.added)} demo coupon(s) with {len(summary.reviews)} "
                                 "review(s) into the records.", where="page")
                for m in summary.mismatches:
                    flash("warning", f"Demo: {m}", where="page")
            st.rerun()
        return
    welders = sorted(w for w in hist["welder"].dropna().unique() if w)
    tab_w, tab_g = st.tabs(["Per welder", "Reject rates by batch, procedure, position"])
    with tab_w:
        if not welders:
            st.info("No saved assessment names a welder yet.")
        else:
            who = st.selectbox("Welder", welders, key="hist_welder")
            h = hist[hist["welder"] == who].sort_values("assessment_id")
            n = len(h)
            c = st.columns(4)
            c[0].metric("Attempts", n)
            for col, res in zip(c[1:], ("accept", "reject", "review")):
                col.metric(H.VERDICT_LOOK[res][0], int((h["result"] == res).sum()))
            st.dataframe(h[["assessment_id", "created_at", "coupon_id", "test", "procedure", "position", "result",
                            "automatic_result", "first_reason", "n_imperfections", "reviewer"]]
                         .rename(columns={"result": "verdict", "automatic_result": "automatic verdict",
                                          "n_imperfections": "imperfections judged"})
                         .assign(verdict=lambda d: d["verdict"].str.upper(),
                                 **{"automatic verdict": lambda d: d["automatic verdict"].str.upper()}),
                         hide_index=True, width="stretch", key="hist_table")
            st.markdown("**Attempts in order:** " + " → ".join(
                f"{_verdict_word(r)} ({_md(c or '-')})" for r, c in zip(h["result"], h["coupon_id"])))
            kinds = _kind_counts(h["assessment_id"].tolist())
            if kinds:
                st.markdown("**Most common imperfections** (judged, all attempts): "
                            + ", ".join(f"{KIND_NAMES.get(k, k)} × {v}" for k, v in kinds))
            if n >= 2:
                trend = pd.DataFrame({"attempt": list(range(1, n + 1)),
                                      "imperfections judged": h["n_imperfections"].astype(int).tolist()})
                st.markdown("**Imperfections judged per attempt**")
                st.bar_chart(trend, x="attempt", y="imperfections judged", x_label="attempt", y_label="count",
                             height=220)
            pick = st.selectbox("Open an attempt for review", h["assessment_id"].tolist()[::-1], key="hist_open")
            st.button("Open it", key="hist_open_btn", on_click=_open_cb, args=(int(pick),))
    with tab_g:
        by = st.multiselect("Group by", ["batch", "procedure", "position", "process", "material", "welder", "test"],
                            default=["batch", "procedure", "position"], key="stats_by")
        try:
            with S.store() as s:
                stats = s.stats(by=by)
        except SurfacesError as err:
            st.error(f":material/error: {err}")
            return
        if not stats.empty:
            stats = stats.assign(reject_rate=(stats["reject_rate"] * 100).round(1)).rename(
                columns={"reject_rate": "reject rate (%)", "top_reasons": "most frequent reasons"})
        st.dataframe(stats, hide_index=True, width="stretch", key="stats_table")


def _verdict_word(result: str) -> str:
    word, icon, _, _ = H.VERDICT_LOOK.get(str(result), H.VERDICT_LOOK["review"])
    return f"{icon} {word}"


def _kind_counts(ids: list[int]) -> list[tuple[str, int]]:
    from collections import Counter

    counts: Counter[str] = Counter()
    with S.store() as s:
        for aid in ids:
            for r in s.get_assessment(int(aid)).get("imperfections") or []:
                if r.get("status") != "dismissed":
                    counts[str(r.get("kind"))] += 1
    return counts.most_common()


def open_record(aid: int) -> None:
    """Make a saved assessment the current work (photo from the store, review rebuilt from its list)."""
    with S.store() as s:
        a = s.get_assessment(aid)
        data = s.photo_bytes(a["photo"]["sha256"])
    rec = a.pop("record")
    auto_rows = a.pop("automatic_imperfections")
    auto = dict(a, imperfections=auto_rows, verdict=rec.get("automatic_verdict") or a.get("verdict"))
    auto.pop("review", None)
    review = R.Review(note=rec.get("review_note") or "")
    by_id = {int(r["id"]): r for r in auto_rows}
    for r in rec.get("reviewed_imperfections") or []:
        if r.get("source") == "manual" and int(r["id"]) not in by_id:
            review.manual.append(r)
            continue
        old = by_id.get(int(r["id"]))
        if old is None:
            continue
        e = R.Edit(decision={"dismissed": "dismiss", "confirmed": "confirm"}.get(r.get("status"), "as found"))
        if r.get("kind") != old.get("kind"):
            e.kind = r.get("kind")
        for attr in ("greatest_mm", "width_mm"):
            if r.get(attr) is not None and old.get(attr) is not None and abs(r[attr] - old[attr]) > 5e-3:
                setattr(e, attr, float(r[attr]))
        if e != R.Edit():
            review.edits[int(r["id"])] = e
    settings = Settings(**{k: (tuple(v) if isinstance(v, list) else v)
                           for k, v in (a.get("settings") or {}).items() if k in Settings.__dataclass_fields__})
    photo = load_photo(data, name=a["photo"].get("name") or "photo")
    coupon = dict(rec.get("coupon") or {})
    w = S.Work(key=f"record-{aid}", name=f"record {aid}: {a['photo'].get('name')}", sha256=photo.sha256,
               data=data, photo=photo, result=None, auto_base=auto, settings=settings, coupon=coupon,
               review=review, saved_id=aid, origin="record")
    w.saved_review = None
    S.add_work(w)
    st.session_state["view"] = VIEWS[0]
    st.session_state["_hold_current"] = True  # the photo input below must not take over at once


def _open_cb(aid: int) -> None:
    try:
        open_record(aid)
    except SurfacesError as err:
        flash("error", f"Cannot open assessment {aid}: {err}", where="page")


def run_uploaded_batch(ups, *, test: str, limits: str, batch: str, common: dict) -> pd.DataFrame:
    """Write the uploads (sanitised names) and a manifest to a temporary folder and run the core's batch."""
    import csv
    import os
    import tempfile

    from surfaces.batch import MANIFEST_COLUMNS, run_batch

    with tempfile.TemporaryDirectory(prefix="surfaces-batch-") as tmp:
        folder = Path(tmp)
        used, names, refused = set(), [], []
        for up in ups:
            name = H.safe_name(up.name)
            stem_, suffix = Path(name).stem, Path(name).suffix
            k = 1
            while name.lower() in used:
                k += 1
                name = f"{stem_}-{k}{suffix}"
            data = up.getvalue()
            try:
                H.check_upload(data, name)
            except SurfacesError as err:
                refused.append({"photo": name, "status": "error", "error": str(err)})
                continue
            used.add(name.lower())
            names.append(name)
            (folder / name).write_bytes(data)
        with open(folder / "manifest.csv", "w", newline="", encoding="utf-8") as fh:
            wr = csv.DictWriter(fh, fieldnames=list(MANIFEST_COLUMNS))
            wr.writeheader()
            for name in names:
                wr.writerow({"photo": name, "coupon_id": H.stem(name),
                             **{k: v for k, v in common.items() if k in MANIFEST_COLUMNS and v}})
        bar = st.progress(0.0, text=f"0 of {len(names)} photos")

        def say(done: int, total: int, row: dict) -> None:
            bar.progress(min(done / max(total, 1), 1.0), text=f"{done} of {total}: {row.get('photo', '')}")

        df = run_batch(folder, settings=Settings(test=test, limits=limits), db=S.db_path(),
                       manifest=folder / "manifest.csv", workers=max(1, min(2, os.cpu_count() or 1)),
                       progress=say, batch=batch or None, actor="page batch")
        bar.progress(1.0, text=f"done: {len(names)} photo(s)")
    if refused:
        df = pd.concat([df, pd.DataFrame(refused)], ignore_index=True)
    if "error" in df:
        df["error"] = df["error"].map(lambda e: H.page_wording(e) if isinstance(e, str) else e)
    return df


def view_batch() -> None:
    st.header("Batch of photos")
    st.caption("Assess many photos with the same coupon details; every result is saved to the records "
               "(automatic result, to be reviewed). Open any of them for review afterwards.")
    ups = st.file_uploader("Photos", type=list(H.PHOTO_TYPES), accept_multiple_files=True, key="batch_upload",
                           max_upload_size=H.MAX_UPLOAD_MB)
    c1, c2, c3 = st.columns(3)
    test = c1.selectbox("Test", TEST_TYPES, format_func=TEST_NAMES.get, key="b_test")
    sets = limit_sets_for(test)
    pick = c2.selectbox("Limit set", [s.name for s in sets], key=f"b_limits_{test}")
    batch_id = c3.text_input("Batch name", key="b_batch", placeholder="e.g. 2026-W48 qualification")
    welder = c1.text_input("Welder id (all photos)", key="b_welder")
    procedure = c2.text_input("Procedure (all photos)", key="b_procedure")
    position = c3.text_input("Position (all photos)", key="b_position")
    st.caption("Each photo's coupon id is taken from its file name (without the suffix).")
    if st.button("Assess and save all", key="b_run", type="primary", disabled=not ups, icon=":material/play_arrow:"):
        st.session_state["batch_rows"] = run_uploaded_batch(ups, test=test, limits=pick, batch=batch_id,
                                                            common={"welder": welder, "procedure": procedure,
                                                                    "position": position})
    df = st.session_state.get("batch_rows")
    if df is not None and len(df):
        c = st.columns(4)
        for col, res in zip(c, ("accept", "reject", "review")):
            col.metric(H.VERDICT_LOOK[res][0], int((df["result"] == res).sum()))
        c[3].metric("Could not be assessed", int((df["status"] == "error").sum()))
        st.dataframe(df.assign(result=df["result"].fillna("").str.upper()), hide_index=True,
                     width="stretch", key="batch_table")
        d1, d2 = st.columns(2)
        d1.download_button("Summary (CSV)", data=report.batch_csv(df), file_name="batch-summary.csv",
                           mime="text/csv", key="b_csv", on_click="ignore")
        d2.download_button("Summary (PDF)", data=lambda: report.batch_pdf(df), file_name="batch-summary.pdf",
                           mime="application/pdf", key="b_pdf", on_click="ignore")
        ids = [int(a) for a in df["assessment_id"].dropna()]
        if ids:
            pick = st.selectbox("Open a coupon for review", ids, key="b_open",
                                format_func=lambda a: f"assessment {a}: "
                                + str(df.loc[df['assessment_id'] == a, 'photo'].iloc[0]))
            st.button("Open it", key="b_open_btn", on_click=_open_cb, args=(int(pick),))


# =========================================================================== page


def sidebar() -> str:
    with st.sidebar:
        st.markdown("## surfaces")
        st.caption("Weld test faces measured from a photo beside the printed reference card.")
        view = st.radio("Go to", VIEWS, key="view")
        ws = S.works()
        if len(ws) > 1:
            keys = list(ws)[::-1]
            cur = st.session_state.get("current")
            wkey = f"pick_work_{cur}"  # a new widget whenever the shown photo changes elsewhere
            st.radio("Photos in this session", keys, index=keys.index(cur) if cur in keys else 0,
                     format_func=lambda k: ws[k].name + (f" (record {ws[k].saved_id})" if ws[k].saved_id else ""),
                     key=wkey, on_change=lambda: st.session_state.update(current=st.session_state[wkey]))
        st.divider()
        st.caption(f"Records: `{S.db_path()}`")
        st.caption("This page runs on this computer only (127.0.0.1).")
    return view


def main() -> None:
    import os
    import time

    t0 = time.perf_counter()
    st.set_page_config(page_title="surfaces · weld test faces", page_icon=":material/straighten:", layout="wide")
    view = sidebar()
    show_flashes("page")
    try:
        {VIEWS[0]: view_assess, VIEWS[1]: view_batch, VIEWS[2]: view_histories, VIEWS[3]: view_limits}[view]()
    except SurfacesError as err:
        st.error(f":material/error: {H.page_wording(str(err))}")
    except Exception as err:  # never a traceback on the page; the log has it
        log.exception("page error")
        st.error(f":material/error: Something went wrong on the page ({err.__class__.__name__}: {err}). "
                 "Your earlier work in this session is kept; please report this with the photo.")
    if os.environ.get("SURFACES_UI_TIMING"):  # used by ui/bench_review.py
        st.session_state.setdefault("_run_s", []).append(time.perf_counter() - t0)


main()
