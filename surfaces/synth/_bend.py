"""Guided-bend coupons: the stretched convex surface with open discontinuities.

Surface frame: ``s`` (x) along the coupon from the start of the inspected
surface, ``t`` (y) across it from the ``y = 0`` edge, true millimetres on
the metal.  With curvature the surface is a cylinder of outer radius
``R = former radius + thickness`` about an axis across the coupon, apex at
``s = L/2``; the photo from above sees it projected onto the card's plane,

    x_plane = Lp/2 + R sin((s - L/2) / R),   Lp = 2 R sin(L / (2 R)),

which is the layout frame used for the canvases and the truth polygons.
Truth sizes are true arc lengths on the surface; ``projected`` sizes are
measured on the projected outlines.  Imperfections and distractors lie on
the inspected arc ``0 <= s <= L`` (the truth ``face``); the cylinder is drawn
on to ``phi_max`` beyond it, and that drawn strip, projected, is the truth
``face.visible`` (what the photo shows).
"""

from __future__ import annotations

import functools
import math

import cv2
import numpy as np

from ..geometry import apply_h
from . import _noise, _shapes
from ._paint import Defect, paint_defect, paint_smudge, paint_speck
from ._render import Layer, fill_alpha, grid_A, to_px
from ._scene import (
    GEOMETRY_ATTEMPTS, SHRINK_STEP, Context, Geometry, Placed, SynthError, clear_of, geometry_rng, layer_res,
    parse_specs, place_specs,
)  # fmt: skip

KIND_WEIGHTS = {"crack": 0.55, "pore": 0.25, "inclusion": 0.2}
SPEC_KEYS = {"kind", "shape", "x_mm", "y_mm", "d_mm", "a_mm", "b_mm", "length_mm", "width_mm", "angle_deg", "edge"}


def _loguniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _draw_sizes(rng, *, shrink: float, curved: bool, fixed_W=None, fixed_T=None, fixed_R=None, fixed_L=None) -> dict:
    """The coupon's sizes, drawn in a fixed order (``visible_face`` replays it from the seed)."""
    Wc = float(fixed_W or rng.uniform(10.0, 40.0))
    T = float(fixed_T or rng.uniform(6.0, 25.0))
    Rf = T * float(rng.choice([1.0, 1.5, 2.0, 3.0, 4.0]))  # former diameter 2T..8T
    R = float(fixed_R or (Rf + T))
    if fixed_R:
        Rf = max(R - T, 0.0)
    if not (5.0 <= Wc <= 80.0 and R > 0):
        raise SynthError(f"coupon width {Wc:g} mm is out of range (use 10..40 mm)")
    lmax, lmin = 150.0, 40.0
    if curved:
        lmax = min(lmax, 2 * R * 1.25)  # half angle up to about 72 deg
        lmin = min(lmin, 0.8 * lmax)  # a tight bend shows a shorter convex arc
    L = float(fixed_L or max(lmin, rng.uniform(lmin, max(lmin, lmax)) * shrink))
    if curved and L / (2 * R) >= math.pi / 2:
        raise SynthError(f"bend arc {L:g} mm is more than half the circumference of radius {R:g} mm; shorten it")
    Lp = 2 * R * math.sin(L / (2 * R)) if curved else L
    # the cylinder is drawn 8..25 deg beyond the inspected arc's ends (the coupon bends on)
    phi_max = min(math.radians(86), L / (2 * R) + math.radians(rng.uniform(8, 25))) if curved else None
    return {"Wc": Wc, "T": T, "Rf": Rf, "R": R, "L": L, "Lp": Lp, "phi_max": phi_max}


def _visible_dict(spec_layout, x0, x1, s0, s1, Wc, phi_max) -> dict:
    return {
        "polygon_layout_mm": np.asarray(spec_layout, float),
        "what": "the convex surface drawn in the photo, projected onto the card's plane",
        "length_mm": x1 - x0,
        "width_mm": Wc,
        "area_mm2": (x1 - x0) * Wc,
        "face_x0_mm": x0,
        "face_x1_mm": x1,
        "surface_x0_mm": s0,
        "surface_x1_mm": s1,
        "arc_length_mm": s1 - s0,
        "arc_area_mm2": (s1 - s0) * Wc,
        "half_angle_deg": math.degrees(phi_max) if phi_max is not None else 0.0,
    }


