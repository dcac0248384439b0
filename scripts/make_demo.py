#!/usr/bin/env python3
"""Rebuild ``demo_images/`` from :data:`surfaces.demo.SCENARIO`, deterministically.

Each demo photo is rendered by :mod:`surfaces.synth` from its seed and
defect list (same seed, same bytes), saved as JPEG with ``<name>.truth.json``
beside it, and listed in ``manifest.csv``.  Then every photo is assessed
with the current pipeline and its verdict compared with the one the story
needs; the script exits 1 when any differs, so a pipeline change that breaks
the story is seen.

    .venv/bin/python scripts/make_demo.py            # rebuild and check
    .venv/bin/python scripts/make_demo.py --check    # check the existing folder only
"""

from __future__ import annotations

import argparse
import csv
import io
import re
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from surfaces import demo  # noqa: E402

MAX_FOLDER_MB = 8.0


def render(c: demo.DemoCoupon):
    """Render a coupon's photo; a ``px_per_mm`` that does not fit is lowered to 95 % of what fits."""
    from surfaces import synth

    opts = dict(c.render)
    scene, seed = opts.pop("scene"), opts.pop("seed")
    fn = synth.render_bend if scene == "bend" else synth.render_fracture
    try:
        return fn(seed, **opts)
    except synth.SynthError as err:
        m = re.search(r"below ([0-9.]+)", str(err))
        if not m or "px_per_mm" not in opts:
            raise
        opts["px_per_mm"] = round(0.95 * float(m.group(1)), 2)
        return fn(seed, **opts)


def build(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    keep = {"manifest.csv"}
    for c in demo.SCENARIO:
        ph = render(c)
        if ph.truth.get("test") != c.test:
            raise SystemExit(f"{c.photo}: rendered a {ph.truth.get('test')} scene for a {c.test} coupon")
        path = ph.save(folder / c.photo)
        keep |= {path.name, path.with_suffix(".truth.json").name}
        print(f"rendered {c.photo}: {ph.rgb.shape[1]}x{ph.rgb.shape[0]}, "
              f"{ph.truth['px_per_mm_face']:.1f} px/mm, tilt {ph.truth['tilt_deg']:.0f} deg, "
              f"{len(ph.truth['imperfections'])} imperfection(s)")
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(demo.MANIFEST_COLUMNS), lineterminator="\n")
    w.writeheader()
    for c in demo.SCENARIO:
        w.writerow(c.manifest_row())
    (folder / "manifest.csv").write_text(buf.getvalue(), encoding="utf-8")
    for p in folder.iterdir():  # files of coupons no longer in the scenario
        if p.is_file() and p.name not in keep:
            p.unlink()
            print(f"removed {p.name}")


def check(folder: Path) -> int:
    from surfaces.model import SurfacesError
    from surfaces.photo import load_photo
    from surfaces.pipeline import assess

    story = {c.coupon_id: c for c in demo.SCENARIO}
    bad = 0
    for row in demo.read_manifest(folder):
        want = story[row["coupon_id"]].expect
        try:
            res = assess(load_photo(folder / row["photo"]), demo.settings_for(row))
        except SurfacesError as err:
            got, reasons = "error", str(err)
        else:
            got = res.assessment["verdict"]["result"]
            reasons = "; ".join(res.assessment["verdict"]["reasons"][:2])
        mark = "ok " if got == want else "BAD"
        bad += got != want
        print(f"{mark} {row['coupon_id']:<14} {row['test']:<12} story {want:<7} pipeline {got:<7} {reasons[:150]}")
    size = sum(p.stat().st_size for p in folder.iterdir() if p.is_file()) / 1e6
    print(f"demo folder: {size:.1f} MB")
    if size > MAX_FOLDER_MB:
        print(f"the demo folder is over {MAX_FOLDER_MB:g} MB: lower the photo size or JPEG quality")
        bad += 1
    if bad:
        print(f"{bad} problem(s): the demo story does not hold with this pipeline")
    return 1 if bad else 0


def search(folder: Path, tries: int) -> int:
    """For each coupon whose verdict is not the story's, try other camera/texture seeds.

    The defects stay as the story sets them; only ``seed`` changes (seed +
    1000 j).  Prints, per coupon, how many seeds were tried and which one
    gives the story's verdict, to be written into ``SCENARIO`` by hand.
    """
    import dataclasses
    import tempfile

    from surfaces.model import SurfacesError
    from surfaces.photo import load_photo
    from surfaces.pipeline import assess

    rows = {r["coupon_id"]: r for r in demo.read_manifest(folder)}
    left = 0
    with tempfile.TemporaryDirectory() as tmp:
        for c in demo.SCENARIO:
            row = rows[c.coupon_id]
            tried = []
            for j in range(0, tries + 1):
                seed = c.render["seed"] + 1000 * j
                cc = dataclasses.replace(c, render={**c.render, "seed": seed})
                try:
                    path = render(cc).save(Path(tmp) / c.photo)
                except SurfacesError as err:  # this seed's face cannot hold the story's defects
                    tried.append((seed, f"no fit ({str(err)[:30]})"))
                    continue
                try:
                    got = assess(load_photo(path), demo.settings_for(row)).assessment["verdict"]["result"]
                except SurfacesError as err:
                    got = f"error ({str(err)[:40]})"
                tried.append((seed, got))
                if got == c.expect:
                    break
            ok = tried[-1][1] == c.expect
            left += not ok
            print(f"{c.coupon_id:<14} story {c.expect:<7} "
                  + ("seed %d after %d tries" % (tried[-1][0], len(tried)) if ok else "NO SEED FOUND")
                  + "  [" + ", ".join(f"{sd}:{g}" for sd, g in tried) + "]")
    return 1 if left else 0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=demo.DEMO_DIR, help="folder to write (default demo_images/)")
    p.add_argument("--check", action="store_true", help="do not render; only check the verdicts")
    p.add_argument("--search", type=int, metavar="K", default=0,
                   help="try up to K other seeds per coupon whose verdict is not the story's; print them")
    a = p.parse_args(argv)
    if a.search:
        return search(a.out, a.search)
    if not a.check:
        build(a.out)
    return check(a.out)


if __name__ == "__main__":
    sys.exit(main())
