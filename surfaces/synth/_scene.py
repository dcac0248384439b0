"""The part every synthetic scene shares: photo size, card, camera, table,
compositing, camera effects and the truth record.

A scene module (fracture, bend) supplies a *builder* with three steps:
``geometry`` (sizes in face mm), ``place`` (imperfections and distractors,
after the camera fit has fixed the sizes) and ``layers`` (canvases in the
layout frame).  The layout frame is the face frame: x along the weld or
coupon from the face start, y across; on a curved bend coupon it is the
projected frame (see :mod:`surfaces.synth._bend`).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np

from ..geometry import apply_h
from ..model import SurfacesError
from . import _camera, _render, _textures
from ._card import make_card
from ._paint import Defect, Light
from ._render import Layer, grid_A
from ._shapes import convex_hull, measures, polygon_area, polygon_centroid

SCHEMA = "surfaces.truth/1"
ASPECTS = (4 / 3, 3 / 2, 16 / 9, 1.0)


class SynthError(SurfacesError):
    """A synthetic-photo option cannot be met (out of range, does not fit)."""


# --------------------------------------------------------------------------- result
@dataclass
class SynthPhoto:
    """A rendered photo and its truth.

    Attributes
    ----------
    rgb : (H, W, 3) uint8 ndarray
        The photo as the camera delivers it (after its JPEG round trip when
        ``truth["look"]["jpeg_quality"]`` is set).
    truth : dict
        JSON-serialisable truth (schema ``surfaces.truth/1``).
    """

    rgb: np.ndarray
    truth: dict
    _jpeg: bytes | None = field(default=None, repr=False)

    def jpeg_bytes(self, quality: int | None = None) -> bytes:
        """The photo as JPEG; the camera's own file unless another quality is asked for."""
        q = self.truth.get("look", {}).get("jpeg_quality")
        if self._jpeg is not None and (quality is None or quality == q):
            return self._jpeg
        return _render.encode_jpeg(self.rgb, 92 if quality is None else int(quality))

    def png_bytes(self) -> bytes:
        ok, buf = cv2.imencode(".png", cv2.cvtColor(self.rgb, cv2.COLOR_RGB2BGR))
        return buf.tobytes()

    def save(self, path: str | Path, *, quality: int | None = None) -> Path:
        """Write the photo (``.jpg``/``.jpeg`` or ``.png`` by suffix) and ``<name>.truth.json``."""
        path = Path(path)
        suf = path.suffix.lower()
        if suf in (".jpg", ".jpeg"):
            data = self.jpeg_bytes(quality)
        elif suf == ".png":
            data = self.png_bytes()
        else:
            raise SynthError(f"cannot save synthetic photo as {path.name!r}: use a .jpg, .jpeg or .png name")
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        path.with_suffix(".truth.json").write_text(json.dumps(self.truth, indent=1))
        return path


# --------------------------------------------------------------------------- helpers
def streams(seed: int, *names: str) -> dict[str, np.random.Generator]:
    """Independent generators per concern, so one option does not reshuffle the rest."""
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SynthError(f"seed {seed!r} must be a non-negative integer")
    return {n: np.random.default_rng([int(seed), k, 7919]) for k, n in enumerate(names)}


#: a face too long for the wanted scale is shortened by this factor per attempt
SHRINK_STEP = 0.9
GEOMETRY_ATTEMPTS = 40


def geometry_rng(seed: int, attempt: int) -> np.random.Generator:
    """The generator of a scene's sizes at one fitting attempt (replayable from the seed)."""
    return np.random.default_rng([int(seed), int(attempt), 31])


def photo_size(rng, megapixels, aspect, portrait) -> tuple[int, int]:
    mp = float(rng.uniform(2.0, 12.0)) if megapixels is None else float(megapixels)
    if not (0.3 <= mp <= 50):
        raise SynthError(f"megapixels={megapixels} is out of range (use 0.3..50, typically 2..12)")
    a = float(rng.choice(ASPECTS, p=[0.5, 0.25, 0.2, 0.05])) if aspect is None else float(aspect)
    if portrait is None:
        portrait = bool(rng.random() < 0.3)
    long_ = int(round(math.sqrt(mp * 1e6 * a)))
    short = int(round(long_ / a))
    return (short, long_) if portrait else (long_, short)


def affine(angle_deg: float, tx: float, ty: float) -> np.ndarray:
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    return np.array([[c, -s, tx], [s, c, ty], [0, 0, 1.0]])