@functools.lru_cache(maxsize=256)
def _replay_half_angle(seed: int, Wc: float, T: float, R: float, Rf: float, L: float) -> float | None:
    """phi_max of the draws that reproduce these sizes, or None when none or several different ones do.

    Which sizes the caller fixed is not recorded.  A size a draw reproduces to
    1e-9 was drawn, not given (fixing the arc length, the last size drawn,
    would otherwise leave every earlier draw matching as well), so the
    explanations with the fewest fixed sizes are tried first.
    """
    want = {"Wc": Wc, "T": T, "R": R, "Rf": Rf, "L": L}
    names = (("fixed_W", "Wc"), ("fixed_T", "T"), ("fixed_R", "R"), ("fixed_L", "L"))
    for n_fixed in range(len(names) + 1):
        phis: list[float] = []
        for mask in (m for m in range(1 << len(names)) if bin(m).count("1") == n_fixed):
            fixed = {k: (want[n] if mask >> i & 1 else None) for i, (k, n) in enumerate(names)}
            shrink = 1.0
            for attempt in range(GEOMETRY_ATTEMPTS):
                try:
                    z = _draw_sizes(geometry_rng(seed, attempt), shrink=shrink, curved=True, **fixed)
                except SynthError:
                    z = None
                if z is not None and all(abs(z[k] - v) <= 1e-9 * max(1.0, abs(v)) for k, v in want.items()):
                    phis.append(z["phi_max"])
                shrink *= SHRINK_STEP
        if phis:
            return float(phis[0]) if max(phis) - min(phis) <= 1e-12 else None
    return None


def visible_face(truth: dict) -> dict | None:
    """The drawn (visible) face of a bend truth, as ``truth["face"]["visible"]`` records it.

    Truth files written before that field existed are replayed from their
    seed: the coupon's sizes are drawn again for every fitting attempt and
    every choice of fixed sizes, and the drawn extent is taken only when the
    draws that reproduce the recorded width, thickness, radii and arc length
    all agree on it.  Returns None when it cannot be told (not a bend, no
    seed, or more than one extent fits).
    """
    tf = truth.get("face") or {}
    if isinstance(tf.get("visible"), dict):
        return tf["visible"]
    cur = truth.get("curvature") or {}
    if truth.get("scene") != "bend" or not cur or "A_face_to_plane" not in tf:
        return None
    try:
        A = np.asarray(tf["A_face_to_plane"], float)
        H = np.asarray(truth["H_plane_to_photo"], float)
        Wc, L, T = float(tf["width_mm"]), float(tf["length_mm"]), float(cur["thickness_mm"])
        seed = int(truth["seed"])
    except (KeyError, TypeError, ValueError):
        return None
    if not cur.get("enabled"):
        x0, x1, s0, s1, phi = 0.0, L, 0.0, L, None
    else:
        try:
            R, Rf = float(cur["radius_mm"]), float(cur["former_radius_mm"])
        except (KeyError, TypeError, ValueError):
            return None
        phi = _replay_half_angle(seed, Wc, T, R, Rf, L)
        if phi is None:
            return None
        Lp = 2 * R * math.sin(L / (2 * R))
        x0, x1 = Lp / 2 - R * math.sin(phi), Lp / 2 + R * math.sin(phi)
        s0, s1 = L / 2 - R * phi, L / 2 + R * phi
    spec = np.array([[x0, 0.0], [x1, 0.0], [x1, Wc], [x0, Wc]])
    v = _visible_dict(spec, x0, x1, s0, s1, Wc, phi)
    poly = apply_h(A, v.pop("polygon_layout_mm"))
    out = {"polygon_mm": poly.tolist(), "polygon_px": apply_h(H, poly).tolist(), **v, "replayed": True}
    return {k: (float(x) if isinstance(x, np.floating) else x) for k, x in out.items()}


