"""Small constructed bend-coupon photos for the bend tests (truth known by construction).

A coupon of outer radius ``R`` bent to ``angle`` degrees lies with its convex
surface up; the camera looks down at the marker plane, which passes through
the bend's apex.  A surface point at true arc length ``s`` from the apex is
drawn at ``u = R sin(s / R)`` (analytic orthographic projection of a
cylinder; the height below the apex is ignored).  Openings are drawn in true
surface coordinates, so their true greatest dimension is known exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np

from surfaces.geometry import apply_h
from surfaces.model import Calibration, MarkerHit

CANVAS_PPM = 24.0


@dataclass
class Opening:
    kind: str  # crack / pore
    s0: float  # start, true mm from the apex along the coupon
    y0: float  # start, mm across from the y=0 edge
    length: float
    angle_deg: float  # in true surface axes
    width: float = 0.15
    at_edge: bool = False


@dataclass
class Built:
    rgb: np.ndarray
    calib: Calibration
    H_plane_to_photo: np.ndarray
    openings: list
    truth: list = field(default_factory=list)  # dicts: greatest_mm, centroid_plane_mm, at_edge
    coupon: dict = field(default_factory=dict)


def _noise(rng, shape, cell, cell_y=None):
    cy = cell if cell_y is None else cell_y
    gh, gw = int(shape[0] / cy) + 3, int(shape[1] / cell) + 3
    g = rng.standard_normal((gh, gw)).astype(np.float32)
    up = cv2.resize(g, (int(gw * cell), int(gh * cy)), interpolation=cv2.INTER_CUBIC)
    return up[: shape[0], : shape[1]]


def build(
    seed: int,
    *,
    R: float = 30.0,
    width: float = 38.0,
    angle: float = 180.0,
    axis_deg: float = 8.0,
    table: str = "dark",
    tilt_deg: float = 12.0,
    photo_ppm: float = 9.0,
    openings: list | None = None,
    scratches: float = 1.0,
    peel: float = 1.0,
) -> Built:
    rng = np.random.default_rng(seed)
    half = math.radians(angle) / 2
    u_max = R * math.sin(min(half, math.pi / 2))
    s_max = R * min(half, math.pi / 2)
    # plane layout: coupon centred at (0, 0), marker at (-u_max - 35, -30)
    P = CANVAS_PPM
    X0, Y0, X1, Y1 = -u_max - 70, -55, u_max + 30, 55
    Wc, Hc = int((X1 - X0) * P), int((Y1 - Y0) * P)
    A = np.array([[1 / P, 0, X0 + 0.5 / P], [0, 1 / P, Y0 + 0.5 / P], [0, 0, 1.0]])  # canvas px -> plane mm
    base_t = (45.0, 40.0, 36.0) if table == "dark" else (205.0, 200.0, 190.0)
    canvas = np.empty((Hc, Wc, 3), np.float32)
    tn = _noise(rng, (Hc, Wc), 3 * P) * 6 + _noise(rng, (Hc, Wc), 0.4 * P) * 4
    for c in range(3):
        canvas[..., c] = base_t[c] + tn
    # card: white square with a black marker of 20 mm
    mk = 20.0
    mx, my = -u_max - 55, -35.0
    cc = lambda X, Y: (int((X - X0) * P), int((Y - Y0) * P))  # noqa: E731
    cv2.rectangle(canvas, cc(mx - 8, my - 8), cc(mx + mk + 8, my + mk + 8), (245, 245, 240), -1)
    cv2.rectangle(canvas, cc(mx, my), cc(mx + mk, my + mk), (20, 20, 20), -1)
    for i in range(4):
        for j in range(4):
            if rng.random() < 0.5:
                a, b = mx + mk / 6 * (1 + i), my + mk / 6 * (1 + j)
                cv2.rectangle(canvas, cc(a, b), cc(a + mk / 6, b + mk / 6), (245, 245, 240), -1)
    # coupon: u along axis, v across, centred at the origin
    ph = math.radians(axis_deg)
    ux, uy = np.array([math.cos(ph), math.sin(ph)]), np.array([-math.sin(ph), math.cos(ph)])
    yy, xx = np.mgrid[0:Hc, 0:Wc].astype(np.float32)
    Xp = X0 + (xx + 0.5) / P
    Yp = Y0 + (yy + 0.5) / P
    u = Xp * ux[0] + Yp * ux[1]
    v = Xp * uy[0] + Yp * uy[1] + width / 2  # 0..width across
    on = (np.abs(u) < u_max) & (v >= 0) & (v <= width)
    th = np.arcsin(np.clip(u / R, -1, 1))
    s = R * th
    # true-surface texture sampled at (s, v)
    T = 20.0  # texture px/mm
    tw, thh = int(2 * s_max * T) + 8, int(width * T) + 8
    peel_t = _noise(rng, (thh, tw), 0.5 * T) * 5 * peel + _noise(rng, (thh, tw), 0.2 * T) * 3 * peel
    scr = _noise(rng, (thh, tw), 12 * T, 0.12 * T) * 7 * scratches
    dark = np.zeros((thh, tw), np.float32)
    truth = []
    for o in openings or []:
        a = math.radians(o.angle_deg)
        L = o.length
        if o.kind == "crack":
            n = 40
            t = np.linspace(0, 1, n)
            px = o.s0 + L * t * math.cos(a) + rng.normal(0, 0.04, n) * L * (t * (1 - t) > 0)
            py = o.y0 + L * t * math.sin(a) + rng.normal(0, 0.04, n) * L * (t * (1 - t) > 0)
            wd = o.width * np.sqrt(np.clip(np.sin(np.pi * t) * 1.6, 0, 1)) if not o.at_edge else o.width * np.sqrt(np.clip(1 - t, 0, 1) * 1.3).clip(0, 1)
            # polygon from centreline and widths
            dx, dy = np.gradient(px), np.gradient(py)
            nn = np.hypot(dx, dy) + 1e-9
            nx, ny = -dy / nn, dx / nn
            left = np.c_[px + nx * wd / 2, py + ny * wd / 2]
            right = np.c_[px - nx * wd / 2, py - ny * wd / 2]
            poly = np.r_[left, right[::-1]]
        else:
            t = np.linspace(0, 2 * np.pi, 60, endpoint=False)
            poly = np.c_[o.s0 + L / 2 * np.cos(t), o.y0 + L / 2 * 0.8 * np.sin(t)]
        pts = ((poly + np.array([s_max, 0])) * T).astype(np.int32)
        cv2.fillPoly(dark, [pts], 1.0, lineType=cv2.LINE_AA)
        d = np.sqrt(((poly[:, None] - poly[None]) ** 2).sum(-1))
        g = float(d.max())
        cs = poly.mean(axis=0)
        # centroid in plane mm
        uc = R * math.sin(cs[0] / R)
        vc = cs[1] - width / 2
        truth.append({"greatest_mm": g, "centroid_plane_mm": uc * ux + vc * uy, "at_edge": o.at_edge, "kind": o.kind, "s": cs[0], "y": cs[1]})
    samp = lambda img: cv2.remap(img, ((s + s_max) * T - 0.5).astype(np.float32), (v * T - 0.5).astype(np.float32), cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)  # noqa: E731
    tex = samp(peel_t + scr)
    dk = samp(dark)
    shade = 0.35 + 0.65 * np.cos(th) ** 1.5
    edge_soft = np.clip(np.minimum(v, width - v) / 0.6, 0, 1) ** 0.5
    metal = (170.0 + tex) * shade * (0.75 + 0.25 * edge_soft)
    metal = metal * (1 - 0.85 * dk)
    for c, tint in enumerate((1.0, 1.0, 1.03)):
        canvas[..., c] = np.where(on, metal * tint, canvas[..., c])
    # camera
    from surfaces.synth._camera import pose

    Wp, Hp = 1800, 1300
    cam = pose(width=Wp, height=Hp, f_px=1.1 * Wp, tilt_deg=tilt_deg, tilt_azimuth_deg=float(rng.uniform(0, 360)),
               roll_deg=float(rng.uniform(-10, 10)), target_mm=(-20.0, 0.0), face_mm=(0.0, 0.0), px_per_mm=photo_ppm)
    Hpp = cam.H
    M = Hpp @ A
    sig = 0.45 * math.sqrt(max((P / photo_ppm) ** 2 - 1, 0))
    canvas = cv2.GaussianBlur(canvas, (0, 0), sig)
    photo = cv2.warpPerspective(canvas, M, (Wp, Hp), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
    photo = cv2.GaussianBlur(photo, (0, 0), 0.6)
    photo += rng.normal(0, 2.0, photo.shape).astype(np.float32)
    rgb = np.clip(photo, 0, 255).astype(np.uint8)
    corners_mm = np.array([[mx, my], [mx + mk, my], [mx + mk, my + mk], [mx, my + mk]])
    cpx = apply_h(Hpp, corners_mm)
    side = float(np.mean(np.linalg.norm(np.roll(cpx, -1, 0) - cpx, axis=1)))
    calib = Calibration(method="marker", H=np.linalg.inv(Hpp) / np.linalg.inv(Hpp)[2, 2], uncertainty_pct=0.3,
                        tilt_deg=tilt_deg, marker_mm=mk, markers=(MarkerHit(0, cpx, side, side / 6, 0.1),))
    return Built(rgb, calib, Hpp, openings or [], truth, {"R": R, "width": width, "u_max": u_max, "axis_deg": axis_deg,
                                                          "ux": ux, "uy": uy})


def shaded_face(seed: int, *, step: bool = True, length: float = 2.6, width: float = 0.25, angle_deg: float = 30.0,
                depth: float = 0.45, ppm: float = 16.0, surface: float = 135.0, centre_x: float = 15.3,
                taper: bool = False):
    """A rectified coupon face (30 x 14 mm at ``ppm``) with one thin crack, by default across the border of a highlight.

    The surface brightness rises from ``surface`` to ``surface + 105`` grey
    across ``x = 15 mm`` (a logistic step 0.7 mm wide: the border of a
    highlight on the curved surface) when ``step``, else stays at
    ``surface``; above 255 the 8-bit photo clips it at white.  A streaky
    grain along x (5 %) and the crack darken it multiplicatively.  The crack
    is a capsule (a line with round caps) of centre-line ``length`` and
    ``width`` mm centred at ``(centre_x, 7)`` mm: its greatest dimension is
    ``length + width`` (analytic geometry).  With ``taper`` it narrows to
    nothing at both tips instead (width ~ sqrt(sin(pi t)), as in
    :func:`build`) and its greatest dimension is the largest distance
    between its outline's vertices.

    Returns ``(rgb, greatest_mm, centre_mm)``.
    """
    rng = np.random.default_rng(seed)
    W, H = 30.0, 14.0
    h, w = int(H * ppm), int(W * ppm)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    X = (xx + 0.5) / ppm
    xb = 15.0
    B = surface + (105.0 / (1 + np.exp(-(X - xb) / 0.7)) if step else 0.0)
    g = rng.standard_normal((int(H / 0.25) + 3, int(W / 1.5) + 3)).astype(np.float32)
    grain = cv2.resize(g, (int((W / 1.5 + 3) * 1.5 * ppm), int((H / 0.25 + 3) * 0.25 * ppm)), interpolation=cv2.INTER_CUBIC)
    img = B * (1 + 0.05 * grain[:h, :w])
    a = math.radians(angle_deg)
    d = np.array([math.cos(a), math.sin(a)])
    c0 = np.array([centre_x, 7.0]) - length / 2 * d
    c1 = c0 + length * d
    f = 4  # drawn 4x finer, then averaged down (anti-aliased)
    m = np.zeros((h * f, w * f), np.uint8)
    greatest = length + width
    if taper:
        # a crack narrowing to nothing at both tips (width ~ sqrt(sin(pi t)), as in build())
        t = np.linspace(0.0, 1.0, 81)
        half = 0.5 * width * np.sqrt(np.clip(np.sin(np.pi * t) * 1.6, 0, 1))
        n = np.array([-d[1], d[0]])
        centre = c0[None] + t[:, None] * length * d[None]
        poly = np.r_[centre + half[:, None] * n, (centre - half[:, None] * n)[::-1]]
        cv2.fillPoly(m, [np.round(poly * ppm * f).astype(np.int32)], 255, lineType=cv2.LINE_AA)
        greatest = float(np.sqrt(((poly[:, None] - poly[None]) ** 2).sum(-1)).max())
    else:
        cv2.line(m, tuple(int(v) for v in np.round(c0 * ppm * f)), tuple(int(v) for v in np.round(c1 * ppm * f)), 255,
                 int(round(width * ppm * f)), lineType=cv2.LINE_AA)
    dark = cv2.resize(m.astype(np.float32) / 255, (w, h), interpolation=cv2.INTER_AREA)
    img = cv2.GaussianBlur(img * (1 - depth * dark), (0, 0), 0.8) + rng.normal(0, 1.5, (h, w))
    rgb = np.repeat(np.clip(img, 0, 255).astype(np.uint8)[..., None], 3, axis=2)
    return rgb, greatest, 0.5 * (c0 + c1)