def _rect(x0, y0, x1, y1):
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], float)


def _separated(a: np.ndarray, b: np.ndarray, gap: float) -> bool:
    """Separating-axis test for convex polygons with a clearance ``gap``."""
    for poly in (a, b):
        e = np.roll(poly, -1, axis=0) - poly
        for ex, ey in e:
            n = np.array([-ey, ex]) / max(math.hypot(ex, ey), 1e-12)
            pa, pb = a @ n, b @ n
            if pa.max() + gap <= pb.min() or pb.max() + gap <= pa.min():
                return True
    return False


@dataclass
class Geometry:
    """Sizes of one scene in the layout frame (mm)."""

    face_poly: np.ndarray
    length_mm: float
    width_mm: float
    root_side: str
    specimen_poly: np.ndarray  # outline for the cast shadow / table clearance
    height_mm: float  # specimen height above the table (shadow length)
    params: dict = field(default_factory=dict)


@dataclass
class Placed:
    defects: list[Defect]
    distractors: list[tuple[str, tuple[float, float]]]


@dataclass
class Context:
    """What ``layers`` needs to size its canvases."""

    px_per_mm: float
    light: Light
    H_layout_to_photo: np.ndarray
    max_canvas_px: float = 4.5e6


def layer_res(ctx: Context, area_mm2: float, factor: float) -> float:
    """Canvas px/mm: ``factor`` x the photo scale, capped by the pixel budget."""
    return float(min(factor * ctx.px_per_mm, math.sqrt(ctx.max_canvas_px / max(area_mm2, 1.0))))


def parse_specs(defects, keys: set, kinds: dict, mixed: Callable, what: str) -> list[dict]:
    """``defects`` ("mixed", "none" or a list of dicts) -> list of spec dicts, validated."""
    if isinstance(defects, str):
        if defects == "none":
            return []
        if defects == "mixed":
            return mixed()
        raise SynthError(f"defects={defects!r} is unknown (use 'mixed', 'none' or a list of dicts)")
    specs = [dict(s) for s in defects]
    for s in specs:
        bad = set(s) - keys
        if bad or s.get("kind") not in kinds:
            raise SynthError(
                f"{what} defect spec {s!r} is invalid: needs kind in {sorted(kinds)}"
                + (f", unknown keys {sorted(bad)}" if bad else "")
            )
    return specs


def place_specs(rng, specs: list[dict], make: Callable, fits: Callable, *, random_set: bool, where: str) -> list[Defect]:
    """Draw each spec until it fits clear of the others; a user's spec that cannot fit is an error."""
    out: list[Defect] = []
    for s in specs:
        soft = s.pop("_soft", False) or random_set
        d = None
        for _ in range(60):
            d = make(rng, s)
            if d is not None and fits(d, out):
                break
            d = None
            if not soft and ("x_mm" in s or "y_mm" in s):
                break
        if d is None:
            if not soft:
                raise SynthError(f"defect {s!r} does not fit {where}; move or shrink it")
            continue
        out.append(d)
    return out


def clear_of(p: np.ndarray, others: list[Defect], gap: float) -> bool:
    """True if the bounding box of outline ``p`` grown by ``gap`` meets no other outline's box."""
    b0, b1 = p.min(0) - gap, p.max(0) + gap
    for o in others:
        o0, o1 = o.poly.min(0), o.poly.max(0)
        if (b0 < o1).all() and (o0 < b1).all():
            return False
    return True