class BendBuilder:
    scene = "bend"
    test = "bend"
    projected = True

    def __init__(self, *, curvature: bool, radius_mm=None, thickness_mm=None, width_mm=None, length_mm=None):
        self.curved = bool(curvature)
        self.fixed_R = radius_mm
        self.fixed_T = thickness_mm
        self.fixed_W = width_mm
        self.fixed_L = length_mm
        self.geo: Geometry | None = None

    # ------------------------------------------------------------------ mapping
    def to_layout(self, pts):
        p = np.array(pts, float).reshape(-1, 2)
        if self.curved:
            L, R, Lp = self.L, self.R, self.Lp
            p[:, 0] = Lp / 2 + R * np.sin((p[:, 0] - L / 2) / R)
        return p

    def to_surface_x(self, xp):
        """Projected layout x -> surface s (inverse of :meth:`to_layout` along x)."""
        if not self.curved:
            return np.asarray(xp, float)
        u = np.clip((np.asarray(xp, float) - self.Lp / 2) / self.R, -1.0, 1.0)
        return self.L / 2 + self.R * np.arcsin(u)

    def curvature_truth(self) -> dict:
        half = self.L / (2 * self.R) if self.curved else 0.0
        return {
            "enabled": self.curved,
            "radius_mm": self.R if self.curved else None,
            "former_radius_mm": self.Rf if self.curved else None,
            "thickness_mm": self.T,
            "axis": "across the coupon (face y)",
            "arc_length_mm": self.L,
            "projected_length_mm": self.Lp,
            "half_angle_deg": math.degrees(half),
            "apex_face_x_mm": self.L / 2,
            "projected_area_mm2": self.Lp * self.Wc,
            "mapping": "x_plane_face = Lp/2 + R*sin((s - L/2)/R)",
        }

    def visible_truth(self) -> dict:
        """The convex surface drawn in the photo, in the layout frame (projected onto the card's plane).

        On a curved coupon the cylinder is drawn beyond the inspected arc, to
        ``phi_max`` either side of the apex, and nothing in the picture marks
        where the inspected arc ends; that drawn strip is what the photo
        shows.  ``x`` is the projected face axis, ``surface_x`` the true arc
        length from the inspected arc's start.
        """
        spec = np.asarray(self.geo.specimen_poly, float)
        x0, x1 = float(spec[:, 0].min()), float(spec[:, 0].max())
        s0, s1 = self.s_ext
        return _visible_dict(spec, x0, x1, s0, s1, self.Wc, self.phi_max)

    # ------------------------------------------------------------------ geometry
    def geometry(self, rng, *, shrink: float = 1.0) -> Geometry:
        z = _draw_sizes(
            rng, shrink=shrink, curved=self.curved,
            fixed_W=self.fixed_W, fixed_T=self.fixed_T, fixed_R=self.fixed_R, fixed_L=self.fixed_L,
        )  # fmt: skip
        L, R, T, Rf, Wc, Lp, phi_max = (z[k] for k in ("L", "R", "T", "Rf", "Wc", "Lp", "phi_max"))
        self.L, self.R, self.T, self.Rf, self.Wc, self.Lp, self.phi_max = L, R, T, Rf, Wc, Lp, phi_max
        face = np.array([[0, 0], [self.Lp, 0], [self.Lp, Wc], [0, Wc]], float)
        if self.curved:
            ext = R * math.sin(phi_max)
            self.s_ext = (L / 2 - R * phi_max, L / 2 + R * phi_max)
            spec = np.array([[self.Lp / 2 - ext, 0], [self.Lp / 2 + ext, 0], [self.Lp / 2 + ext, Wc], [self.Lp / 2 - ext, Wc]])
            height = R + rng.uniform(20, 60)
        else:
            self.s_ext = (0.0, L)
            spec = face.copy()
            height = T
        params = {"true_area_mm2": L * Wc, "coupon_thickness_mm": T}
        self.geo = Geometry(face, L, Wc, "unknown", spec, float(height), params)
        return self.geo

    # ------------------------------------------------------------------ imperfections
    def place(self, rng, defects, distractors: bool) -> Placed:
        def mixed():
            n = int(rng.choice(7, p=[0.12, 0.2, 0.2, 0.18, 0.12, 0.1, 0.08]))
            return [{"kind": str(rng.choice(list(KIND_WEIGHTS), p=list(KIND_WEIGHTS.values())))} for _ in range(n)]

        specs = parse_specs(defects, SPEC_KEYS, KIND_WEIGHTS, mixed, "bend")
        out = place_specs(
            rng, specs, self._make, self._fits, random_set=isinstance(defects, str),
            where=f"on the {self.L:.0f} x {self.Wc:.0f} mm coupon surface",
        )  # fmt: skip
        dis = self._distractors(rng) if distractors else []
        return Placed(out, dis)

    def _fits(self, d: Defect, others, gap: float = 0.6) -> bool:
        p = d.poly
        m = 0.3
        edge = d.extra.get("starts_at_edge", False)
        if p[:, 0].min() < m or p[:, 0].max() > self.L - m:
            return False
        lo, hi = (-1e-9, self.Wc + 1e-9) if edge else (m, self.Wc - m)
        if p[:, 1].min() < lo or p[:, 1].max() > hi:
            return False
        return clear_of(p, others, gap)

    def _make(self, rng, s) -> Defect:
        L, Wc = self.L, self.Wc
        kind = s["kind"]
        cx = s.get("x_mm")
        cy = s.get("y_mm")
        if kind == "pore":
            if "a_mm" in s:
                a, b = float(s["a_mm"]), float(s.get("b_mm", s["a_mm"]))
                shape = "ellipse"
            else:
                d = float(s.get("d_mm") or _loguniform(rng, 0.4, 3.0))
                if rng.random() < 0.25 and "d_mm" not in s:
                    a, b, shape = d / 2, d / 2 / rng.uniform(1.1, 1.8), "ellipse"
                else:
                    a = b = d / 2
                    shape = "circle"
            ang = float(s.get("angle_deg", rng.uniform(0, 180)))
            cx = float(cx if cx is not None else rng.uniform(0, L))
            cy = float(cy if cy is not None else rng.uniform(0, Wc))
            poly, an = _shapes.ellipse(cx, cy, a, b, ang)
            sh = {"shape": shape, "cx_mm": cx, "cy_mm": cy, "a_mm": max(a, b), "b_mm": min(a, b), "angle_deg": ang if a >= b else ang + 90}
            if shape == "circle":
                sh["d_mm"] = 2 * a
            return Defect("pore", "2017", poly, an, sh, {"cause": "pore"})
        if kind == "inclusion":
            g = float(s.get("length_mm") or _loguniform(rng, 0.5, 4.0))
            w = float(s.get("width_mm") or g / rng.uniform(1.0, 2.2))
            ang = float(s.get("angle_deg", rng.uniform(0, 180)))
            cx = float(cx if cx is not None else rng.uniform(0, L))
            cy = float(cy if cy is not None else rng.uniform(0, Wc))
            poly = _shapes.blob(rng, cx, cy, g / 2, w / 2, ang, rough=0.22)
            sh = {"shape": "blob", "cx_mm": cx, "cy_mm": cy, "nominal_length_mm": g, "nominal_width_mm": w, "angle_deg": ang}
            return Defect("inclusion", "301", poly, None, sh, {"cause": "slag"})
        # open discontinuity
        length = float(s.get("length_mm") or _loguniform(rng, 0.5, 8.0))
        width = float(s.get("width_mm") or rng.uniform(0.08, 0.35) * min(1.0, 0.5 + length / 8))
        edge = s.get("edge")
        if edge is None and "y_mm" in s:
            edge = ""  # a placed crack starts where it was put
        if edge is None:
            edge = str(rng.choice(["", "y0", "y1"], p=[0.75, 0.125, 0.125]))
        if edge not in ("", "y0", "y1"):
            raise SynthError(f"bend crack edge {edge!r} is unknown (use '', 'y0' or 'y1')")
        if edge:
            ang = float(s.get("angle_deg", rng.normal(90, 20)))
            ang = ang if edge == "y0" else ang + 180.0
            length = min(length, 0.8 * Wc)
            x0 = float(cx if cx is not None else rng.uniform(0, L))
            y0 = 0.0 if edge == "y0" else Wc
            poly, _ = _shapes.crack(rng, x0, y0, length, width, ang, open_start=True)
            poly[0, 1] = poly[-1, 1] = y0
            poly[:, 1] = np.clip(poly[:, 1], 0.0, Wc)
        else:
            ang = float(s.get("angle_deg", rng.choice([rng.normal(90, 12), rng.uniform(0, 180)])))
            length = min(length, 0.9 * Wc / max(abs(math.sin(math.radians(ang))), 0.1))
            c, sn = math.cos(math.radians(ang)), math.sin(math.radians(ang))
            cx = float(cx if cx is not None else rng.uniform(0, L))
            cy = float(cy if cy is not None else rng.uniform(0, Wc))
            poly, _ = _shapes.crack(rng, cx - c * length / 2, cy - sn * length / 2, length, width, ang)
            x0, y0 = cx, cy
        sh = {"shape": "crack", "x_mm": x0, "y_mm": y0, "chord_mm": length, "nominal_width_mm": width, "angle_deg": ang}
        return Defect("crack", "100", poly, None, sh, {"cause": "", "starts_at_edge": bool(edge), "edge": edge})

    def _distractors(self, rng) -> list:
        L, Wc = self.L, self.Wc
        out = []
        self._specks = []
        for _ in range(int(rng.integers(5, 40))):
            p = (rng.uniform(0.3, L - 0.3), rng.uniform(0.3, Wc - 0.3))
            self._specks.append((p, rng.uniform(0.04, 0.18), float(rng.choice([rng.uniform(0.1, 0.3), rng.uniform(0.85, 1.0)]))))
            out.append(("speck", p))
        self._scratches = []
        for _ in range(int(rng.integers(0, 6))):
            y = rng.uniform(0.5, Wc - 0.5)
            x0 = rng.uniform(0, 0.7 * L)
            self._scratches.append((x0, min(L, x0 + rng.uniform(5, 0.5 * L)), y, rng.uniform(0.03, 0.08)))
            out.append(("grinding_mark", ((x0 + self._scratches[-1][1]) / 2, y)))
        self._smudges = []
        for _ in range(int(rng.choice(3, p=[0.5, 0.35, 0.15]))):
            p = (rng.uniform(0, L), rng.uniform(0, Wc))
            self._smudges.append((p, rng.uniform(2, 8), rng.uniform(0.1, 0.3)))
            out.append(("smudge", p))
        return out

    # ------------------------------------------------------------------ rendering
    def layers(self, rng, ctx: Context, placed: Placed) -> list[Layer]:
        Wc = self.Wc
        s0, s1 = self.s_ext
        pad = 0.6
        lo_s, hi_s = s0 - pad, s1 + pad
        xp = self.to_layout(np.array([[s0, 0], [s1, 0]]))[:, 0]
        area_p = (xp[1] - xp[0] + 2 * pad) * (Wc + 2 * pad)
        r = layer_res(ctx, area_p, 1.6)
        r = max(r, ctx.px_per_mm)
        hs = int(math.ceil((Wc + 2 * pad) * r))
        ws = int(math.ceil((hi_s - lo_s) * r))
        A_s = grid_A(lo_s, -pad, r)
        rgb = self._surface(rng, (hs, ws), r, A_s, ctx, placed)
        # curvature shading per surface column
        s_col = (np.arange(ws, dtype=np.float64) + 0.5) / r + lo_s
        phi = (s_col - self.L / 2) / self.R if self.curved else np.zeros(ws)
        Lv = ctx.light.vec()
        # surface normal in the layout frame tilts along x with phi (z up towards the camera)
        diffuse = np.clip(np.sin(phi) * Lv[0] + np.cos(phi) * Lv[2], 0.05, 1.0)
        diffuse /= max(float(np.cos(0) * Lv[2]), 0.2)
        hvec = Lv + np.array([0, 0, 1.0])
        hvec /= np.linalg.norm(hvec)
        phi_h = math.atan2(hvec[0], hvec[2])
        width = math.radians(rng.uniform(4, 14))
        spec = np.exp(-(((phi - phi_h) / width) ** 2)) * rng.uniform(0.15, 0.5)
        # ground metal is mostly specular: towards grazing it reflects the dim surroundings
        grazing = np.cos(np.clip(phi, -1.55, 1.55)) ** 0.8
        shade = ((0.2 + 0.8 * grazing) * (0.7 + 0.3 * np.clip(diffuse, 0, 1.3))).astype(np.float32)
        rgb *= shade[None, :, None]
        rgb += spec.astype(np.float32)[None, :, None]
        # rounded coupon edges: a highlight line and a dark line along both long edges
        t = (np.arange(hs, dtype=np.float32) + 0.5) / np.float32(r) - np.float32(pad)
        de = np.minimum(np.abs(t), np.abs(t - Wc))
        rgb *= (1.0 - 0.35 * np.exp(-((de / 0.25) ** 2)))[:, None, None]
        if not self.curved:
            alpha = fill_alpha((hs, ws), [to_px(A_s, self.geo.specimen_poly)])
            return [Layer(rgb.astype(np.float32), alpha, A_s)]
        # remap the surface canvas onto the projected (layout) frame
        x_lo, x_hi = xp[0] - pad, xp[1] + pad
        wp = int(math.ceil((x_hi - x_lo) * r))
        A_p = grid_A(x_lo, -pad, r)
        xcol = (np.arange(wp, dtype=np.float64) + 0.5) / r + x_lo
        s_of = self.to_surface_x(xcol)
        comp = 1.0 / np.sqrt(np.clip(1 - ((xcol - self.Lp / 2) / self.R) ** 2, 1e-4, 1))  # ds/dx
        src = (s_of - lo_s) * r - 0.5
        out = np.zeros((hs, wp, 3), np.float32)
        levels = [1.0, 1.6, 2.5, 4.0, 7.0]
        which = np.argmin(np.abs(np.log(comp[:, None]) - np.log(np.array(levels))[None, :]), axis=1)
        map_y = np.repeat(np.arange(hs, dtype=np.float32)[:, None], wp, axis=1)
        map_x = np.repeat(src.astype(np.float32)[None, :], hs, axis=0)
        for k, c in enumerate(levels):
            cols = which == k
            if not cols.any():
                continue
            sig = 0.45 * math.sqrt(c * c - 1)
            img = cv2.GaussianBlur(rgb, (0, 0), sigmaX=sig, sigmaY=0.01) if sig > 0.25 else rgb
            res = cv2.remap(img, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
            out[:, cols] = res[:, cols]
        spec_poly = self.geo.specimen_poly
        alpha = fill_alpha((hs, wp), [to_px(A_p, spec_poly)])
        return [Layer(out, alpha, A_p)]

    def _surface(self, rng, shape, r, A, ctx: Context, placed: Placed) -> np.ndarray:
        """Ground, stretched metal in surface mm: grinding marks, orange peel, weld zone."""
        h, w = shape
        g = rng.uniform(0.5, 0.75)
        base = np.array([g, g * rng.uniform(0.98, 1.01), g * rng.uniform(0.98, 1.04)], np.float32)
        marks = _noise.fractal(
            rng, shape, rng.uniform(15, 40) * r, cell_y=max(rng.uniform(0.03, 0.1) * r, 0.6), angle_deg=float(rng.normal(0, 1.5)), octaves=2
        )
        coarse = _noise.value(rng, shape, rng.uniform(30, 60) * r, cell_y=max(rng.uniform(0.3, 0.8) * r, 0.8))
        peel_cell = rng.uniform(0.25, 0.8)
        peel_h = _noise.fractal(rng, shape, 1.5 * peel_cell * r, cell_y=peel_cell * r, octaves=3)
        peel_h *= np.float32(rng.uniform(0.015, 0.06) * r)
        peel = _noise.shade(peel_h, ctx.light.azimuth_deg, strength=0.5)
        lum = 1.0 + np.float32(rng.uniform(0.04, 0.1)) * marks + np.float32(rng.uniform(0.02, 0.06)) * coarse + peel
        lum += 0.03 * _noise.fractal(rng, shape, 10 * r)
        # the weld zone across the coupon: a slightly different tone between two fusion lines
        X = (np.arange(w, dtype=np.float32) + 0.5) / np.float32(r) + np.float32(A[0, 2] - 0.5 / r)
        wz = rng.uniform(6, 25)
        c = self.L / 2 + rng.normal(0, 0.1 * self.L)
        wzone = np.clip(1 - np.abs(X - c) / (wz / 2), 0, 1) ** 0.3
        lum *= (1 + np.float32(rng.uniform(-0.08, 0.08)) * wzone)[None, :]
        rgb = lum[..., None] * base
        tint = rng.random() < 0.3
        if tint:  # faint heat tint left from welding or a light etch
            tcol = np.array([1.04, 1.0, 0.9], np.float32) if rng.random() < 0.5 else np.array([0.95, 0.98, 1.06], np.float32)
            rgb *= (1 + (tcol - 1)[None, None, :] * wzone[None, :, None])
        for x0, x1, y, wid in getattr(self, "_scratches", []):
            pts = np.array([[x0, y], [x1, y]])
            pp = to_px(A, pts)
            m = np.zeros(shape, np.uint8)
            cv2.line(m, tuple(np.round(pp[0] * 16).astype(int)), tuple(np.round(pp[1] * 16).astype(int)), 255, max(1, int(round(wid * r))), cv2.LINE_AA, shift=4)
            rgb *= (1 - 0.18 * m.astype(np.float32)[..., None] / 255.0)
        for p, size, k in getattr(self, "_smudges", []):
            paint_smudge(rgb, A, p[0], p[1], size, rng, strength=k)
        for d in placed.defects:
            paint_defect(rgb, A, d, rng, ctx.light)
        for p, size, tone in getattr(self, "_specks", []):
            paint_speck(rgb, A, p[0], p[1], size, tone)
        return rgb.astype(np.float32)
