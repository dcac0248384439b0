"""The region model: kind and confidence of a candidate region from its features.

A multinomial logistic model over the classes ``none, pore, inclusion,
unfused, crack``.  Its inputs are generic, dimensionless region features
(see :func:`feature_vector`), standardised; its weights live in
``regionmodel.json`` beside this file and are fitted on seeded synthetic
faces (truth known by construction) by ``scripts/fit_region_model.py``,
which also records the training set, the held-out scores and the date.

The probability of the chosen kind is reported as the detection's
confidence; ``1 - P(none)`` is the belief that the region is an
imperfection at all.
"""

from __future__ import annotations

import json
import math
from functools import lru_cache
from pathlib import Path

import numpy as np

CLASSES = ("none", "pore", "inclusion", "unfused", "crack")
MODEL_PATH = Path(__file__).with_name("regionmodel.json")

FEATURES = (
    "log_greatest", "log_area", "log_aspect", "solidity", "roughness", "log_thickness",
    "contrast", "depth", "edge_sharpness", "tex_in", "tex_ring", "chroma_ring", "chroma_face",
    "ridge_frac", "edge_contact", "log_photo_px", "log_photo_thick_px", "bright_frac",
    "src_dark", "src_ridge", "src_smooth",
)  # fmt: skip


def _log(v: float, floor: float = 1e-3) -> float:
    return math.log(max(float(v), floor))


def feature_vector(f: dict) -> np.ndarray:
    """The model's input for one region's feature dict (from :mod:`surfaces.segment`)."""
    src = f.get("source", "dark")
    v = [
        _log(f["greatest_mm"]),
        _log(f["area_mm2"], 1e-4),
        _log(min(f["aspect"], 50.0), 1.0),
        f["solidity"],
        min(f["roughness"], 3.0),
        _log(f["thickness_mm"], 1e-3),
        f["contrast"],
        f["depth"],
        min(f["edge_sharpness"], 20.0),
        min(f["tex_in"], 5.0),
        min(f["tex_ring"], 5.0),
        min(f["chroma_ring"], 60.0),
        min(f["chroma_face"], 60.0),
        f["ridge_frac"],
        f["edge_contact"],
        _log(f["photo_px"], 0.1),
        _log(f["photo_thick_px"], 0.05),
        f["bright_frac"],
        float(src == "dark"),
        float(src == "ridge"),
        float(src == "smooth"),
    ]
    return np.asarray(v, dtype=np.float64)


@lru_cache(maxsize=1)
def load_model(path: str | None = None) -> dict:
    p = Path(path) if path else MODEL_PATH
    m = json.loads(p.read_text())
    if tuple(m["features"]) != FEATURES or tuple(m["classes"]) != CLASSES:
        raise RuntimeError(f"{p}: the region model was fitted for other features; re-run scripts/fit_region_model.py")
    m["W"] = np.asarray(m["W"], dtype=np.float64)
    m["b"] = np.asarray(m["b"], dtype=np.float64)
    m["mean"] = np.asarray(m["mean"], dtype=np.float64)
    m["std"] = np.asarray(m["std"], dtype=np.float64)
    return m


def probabilities(X: np.ndarray, model: dict | None = None) -> np.ndarray:
    """Class probabilities for rows of raw feature vectors ``X`` (n, len(FEATURES))."""
    m = model or load_model()
    Z = (np.atleast_2d(X) - m["mean"]) / m["std"]
    logits = Z @ m["W"] + m["b"]
    logits -= logits.max(axis=1, keepdims=True)
    e = np.exp(logits)
    return e / e.sum(axis=1, keepdims=True)


def classify(f: dict) -> tuple[str, float, dict]:
    """Kind, confidence and all class probabilities of one region."""
    p = probabilities(feature_vector(f)[None, :])[0]
    probs = {c: round(float(v), 4) for c, v in zip(CLASSES, p)}
    k = int(np.argmax(p))
    if CLASSES[k] == "none":
        return "none", float(p[k]), probs
    return CLASSES[k], float(p[k]), probs
