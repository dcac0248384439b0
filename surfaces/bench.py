"""``surfaces bench``: speed, memory and accuracy, measured honestly.

Three parts, each optional:

* **speed** — for each photo size (megapixels), one synthetic photo is
  written as JPEG and timed in a *fresh worker process*: the full pipeline
  (decode .. verdict) ``repeat`` times after one warm-up run, and the
  *floor* (decode + grey conversion + one Gaussian blur, sigma 2 px) of the
  same file in the same process.  The worker reports its peak resident
  memory (``VmHWM`` from ``/proc/self/status``, else ``ru_maxrss``).  Batch
  throughput is timed twice over the same photos (one printed card for all,
  as on a shift): with 1 and 2 warmed worker processes (assessment only), and
  as the user runs it, ``surfaces batch FOLDER --workers 1`` and ``--workers 2``
  as fresh commands on a new records store (start-up, hashing, photo copies
  and one transaction per photo counted).  The target is judged on the
  command's ratio.
* **accuracy** — on a seeded generated set (and on any folder of photos with
  ``<name>.truth.json`` beside them): recall/precision per kind and size,
  greatest-dimension error, calibration and face-area error, and per preset
  the verdict confusion matrix (expected verdict = the *truth* table judged by
  the same limits engine, uncertainties 0) with the count of false accepts.
* **realdata** — on the third-party annotated photos in a ``realdata``
  folder (evaluation only, never copied): recall of annotated defects by
  running :func:`surfaces.segment.segment` on each whole image at an assumed
  scale, and false detections on defect-free tiles.

Targets are reported as met / not met; nothing here asserts.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from .model import SurfacesError

__all__ = ["TARGETS", "add_commands", "floor_time", "peak_rss_mb", "run_bench"]

#: (key, description, threshold)
TARGETS = {
    "speed_12mp_s": ("12 MP photo, median time per photo (2-core machine)", 1.0),
    "floor_ratio_12mp": ("12 MP photo, median time / floor", 6.0),
    "memory_12mp_mb": ("12 MP photo, peak memory of the worker process (MB)", 1024.0),
    "batch_ratio": ("`surfaces batch`, 2 processes / 1 process (wall time, with the store)", 1.6),
    "false_accepts": ("false accepts on the generated set (truth rejects, tool accepts)", 0),
    "borderline_review": ("borderline coupons sent to review (fraction)", 1.0),
}

DEFAULT_REALDATA = Path(__file__).resolve().parents[2] / "shared" / "realdata"
REALDATA_PX_PER_MM = 10.0  # assumed scale of the real photos (they carry none)
SPEED_TRIES = 4  # seeds tried per size for a speed photo the pipeline can assess


class BenchError(SurfacesError):
    """A bench option that cannot be used."""


# --------------------------------------------------------------------------- memory / floor


def peak_rss_mb() -> float:
    """Peak resident memory of this process in MB (VmHWM; ru_maxrss as a fallback)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource

    r = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return r / 1024.0 if sys.platform != "darwin" else r / 1024.0 / 1024.0


def floor_time(path: str | os.PathLike) -> float:
    """Seconds to decode ``path``, convert it to grey and blur it once (sigma 2 px).

    The least any whole-photo tool must do; the pipeline's time is reported
    as a multiple of it.
    """
    import cv2

    t0 = time.perf_counter()
    img = cv2.imread(str(path), cv2.IMREAD_COLOR)
    if img is None:
        raise BenchError(f"{path}: OpenCV cannot decode it; give a JPEG or PNG")
    g = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)
    cv2.GaussianBlur(g, (0, 0), 2.0)
    return time.perf_counter() - t0


# --------------------------------------------------------------------------- synthetic photos


def _synth():
    try:
        from . import synth
    except ImportError as err:  # the generator ships with the source tree
        raise BenchError(f"the synthetic photo generator is not available ({err}); run from a checkout") from None
    return synth


def _settings_for_truth(truth: dict):
    """Settings a careful user would give for this photo: its test and nominal sizes."""
    from .model import Settings

    p = truth.get("params") or {}
    test = truth.get("test") or "fillet-break"
    width = (truth.get("face") or {}).get("width_mm")
    nominal = {}
    for k, v in (truth.get("nominal") or {}).items():
        if isinstance(v, (int, float)) and v > 0:
            nominal[k] = float(v)
    # what the inspector would enter: plate thickness and throat of a fillet
    # coupon, the wall of a nick-break coupon (the face spans the wall)
    if isinstance(p.get("plate_thickness_mm"), (int, float)):
        nominal.setdefault("thickness_mm", round(float(p["plate_thickness_mm"]), 1))
    for key in ("thickness_mm", "coupon_thickness_mm"):
        if isinstance(p.get(key), (int, float)):
            nominal.setdefault("thickness_mm", round(float(p[key]), 1))
    if test == "bend" and "thickness_mm" in nominal:  # a bend coupon spans the wall of the test piece
        nominal.setdefault("wall_mm", nominal["thickness_mm"])
    if isinstance(width, (int, float)) and width > 0 and test in ("fillet-break", "nick-break"):
        nominal.setdefault("throat_mm" if test == "fillet-break" else "wall_mm", round(float(width), 1))
    kw = {}
    if test == "bend":
        curv = truth.get("curvature") or {}
        if curv.get("enabled") and isinstance(curv.get("radius_mm"), (int, float)):
            kw["outer_radius_mm"] = round(float(curv["radius_mm"]), 1)
        if curv.get("enabled") and isinstance(curv.get("former_radius_mm"), (int, float)):
            kw["former_diameter_mm"] = round(2 * float(curv["former_radius_mm"]), 1)
    marker = truth.get("marker_mm")
    if isinstance(marker, (int, float)) and marker > 0:
        kw["marker_mm"] = float(marker)  # the printed marker side, as the user states it
    return Settings(test=test, nominal=nominal, **kw)