# --------------------------------------------------------------------------- main driver
def render_scene(
    seed: int,
    builder: Any,
    *,
    megapixels: float | None,
    aspect: float | None,
    portrait: bool | None,
    tilt_deg: float | None,
    px_per_mm: float | None,
    marker_mm: float | None,
    n_markers: int,
    ruler: bool | None,
    defects: Any,
    distractors: bool,
    clean: bool,
    jpeg_quality: int | None,
    table: str | None,
) -> SynthPhoto:
    rs = streams(seed, "photo", "geo", "card", "camera", "defects", "layers", "look", "noise", "table")
    W, H = photo_size(rs["photo"], megapixels, aspect, portrait)
    long_px, short_px = max(W, H), min(W, H)
    if tilt_deg is None:
        tilt_deg = float(rs["camera"].uniform(0.0, 30.0) if not clean else 0.0)
    if not (0.0 <= tilt_deg <= 60.0):
        raise SynthError(f"tilt_deg={tilt_deg} is out of range (use 0..60, typically 0..30)")
    if px_per_mm is not None and not (1.0 <= px_per_mm <= 200.0):
        raise SynthError(f"px_per_mm={px_per_mm} is out of range (use 1..200, typically 8..25)")
    if marker_mm is None:
        marker_mm = float(rs["card"].choice([10, 15, 20, 25, 30, 40, rs["card"].uniform(10, 40)]))
    if not (5.0 <= marker_mm <= 80.0):
        raise SynthError(f"marker_mm={marker_mm} is out of range (use 10..40 mm)")
    if n_markers not in (1, 2):
        raise SynthError(f"n_markers={n_markers} must be 1 or 2")
    if ruler is None:
        ruler = bool(rs["card"].random() < 0.4)

    # ---- geometry + card placement, shrinking a long face until it fits the wanted scale
    if px_per_mm is not None:
        ppm_want = float(px_per_mm)
    else:
        # half the time shorten a long face towards a close-up, half the time keep its length
        ppm_want = float(rs["camera"].uniform(8.0, 25.0)) if rs["camera"].random() < 0.5 else 8.0
    card_rng_state = rs["card"].bit_generator.state
    shrink, last_len = 1.0, None
    for attempt in range(GEOMETRY_ATTEMPTS):
        geo = builder.geometry(geometry_rng(seed, attempt), shrink=shrink)
        rs["card"].bit_generator.state = card_rng_state
        ids = [int(i) for i in rs["card"].choice(50, size=n_markers, replace=False)]
        card_rng = np.random.default_rng([int(seed), 41])
        card_size = _card_size(marker_mm, n_markers, ruler)
        T_card = _place_card(card_rng, geo, card_size)
        card_poly = apply_h(T_card, _rect(0, 0, *card_size))
        must = np.r_[geo.face_poly, card_poly]
        ext = np.ptp(must, axis=0)
        fit_ppm = 0.85 * min(long_px / max(ext), short_px / max(min(ext), 1.0)) / (1 + 0.45 * math.sin(math.radians(tilt_deg)))
        if fit_ppm >= ppm_want or (last_len is not None and abs(geo.length_mm - last_len) < 1e-9):
            break
        last_len = geo.length_mm
        shrink *= SHRINK_STEP
    if px_per_mm is not None:
        if fit_ppm < px_per_mm * 0.98:
            raise SynthError(
                f"px_per_mm={px_per_mm} does not fit the face and card in a {W}x{H} photo; "
                f"lower px_per_mm (below {fit_ppm:.1f}) or raise megapixels"
            )
        ppm_goal = float(px_per_mm)
    else:
        # an inspector fills much of the frame: between half and nearly all of what fits
        ppm_goal = float(np.clip(fit_ppm * rs["camera"].uniform(0.72, 1.0), 8.0, 25.0))
        ppm_goal = min(ppm_goal, fit_ppm)

    card = make_card(rs["card"], marker_mm=marker_mm, ids=ids, ruler=ruler, px_per_mm=1.6 * ppm_goal)
    card_poly = apply_h(T_card, _rect(0, 0, *card.size_mm))
    # plane frame = marker 0's frame: origin at its top-left outer corner, X along its top edge
    m0 = apply_h(T_card, card.markers[0][1])
    ex = m0[1] - m0[0]
    beta = math.degrees(math.atan2(ex[1], ex[0]))
    T_plane_to_layout = affine(beta, m0[0, 0], m0[0, 1])
    T_layout_to_plane = np.linalg.inv(T_plane_to_layout)

    # ---- camera
    face_c_layout = np.array(polygon_centroid(geo.face_poly))
    face_c = apply_h(T_layout_to_plane, [face_c_layout])[0]
    must_plane = apply_h(T_layout_to_plane, must)
    cam_rng = rs["camera"]
    f_px = float(long_px * cam_rng.uniform(0.75, 1.6))
    # principal direction of the must-see points in the plane
    mc = must_plane - must_plane.mean(0)
    evals, evecs = np.linalg.eigh(mc.T @ mc)
    pdir = math.degrees(math.atan2(evecs[1, 1], evecs[0, 1]))
    photo_long_dir = 0.0 if W >= H else 90.0
    cam = None
    ppm = ppm_goal
    for attempt in range(80):
        if cam_rng.random() < 0.8:
            roll = pdir - photo_long_dir + cam_rng.normal(0, 7) + 180.0 * int(cam_rng.integers(0, 2))
        else:
            roll = cam_rng.uniform(0, 360)
        # the roll turns the photo: a plane direction at angle a appears at a - roll
        az = cam_rng.uniform(0, 360)
        lo, hi = must_plane.min(0), must_plane.max(0)
        target = (lo + hi) / 2 + cam_rng.normal(0, 0.06, 2) * (hi - lo)
        cand = _camera.pose(
            width=W,
            height=H,
            f_px=f_px,
            tilt_deg=tilt_deg,
            tilt_azimuth_deg=az,
            roll_deg=roll,
            target_mm=tuple(target),
            face_mm=tuple(face_c),
            px_per_mm=ppm,
        )
        if _camera.inside(cand, must_plane, margin_px=0.03 * short_px):
            cam = cand
            break
        if px_per_mm is None and attempt % 4 == 3:
            ppm = max(ppm * 0.95, 4.0)
    if cam is None:
        raise SynthError(
            f"could not frame the scene in a {W}x{H} photo at {ppm_goal:.1f} px/mm and tilt {tilt_deg:.0f} deg; "
            "lower px_per_mm or tilt_deg, or raise megapixels"
        )
    H_plane = cam.H
    H_layout = H_plane @ T_layout_to_plane

    # ---- imperfections and distractors (sizes are now final)
    placed = builder.place(rs["defects"], defects, distractors)

    # ---- light and canvases
    lrng = rs["layers"]
    light = Light(float(lrng.uniform(0, 360)), float(lrng.uniform(25, 70)))
    ctx = Context(px_per_mm=ppm, light=light, H_layout_to_photo=H_layout)
    img = np.zeros((H, W, 3), np.float32)
    table_kind = table or str(rs["table"].choice(_textures.TABLES))
    if table_kind not in _textures.TABLES:
        raise SynthError(f"table={table!r} is unknown (use one of {', '.join(_textures.TABLES)})")
    _table_layer(img, rs["table"], table_kind, H_layout, geo, card_poly, light, W, H, ppm)
    for layer in builder.layers(lrng, ctx, placed):
        _render.composite(img, layer, H_layout)
    card_layer = card.layer
    _render.composite(img, card_layer, H_layout @ T_card)

    # ---- camera effects
    glare_at = apply_h(H_layout, [face_c_layout])[0]
    look = _render.random_look(rs["look"], W, H, clean=clean, glare_xy=tuple(glare_at))
    if jpeg_quality is not None:
        look = replace(look, jpeg_quality=int(jpeg_quality))
    u8 = _render.apply_look(rs["noise"], img, look)
    del img
    jpeg = None
    if look.jpeg_quality is not None:
        if not (30 <= look.jpeg_quality <= 100):
            raise SynthError(f"jpeg_quality={look.jpeg_quality} is out of range (use 30..100)")
        jpeg = _render.encode_jpeg(u8, look.jpeg_quality)
        u8 = _render.decode_jpeg(jpeg)

    truth = _truth(
        seed, builder, geo, placed, card, T_card, T_layout_to_plane, cam, W, H, look, table_kind, light, ids
    )
    return SynthPhoto(rgb=u8, truth=truth, _jpeg=jpeg)


