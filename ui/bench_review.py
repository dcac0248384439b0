"""How long the page takes to answer one review action on a large photo (a measurement, not a test).

Usage::

    .venv/bin/python -m ui.bench_review [--megapixels 12] [--repeat 7]

Renders a seeded synthetic fillet-break photo (:mod:`surfaces.synth`), opens
the page under Streamlit's AppTest, uploads the photo (one analysis), then
times complete script reruns after single review actions (dismiss, then back
to "as found", alternately) and prints the median and the worst.  It also
checks that no review action ran the analysis again.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--megapixels", type=float, default=12.0)
    p.add_argument("--repeat", type=int, default=7)
    p.add_argument("--seed", type=int, default=11)
    p.add_argument("--face-box", action="store_true", help="give the face box (from the synthetic truth) "
                   "instead of letting the core find the face")
    a = p.parse_args(argv)
    sys.path.insert(0, str(ROOT))
    from streamlit.testing.v1 import AppTest

    import surfaces.pipeline as pipeline
    from surfaces.synth import render_fracture

    tmp = Path(tempfile.mkdtemp(prefix="surfaces-bench-"))
    os.environ["SURFACES_DB"] = str(tmp / "records.sqlite3")
    os.environ["SURFACES_HOME"] = str(tmp)
    os.environ["SURFACES_UI_TIMING"] = "1"
    sp = render_fracture(a.seed, megapixels=a.megapixels, tilt_deg=3, marker_mm=20, length_mm=120, width_mm=10,
                         defects=[{"kind": "pore", "d_mm": 3.0, "x_mm": 30, "y_mm": 5},
                                  {"kind": "pore", "d_mm": 1.5, "x_mm": 70, "y_mm": 4}])
    data = sp.jpeg_bytes()
    h, w = sp.rgb.shape[:2]
    import hashlib

    import numpy as np

    from surfaces.geometry import apply_h

    face_px = apply_h(np.array(sp.truth["H_plane_to_photo"]), np.array(sp.truth["face"]["polygon_mm"]))
    box = tuple(float(v) for v in (*(face_px.min(axis=0) - 20), *(face_px.max(axis=0) + 20)))
    calls = []
    real = pipeline.assess
    pipeline.assess = lambda *x, **k: (calls.append(1), real(*x, **k))[1]

    at = AppTest.from_file(str(ROOT / "ui" / "app.py"), default_timeout=600)
    at.run()
    at.radio(key="src").set_value("Upload a photo").run()
    if a.face_box:  # the page's face-box fallback, from the synthetic truth
        at.session_state["roi"] = {hashlib.sha256(data).hexdigest(): box}
    at.file_uploader(key="upload").set_value(("bench.jpg", data, "image/jpeg"))
    t0 = time.perf_counter()
    at.run()
    first = time.perf_counter() - t0
    if at.exception or "current" not in at.session_state:
        print(at.exception or [e.value for e in at.error])
        print("no assessment; try --face-box")
        return 1
    ws = at.session_state["works"]
    work = ws[at.session_state["current"]]
    rows = work.auto_base["imperfections"]
    print(f"photo {w}x{h} ({w * h / 1e6:.1f} MP, {len(data) / 2**20:.1f} MB JPEG); "
          f"upload + analysis + first page: {first:.2f} s; {len(rows)} detection(s)")
    if not rows:
        print("no detection to review on this photo; try another --seed")
        return 1
    rid = int(rows[0]["id"])
    key = f"rv_{work.key}_{rid}_dec"
    n0 = len(calls)
    times = []
    n_runs = len(at.session_state["_run_s"])
    for i in range(a.repeat):
        at.radio(key=key).set_value("dismiss" if i % 2 == 0 else "as found")
        t0 = time.perf_counter()
        at.run()
        times.append(time.perf_counter() - t0)
    script = at.session_state["_run_s"][n_runs:]
    print(f"rerun after one review action, whole AppTest round trip: median {statistics.median(times):.3f} s, "
          f"worst {max(times):.3f} s over {a.repeat} actions")
    print(f"  of which the page script itself: median {statistics.median(script):.3f} s, worst {max(script):.3f} s")
    print(f"  analysis runs during the review: {len(calls) - n0}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