def _write_speed_photo(folder: Path, mp: float, seed: int) -> Path:
    synth = _synth()
    ph = synth.render_fracture(seed, test="fillet-break", megapixels=float(mp))
    path = folder / f"speed_{mp:g}mp_seed{seed}.jpg"
    ph.save(path)
    return path


# --------------------------------------------------------------------------- speed worker


def _worker_main(argv: list[str]) -> int:
    """Runs in a fresh process: time one photo, print one JSON line."""
    p = argparse.ArgumentParser(prog="surfaces.bench worker")
    p.add_argument("photo")
    p.add_argument("--repeat", type=int, default=3)
    a = p.parse_args(argv)
    from .photo import load_photo
    from .pipeline import assess

    base_mb = peak_rss_mb()
    truth_path = Path(a.photo).with_suffix(".truth.json")
    truth = json.loads(truth_path.read_text()) if truth_path.exists() else {"test": "fillet-break"}
    settings = _settings_for_truth(truth)
    floors = [floor_time(a.photo) for _ in range(max(1, a.repeat) + 1)][1:]
    cold = None
    times, stages = [], []
    for k in range(max(1, a.repeat) + 1):
        t0 = time.perf_counter()
        res = assess(load_photo(a.photo), settings)
        dt = time.perf_counter() - t0
        if k == 0:
            cold = dt
            continue
        times.append(dt)
        stages.append(dict(res.timings))
    out = {
        "photo": str(a.photo),
        "width": res.photo.width,
        "height": res.photo.height,
        "megapixels": res.photo.width * res.photo.height / 1e6,
        "cold_s": cold,
        "times_s": times,
        "floor_s": floors,
        "stages_s": {k: statistics.median(s[k] for s in stages) for k in stages[0]} if stages else {},
        "baseline_mb": base_mb,
        "peak_mb": peak_rss_mb(),
        "verdict": res.assessment["verdict"]["result"],
    }
    print(json.dumps(out))
    return 0


