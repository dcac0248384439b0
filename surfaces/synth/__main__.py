"""``python -m surfaces.synth --out DIR --n 30 --seed 1 [--scene mixed] [--mp-min 2 --mp-max 12]``"""

from __future__ import annotations

import argparse
import sys

from ..model import SurfacesError
from ._set import generate_set


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m surfaces.synth", description="Write seeded synthetic weld-face photos with truth.")
    ap.add_argument("--out", required=True, help="output folder")
    ap.add_argument("--n", type=int, default=30, help="number of photos")
    ap.add_argument("--seed", type=int, default=1, help="set seed")
    ap.add_argument("--scene", default="mixed", choices=["fracture", "bend", "mixed"])
    ap.add_argument("--mp-min", type=float, default=2.0, help="smallest photo size, megapixels")
    ap.add_argument("--mp-max", type=float, default=12.0, help="largest photo size, megapixels")
    ap.add_argument("--format", default="jpg", choices=["jpg", "png"])
    ap.add_argument("--overwrite", action="store_true", help="replace an existing set in --out")
    a = ap.parse_args(argv)
    try:
        m = generate_set(a.out, n=a.n, seed=a.seed, scene=a.scene, megapixels=(a.mp_min, a.mp_max), fmt=a.format, overwrite=a.overwrite)
    except SurfacesError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    print(m)
    return 0


if __name__ == "__main__":
    sys.exit(main())