def _card_size(marker_mm: float, n: int, ruler: bool) -> tuple[float, float]:
    """Upper bound of the card size (the card module fixes the exact one)."""
    S = marker_mm
    q = 2.5 * S / 6
    w = 2 * q + n * S + (n - 1) * 4 * S / 6
    if ruler:
        w = max(w, 2 * q + 50)
    return w, 2 * q + S + max(3.5, 0.16 * S) + (7.0 if ruler else 0.0)


def _place_card(rng, geo: Geometry, size) -> np.ndarray:
    """Card -> layout transform: beside the specimen, clear of it, any turn."""
    cw, ch = size
    sp = geo.specimen_poly
    x0, y0 = sp.min(0)
    x1, y1 = sp.max(0)
    for _ in range(200):
        beta = float(rng.normal(0, 15)) + 90.0 * int(rng.choice(4, p=[0.55, 0.15, 0.15, 0.15]))
        side = rng.choice(["below", "above", "left", "right"], p=[0.35, 0.35, 0.15, 0.15])
        gap = rng.uniform(3.0, 15.0)
        R = affine(beta, 0, 0)
        corners = apply_h(R, _rect(0, 0, cw, ch))
        lo, hi = corners.min(0), corners.max(0)
        bw, bh = hi - lo
        if side == "below":
            cx = rng.uniform(x0, max(x0, x1 - bw)) if x1 - x0 > bw else (x0 + x1 - bw) / 2
            cy = y1 + gap
        elif side == "above":
            cx = rng.uniform(x0, max(x0, x1 - bw)) if x1 - x0 > bw else (x0 + x1 - bw) / 2
            cy = y0 - gap - bh
        elif side == "left":
            cx, cy = x0 - gap - bw, rng.uniform(y0 - bh / 2, y1 - bh / 2)
        else:
            cx, cy = x1 + gap, rng.uniform(y0 - bh / 2, y1 - bh / 2)
        T = affine(beta, cx - lo[0], cy - lo[1])
        poly = apply_h(T, _rect(0, 0, cw, ch))
        if _separated(poly, convex_hull(sp), 2.0):
            return T
    raise SynthError("could not place the reference card beside the specimen")  # pragma: no cover


