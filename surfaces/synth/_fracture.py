"""Fracture faces: fillet-weld break test and pipeline nick-break test.

Face frame (= layout frame): x along the weld from the face start, y across
(throat or wall) from the y = 0 edge, mm.  The root edge is straight; the
other long edge of a fillet face wanders a little, as a real break does.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from . import _noise, _shapes, _textures
from ._paint import Defect, paint_defect, paint_smudge, paint_speck
from ._render import Layer, fill_alpha, grid_A, to_px
from ._scene import Context, Geometry, Placed, SynthError, clear_of, layer_res, parse_specs, place_specs

TINTS = {
    "straw": [0.78, 0.66, 0.42],
    "blue": [0.36, 0.45, 0.64],
    "brown": [0.5, 0.36, 0.26],
    "grey": [0.46, 0.46, 0.47],
    "purple": [0.48, 0.38, 0.52],
}
KIND_WEIGHTS = {"pore": 0.4, "inclusion": 0.25, "unfused": 0.18, "crack": 0.17}
SPEC_KEYS = {
    "kind", "shape", "x_mm", "y_mm", "d_mm", "a_mm", "b_mm", "r_mm", "length_mm", "width_mm",
    "angle_deg", "side", "tint",
}  # fmt: skip


def _loguniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


class FractureBuilder:
    scene = "fracture"

    def __init__(self, test: str, *, length_mm=None, width_mm=None, plate=None):
        if test not in ("fillet-break", "nick-break"):
            raise SynthError(f"test={test!r} is not a fracture test (use 'fillet-break' or 'nick-break')")
        self.test = test
        self.fixed_length = length_mm
        self.fixed_width = width_mm
        self.plate_kind = plate
        self.geo: Geometry | None = None

    # ------------------------------------------------------------------ geometry
    def to_layout(self, pts):
        return np.asarray(pts, float)

    def geometry(self, rng, *, shrink: float = 1.0) -> Geometry:
        fillet = self.test == "fillet-break"
        if fillet:
            L = self.fixed_length or max(60.0, rng.uniform(60.0, 160.0) * shrink)
            W = self.fixed_width or rng.uniform(4.0, 12.0)
        else:
            L = self.fixed_length or max(20.0, rng.uniform(20.0, 30.0) * shrink)
            W = self.fixed_width or rng.uniform(6.0, 20.0)
        if not (3.0 <= L <= 400.0 and 1.0 <= W <= 60.0):
            raise SynthError(f"face {L:g} x {W:g} mm is out of range (length 3..400, width 1..60 mm)")
        root = str(rng.choice(["y0", "y1"]))
        n = int(max(200, 6 * L))
        x = np.linspace(0.0, L, n)
        amp = (rng.uniform(0.1, 0.4) if fillet else rng.uniform(0.02, 0.12)) * min(1.0, W / 6)
        wav = np.zeros_like(x)
        for k in range(1, 9):
            wav += rng.normal(0, amp / k**0.7) * np.sin(2 * np.pi * k * x / L * rng.uniform(0.8, 1.2) + rng.uniform(0, 6.3))
        wav -= wav.mean()
        wav *= np.clip(np.minimum(x, L - x) / max(0.5, 0.1 * W), 0, 1)  # meets the straight ends
        if root == "y0":
            y_root, y_free = np.zeros_like(x), W + wav
        else:
            y_root, y_free = np.full_like(x, W), wav
        face = np.r_[np.c_[x, y_root], np.c_[x[::-1], y_free[::-1]]]
        area = _shapes.polygon_area(face)
        params = {"wander_mm": float(amp), "true_area_mm2": area, "root_y_mm": 0.0 if root == "y0" else float(W)}
        toe_sign = 1.0 if root == "y0" else -1.0
        if fillet:
            bead = rng.uniform(0.6, 1.3) * W
            ex0, ex1 = rng.uniform(4, 25), rng.uniform(4, 25)
            p_root, p_toe = rng.uniform(6, 30), rng.uniform(6, 30)
            if root == "y0":
                ylo, yhi = -p_root, W + bead + p_toe
            else:
                ylo, yhi = -bead - p_toe, W + p_root
            spec = np.array([[-ex0, ylo], [L + ex1, ylo], [L + ex1, yhi], [-ex0, yhi]])
            params.update(bead_mm=bead, plate_thickness_mm=rng.uniform(6, 20))
            height = params["plate_thickness_mm"]
        else:
            notch = rng.uniform(1.5, 3.5)
            cap, rootb = rng.uniform(1.0, 3.0), rng.uniform(0.4, 2.0)
            if root == "y0":
                ylo, yhi = -rootb, W + cap
            else:
                ylo, yhi = -cap, W + rootb
            spec = np.array([[-notch, ylo], [L + notch, ylo], [L + notch, yhi], [-notch, yhi]])
            params.update(notch_mm=notch, cap_mm=cap, root_bead_mm=rootb)
            height = rng.uniform(30, 70)
        params["toe_sign"] = toe_sign
        self.geo = Geometry(face, float(L), float(area / L), root, spec, float(height), params)
        return self.geo

    # ------------------------------------------------------------------ imperfections
    def place(self, rng, defects, distractors: bool) -> Placed:
        geo = self.geo
        assert geo is not None
        specs = parse_specs(defects, SPEC_KEYS, KIND_WEIGHTS, lambda: self._mixed(rng), "fracture")
        out = place_specs(
            rng, specs, self._make, self._fits, random_set=isinstance(defects, str),
            where=f"inside the {geo.length_mm:.0f} x {geo.width_mm:.1f} mm face",
        )  # fmt: skip
        dis = self._distractors(rng) if distractors else []
        return Placed(out, dis)

    def _mixed(self, rng) -> list[dict]:
        geo = self.geo
        n = int(rng.choice(7, p=[0.1, 0.2, 0.2, 0.18, 0.12, 0.1, 0.1]))
        kinds = list(KIND_WEIGHTS)
        specs = [{"kind": str(rng.choice(kinds, p=list(KIND_WEIGHTS.values())))} for _ in range(n)]
        if rng.random() < 0.15:  # a cluster of small pores
            cx, cy = rng.uniform(0.2, 0.8) * geo.length_mm, rng.uniform(0.3, 0.7) * geo.width_mm
            for _ in range(int(rng.integers(3, 8))):
                specs.append({
                    "kind": "pore",
                    "d_mm": _loguniform(rng, 0.3, 1.0),
                    "x_mm": cx + rng.normal(0, 1.5),
                    "y_mm": cy + rng.normal(0, 0.2 * geo.width_mm),
                    "_soft": True,
                })  # fmt: skip
        return specs

    def _inner(self):
        g = self.geo
        W, L = g.width_mm, g.length_mm
        amp = 2.5 * g.params["wander_mm"]
        if g.root_side == "y0":
            return 0.0, L, 0.0, W - amp
        return 0.0, L, amp, W

    def _fits(self, d: Defect, others: list[Defect], gap: float = 0.6) -> bool:
        x0, x1, y0, y1 = self._inner()
        m = 0.25
        p = d.poly
        at_root = d.extra.get("at_root", False)
        if p[:, 0].min() < x0 + m or p[:, 0].max() > x1 - m:
            return False
        lo = y0 - 1e-9 if (at_root and self.geo.root_side == "y0") else y0 + m
        hi = y1 + 1e-9 if (at_root and self.geo.root_side == "y1") else y1 - m
        if p[:, 1].min() < lo or p[:, 1].max() > hi:
            return False
        return clear_of(p, others, gap)

    def _make(self, rng, s: dict) -> Defect | None:
        g = self.geo
        L, W = g.length_mm, g.width_mm
        kind = s["kind"]
        ang = s.get("angle_deg")
        if kind == "pore":
            shape = s.get("shape") or ("circle" if "d_mm" in s else None)
            if shape is None:
                shape = str(rng.choice(["circle", "ellipse", "capsule"], p=[0.7, 0.15, 0.15]))
            if shape == "circle":
                d = float(s.get("d_mm") or _loguniform(rng, 0.3, min(4.0, 0.8 * W)))
                a = b = d / 2
            elif shape == "ellipse":
                a = float(s.get("a_mm") or _loguniform(rng, 0.25, min(2.0, 0.4 * W)))
                b = float(s.get("b_mm") or a / rng.uniform(1.2, 2.0))
            elif shape == "capsule":
                r = float(s.get("r_mm") or _loguniform(rng, 0.2, min(1.0, 0.25 * W)))
                length = float(s.get("length_mm") or 2 * r * rng.uniform(2.0, 4.0))
            else:
                raise SynthError(f"pore shape {shape!r} is unknown (use circle, ellipse or capsule)")
            ang = float(rng.normal(0, 20) if ang is None else ang)
            half = (length / 2 if shape == "capsule" else a) + 0.3
            cx = float(s.get("x_mm", rng.uniform(half, max(half, L - half))))
            cy = float(s.get("y_mm", rng.uniform(0, W)))
            if shape == "capsule":
                poly, an = _shapes.capsule(cx, cy, length, r, ang)
                sh = {"shape": "capsule", "cx_mm": cx, "cy_mm": cy, "length_mm": length, "r_mm": r, "angle_deg": ang}
                iso = "2016"
            else:
                poly, an = _shapes.ellipse(cx, cy, a, b, ang)
                if b > a:
                    a, b, ang = b, a, ang + 90
                sh = {"shape": shape, "cx_mm": cx, "cy_mm": cy, "a_mm": a, "b_mm": b, "angle_deg": ang}
                if shape == "circle":
                    sh["d_mm"] = 2 * a
                iso = "2011" if shape == "circle" or a / b < 1.5 else "2015"
            return Defect("pore", iso, poly, an, sh)
        if kind == "inclusion":
            gmax = float(s.get("length_mm") or _loguniform(rng, 0.5, min(6.0, 0.9 * L)))
            wid = float(s.get("width_mm") or max(0.3, min(gmax / rng.uniform(1.2, 5.0), 0.6 * W)))
            ang = float(rng.normal(0, 12) if ang is None else ang)
            cx = float(s.get("x_mm", rng.uniform(0, L)))
            cy = float(s.get("y_mm", rng.uniform(0, W)))
            poly = _shapes.blob(rng, cx, cy, gmax / 2, wid / 2, ang)
            sh = {"shape": "blob", "cx_mm": cx, "cy_mm": cy, "nominal_length_mm": gmax, "nominal_width_mm": wid, "angle_deg": ang}
            return Defect("inclusion", "301", poly, None, sh)
        if kind == "unfused":
            side = s.get("side") or str(rng.choice(["root", "wall"], p=[0.7, 0.3]))
            length = float(s.get("length_mm") or rng.uniform(3.0, min(40.0, 0.8 * L)))
            wid = float(s.get("width_mm") or rng.uniform(0.5, min(3.0, 0.45 * W)))
            x0 = float(s.get("x_mm", rng.uniform(0, max(0.0, L - length))))
            tint = s.get("tint") or str(rng.choice(list(TINTS)))
            if tint not in TINTS:
                raise SynthError(f"unfused tint {tint!r} is unknown (use {', '.join(TINTS)})")
            if side == "root":
                y_edge = g.params["root_y_mm"]  # the straight root edge itself
                sign = 1.0 if g.root_side == "y0" else -1.0
                poly = _shapes.band(rng, x0, x0 + length, y_edge, wid, sign=sign)
                iso = "4021"
            elif side == "wall":
                yc = float(s.get("y_mm", rng.uniform(0.3, 0.7) * W))
                poly = _shapes.strip(rng, x0, x0 + length, yc, wid)
                iso = "4011"
            else:
                raise SynthError(f"unfused side {side!r} is unknown (use 'root' or 'wall')")
            # heat tints on a real face are muted: mix towards the face's grey
            mix = rng.uniform(0.35, 0.7)
            rgb = ((mix * np.array(TINTS[tint]) + (1 - mix) * 0.5) * rng.uniform(0.85, 1.15)).clip(0, 1).tolist()
            sh = {"shape": "band", "side": side, "x0_mm": x0, "length_mm": length, "nominal_width_mm": wid, "tint": tint, "tint_rgb": rgb}
            return Defect("unfused", iso, poly, None, sh, {"at_root": side == "root"})
        # crack
        ang = float(rng.choice([rng.normal(0, 15), rng.normal(90, 20), rng.uniform(0, 180)]) if ang is None else ang)
        across = abs(math.sin(math.radians(ang)))
        lmax = min(15.0, 0.85 * L, (0.8 * W / across) if across > 0.05 else 1e9)
        if lmax < 1.0 and "length_mm" not in s:
            return None
        length = float(s.get("length_mm") or rng.uniform(1.0, max(1.0, lmax)))
        wid = float(s.get("width_mm") or rng.uniform(0.1, 0.3))
        c, sn = math.cos(math.radians(ang)), math.sin(math.radians(ang))
        cx = float(s.get("x_mm", rng.uniform(0, L)))
        cy = float(s.get("y_mm", rng.uniform(0, W)))
        poly, _ = _shapes.crack(rng, cx - c * length / 2, cy - sn * length / 2, length, wid, ang)
        sh = {"shape": "crack", "cx_mm": cx, "cy_mm": cy, "chord_mm": length, "nominal_width_mm": wid, "angle_deg": ang}
        return Defect("crack", "100", poly, None, sh)

    def _distractors(self, rng) -> list:
        g = self.geo
        L, W = g.length_mm, g.width_mm
        x0, x1, y0, y1 = self._inner()
        out = []
        self._specks = []
        for _ in range(int(rng.integers(5, 40))):
            p = (rng.uniform(x0, x1), rng.uniform(y0, y1))
            d = rng.uniform(0.04, 0.18)
            self._specks.append((p, d, float(rng.choice([rng.uniform(0.05, 0.2), rng.uniform(0.8, 1.0)]))))
            out.append(("speck", p))
        self._smudges = []
        for _ in range(int(rng.choice(4, p=[0.4, 0.3, 0.2, 0.1]))):
            p = (rng.uniform(x0, x1), rng.uniform(y0, y1))
            self._smudges.append((p, rng.uniform(1.5, min(8.0, max(2.0, 1.5 * W))), rng.uniform(0.15, 0.4)))
            out.append(("smudge", p))
        self._facets = []
        for _ in range(int(rng.integers(0, 6))):
            p = (rng.uniform(x0, x1), rng.uniform(y0, y1))
            self._facets.append((p, rng.uniform(0.15, 0.5)))
            out.append(("bright_facet", p))
        self._edge_shadow = None
        if rng.random() < 0.6:
            side = str(rng.choice(["y0", "y1"]))
            w = rng.uniform(0.3, 1.2)
            self._edge_shadow = (side, w, rng.uniform(0.15, 0.4))
            out.append(("edge_shadow", (L / 2, w / 2 if side == "y0" else W - w / 2)))
        return out

    # ------------------------------------------------------------------ rendering
    def layers(self, rng, ctx: Context, placed: Placed) -> list[Layer]:
        return [self._specimen_layer(rng, ctx, placed), self._face_layer(rng, ctx, placed)]

    def _specimen_layer(self, rng, ctx: Context, placed: Placed) -> Layer:
        g = self.geo
        sp = g.specimen_poly
        lo, hi = sp.min(0) - 0.5, sp.max(0) + 0.5
        r = layer_res(ctx, float(np.prod(hi - lo)), 1.0)
        h, w = int(math.ceil((hi[1] - lo[1]) * r)), int(math.ceil((hi[0] - lo[0]) * r))
        A = grid_A(lo[0], lo[1], r)
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        X = xx / np.float32(r) + np.float32(lo[0] + 0.5 / r)
        Y = yy / np.float32(r) + np.float32(lo[1] + 0.5 / r)
        L, W = g.length_mm, g.width_mm
        root0 = g.root_side == "y0"
        kind = self.plate_kind or str(rng.choice(_textures.PLATES, p=[0.35, 0.3, 0.15, 0.2]))
        g.params["plate"] = kind
        if self.test == "fillet-break":
            rgb, rust = _textures.plate(rng, (h, w), r, kind)
            bead = g.params["bead_mm"]
            # weld bead on the toe side: rippled, convex, heat-tinted at its edges
            yc = W + bead / 2 if root0 else -bead / 2
            # work only on the rows the bead and its heat tint reach
            r0 = max(0, int((yc - bead / 2 - 8.0 - lo[1]) * r))
            r1 = min(h, int(math.ceil((yc + bead / 2 + 8.0 - lo[1]) * r)) + 1)
            hs = (r1 - r0, w)
            Xb, Yb = X[r0:r1], Y[r0:r1]
            v = (Yb - np.float32(yc)) / np.float32(bead / 2)
            endfall = np.clip(np.minimum(Xb + 1.0, L + 1.0 - Xb) / max(bead / 2, 0.5), 0, 1)
            inb = np.clip((1 - v * v) * endfall, 0, 1)
            prof = np.sqrt(inb)
            pitch = rng.uniform(0.7, 2.0)
            phase = _noise.value(rng, hs, 6 * r) * np.float32(0.6)
            ripple = np.sin((Xb - np.float32(rng.uniform(0.5, 2.0)) * v * v * bead / 2) * np.float32(2 * math.pi / pitch) + phase)
            ripple *= np.float32(rng.uniform(0.2, 0.6))
            hgt = prof * np.float32(0.4 * bead * r) + ripple * np.float32(0.02 * r) * prof
            shade = _noise.shade(hgt.astype(np.float32), ctx.light.azimuth_deg, strength=0.5)
            bead_lum = 0.55 + 0.06 * ripple * prof + shade + 0.06 * _noise.fractal(rng, hs, 2.0 * r)
            bead_col = np.array(rng.choice([[0.42, 0.42, 0.45], [0.36, 0.34, 0.33], [0.48, 0.46, 0.42]]), np.float32)
            bead_rgb = bead_lum[..., None] * bead_col
            # glassy silicate islands on the bead
            isl = _noise.blotches(rng, hs, 1.5 * r, rng.uniform(0.0, 0.04), edge=0.5) * (prof > 0.3)
            bead_rgb = bead_rgb * (1 - isl[..., None]) + isl[..., None] * np.array([0.22, 0.17, 0.11], np.float32)
            a_b = np.clip(inb * 4, 0, 1)[..., None]
            # heat tint on the plate beside the bead
            dist = np.abs(v) - 1
            tint_w = rng.uniform(0.0, 1.0)
            band = np.exp(-np.clip(dist, 0, None) * bead / max(2.0, 4 * tint_w)) * (dist > 0) * endfall
            tcol = np.array(TINTS[str(rng.choice(["straw", "blue", "brown", "purple"]))], np.float32)
            sub = rgb[r0:r1]
            sub = sub * (1 - 0.35 * tint_w * band[..., None]) + 0.35 * tint_w * band[..., None] * tcol * sub.mean()
            rgb[r0:r1] = sub * (1 - a_b) + bead_rgb * a_b
            # the root line: the gap the web plate left
            y_r = g.params["root_y_mm"]
            q0 = max(0, int((y_r - 2.0 - lo[1]) * r))
            q1 = min(h, int(math.ceil((y_r + 2.0 - lo[1]) * r)) + 1)
            Xq, Yq = X[q0:q1], Y[q0:q1]
            line = np.exp(-(((Yq - np.float32(y_r)) / np.float32(rng.uniform(0.15, 0.4))) ** 2)) * ((Xq > -1) & (Xq < L + 1))
            rgb[q0:q1] *= (1 - 0.6 * line)[..., None]
            # spatter on the plate
            for _ in range(int(rng.integers(0, 25))):
                sx = rng.uniform(lo[0], hi[0])
                sy = yc + rng.normal(0, 1.5 * bead)
                paint_speck(rgb, A, sx, sy, rng.uniform(0.3, 1.0), float(rng.uniform(0.25, 0.45)))
            alpha = fill_alpha((h, w), [to_px(A, _jag(rng, sp))])
        else:
            rgb, rust = _textures.plate(rng, (h, w), r, kind)
            notch = g.params["notch_mm"]
            cap, rootb = g.params["cap_mm"], g.params["root_bead_mm"]
            # saw-cut notch faces at both ends: fine parallel marks across the wall
            marks = _noise.value(rng, (h, w), max(0.08 * r, 0.7), cell_y=20 * r)
            saw = (np.float32(rng.uniform(0.5, 0.68)) + 0.05 * marks)[..., None] * np.array([1.0, 1.0, 1.02], np.float32)
            in_notch = ((X < 0) | (X > L)).astype(np.float32)[..., None]
            rgb = rgb * (1 - in_notch) + saw * in_notch
            # weld reinforcement bulges (cap on the far side of the root, root bead at the root)
            for y_edge, hgt_mm, sign in ((0.0, rootb if root0 else cap, -1.0), (W, cap if root0 else rootb, 1.0)):
                t = (Y - np.float32(y_edge)) * np.float32(sign) / np.float32(max(hgt_mm, 0.2))
                inside = ((t > 0) & (t <= 1)).astype(np.float32)
                slope = np.clip(t, 0, 1)
                lum = 0.5 - 0.25 * slope + 0.05 * _noise.fractal(rng, (h, w), 1.0 * r)
                rgb = rgb * (1 - inside[..., None]) + inside[..., None] * (lum[..., None] * np.array([0.8, 0.8, 0.85], np.float32))
            alpha = fill_alpha((h, w), [to_px(A, _jag(rng, sp, amp=0.15))])
        if placed is not None and rust.max() > 0.3:
            n, lab, stats, cents = cv2.connectedComponentsWithStats((rust > 0.3).astype(np.uint8))
            order = np.argsort(-stats[1:, cv2.CC_STAT_AREA])[:5] + 1
            for k in order:
                if stats[k, cv2.CC_STAT_AREA] > (1.0 * r) ** 2:
                    cx, cy = cents[k]
                    pt = (float(cx / r + lo[0]), float(cy / r + lo[1]))
                    if not _shapes.point_in_polygon(np.array([pt]), g.face_poly)[0]:
                        placed.distractors.append(("rust", pt))
        # edge highlights / bevel of the plate outline
        edge = cv2.morphologyEx((alpha > 0.5).astype(np.uint8), cv2.MORPH_GRADIENT, np.ones((3, 3), np.uint8))
        rgb = rgb * (1 + 0.25 * cv2.GaussianBlur(edge.astype(np.float32), (0, 0), max(0.6, 0.2 * r))[..., None])
        return Layer(rgb.astype(np.float32), alpha, A)

    def _face_layer(self, rng, ctx: Context, placed: Placed) -> Layer:
        g = self.geo
        lo, hi = g.face_poly.min(0) - 0.6, g.face_poly.max(0) + 0.6
        r = layer_res(ctx, float(np.prod(hi - lo)), 1.7)
        r = max(r, 1.2 * ctx.px_per_mm)
        h, w = int(math.ceil((hi[1] - lo[1]) * r)), int(math.ceil((hi[0] - lo[0]) * r))
        A = grid_A(lo[0], lo[1], r)
        rgb, desc = _textures.fracture(rng, (h, w), r, ctx.light.azimuth_deg)
        g.params["fracture"] = desc
        # darker, slightly different tone towards the root (slower cooling) - a mild gradient
        yy = (np.arange(h, dtype=np.float32)[:, None] / np.float32(r) + np.float32(lo[1])) / np.float32(g.width_mm)
        if g.root_side == "y1":
            yy = 1 - yy
        rgb *= (1 + np.float32(rng.uniform(-0.12, 0.12)) * (yy - 0.5))[..., None]
        W = g.width_mm
        es = getattr(self, "_edge_shadow", None)
        if es is not None:
            side, wid, k = es
            d = yy * W if (side == "y0") == (g.root_side == "y0") else (1 - yy) * W
            rgb *= (1 - k * np.exp(-np.clip(d, 0, None) / np.float32(wid)))[..., None]
        for p, size in getattr(self, "_facets", []):
            paint_speck(rgb, A, p[0], p[1], size, float(rng.uniform(0.85, 1.0)))
        for p, size, k in getattr(self, "_smudges", []):
            paint_smudge(rgb, A, p[0], p[1], size, rng, strength=k)
        for d in placed.defects:
            paint_defect(rgb, A, d, rng, ctx.light)
        for p, size, tone in getattr(self, "_specks", []):
            paint_speck(rgb, A, p[0], p[1], size, tone)
        alpha = fill_alpha((h, w), [to_px(A, g.face_poly)])
        return Layer(rgb.astype(np.float32), alpha, A)


def _jag(rng, rect: np.ndarray, *, amp: float = 0.4) -> np.ndarray:
    """Rectangle with slightly irregular (cut) edges."""
    out = []
    for i in range(4):
        p, q = rect[i], rect[(i + 1) % 4]
        n = max(8, int(np.hypot(*(q - p)) / 2))
        t = np.linspace(0, 1, n, endpoint=False)
        e = q - p
        nrm = np.array([-e[1], e[0]]) / max(np.hypot(*e), 1e-9)
        j = np.cumsum(rng.normal(0, amp * 0.3, n))
        j -= np.linspace(0, j[-1], n)
        out.append(p + t[:, None] * e + (j * np.sin(np.pi * t))[:, None] * nrm)
    return np.concatenate(out)