def _child_env() -> dict:
    """The environment for a child ``python -m surfaces ...``: this checkout first on its path."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parent.parent) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def _run_worker(photo: Path, repeat: int) -> dict:
    cmd = [sys.executable, "-m", "surfaces.bench", "worker", str(photo), "--repeat", str(repeat)]
    env = _child_env()
    r = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if r.returncode != 0:
        tail = (r.stderr.strip().splitlines() or ["no output"])[-1]
        return {"photo": str(photo), "error": tail}
    return json.loads(r.stdout.strip().splitlines()[-1])


def _assess_one(path: str, settings) -> str:
    """Worker: the verdict of one photo, or ``error`` (a failed photo still took its time)."""
    from .pipeline import assess_path

    try:
        return assess_path(path, settings).assessment["verdict"]["result"]
    except SurfacesError:
        return "error"


def _warm(_: int) -> int:
    from . import pipeline  # noqa: F401  (imports OpenCV, scikit-image, SciPy)

    time.sleep(0.2)  # so that every worker of the pool gets one
    return os.getpid()


def _single_thread_worker() -> None:
    """Pool initializer for several workers: one OpenCV thread each (as the batch runner does)."""
    try:
        from .batch import _init_worker

        _init_worker()
    except ImportError:
        import cv2

        cv2.setNumThreads(1)


def batch_throughput(paths: list[Path], settings_list: list, workers: int) -> dict:
    """Photos per second over ``paths`` with a warmed ``workers``-process pool.

    As the batch runner does it: one process keeps OpenCV's own threads;
    several processes run one OpenCV thread each.  Pool start-up and imports
    are not counted (the pool is warmed first).
    """
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    ctx = mp.get_context("spawn")
    init = _single_thread_worker if workers > 1 else None
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=init) as ex:
        list(ex.map(_warm, range(workers)))
        t0 = time.perf_counter()
        verdicts = list(ex.map(_assess_one, [str(p) for p in paths], settings_list))
        dt = time.perf_counter() - t0
    return {"workers": workers, "photos": len(paths), "seconds": dt, "photos_per_s": len(paths) / dt,
            "verdicts": verdicts}


#: one printed card for every photo of the batch, as on a shift
BATCH_MARKER_MM = 30.0


def batch_command(folder: Path, manifest: Path, *, workers: int, workdir: Path) -> dict:
    """Wall time of ``surfaces batch FOLDER --workers N`` in a fresh process on a new store."""
    db = workdir / f"batch_store_{workers}" / "records.sqlite"
    cmd = [sys.executable, "-m", "surfaces", "batch", str(folder), "--test", "fillet-break",
           "--marker-mm", f"{BATCH_MARKER_MM:g}", "--manifest", str(manifest), "--workers", str(workers),
           "--db", str(db), "--summary-csv", str(db.parent / "summary.csv"), "--quiet"]
    env = _child_env()
    t0 = time.perf_counter()
    r = subprocess.run(cmd, capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t0
    if r.returncode != 0:
        tail = (r.stderr.strip().splitlines() or ["no output"])[-1]
        return {"workers": workers, "error": tail}
    import csv

    with open(db.parent / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    status = [row.get("status") for row in rows]
    return {"workers": workers, "photos": len(rows), "seconds": dt, "photos_per_s": len(rows) / dt,
            "done": status.count("done"), "errors": status.count("error")}


def run_speed(*, sizes: list[float], repeat: int, seed: int, batch_n: int, workdir: Path, batch_mp: float = 4.0,
              say=print) -> dict:
    """The speed and memory part of the bench (see the module docstring)."""
    out = {"cpu_count": os.cpu_count(), "repeat": repeat, "sizes": [], "loadavg_before": _loadavg()}
    for mp in sizes:
        say(f"speed: rendering and timing a {mp:g} MP photo in a fresh process ...")
        tried = []
        for k in range(SPEED_TRIES):  # a photo the pipeline cannot assess gives no timing: take the next seed
            path = _write_speed_photo(workdir, mp, seed + k)
            w = _run_worker(path, repeat)
            tried.append({"seed": seed + k, "error": w.get("error")})
            if "error" not in w:
                break
        w["seeds_tried"] = tried
        if "error" not in w:
            med, flo = statistics.median(w["times_s"]), statistics.median(w["floor_s"])
            w.update(mp_nominal=mp, median_s=med, worst_s=max(w["times_s"]), floor_median_s=flo,
                     floor_ratio=med / flo if flo > 0 else None)
        else:
            w["mp_nominal"] = mp
        out["sizes"].append(w)
    # batch: the same mid-size photos through 1 and 2 processes
    say(f"speed: batch throughput over {batch_n} photos with 1 and 2 processes ...")
    synth = _synth()
    bpaths, bset = [], []
    bdir = workdir / "batch"
    bdir.mkdir(exist_ok=True)
    manifest = ["photo,coupon_id,welder,thickness_mm,throat_mm"]
    for k in range(batch_n):
        ph = synth.render_fracture(seed + 100 + k, test="fillet-break", megapixels=batch_mp, marker_mm=BATCH_MARKER_MM)
        p = ph.save(bdir / f"batch_{k:03d}.jpg")
        bpaths.append(p)
        st = _settings_for_truth(ph.truth)
        bset.append(st)
        nom = st.nominal or {}
        manifest.append(f"{p.name},B-{k:03d},bench,{nom.get('thickness_mm', '')},{nom.get('throat_mm', '')}")
    (workdir / "batch_manifest.csv").write_text("\n".join(manifest) + "\n", encoding="utf-8")
    b1 = batch_throughput(bpaths, bset, 1)
    b2 = batch_throughput(bpaths, bset, 2)
    out["batch_pool"] = {"one": b1, "two": b2, "ratio": b2["photos_per_s"] / b1["photos_per_s"],
                         "megapixels": batch_mp}
    say(f"speed: `surfaces batch` over the same {batch_n} photos with --workers 1 and 2 ...")
    c1 = batch_command(bdir, workdir / "batch_manifest.csv", workers=1, workdir=workdir)
    c2 = batch_command(bdir, workdir / "batch_manifest.csv", workers=2, workdir=workdir)
    ok = "error" not in c1 and "error" not in c2
    out["batch"] = {"one": c1, "two": c2, "ratio": (c2["photos_per_s"] / c1["photos_per_s"]) if ok else None,
                    "megapixels": batch_mp, "command": True}
    out["loadavg_after"] = _loadavg()
    return out


def _loadavg() -> float | None:
    """1-minute load average (other work on the machine skews every timing)."""
    try:
        return round(os.getloadavg()[0], 2)
    except (OSError, AttributeError):
        return None


# --------------------------------------------------------------------------- accuracy


def _render_one(job: tuple) -> str:
    """Worker: render one generated photo and save it with its truth; returns the path."""
    folder, k, seed, test, mp, defects = job
    synth = _synth()
    kw = {} if defects is None else {"defects": defects}
    if test == "bend":
        ph = synth.render_bend(seed, megapixels=mp, **kw)
    else:
        ph = synth.render_fracture(seed, test=test, megapixels=mp, **kw)
    tag = "gen" if defects is None else "limit"
    return str(ph.save(Path(folder) / f"{tag}_{k:03d}_{test}_seed{seed}_{mp:.1f}mp.jpg"))


#: Imperfections placed right at a default preset's limit (REFERENCES.md):
#: AWS D1.1 fillet break, pore 3/32 in = 2.38 mm; API 1104 nick-break, gas
#: pocket 1/16 in = 1.59 mm; AWS D1.1 bend, discontinuity 1/8 in, 3 mm.
AT_LIMIT = (
    ("fillet-break", "pore", "d_mm", 2.38),
    ("nick-break", "pore", "d_mm", 1.59),
    ("bend", "crack", "length_mm", 3.0),
)
AT_LIMIT_OFFSETS_MM = (-0.08, 0.0, 0.08)


def _at_limit_jobs(folder: Path, *, n: int, seed: int, start: int) -> list[tuple]:
    jobs = []
    for j in range(n):
        test, kind, key, value = AT_LIMIT[j % len(AT_LIMIT)]
        off = AT_LIMIT_OFFSETS_MM[(j // len(AT_LIMIT)) % len(AT_LIMIT_OFFSETS_MM)]
        spec = {"kind": kind, key: round(value + off, 3)}
        if kind == "crack":
            spec.update(edge="", width_mm=0.25)
        jobs.append((str(folder), start + j, int(seed) + 50000 + j, test, 3.0, [spec]))
    return jobs


def generated_set(folder: Path, *, n: int, seed: int, mp_range=(2.0, 12.0), extra_mp: tuple[float, ...] = (),
                  at_limit: int = 0, tests=("fillet-break", "nick-break", "bend"), workers: int = 2,
                  say=print) -> list[Path]:
    """Write ``n`` seeded synthetic photos (mixed tests, sizes, tilts, scales) into ``folder``.

    Photo ``k`` uses seed ``seed + k`` and the test ``tests[k % len(tests)]``;
    its size is drawn here in ``mp_range`` (``extra_mp`` adds photos of those
    exact sizes after the ``n``); the generator draws tilt (0-30 deg) and
    scale (8-25 px/mm at the face) from its own seeded ranges and the
    imperfections from its ``mixed`` set.  ``at_limit`` adds 3 MP photos with
    one imperfection within 0.08 mm of a default preset's limit
    (:data:`AT_LIMIT`): coupons the tool must send to ``review``.  Rendering
    runs in ``workers`` processes; the result does not depend on it.
    """
    rng = np.random.default_rng([int(seed), 424242])
    sizes = [float(rng.uniform(*mp_range)) for _ in range(n)] + [float(m) for m in extra_mp]
    jobs = [(str(folder), k, int(seed) + k, tests[k % len(tests)], mp, None) for k, mp in enumerate(sizes)]
    jobs += _at_limit_jobs(folder, n=at_limit, seed=seed, start=len(jobs))
    if workers > 1 and len(jobs) > 1:
        import multiprocessing as mpc
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=workers, mp_context=mpc.get_context("spawn")) as ex:
            paths = list(ex.map(_render_one, jobs))
    else:
        paths = [_render_one(j) for j in jobs]
    if say:
        say(f"accuracy: generated {len(paths)} photos")
    return [Path(p) for p in paths]


def _photo_list(folder: Path) -> list[Path]:
    out = []
    for p in sorted(Path(folder).iterdir()):
        if p.suffix.lower() in (".jpg", ".jpeg", ".png", ".tif", ".tiff") and p.with_suffix(".truth.json").exists():
            out.append(p)
    return out


def _assess_for_accuracy(path: str) -> dict:
    """Worker: assess one photo with settings from its truth; return what scoring needs."""
    from .pipeline import assess_path

    truth = json.loads(Path(path).with_suffix(".truth.json").read_text())
    settings = _settings_for_truth(truth)
    try:
        res = assess_path(path, settings)
    except SurfacesError as err:
        return {"path": path, "error": str(err), "truth": truth}
    return {"path": path, "assessment": res.assessment, "truth": truth, "seconds": res.timings.get("total_s")}


def assess_folder(paths: list[Path], *, workers: int = 2, say=print) -> list[dict]:
    """Assess every photo (in ``workers`` processes); results in input order."""
    if workers <= 1:
        return [_assess_for_accuracy(str(p)) for p in paths]
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn")) as ex:
        return list(ex.map(_assess_for_accuracy, [str(p) for p in paths]))


def _confusion(confusion: dict, name: str) -> dict:
    """The confusion matrix of one limit set: truth verdict -> tool verdict (or ``error``) -> count."""
    return confusion.setdefault(name, {t: {o: 0 for o in ("accept", "review", "reject", "error")}
                                       for t in ("accept", "review", "reject")})


def score_results(results: list[dict]) -> dict:
    """Accuracy figures from :func:`assess_folder` output (see the module docstring)."""
    from . import evaluate as ev
    from .limits import judge_assessment, list_presets

    matches, photos, failures = [], [], []
    presets = list_presets()
    confusion: dict[str, dict] = {}
    false_accepts: list[dict] = []
    border = {"n": 0, "review": 0, "items": []}
    z_greatest: list[float] = []  # |greatest error| / stated 1-sigma uncertainty, matched imperfections
    for r in results:
        truth = r["truth"]
        name = Path(r["path"]).name
        if "error" in r:
            # a photo the tool cannot assess: everything on it is missed, and it gets no verdict
            failures.append({"photo": name, "error": r["error"]})
            m = ev.match({"imperfections": []}, truth)
            m.insert(0, "photo", name)
            matches.append(m)
            test = truth.get("test")
            for ls in presets:
                if ls.applies_to(test):
                    tv = ev.truth_band(truth, limit_set=ls, test=test, nominal=_settings_for_truth(truth).nominal)
                    _confusion(confusion, ls.name)[tv["result"]]["error"] += 1
            continue
        a = r["assessment"]
        m = ev.match(a, truth)
        m.insert(0, "photo", name)
        matches.append(m)
        u_by_id = {int(i["id"]): i.get("greatest_u_mm") for i in a.get("imperfections") or []}
        for _, x in m[m["matched"]].iterrows():
            u = u_by_id.get(int(x["det_id"]))
            if u is not None and np.isfinite(float(u)) and np.isfinite(float(x["greatest_err_mm"])):
                z_greatest.append(abs(float(x["greatest_err_mm"])) / max(float(u), 1e-9))
        ps = ev.photo_scores(a, truth)
        ps.update(photo=name, test=a["test"], seconds=r.get("seconds"), tilt_deg=truth.get("tilt_deg"),
                  px_per_mm_face=truth.get("px_per_mm_face"),
                  megapixels=(a["photo"]["width"] * a["photo"]["height"]) / 1e6)
        photos.append(ps)
        nominal = dict(a.get("nominal") or {})
        for ls in presets:
            if not ls.applies_to(a["test"]):
                continue
            tv = ev.truth_band(truth, limit_set=ls, test=a["test"], nominal=nominal)
            tool = judge_assessment(a, ls)["verdict"]["result"]
            _confusion(confusion, ls.name)[tv["result"]][tool] += 1
            if tv["result"] == "reject" and tool == "accept":
                false_accepts.append({"photo": name, "limits": ls.name, "truth_reasons": tv["reasons"][:3]})
            if tv["borderline"]:
                border["n"] += 1
                border["review"] += tool == "review"
                border["items"].append({"photo": name, "limits": ls.name, "truth": tv["result"], "tool": tool})
    s = ev.scores(matches, min_mm={"pore": 0.5, "inclusion": 1.0}) if matches else {}
    if s:
        from .limits import COVERAGE_K

        z = np.array(z_greatest, float)
        s["greatest"]["coverage_k"] = COVERAGE_K
        s["greatest"]["frac_within_k_sigma"] = float(np.mean(z <= COVERAGE_K)) if z.size else None

    def stat(key, f=np.median):
        v = np.array([p[key] for p in photos if p.get(key) is not None], float)
        return None if v.size == 0 else float(f(v))

    cal = {
        "n": len(photos),
        "median_abs_err_pct": stat("px_per_mm_err_pct", lambda v: np.median(np.abs(v))),
        "max_abs_err_pct": stat("px_per_mm_err_pct", lambda v: np.max(np.abs(v))),
        "frac_under_0.5pct": stat("px_per_mm_err_pct", lambda v: float(np.mean(np.abs(v) < 0.5))),
    }
    face = {
        "median_abs_err_pct": stat("face_area_err_pct", lambda v: np.median(np.abs(v))),
        "max_abs_err_pct": stat("face_area_err_pct", lambda v: np.max(np.abs(v))),
        "frac_within_5pct": stat("face_area_err_pct", lambda v: float(np.mean(np.abs(v) <= 5.0))),
    }
    return {
        "photos": len(results), "assessed": len(photos), "failures": failures,
        "detection": s, "calibration": cal, "face_area": face,
        "confusion": confusion, "false_accepts": false_accepts, "n_false_accepts": len(false_accepts),
        "borderline": border, "per_photo": photos,
    }  # fmt: skip


# --------------------------------------------------------------------------- real photos


def _load_realdata_module(folder: Path):
    spec = importlib.util.spec_from_file_location("surfaces_realdata_load", folder / "load.py")
    if spec is None or spec.loader is None:
        raise BenchError(f"{folder / 'load.py'} cannot be imported")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _pred_mask(contours, shape) -> np.ndarray:
    import cv2

    m = np.zeros(shape, np.uint8)
    for c in contours:
        cv2.fillPoly(m, [np.round(np.asarray(c)).astype(np.int32).reshape(-1, 1, 2)], 1)
    return m.astype(bool)


def _segment_real(job: tuple[str, float, float]) -> tuple[list[np.ndarray], list[tuple[float, float]], tuple[int, int]]:
    """Worker: segment one real image whole; outlines (x, y) and centroids (x, y) in its pixels."""
    from PIL import Image

    from .segment import segment

    path, px_per_mm, min_size_mm = job
    with Image.open(path) as im:
        g = np.array(im.convert("L"))
    rgb = np.repeat(g[..., None], 3, axis=2)
    dets = segment(rgb, None, px_per_mm=px_per_mm, min_size_mm=min_size_mm, test="fillet-break")
    return ([np.asarray(d.contour, np.float32) for d in dets],
            [(float(d.features.get("cx_px", np.nan)), float(d.features.get("cy_px", np.nan))) for d in dets],
            g.shape)


def realdata_recall(folder: str | os.PathLike, *, px_per_mm: float = REALDATA_PX_PER_MM,
                    min_size_mm: float = 0.3, stride: int = 1, workers: int = 2) -> dict:
    """Recall of annotated defects on real photos, and false detections on defect-free ones.

    Each image is segmented whole (mask all True) at the assumed ``px_per_mm``.
    An annotation is *found* when the union of detection outlines covers at
    least 10 % of it (``load.hit(pred, ann, min_frac=0.1)``) or a detection's
    centroid lies in its box.  ``magnetic-tile`` masks are split into
    connected components (one annotation per blob).  Because a detector that
    marks everything would find everything, the result also gives, per
    group, the mean fraction of the image covered by detections and the
    detections touching no annotation (``stray``), and on the defect-free
    tiles the detections per image.  ``stride`` takes every n-th image of
    each dataset (a quicker subset).
    """
    folder = Path(folder)
    load = _load_realdata_module(folder)
    samples = []
    for ds in load.DATASETS:
        if not (folder / ds).is_dir():
            continue
        for k, (img_path, anns) in enumerate(load.iter_samples(ds, root=folder, components=True)):
            if k % max(1, int(stride)) == 0:
                samples.append((ds, img_path, anns))
    jobs = [(str(p), float(px_per_mm), float(min_size_mm)) for _, p, _ in samples]
    t0 = time.perf_counter()
    if workers > 1 and len(jobs) > 1:
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn")) as ex:
            outs = list(ex.map(_segment_real, jobs, chunksize=8))
    else:
        outs = [_segment_real(j) for j in jobs]
    per: dict[str, dict] = {}
    free = {"images": 0, "images_with_detections": 0, "detections": 0, "covered_frac": 0.0}
    for (ds, img_path, anns), (contours, cents, shape) in zip(samples, outs):
        pred = _pred_mask(contours, shape)
        if not anns:
            if "MT_Free" in str(img_path):
                free["images"] += 1
                free["detections"] += len(contours)
                free["images_with_detections"] += bool(contours)
                free["covered_frac"] += float(pred.mean())
            continue
        union = np.zeros(shape, bool)
        for ann in anns:
            if ann.get("mask") is not None:
                union |= ann["mask"]
            else:
                x0, y0, x1, y1 = ann["box"]
                union[y0:y1, x0:x1] = True
        stray = 0
        for c in contours:
            one = _pred_mask([c], shape)
            stray += not (one & union).any()
        groups_here = set()
        for ann in anns:
            x0, y0, x1, y1 = ann["box"]
            hit = bool(load.hit(pred, ann, min_frac=0.1)) or any(
                x0 <= cx < x1 and y0 <= cy < y1 for cx, cy in cents if math.isfinite(cx))
            key = f"{ds}/{ann['group']}"
            e = per.setdefault(key, {"annotations": 0, "found": 0, "images": 0, "covered": 0.0, "stray": 0})
            e["annotations"] += 1
            e["found"] += hit
            groups_here.add(key)
        for key in groups_here:
            per[key]["images"] += 1
            per[key]["covered"] += float(pred.mean())
            per[key]["stray"] += stray
    groups = {k: {"annotations": v["annotations"], "found": v["found"], "images": v["images"],
                  "recall": v["found"] / v["annotations"] if v["annotations"] else None,
                  "covered_frac": v["covered"] / v["images"] if v["images"] else None,
                  "stray_per_image": v["stray"] / v["images"] if v["images"] else None}
              for k, v in sorted(per.items())}
    tot_a = sum(v["annotations"] for v in groups.values())
    tot_f = sum(v["found"] for v in groups.values())
    nf = free["images"]
    return {
        "folder": str(folder), "assumed_px_per_mm": px_per_mm, "min_size_mm": min_size_mm,
        "images": len(samples), "stride": stride, "groups": groups,
        "overall": {"annotations": tot_a, "found": tot_f, "recall": tot_f / tot_a if tot_a else None},
        "defect_free": {"images": nf, "images_with_detections": free["images_with_detections"],
                        "detections": free["detections"], "per_image": free["detections"] / nf if nf else None,
                        "covered_frac": free["covered_frac"] / nf if nf else None},
        "seconds": time.perf_counter() - t0,
        "note": ("third-party photos of rolled steel strip and ferrite tiles, not weld faces; "
                 "segmented whole at an assumed scale; evaluation only"),
    }  # fmt: skip


# --------------------------------------------------------------------------- targets and table


def targets(report: dict) -> list[dict]:
    """Each target with its measured value and met / not met (None when not measured)."""
    out = []

    def add(key, value, met):
        desc, thr = TARGETS[key]
        out.append({"target": key, "description": desc, "threshold": thr, "value": value,
                    "met": None if value is None else bool(met)})

    sp = report.get("speed") or {}
    twelve = next((s for s in sp.get("sizes", []) if abs(s.get("mp_nominal", 0) - 12) < 0.5 and "median_s" in s), None)
    if sp:
        ncpu = sp.get("cpu_count")
        add("speed_12mp_s", twelve and twelve["median_s"], twelve and twelve["median_s"] < 1.0)
        if ncpu != 2 and out[-1]["value"] is not None:
            out[-1]["description"] += f" (this machine has {ncpu} cores)"
        add("floor_ratio_12mp", twelve and twelve["floor_ratio"], twelve and twelve["floor_ratio"] <= 6.0)
        add("memory_12mp_mb", twelve and twelve["peak_mb"], twelve and twelve["peak_mb"] < 1024.0)
        b = sp.get("batch")
        add("batch_ratio", b and b["ratio"], b and b["ratio"] is not None and b["ratio"] >= 1.6)
    acc = report.get("accuracy", {}).get("generated")
    if acc:
        add("false_accepts", acc["n_false_accepts"], acc["n_false_accepts"] == 0)
        bd = acc["borderline"]
        frac = bd["review"] / bd["n"] if bd["n"] else None
        add("borderline_review", frac, frac is not None and frac >= 1.0)
    return out


def _f(v, fmt="{:.3f}"):
    return "-" if v is None else fmt.format(v)


def format_table(report: dict) -> str:
    """A compact text table of the report."""
    L = []
    sp = report.get("speed")
    if sp:
        L.append(f"SPEED ({sp['cpu_count']} CPU, {sp['repeat']} timed runs after 1 warm-up, fresh process per size; "
                 f"load average {sp.get('loadavg_before')} before, {sp.get('loadavg_after')} after)")
        L.append(f"  {'MP':>5} {'median s':>9} {'worst s':>8} {'cold s':>7} {'floor s':>8} {'x floor':>8} {'peak MB':>8}")
        for s in sp["sizes"]:
            if "error" in s:
                L.append(f"  {s['mp_nominal']:>5g}  error on {len(s['seeds_tried'])} photo(s): {s['error']}")
                continue
            if len(s.get("seeds_tried", [])) > 1:
                L.append(f"        ({len(s['seeds_tried']) - 1} earlier {s['mp_nominal']:g} MP photo(s) failed to assess)")
            L.append(f"  {s['megapixels']:>5.1f} {s['median_s']:>9.3f} {s['worst_s']:>8.3f} {s['cold_s']:>7.2f} "
                     f"{s['floor_median_s']:>8.3f} {s['floor_ratio']:>8.1f} {s['peak_mb']:>8.0f}")
        b = sp.get("batch_pool")
        if b:
            n_err = b["one"]["verdicts"].count("error") if "verdicts" in b["one"] else 0
            L.append(f"  assessment only, {b['one']['photos']} x {b['megapixels']:g} MP in warmed pools: "
                     f"1 process {b['one']['photos_per_s']:.2f}/s, 2 processes {b['two']['photos_per_s']:.2f}/s, "
                     f"ratio {b['ratio']:.2f}" + (f" ({n_err} photo(s) failed to assess)" if n_err else ""))
        b = sp.get("batch")
        if b and b.get("command"):
            one, two = b["one"], b["two"]
            if b["ratio"] is None:
                L.append(f"  `surfaces batch` failed: {one.get('error') or two.get('error')}")
            else:
                L.append(f"  `surfaces batch` (fresh command, new store): --workers 1 {one['seconds']:.1f} s "
                         f"({one['photos_per_s']:.2f}/s), --workers 2 {two['seconds']:.1f} s ({two['photos_per_s']:.2f}/s), "
                         f"ratio {b['ratio']:.2f}; {one['done']} done, {one['errors']} error row(s) each run")
    for label, acc in (report.get("accuracy") or {}).items():
        if not acc:
            continue
        L.append(f"ACCURACY [{label}] {acc['assessed']}/{acc['photos']} photos assessed"
                 + (f", {len(acc['failures'])} failed" if acc["failures"] else ""))
        for fl in acc["failures"][:5]:
            L.append(f"  failed: {fl['photo']}: {fl['error']}")
        det = acc.get("detection") or {}
        if det:
            L.append(f"  {'kind':<10} {'bucket':<7} {'truth':>5} {'recall':>7} {'any':>5} {'dets':>5} {'prec':>6}")
            for k, e in det["kinds"].items():
                rows = [("all", e["all"])] + [(b, v) for b, v in e["buckets"].items() if v["n_truth"] or v["n_detected"]]
                if "at_least" in e:
                    rows.append((f">={e['at_least']['min_mm']:g}", e["at_least"]))
                for b, v in rows:
                    L.append(f"  {k:<10} {b:<7} {v['n_truth']:>5} {_f(v['recall'], '{:.2f}'):>7} "
                             f"{_f(v['recall_any_kind'], '{:.2f}'):>5} {v['n_detected']:>5} {_f(v['precision'], '{:.2f}'):>6}")
            g = det["greatest"]
            L.append(f"  greatest dimension: n={g['n']} median |err| {_f(g['median_abs_err_mm'])} mm, "
                     f"p95 {_f(g['p95_abs_err_mm'])} mm, within max(0.15 mm, 5 %): {_f(g['frac_within'], '{:.1%}')}")
            if g.get("frac_within_k_sigma") is not None:
                L.append(f"  greatest dimension inside its stated {g['coverage_k']:g}-sigma interval: "
                         f"{_f(g['frac_within_k_sigma'], '{:.1%}')} (aim 95 %)")
            u = det["unfused_length"]
            L.append(f"  unfused length: n={u['n']} median rel err {_f(u['median_rel_err'], '{:.1%}')}, "
                     f"max {_f(u['max_rel_err'], '{:.1%}')}")
            L.append(f"  false detections {det['false_detections']}, missed {det['missed']} of {det['n_truth']}")
        c, fa = acc["calibration"], acc["face_area"]
        L.append(f"  px/mm error: median {_f(c['median_abs_err_pct'])} %, max {_f(c['max_abs_err_pct'])} %, "
                 f"under 0.5 %: {_f(c['frac_under_0.5pct'], '{:.0%}')}")
        L.append(f"  face area error: median {_f(fa['median_abs_err_pct'], '{:.2f}')} %, "
                 f"max {_f(fa['max_abs_err_pct'], '{:.2f}')} %, within 5 %: {_f(fa['frac_within_5pct'], '{:.0%}')}")
        L.append("  verdicts (truth acc/rev/rej; tool accept/review/reject/not assessed):")
        for name, cm in acc["confusion"].items():
            cells = "  ".join(f"{t[:3]} {cm[t]['accept']:>2}/{cm[t]['review']:>2}/{cm[t]['reject']:>2}/{cm[t]['error']:>2}"
                              for t in cm)
            L.append(f"    {name:<26} {cells}")
        bd = acc["borderline"]
        L.append(f"  false accepts: {acc['n_false_accepts']};  borderline (truth within max(0.15 mm, 5 %) of a limit): "
                 f"{bd['review']}/{bd['n']} sent to review")
    rd = report.get("realdata")
    if rd:
        if rd.get("skipped"):
            L.append(f"REALDATA skipped: {rd['skipped']}")
        else:
            L.append(f"REALDATA {rd['images']} images, assumed {rd['assumed_px_per_mm']:g} px/mm, "
                     f"found = detections cover >= 10 % of the annotation or a centroid in its box")
            L.append(f"  {'dataset/group':<28} {'found':>9} {'recall':>6} {'covered':>8} {'stray/img':>9}")
            for k, v in rd["groups"].items():
                L.append(f"  {k:<28} {v['found']:>4}/{v['annotations']:<4} {_f(v['recall'], '{:.2f}'):>6} "
                         f"{_f(v['covered_frac'], '{:.1%}'):>8} {_f(v['stray_per_image'], '{:.1f}'):>9}")
            o, fr = rd["overall"], rd["defect_free"]
            L.append(f"  overall recall {_f(o['recall'], '{:.2f}')} ({o['found']}/{o['annotations']}); defect-free tiles: "
                     f"{fr['images_with_detections']}/{fr['images']} with detections, {_f(fr['per_image'], '{:.2f}')} per image, "
                     f"{_f(fr['covered_frac'], '{:.1%}')} of the area covered")
    tg = report.get("targets") or []
    if tg:
        L.append("TARGETS")
        for t in tg:
            mark = "n/a" if t["met"] is None else ("met" if t["met"] else "NOT MET")
            L.append(f"  {mark:<8} {t['description']}: {_f(t['value'], '{:.3g}')} (target {t['threshold']:g})")
    return "\n".join(L)


# --------------------------------------------------------------------------- driver


def run_bench(*, n: int = 30, seed: int = 1, sizes=(3.0, 8.0, 12.0), repeat: int = 3, folder=None,
              realdata=None, skip_speed: bool = False, skip_accuracy: bool = False, batch_n: int = 6, at_limit: int = 6,
              workers: int = 2, workdir=None, say=print, batch_mp: float = 4.0) -> dict:
    """Run the bench and return the report dict (also what ``--json`` writes)."""
    from . import __version__

    report: dict = {"tool": {"name": "surfaces", "version": __version__}, "seed": seed,
                    "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    tmp = tempfile.TemporaryDirectory(prefix="surfaces-bench-") if workdir is None else None
    wd = Path(tmp.name if tmp else workdir)
    wd.mkdir(parents=True, exist_ok=True)
    try:
        if not skip_speed:
            report["speed"] = run_speed(sizes=list(sizes), repeat=repeat, seed=seed, batch_n=batch_n, batch_mp=batch_mp,
                                        workdir=wd, say=say)
        if not skip_accuracy:
            acc = {}
            if n > 0 or at_limit > 0:
                gdir = wd / "generated"
                gdir.mkdir(exist_ok=True)
                say(f"accuracy: generating {n} + {at_limit} photos at limits (seed {seed}) ...")
                paths = generated_set(gdir, n=n, seed=seed, at_limit=at_limit, workers=workers, say=say)
                say(f"accuracy: assessing {n} photos with {workers} processes ...")
                acc["generated"] = score_results(assess_folder(paths, workers=workers))
                acc["generated"]["n"] = n
                acc["generated"]["at_limit"] = at_limit
            if folder:
                paths = _photo_list(Path(folder))
                if not paths:
                    raise BenchError(f"--folder {folder}: no photos with a <name>.truth.json beside them")
                say(f"accuracy: assessing {len(paths)} photos from {folder} ...")
                acc[f"folder:{folder}"] = score_results(assess_folder(paths, workers=workers))
            report["accuracy"] = acc
            rd = Path(realdata) if realdata else DEFAULT_REALDATA
            if rd.is_dir() and (rd / "load.py").exists():
                say(f"realdata: segmenting the annotated photos in {rd} ...")
                report["realdata"] = realdata_recall(rd)
            else:
                report["realdata"] = {"skipped": f"no realdata folder with load.py at {rd}"}
                say(f"realdata: {rd} not found (or has no load.py): skipped")
        report["targets"] = targets(report)
    finally:
        if tmp:
            tmp.cleanup()
    return report


def _sizes(text: str) -> list[float]:
    try:
        v = [float(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"--sizes {text!r}: give megapixels separated by commas, e.g. 3,8,12") from None
    if not v or any(not (0.3 <= x <= 50) for x in v):
        raise argparse.ArgumentTypeError(f"--sizes {text!r}: each size must be 0.3 to 50 megapixels")
    return v


def _nonneg_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"{text!r}: give 0 or more")
    return v


def _pos_int(text: str) -> int:
    v = _nonneg_int(text)
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: give 1 or more")
    return v


def cmd_bench(a: argparse.Namespace) -> int:
    if a.folder and not Path(a.folder).is_dir():
        raise BenchError(f"--folder {a.folder}: not a folder; give a folder of photos with .truth.json files")
    if a.json and Path(a.json).exists() and not a.force:
        raise BenchError(f"{a.json} exists: give another --json name or --force to overwrite")
    rep = run_bench(n=a.n, seed=a.seed, sizes=a.sizes, repeat=a.repeat, folder=a.folder, realdata=a.realdata,
                    skip_speed=a.skip_speed, skip_accuracy=a.skip_accuracy, batch_n=a.batch_n, batch_mp=a.batch_mp, at_limit=a.at_limit, workers=a.workers,
                    say=(lambda m: None) if a.quiet else (lambda m: print(m, file=sys.stderr)))
    print(format_table(rep))
    if a.json:
        from .atomic import write_text_atomic

        write_text_atomic(a.json, json.dumps(_jsonable(rep), indent=1), force=True)
        print(f"wrote {a.json}")
    return 0


def _jsonable(o):
    if isinstance(o, dict):
        return {str(k): _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating, float)):
        f = float(o)
        return f if math.isfinite(f) else None
    if isinstance(o, np.bool_):
        return bool(o)
    return o


def add_commands(sub) -> None:
    """Register ``surfaces bench`` on the CLI's sub-parsers."""
    p = sub.add_parser("bench", help="measure speed, memory and accuracy (synthetic set, folders, real photos)")
    p.add_argument("--n", type=_nonneg_int, default=30, help="photos in the generated accuracy set (default 30; 0: none)")
    p.add_argument("--seed", type=_nonneg_int, default=1, help="seed of the generated photos (default 1)")
    p.add_argument("--sizes", type=_sizes, default=[3.0, 8.0, 12.0], help="photo sizes for speed, MP (default 3,8,12)")
    p.add_argument("--repeat", type=_pos_int, default=3, help="timed runs per size after one warm-up (default 3)")
    p.add_argument("--at-limit", type=_nonneg_int, default=6,
                   help="extra generated photos with one imperfection at a preset's limit (default 6)")
    p.add_argument("--batch-n", type=_pos_int, default=6, help="photos in the batch throughput run (default 6)")
    p.add_argument("--batch-mp", type=float, default=4.0, help="size of the batch photos, MP (default 4)")
    p.add_argument("--workers", type=_pos_int, default=2, help="processes for the accuracy runs (default 2)")
    p.add_argument("--folder", help="also score a folder of photos with <name>.truth.json beside each")
    p.add_argument("--realdata", help=f"folder of annotated real photos with load.py (default {DEFAULT_REALDATA})")
    p.add_argument("--skip-speed", action="store_true", help="leave out speed and memory")
    p.add_argument("--skip-accuracy", action="store_true", help="leave out accuracy and real photos")
    p.add_argument("--json", metavar="OUT.json", help="write the full report as JSON")
    p.add_argument("--force", action="store_true", help="overwrite an existing --json file")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_bench)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "worker":
        sys.exit(_worker_main(sys.argv[2:]))
    from .cli import main

    sys.exit(main(["bench"] + sys.argv[1:]))
