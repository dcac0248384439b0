"""Layer compositing onto the photo and the camera's own effects.

A *layer* is a canvas rendered in some metric frame: an ``(h, w, 3)``
float32 colour image, an optional ``(h, w)`` float32 coverage (alpha), and
``A`` (3x3) mapping canvas pixel indices ``(col, row, 1)`` (pixel centres
at integers) to layout millimetres.  :func:`composite` warps it into the
photo through ``H_layout_to_photo @ A`` with a Gaussian prefilter matched to
the local down-sampling (an area-like antialiasing that keeps edges
unbiased), then blends by coverage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..geometry import apply_h, jacobian
from . import _noise


@dataclass
class Layer:
    rgb: np.ndarray
    alpha: np.ndarray | None
    A: np.ndarray


def grid_A(x0: float, y0: float, r: float) -> np.ndarray:
    """Canvas (col, row) -> frame mm for a canvas whose pixel (0, 0) covers [x0, x0 + 1/r)."""
    return np.array([[1 / r, 0, x0 + 0.5 / r], [0, 1 / r, y0 + 0.5 / r], [0, 0, 1.0]])


def composite(
    photo: np.ndarray, layer: Layer, H_frame_to_photo: np.ndarray, *, prefilter: bool = True, opaque: bool = False
) -> None:
    """Warp ``layer`` into ``photo`` (float32 (H, W, 3), modified in place).

    ``opaque``: the layer covers the whole photo (the table), so it replaces
    the pixels instead of blending.
    """
    Hh, Ww = photo.shape[:2]
    h, w = layer.rgb.shape[:2]
    M = H_frame_to_photo @ layer.A
    corners = apply_h(M, [[-0.5, -0.5], [w - 0.5, -0.5], [w - 0.5, h - 0.5], [-0.5, h - 0.5]])
    x0 = max(int(math.floor(corners[:, 0].min())) - 2, 0)
    y0 = max(int(math.floor(corners[:, 1].min())) - 2, 0)
    x1 = min(int(math.ceil(corners[:, 0].max())) + 3, Ww)
    y1 = min(int(math.ceil(corners[:, 1].max())) + 3, Hh)
    if x1 <= x0 or y1 <= y0:
        return
    rgb = layer.rgb
    alpha = layer.alpha
    if prefilter:
        # canvas px per photo px at the layer centre
        J = jacobian(M, (w - 1) / 2.0, (h - 1) / 2.0)
        shrink = 1.0 / math.sqrt(abs(np.linalg.det(J)))
        sigma = 0.45 * math.sqrt(max(shrink * shrink - 1.0, 0.0))
        if sigma > 0.25:
            rgb = cv2.GaussianBlur(rgb, (0, 0), sigma)
            if alpha is not None:
                alpha = cv2.GaussianBlur(alpha, (0, 0), sigma)
    src = rgb if alpha is None else np.dstack([rgb * alpha[..., None], alpha])
    Mt = np.array([[1, 0, -x0], [0, 1, -y0], [0, 0, 1.0]]) @ M
    out = cv2.warpPerspective(
        np.ascontiguousarray(src, np.float32),
        Mt,
        (x1 - x0, y1 - y0),
        flags=cv2.INTER_LINEAR,
        borderMode=cv2.BORDER_CONSTANT,
        borderValue=0,
    )
    roi = photo[y0:y1, x0:x1]
    if alpha is None and opaque:
        roi[...] = out
    elif alpha is None:
        cov = cv2.warpPerspective(
            np.ones((h, w), np.float32), Mt, (x1 - x0, y1 - y0), flags=cv2.INTER_LINEAR, borderValue=0
        )
        roi *= (1.0 - cov)[..., None]
        roi += out
    else:
        roi *= (1.0 - out[..., 3])[..., None]
        roi += out[..., :3]


def fill_alpha(shape: tuple[int, int], polys_px: list[np.ndarray]) -> np.ndarray:
    """Antialiased coverage (0..1 float32) of polygons given in canvas px (x, y)."""
    m = np.zeros(shape, np.uint8)
    pts = [np.round(np.asarray(p, float) * 256.0).astype(np.int32).reshape(-1, 1, 2) for p in polys_px]
    cv2.fillPoly(m, pts, 255, lineType=cv2.LINE_AA, shift=8)
    return m.astype(np.float32) * np.float32(1 / 255.0)


def to_px(A: np.ndarray, poly_mm: np.ndarray) -> np.ndarray:
    """Frame mm -> canvas index coordinates through the inverse of ``A``."""
    return apply_h(np.linalg.inv(A), poly_mm)


# --------------------------------------------------------------------------- camera effects
@dataclass(frozen=True)
class Look:
    """How the camera and the light spoil the ideal image (photo-space)."""

    gain: tuple[float, float, float] = (1.0, 1.0, 1.0)  # white balance / colour cast
    exposure: float = 1.0
    gradient: tuple[float, float] = (0.0, 0.0)  # relative change per photo width/height
    vignette: float = 0.0  # relative fall-off at the corners
    glare: tuple[float, float, float, float] | None = None  # x, y, sigma_px, strength
    blur_px: float = 0.0
    noise: float = 0.0  # read-noise std (0..1 signal units)
    shot: float = 0.0  # shot-noise factor
    gamma: float = 1.0
    jpeg_quality: int | None = 85
    # shallow depth of field: extra blur growing away from a focus line
    dof: tuple[float, float, float, float] | None = None  # focus x, y, direction deg, extra sigma px at the far edge

    def to_dict(self) -> dict:
        return {
            "gain": list(self.gain),
            "exposure": self.exposure,
            "gradient": list(self.gradient),
            "vignette": self.vignette,
            "glare": None if self.glare is None else list(self.glare),
            "blur_px": self.blur_px,
            "noise": self.noise,
            "shot": self.shot,
            "gamma": self.gamma,
            "jpeg_quality": self.jpeg_quality,
            "dof": None if self.dof is None else list(self.dof),
        }


def random_look(rng: np.random.Generator, width: int, height: int, *, clean: bool, glare_xy=None) -> Look:
    if clean:
        return Look(jpeg_quality=None)
    fx, fy = glare_xy if glare_xy is not None else (width / 2, height / 2)
    cast = rng.choice(["neutral", "warm", "cool", "green", "magenta"], p=[0.35, 0.25, 0.2, 0.1, 0.1])
    base = {
        "neutral": (1.0, 1.0, 1.0),
        "warm": (1.08, 1.0, 0.86),
        "cool": (0.92, 1.0, 1.1),
        "green": (0.96, 1.04, 0.95),
        "magenta": (1.04, 0.95, 1.03),
    }[str(cast)]
    gain = tuple(float(g * rng.uniform(0.97, 1.03)) for g in base)
    glare = None
    if rng.random() < 0.3:
        gx, gy = glare_xy if glare_xy is not None and rng.random() < 0.5 else (rng.uniform(0, width), rng.uniform(0, height))
        glare = (
            float(gx + rng.normal(0, 0.05 * width)),
            float(gy + rng.normal(0, 0.05 * height)),
            float(rng.uniform(0.03, 0.12) * max(width, height)),
            float(rng.uniform(0.1, 0.45)),
        )
    return Look(
        gain=gain,
        exposure=float(rng.uniform(0.8, 1.15)),
        gradient=(float(rng.normal(0, 0.18)), float(rng.normal(0, 0.18))),
        vignette=float(rng.uniform(0.05, 0.4)),
        glare=glare,
        blur_px=float(rng.choice([rng.uniform(0.0, 0.6), rng.uniform(0.6, 1.6)], p=[0.7, 0.3])),
        noise=float(rng.uniform(0.003, 0.02)),
        shot=float(rng.uniform(0.0, 0.02)),
        gamma=float(rng.uniform(0.85, 1.15)),
        jpeg_quality=int(rng.integers(70, 96)),
        dof=(
            (float(fx), float(fy), float(rng.uniform(0, 180)), float(rng.uniform(0.8, 2.5)))
            if rng.random() < 0.3
            else None
        ),
    )


def apply_look(rng: np.random.Generator, img: np.ndarray, look: Look) -> np.ndarray:
    """Lighting field, glare, defocus, noise, tone; returns uint8 RGB (before JPEG)."""
    H, W = img.shape[:2]
    # low-resolution illumination field, upsampled (smooth by construction)
    sh, sw = max(8, H // 16), max(8, W // 16)
    yy, xx = np.mgrid[0:sh, 0:sw].astype(np.float32)
    u = (xx + 0.5) / sw - 0.5
    v = (yy + 0.5) / sh - 0.5
    field = 1.0 + look.gradient[0] * u + look.gradient[1] * v
    r2 = (u * u + v * v) / 0.5
    field *= 1.0 - look.vignette * r2
    field = np.clip(field, 0.2, 2.0).astype(np.float32) * np.float32(look.exposure)
    if look.glare is not None:
        gx, gy, sg, k = look.glare
        gyy = (yy + 0.5) * H / sh
        gxx = (xx + 0.5) * W / sw
        glare = (k * np.exp(-((gxx - gx) ** 2 + (gyy - gy) ** 2) / (2 * sg * sg))).astype(np.float32)
    else:
        glare = None
    field = cv2.resize(field, (W, H), interpolation=cv2.INTER_LINEAR)
    img *= cv2.merge([field * np.float32(g) for g in look.gain])
    if glare is not None:
        # glare lifts everything towards white and desaturates (only where it is felt)
        ys, xs = np.nonzero(glare > 0.01)
        if len(ys):
            y0, y1 = int(ys.min() * H / sh), min(H, int((ys.max() + 1) * H / sh) + 1)
            x0, x1 = int(xs.min() * W / sw), min(W, int((xs.max() + 1) * W / sw) + 1)
            g = cv2.resize(glare, (W, H), interpolation=cv2.INTER_CUBIC)[y0:y1, x0:x1]
            sub = img[y0:y1, x0:x1]
            sub *= (1.0 - 0.5 * g)[..., None]
            sub += (1.1 * g)[..., None]
    if look.blur_px > 0.25:
        img = cv2.GaussianBlur(img, (0, 0), look.blur_px)
    if look.dof is not None:
        fx, fy, ang, extra = look.dof
        c, sn = math.cos(math.radians(ang)), math.sin(math.radians(ang))
        far = np.abs((xx + 0.5) * W / sw * c + (yy + 0.5) * H / sh * sn - (fx * c + fy * sn)) / max(W, H)
        wgt = cv2.resize(np.clip(far * 2.0, 0, 1).astype(np.float32), (W, H), interpolation=cv2.INTER_LINEAR)
        soft = cv2.GaussianBlur(img, (0, 0), extra)
        soft -= img
        soft *= wgt[..., None]
        img += soft
    np.clip(img, 0.0, 2.0, out=img)
    if look.noise > 0 or look.shot > 0:
        # luma noise at full resolution plus weaker, coarser colour noise
        luma = _noise.white(rng, (H, W))
        sig = img[..., 1] * np.float32(look.shot**2)
        sig += np.float32(look.noise**2)
        np.sqrt(sig, out=sig)
        luma *= sig
        ch = _noise.white(rng, ((H + 1) // 2, ((W + 1) // 2) * 3)).reshape((H + 1) // 2, (W + 1) // 2, 3)
        ch = cv2.resize(ch, (W, H), interpolation=cv2.INTER_LINEAR)
        ch *= (np.float32(0.4) * sig)[..., None]
        ch += luma[..., None]
        img += ch
    np.clip(img, 0.0, 1.0, out=img)
    if abs(look.gamma - 1.0) > 1e-3:
        lut = (np.linspace(0, 1, 256) ** (1.0 / look.gamma) * 255.0 + 0.5).astype(np.uint8)
        u8 = (img * np.float32(255.0) + np.float32(0.5)).astype(np.uint8)
        return cv2.LUT(u8, lut)
    return (img * np.float32(255.0) + np.float32(0.5)).astype(np.uint8)


def encode_jpeg(rgb: np.ndarray, quality: int) -> bytes:
    ok, buf = cv2.imencode(".jpg", cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, int(quality)])
    if not ok:  # pragma: no cover - OpenCV always encodes uint8 RGB
        raise RuntimeError("JPEG encoding failed")
    return buf.tobytes()


def decode_jpeg(data: bytes) -> np.ndarray:
    bgr = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
    return cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)