def _table_layer(img, rng, kind, H_layout, geo, card_poly, light, W, H, ppm) -> None:
    """Table texture over the whole photo, with the specimen's and card's cast shadows."""
    Hinv = np.linalg.inv(H_layout)
    corners = apply_h(Hinv, [[0, 0], [W - 1, 0], [W - 1, H - 1], [0, H - 1]])
    lo, hi = corners.min(0) - 5, corners.max(0) + 5
    area = float(np.prod(hi - lo))
    r = float(min(0.6 * ppm, math.sqrt(2.0e6 / area)))
    r = max(r, 0.5)
    h, w = int(math.ceil((hi[1] - lo[1]) * r)), int(math.ceil((hi[0] - lo[0]) * r))
    rgb = _textures.table(rng, (h, w), r, kind)
    A = grid_A(lo[0], lo[1], r)
    Ainv = np.linalg.inv(A)
    # cast shadows: the specimen is tall, the card almost flat
    a = math.radians(light.azimuth_deg)
    L = geo.height_mm / math.tan(math.radians(light.elevation_deg))
    off = -np.array([math.cos(a), math.sin(a)]) * L
    shadow = np.zeros((h, w), np.float32)
    for poly, o, dens, soft in ((geo.specimen_poly, off, 0.55, 0.15 * L + 1.0), (card_poly, off * 0.02, 0.3, 0.4)):
        sig = max(soft * r, 0.6)
        f = max(1.0, sig / 3.0)  # blur wide shadows on a coarser grid
        hs, ws = max(2, int(math.ceil(h / f))), max(2, int(math.ceil(w / f)))
        S = np.diag([1 / f, 1 / f, 1.0]) @ Ainv
        m = np.zeros((hs, ws), np.float32)
        # sweep the outline from its base to the shadow tip (extruded shadow)
        for t in np.linspace(0.0, 1.0, 8):
            pts = apply_h(S, poly + o * t)
            m = np.maximum(m, _render.fill_alpha((hs, ws), [pts]))
        m = cv2.GaussianBlur(m, (0, 0), sig / f)
        if f > 1.0:
            m = cv2.resize(m, (w, h), interpolation=cv2.INTER_LINEAR)
        shadow = np.maximum(shadow, m * np.float32(dens))
    rgb *= (1.0 - shadow)[..., None]
    _render.composite(img, Layer(rgb, None, A), H_layout, prefilter=False, opaque=True)


