"""Write a set of synthetic photos with their truth and a manifest."""

from __future__ import annotations

import csv
import time
from pathlib import Path

import numpy as np

from ._scene import SynthError


def generate_set(
    out_dir: str | Path,
    *,
    n: int,
    seed: int,
    scene: str = "mixed",
    megapixels: tuple[float, float] = (2.0, 12.0),
    fmt: str = "jpg",
    overwrite: bool = False,
) -> Path:
    """Render ``n`` photos into ``out_dir`` with ``<name>.truth.json`` each and ``manifest.csv``.

    Photo ``k`` uses seed ``seed * 100003 + k`` (so any one can be re-made
    alone); the scene, test, size and options follow from it.

    Parameters
    ----------
    scene : {"fracture", "bend", "mixed"}
    megapixels : (min, max) photo size range.
    fmt : "jpg" (the camera's own JPEG) or "png" (same pixels, lossless).
    overwrite : replace an existing manifest; otherwise refuse.

    Returns
    -------
    Path of the manifest.
    """
    from ._api import render_bend, render_fracture

    if scene not in ("fracture", "bend", "mixed"):
        raise SynthError(f"scene={scene!r} is unknown (use fracture, bend or mixed)")
    if not (isinstance(n, int) and n >= 1):
        raise SynthError(f"n={n!r} must be a positive integer")
    lo, hi = float(megapixels[0]), float(megapixels[1])
    if not (0.3 <= lo <= hi <= 50):
        raise SynthError(f"megapixels range {megapixels} is invalid (use min <= max within 0.3..50)")
    if fmt not in ("jpg", "png"):
        raise SynthError(f"fmt={fmt!r} is unknown (use jpg or png)")
    out = Path(out_dir)
    manifest = out / "manifest.csv"
    if manifest.exists() and not overwrite:
        raise SynthError(f"{manifest} already exists; choose another --out folder or pass overwrite")
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    for k in range(n):
        s = int(seed) * 100003 + k
        rng = np.random.default_rng([s, 99])
        mp = float(rng.uniform(lo, hi))
        kind = scene if scene != "mixed" else str(rng.choice(["fillet-break", "nick-break", "bend"], p=[0.4, 0.25, 0.35]))
        if kind == "fracture":
            kind = str(rng.choice(["fillet-break", "nick-break"], p=[0.6, 0.4]))
        t0 = time.perf_counter()
        if kind == "bend":
            photo = render_bend(s, curvature=bool(rng.random() < 0.6), megapixels=mp, n_markers=int(rng.choice([1, 2], p=[0.8, 0.2])))
        else:
            photo = render_fracture(s, test=kind, megapixels=mp, n_markers=int(rng.choice([1, 2], p=[0.8, 0.2])))
        secs = time.perf_counter() - t0
        name = f"synth_{k:04d}_{kind}.{fmt}"
        photo.save(out / name)
        t = photo.truth
        rows.append(
            {
                "file": name,
                "truth": Path(name).with_suffix(".truth.json").name,
                "seed": s,
                "scene": t["scene"],
                "test": t["test"],
                "width_px": t["photo_size"][0],
                "height_px": t["photo_size"][1],
                "px_per_mm_face": round(t["px_per_mm_face"], 4),
                "tilt_deg": round(t["tilt_deg"], 2),
                "marker_mm": round(t["marker_mm"], 3),
                "n_markers": len(t["markers"]),
                "n_imperfections": len(t["imperfections"]),
                "kinds": " ".join(sorted({i["kind"] for i in t["imperfections"]})),
                "curved": bool(t.get("curvature", {}).get("enabled", False)),
                "render_s": round(secs, 3),
            }
        )
    with manifest.open("w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return manifest
