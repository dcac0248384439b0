#!/usr/bin/env python3
"""Fit the region model (surfaces/regionmodel.json) on seeded synthetic faces.

    python scripts/fit_region_model.py --render 200 --seed 100000 --mp 2 --mp-max 4 --workers 2 --cache DIR1
    python scripts/fit_region_model.py --render 130 --seed 100200 --mp 2 --mp-max 4 --truth-face --cache DIR2
    python scripts/fit_region_model.py --from-cache DIR1 --from-cache DIR2     # refit, no rendering
    python scripts/fit_region_model.py --folder DIR [--folder DIR2]   # photos + .truth.json
    python scripts/fit_region_model.py --from-cache DIR1 --from-cache DIR2 --keep-detection surfaces/regionmodel.json
                                                                      # refit the kind model only

Each photo goes through the runtime's own calibration and face finder (with
``--truth-face``, a photo whose face is not found is rectified from its true
outline instead of skipped); ``--cache`` keeps every prepared face so that
later fits (``--from-cache``) only re-run the candidate generator
(``segment(..., keep_all=True)``).  Every candidate is labelled with the kind
of the truth imperfection whose outline contains its centre (grown by
0.3 mm), else ``none``; candidates :func:`surfaces.segment.ruled_out` settles
are left out; every third face is also used as a monochrome photo.  A
multinomial logistic model with an L2 penalty is fitted (SciPy L-BFGS) with
class weights that balance the many ``none`` candidates, colour weights tied
across every class but ``unfused``; it decides whether a candidate is an
imperfection from every feature but the kind-only ones
(``regionmodel.KIND_ONLY``), and a second one, fitted on the imperfections
alone with every feature, shares out the kinds (``--keep-detection`` takes the
detection model from an earlier fit as it is: after a change to the kind-only
features, every detection stays as it was).  The seeds used here (100000 and up) are
disjoint from the seeds the tests and the benchmark evaluate on.
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import pickle
import sys
import zlib
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from surfaces.regionmodel import CLASSES, DETECT_FEATURES, FEATURES, MODEL_PATH, feature_vector  # noqa: E402

DETECT_IDX = [FEATURES.index(f) for f in DETECT_FEATURES]


def prepare_face(args) -> dict | str:
    """One photo through calibration and the face finder: the segmenter's inputs and the truth outlines.

    Returns a dict (``image``, ``mask``, ``px_per_mm``, ``photo_px_per_mm``,
    ``truth`` as ``(kind, outline in face px)`` pairs) or a string saying
    why the photo is no training data.
    """
    from surfaces.calibrate import calibrate
    from surfaces.face import find_face
    from surfaces.geometry import apply_h
    from surfaces.photo import load_photo
    from surfaces.pipeline import EDGE_INSET_MM, _inset

    kind, item = args
    if kind == "render":
        from surfaces.synth import render_fracture

        seed, mp = item
        sp = render_fracture(seed, test="nick-break" if seed % 3 == 0 else "fillet-break", megapixels=mp)
        truth = sp.truth
        photo = load_photo(sp.jpeg_bytes(truth.get("jpeg_quality", 90)), name=f"seed{seed}.jpg")
    else:
        path = item
        truth = json.loads(Path(path).with_suffix(".truth.json").read_text())
        if truth.get("test") == "bend":
            return "skipped: bend photos go to surfaces.bend"
        photo = load_photo(path)
    why = ""
    try:
        cal = calibrate(photo, marker_mm=truth["marker_mm"])
        face = find_face(photo.rgb, photo.gray, cal, test=truth.get("test", "fillet-break"))
        area_err = face.area_mm2 / truth["face"]["area_mm2"] - 1
        if abs(area_err) > 0.08:
            why = f"face area off by {area_err:+.0%}"
    except Exception as e:
        why = str(e)
    if why:
        if not TRUTH_FACE:  # a failed face is no training data
            return f"skipped: {why}"
        image, A, ppm_face = truth_face(photo.rgb, truth)
        mask = np.ones(image.shape[:2], bool)
        ppm_photo = float(truth["px_per_mm_face"])
    else:
        image, A, ppm_face, mask = face.image, face.A_face_to_plane, face.px_per_mm, face.mask
        centre = face.polygon_px.mean(axis=0)
        ppm_photo = cal.px_per_mm_at(float(centre[0]), float(centre[1]))
    Ainv = np.linalg.inv(A)
    return {
        "name": str(item),
        "image": image,
        "mask": _inset(mask, int(round(EDGE_INSET_MM * ppm_face))),
        "px_per_mm": ppm_face,
        "photo_px_per_mm": ppm_photo,
        "face": "found" if not why else "truth",
        "truth": [(t["kind"], apply_h(Ainv, np.asarray(t["polygon_mm"]))) for t in truth["imperfections"]],
    }


def truth_face(rgb: np.ndarray, truth: dict) -> tuple[np.ndarray, np.ndarray, float]:
    """The face rectified from its true outline (``truth["face"]``), at the runtime's working resolution.

    Returns the image, its face-pixel -> plane-mm matrix and its px/mm.
    """
    import cv2

    from surfaces.model import WORK_PX_PER_MM

    f = truth["face"]
    wf, hf = int(round(f["length_mm"] * WORK_PX_PER_MM)), int(round(f["width_mm"] * WORK_PX_PER_MM))
    sx, sy = f["length_mm"] / wf, f["width_mm"] / hf
    A = np.asarray(f["A_face_to_plane"], float) @ np.array([[sx, 0, 0.5 * sx], [0, sy, 0.5 * sy], [0, 0, 1.0]])
    M = np.asarray(truth["H_plane_to_photo"], float) @ A
    image = cv2.warpPerspective(rgb, M, (wf, hf), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                                borderMode=cv2.BORDER_REPLICATE)  # fmt: skip
    return image, A, float(WORK_PX_PER_MM)


def label_candidates(face: dict, *, grey: bool = False) -> tuple[list, list]:
    """Feature vectors of every candidate on one prepared face, labelled by the truth outline holding its centre.

    ``grey``: the face as a monochrome camera gives it (the same luma in the
    three channels), so that the model does not learn that an imperfection
    must have some colour: real photos may have none.
    """
    import cv2

    from surfaces.segment import ruled_out, segment

    image = face["image"]
    if grey:
        image = np.repeat(cv2.cvtColor(image, cv2.COLOR_RGB2GRAY)[..., None], 3, axis=2)
    dets = segment(image, face["mask"], px_per_mm=face["px_per_mm"],
                   photo_px_per_mm=face["photo_px_per_mm"], keep_all=True)  # fmt: skip
    h, w = face["image"].shape[:2]
    grow = int(round(0.3 * face["px_per_mm"]))
    polys = []
    for k, poly in face["truth"]:
        m = np.zeros((h, w), np.uint8)
        cv2.fillPoly(m, [np.round(poly).astype(np.int32)], 1)
        polys.append((k, cv2.dilate(m, np.ones((2 * grow + 1, 2 * grow + 1), np.uint8))))
    X, y = [], []
    for d in dets:
        if ruled_out(d.features):
            continue  # decided before the model
        c, r = int(round(d.features["cx_px"])), int(round(d.features["cy_px"]))
        label = "none"
        if 0 <= r < h and 0 <= c < w:
            for k, m in polys:
                if m[r, c]:
                    label = k
                    break
        X.append(feature_vector(d.features).tolist())
        y.append(CLASSES.index(label))
    return X, y


def candidates_for(args) -> tuple[list, list, str]:
    """Feature vectors and labels of every candidate on one photo (or one cached face)."""
    kind, item = args
    if kind == "cached":
        with open(item, "rb") as fh:
            face = pickle.load(fh)
    else:
        face = prepare_face(args)
        if isinstance(face, str):
            return [], [], face
        if CACHE_DIR:
            name = f"{kind}_{item[0]}.pkl" if kind == "render" else f"file_{Path(item).stem}.pkl"
            with open(os.path.join(CACHE_DIR, name), "wb") as fh:
                pickle.dump(face, fh)
    X, y = label_candidates(face)
    if zlib.crc32(str(face["name"]).encode()) % GREY_EVERY == 0:  # a monochrome copy of every few faces
        Xg, yg = label_candidates(face, grey=True)
        X, y = X + Xg, y + yg
    return X, y, "ok"


#: one face in this many is also used as a monochrome photo
GREY_EVERY = 3


CACHE_DIR = os.environ.get("SURFACES_FIT_CACHE", "")
TRUTH_FACE = os.environ.get("SURFACES_FIT_TRUTH_FACE", "") == "1"


#: colour tells a tinted unfused region (oxide) from the rest, not a pore from grain: the
#: weights of these features are tied across every class but ``unfused``
COLOUR_FEATURES = ("chroma_ring", "chroma_face")


def fit(X: np.ndarray, y: np.ndarray, *, l2: float = 1e-2, features=FEATURES, classes=CLASSES) -> dict:
    """Multinomial logistic weights (L2, class-balanced), colour weights tied (:data:`COLOUR_FEATURES`).

    ``X`` has one column per name in ``features``, ``y`` indexes ``classes``.
    Tying is kept by giving the tied weights one shared gradient (their
    mean) from a zero start, so they stay equal and cancel in the softmax.
    """
    from scipy.optimize import minimize

    mean = X.mean(axis=0)
    std = X.std(axis=0)
    std[std < 1e-9] = 1.0
    Z = (X - mean) / std
    n, d = Z.shape
    k = len(classes)
    counts = np.bincount(y, minlength=k).astype(float)
    cw = np.where(counts > 0, (n / (k * np.maximum(counts, 1))) ** 0.5, 0.0)
    sw = cw[y]
    Y = np.eye(k)[y]
    rows = [list(features).index(f) for f in COLOUR_FEATURES]
    tied = np.array([c != "unfused" for c in classes])

    def loss(theta):
        W = theta[: d * k].reshape(d, k)
        b = theta[d * k :]
        L = Z @ W + b
        L -= L.max(axis=1, keepdims=True)
        P = np.exp(L)
        P /= P.sum(axis=1, keepdims=True)
        nll = -(sw * np.log(np.clip((P * Y).sum(axis=1), 1e-12, None))).sum() / sw.sum()
        G = (P - Y) * sw[:, None] / sw.sum()
        gW = Z.T @ G + l2 * W
        gW[rows, :] = np.where(tied, gW[rows][:, tied].mean(axis=1, keepdims=True), gW[rows, :])
        gb = G.sum(axis=0)
        return nll + 0.5 * l2 * (W**2).sum(), np.concatenate([gW.ravel(), gb])

    res = minimize(loss, np.zeros(d * k + k), jac=True, method="L-BFGS-B", options={"maxiter": 2000})
    W = res.x[: d * k].reshape(d, k)
    b = res.x[d * k :]
    return {"W": W.tolist(), "b": b.tolist(), "mean": mean.tolist(), "std": std.tolist(), "loss": float(res.fun)}


def kept_detection(path: str) -> dict:
    """The detection part (weights, standardisation) of a fitted model JSON, checked against :data:`DETECT_FEATURES`."""
    old = json.loads(Path(path).read_text())
    if tuple(old.get("detect_features", ())) != DETECT_FEATURES:
        sys.exit(f"{path}: its detection model was fitted on other features; fit both models (leave out --keep-detection)")
    kept = {k: old[k] for k in ("W", "b", "mean", "std", "loss")}
    kept["detection_from"] = {"path": str(path), "fitted": old.get("fitted"), "training": old.get("training")}
    return kept


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", action="append", default=[], help="folder of synthetic photos with .truth.json")
    ap.add_argument("--render", type=int, default=0, help="render this many photos on the fly")
    ap.add_argument("--seed", type=int, default=100000)
    ap.add_argument("--mp", type=float, default=3.0)
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--holdout", type=float, default=0.25, help="fraction of photos held out for the scores")
    ap.add_argument("--mp-max", type=float, default=None, help="photo sizes spread from --mp to this (MP)")
    ap.add_argument("--cache", default="", help="keep each prepared face here (pickles) for --from-cache")
    ap.add_argument("--from-cache", action="append", default=[], help="refit from faces kept by an earlier --cache")
    ap.add_argument("--truth-face", action="store_true",
                    help="where the face finder fails, rectify the face from its true outline instead of skipping")
    ap.add_argument("--l2", type=float, default=1e-2, help="L2 penalty on the detection model's standardised weights")
    ap.add_argument("--kind-l2", type=float, default=3e-3,
                    help="L2 penalty on the kind model's (default 0.003: on held-out and fresh faces 0.003 named pores "
                         "and inclusions better than 0.01-0.1 and kept the real photos' recall; 0.001 and under gained "
                         "little more)")  # fmt: skip
    ap.add_argument("--keep-detection", default="",
                    help="take the detection model from this fitted JSON (same detection features) and fit the kind "
                         "model only: a change to the kind-only features then leaves every detection as it was")
    ap.add_argument("--out", default=str(MODEL_PATH))
    a = ap.parse_args()
    jobs = [("file", p) for f in a.folder for p in sorted(glob.glob(os.path.join(f, "*.jpg")))]
    hi = a.mp_max or a.mp
    jobs += [("render", (a.seed + i, a.mp + (hi - a.mp) * ((i * 0.618) % 1.0))) for i in range(a.render)]
    jobs += [("cached", p) for f in a.from_cache for p in sorted(glob.glob(os.path.join(f, "*.pkl")))]
    if not jobs:
        ap.error("give --folder, --render or --from-cache")
    global CACHE_DIR, TRUTH_FACE
    if a.truth_face:
        os.environ["SURFACES_FIT_TRUTH_FACE"] = "1"
        TRUTH_FACE = True
    if a.cache:
        os.makedirs(a.cache, exist_ok=True)
        os.environ["SURFACES_FIT_CACHE"] = a.cache
        CACHE_DIR = a.cache
    with ProcessPoolExecutor(a.workers) as ex:
        results = list(ex.map(candidates_for, jobs))
    used = [(j, r) for j, r in zip(jobs, results) if r[2] == "ok"]
    print(f"{len(used)} of {len(jobs)} photos usable", file=sys.stderr)
    rng = np.random.default_rng(0)
    order = rng.permutation(len(used))
    n_hold = int(round(a.holdout * len(used)))
    hold, train = order[:n_hold], order[n_hold:]

    def stack(idx):
        X = [x for i in idx for x in used[i][1][0]]
        y = [v for i in idx for v in used[i][1][1]]
        return np.asarray(X, float), np.asarray(y, int)

    Xt, yt = stack(train)
    # whether: the detection model, blind to orientation; what: the kind model, on imperfections only
    if a.keep_detection:
        model = kept_detection(a.keep_detection)
    else:
        model = fit(Xt[:, DETECT_IDX], yt, l2=a.l2, features=DETECT_FEATURES)
    real = yt > 0
    model["kinds"] = fit(Xt[real], yt[real] - 1, l2=a.kind_l2, classes=CLASSES[1:])
    model["kinds"]["classes"] = list(CLASSES[1:])
    model.update(
        classes=list(CLASSES),
        features=list(FEATURES),
        detect_features=list(DETECT_FEATURES),
        fitted=dt.date.today().isoformat(),
        training={
            "photos": len(train),
            "candidates": int(len(yt)),
            "per_class": {c: int((yt == i).sum()) for i, c in enumerate(CLASSES)},
            "sources": sorted({j[0] for j, _ in used}),
            "first_seed": a.seed if a.render else None,
            "from_cache": list(a.from_cache),
            "seed": a.seed,
            "l2": a.l2,
            "kind_l2": a.kind_l2,
            "keep_detection": a.keep_detection or None,
        },
    )
    if n_hold:
        from surfaces.regionmodel import prepare_model, probabilities

        Xh, yh = stack(hold)
        P = probabilities(Xh, prepare_model(model))
        pred = P.argmax(axis=1)
        conf = np.zeros((len(CLASSES), len(CLASSES)), int)
        for t, p in zip(yh, pred):
            conf[t, p] += 1
        model["holdout"] = {"photos": int(n_hold), "confusion_rows_truth_cols_pred": conf.tolist()}
        print("held-out confusion (rows truth, cols predicted):", CLASSES, file=sys.stderr)
        for c, row in zip(CLASSES, conf):
            print(f"  {c:>9} {row}", file=sys.stderr)
    Path(a.out).write_text(json.dumps(model, indent=1) + "\n")
    print(f"wrote {a.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