# --------------------------------------------------------------------------- truth
def _truth(seed, builder, geo, placed, card, T_card, T_lp, cam, W, H, look, table_kind, light, ids) -> dict:
    Hp = cam.H
    to_layout: Callable = builder.to_layout

    def plane(pts):
        return apply_h(T_lp, pts)

    def px(pts_plane):
        return apply_h(Hp, pts_plane)

    face_plane = plane(geo.face_poly)
    face_px = px(face_plane)
    fc = plane([polygon_centroid(geo.face_poly)])[0]
    ppm_face = _camera.scale_at(Hp, *fc)
    axis = apply_h(T_lp, [[0, 0], [1, 0]])
    axis_deg = math.degrees(math.atan2(axis[1, 1] - axis[0, 1], axis[1, 0] - axis[0, 0])) % 360.0
    markers = []
    for mid, corners in card.markers:
        cm = plane(apply_h(T_card, corners))
        markers.append({"id": mid, "corners_mm": cm.tolist(), "corners_px": px(cm).tolist(), "side_mm": card.marker_mm})
    imps = []
    for k, d in enumerate(placed.defects, start=1):
        m = measures(d.poly, d.analytic)
        lay = to_layout(d.poly)
        pl = plane(lay)
        ppx = px(pl)
        c_pl = plane(to_layout(np.array([m["centroid"]])))[0]
        ent = {
            "id": k,
            "kind": d.kind,
            "iso6520": d.iso6520,
            "centroid_mm": c_pl.tolist(),
            "centroid_px": px([c_pl])[0].tolist(),
            "bbox_px": [float(ppx[:, 0].min()), float(ppx[:, 1].min()), float(ppx[:, 0].max()), float(ppx[:, 1].max())],
            "greatest_mm": m["greatest_mm"],
            "width_mm": m["width_mm"],
            "along_mm": m["along_mm"],
            "across_mm": m["across_mm"],
            "area_mm2": m["area_mm2"],
            "starts_at_edge": bool(d.extra.get("starts_at_edge", False)),
            "at_root": bool(d.extra.get("at_root", False)),
            "face_mm": {
                "cx": m["centroid"][0],
                "cy": m["centroid"][1],
                "x0": m["extent"][0],
                "x1": m["extent"][1],
                "y0": m["extent"][2],
                "y1": m["extent"][3],
            },
            "shape": d.shape,
            "polygon_mm": _thin(pl).tolist(),
            "polygon_px": _thin(ppx).tolist(),
        }
        for key, val in d.extra.items():
            if key not in ("starts_at_edge", "at_root"):
                ent[key] = val
        proj = getattr(builder, "projected", None)
        if proj is not None:
            pm = measures(lay)
            ent["projected"] = {
                "greatest_mm": pm["greatest_mm"],
                "width_mm": pm["width_mm"],
                "along_mm": pm["along_mm"],
                "across_mm": pm["across_mm"],
                "area_mm2": pm["area_mm2"],
            }
        imps.append(ent)
    dis = []
    for typ, xy in placed.distractors:
        c = plane(to_layout(np.array([xy])))[0]
        dis.append({"type": typ, "centroid_mm": c.tolist(), "centroid_px": px([c])[0].tolist()})
    A_face_to_plane = T_lp
    truth = {
        "schema": SCHEMA,
        "seed": int(seed),
        "scene": builder.scene,
        "test": builder.test,
        "photo_size": [int(W), int(H)],
        "H_plane_to_photo": Hp.tolist(),
        "px_per_mm_face": ppm_face,
        "tilt_deg": float(cam.tilt_deg),
        "marker_mm": float(card.marker_mm),
        "markers": markers,
        "card": {"polygon_mm": plane(apply_h(T_card, _rect(0, 0, *card.size_mm))).tolist(), "ruler": card.ruler},
        "face": {
            "polygon_mm": _thin(face_plane, 4000).tolist(),
            "polygon_px": _thin(face_px, 4000).tolist(),
            "length_mm": float(geo.length_mm),
            "width_mm": float(geo.width_mm),
            "area_mm2": float(geo.params.get("true_area_mm2", polygon_area(geo.face_poly))),
            "axis_deg": axis_deg,
            "root_side": geo.root_side,
            "A_face_to_plane": A_face_to_plane.tolist(),
            "centroid_mm": fc.tolist(),
        },
        "imperfections": imps,
        "distractors": dis,
        "camera": {
            "f_px": cam.f_px,
            "roll_deg": float(cam.roll_deg),
            "centre_mm": cam.C.tolist(),
        },
        "light": {"azimuth_deg": light.azimuth_deg, "elevation_deg": light.elevation_deg},
        "look": look.to_dict(),
        "table": table_kind,
        "params": _jsonable(geo.params),
    }
    vis = getattr(builder, "visible_truth", None)
    if vis is not None:
        v = vis()
        poly = plane(v.pop("polygon_layout_mm"))
        truth["face"]["visible"] = {"polygon_mm": poly.tolist(), "polygon_px": px(poly).tolist(), **v}
    curv = getattr(builder, "curvature_truth", None)
    if curv is not None:
        truth["curvature"] = curv()
    return _jsonable(truth)


def _thin(p: np.ndarray, n: int = 400) -> np.ndarray:
    """At most ``n`` vertices for the JSON (the measures use the full outline)."""
    p = np.asarray(p)
    if len(p) <= n:
        return p
    return p[np.linspace(0, len(p), n, endpoint=False).astype(int)]


def _jsonable(o):
    if isinstance(o, dict):
        return {str(k): _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    if isinstance(o, np.ndarray):
        return _jsonable(o.tolist())
    if isinstance(o, (np.floating,)):
        return float(o)
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.bool_,)):
        return bool(o)
    if isinstance(o, float) and not math.isfinite(o):
        return None
    return o
