"""The ``surfaces`` command line: thin over the core stages.

Exit codes: 0 when the command did its job (an assessment exits 0 whatever
the verdict), 2 with one line on stderr for bad input or usage.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from . import __version__
from .model import TEST_TYPES, SurfacesError


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line (the CLI contract), not a usage block."""

    def error(self, message: str):  # noqa: D401
        raise SurfacesError(f"{self.prog}: {message} (see {self.prog} --help)")


def _floats(text: str) -> tuple[float, ...]:
    try:
        return tuple(float(v) for v in text.replace(" ", "").split(",") if v != "")
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: give numbers separated by commas") from None


def _positive(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (v > 0 and v < 1e6):
        raise argparse.ArgumentTypeError(f"{text!r}: give a positive number")
    return v


def _add_specimen_args(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("specimen (nominal dimensions, mm)")
    g.add_argument("--thickness-mm", type=_positive, help="plate thickness t")
    g.add_argument("--throat-mm", type=_positive, help="fillet throat a")
    g.add_argument("--wall-mm", type=_positive, help="pipe wall thickness")
    g.add_argument("--length-mm", type=_positive, help="specimen length examined")


def _add_photo_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--test", required=True, choices=TEST_TYPES, help="which destructive test the face comes from")
    p.add_argument("--marker-mm", type=_positive, help="printed marker side S in mm (default: the card's 20 mm)")
    p.add_argument("--px-per-mm", type=_positive, help="manual scale when there is no marker (no perspective correction)")
    p.add_argument(
        "--ruler",
        type=_floats,
        metavar="X0,Y0,X1,Y1,MM",
        help="two points on a ruler in the photo (pixels) and the distance between them in mm",
    )
    p.add_argument(
        "--roi",
        type=_floats,
        metavar="X0,Y0,X1,Y1",
        help="rough box around the face in photo pixels (or 8 numbers: the 4 corners)",
    )
    p.add_argument("--min-size-mm", type=_positive, default=0.3, help="smallest greatest dimension reported (default 0.3)")
    p.add_argument("--limits", help="limit set: a preset name (see `surfaces limits list`) or a .toml file")
    p.add_argument("--bend-angle", type=_positive, dest="bend_angle_deg", help="bend angle in degrees (bend tests)")
    p.add_argument("--former-mm", type=_positive, dest="former_diameter_mm", help="former (plunger) diameter in mm (bend tests)")
    p.add_argument("--outer-radius-mm", type=_positive, help="outer radius of the bent surface in mm (instead of former + thickness)")
    _add_specimen_args(p)


def settings_from_args(a: argparse.Namespace):
    from .model import Settings

    if a.ruler is not None and len(a.ruler) != 5:
        raise SurfacesError("--ruler takes 5 numbers: X0,Y0,X1,Y1,MM (two photo points and their distance in mm)")
    if a.roi is not None and len(a.roi) not in (4, 8):
        raise SurfacesError(f"--roi takes 4 numbers (box) or 8 (corners), not {len(a.roi)}")
    nominal = {
        k: getattr(a, k)
        for k in ("thickness_mm", "throat_mm", "wall_mm", "length_mm")
        if getattr(a, k, None) is not None
    }
    return Settings(
        test=a.test,
        marker_mm=a.marker_mm,
        px_per_mm=a.px_per_mm,
        ruler=tuple(a.ruler) if a.ruler else None,
        roi=tuple(a.roi) if a.roi else None,
        min_size_mm=a.min_size_mm,
        limits=a.limits,
        nominal=nominal,
        bend_angle_deg=a.bend_angle_deg,
        former_diameter_mm=a.former_diameter_mm,
        outer_radius_mm=a.outer_radius_mm,
    )


def cmd_assess(a: argparse.Namespace) -> int:
    from .pipeline import assess
    from .photo import load_photo
    from . import report

    settings = settings_from_args(a)
    # refuse before any work: an existing output without --force must not leave the others half-written
    if not a.force:
        for out in (a.json, a.overlay, a.csv, a.pdf):
            if out and Path(out).exists():
                raise SurfacesError(f"{out} already exists; pass --force to replace it or choose another name")
    photo = load_photo(a.photo)
    try:
        res = assess(photo, settings)
    except SurfacesError as e:
        msg = str(e)
        if photo.name not in msg:
            raise SurfacesError(f"photo '{photo.name}': {msg}") from None
        raise
    ass = res.assessment
    if a.json:
        report.write_json(a.json, ass, force=a.force)
    if a.overlay:
        report.write_overlay_png(a.overlay, photo.rgb, ass, force=a.force)
    if a.csv:
        report.write_csv(a.csv, ass, force=a.force)
    if a.pdf:
        report.write_pdf(a.pdf, ass, photo.rgb, face_rgb=res.face.image, force=a.force)
    if not a.quiet:
        print(summary_text(ass))
    return 0


def summary_text(ass: dict) -> str:
    c, f, v = ass["calibration"], ass["face"], ass["verdict"]
    lines = [
        f"photo      {ass['photo']['name']}  ({ass['photo']['width']}x{ass['photo']['height']}, sha256 {ass['photo']['sha256'][:12]}...)",
        f"scale      {c['method']}: {c['px_per_mm']:.2f} px/mm at the face, +/- {c['uncertainty_pct']:.2f} %"
        + (f", tilt {c['tilt_deg']:.1f} deg" if c.get("tilt_deg") is not None else ""),
        f"face       {f['length_mm']:.1f} x {f['width_mm']:.1f} mm ({f['area_mm2']:.0f} mm2, {f['method']})",
        f"found      {len(ass['imperfections'])} imperfection(s)",
    ]
    for r in ass["imperfections"]:
        lines.append(
            f"  {r['id']:>3} {r['kind']:<9} {r['greatest_mm']:6.2f} +/- {r['greatest_u_mm']:.2f} mm"
            f"  width {r['width_mm']:.2f}  conf {r['confidence']:.2f}"
        )
    lines.append(f"limits     {ass['limits'].get('name')}: {ass['limits'].get('title', '')}")
    lines.append(f"VERDICT    {v['result'].upper()}")
    for reason in v["reasons"]:
        lines.append(f"  - {reason}")
    for w in ass.get("warnings", []):
        lines.append(f"warning    {w}")
    for cau in ass.get("cautions", []):
        lines.append(f"caution    {cau}")
    return "\n".join(lines)


def cmd_card(a: argparse.Namespace) -> int:
    from .card import write_card

    write_card(a.out, marker_mm=a.marker_mm, marker_id=a.marker_id, force=a.force)
    print(f"wrote {a.out}: print at 100 % (actual size) and check the square measures 50 mm")
    return 0


def cmd_ui(a: argparse.Namespace) -> int:
    import subprocess

    app = Path(__file__).resolve().parent.parent / "ui" / "app.py"
    if not app.exists():
        raise SurfacesError(f"the page is not installed beside the package ({app}): run from a checkout")
    if a.address not in ("127.0.0.1", "localhost"):
        print(
            f"warning: the page will listen on {a.address}: anyone on that network can open it and see the records",
            file=sys.stderr,
        )
    env = dict(os.environ)
    if a.db:
        env["SURFACES_DB"] = str(a.db)
    cmd = [
        sys.executable, "-m", "streamlit", "run", str(app),
        "--server.address", a.address, "--server.port", str(a.port),
        "--server.headless", "true", "--browser.gatherUsageStats", "false",
        "--server.maxUploadSize", "60", "--client.toolbarMode", "minimal",
    ]  # fmt: skip
    return subprocess.call(cmd, env=env)


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="surfaces",
        description="Measure and judge weld test faces (fillet break, nick break, bend) from a photo beside the printed reference card.",
    )
    p.add_argument("--version", action="version", version=f"surfaces {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    s = sub.add_parser("assess", help="measure one photo and judge it against a limit set")
    s.add_argument("photo", help="photo file (JPEG, PNG, TIFF)")
    _add_photo_args(s)
    s.add_argument("--json", metavar="OUT.json", help="write the assessment (stable JSON contract)")
    s.add_argument("--overlay", metavar="OUT.png", help="write the photo with numbered outlines, scale bar and verdict")
    s.add_argument("--csv", metavar="OUT.csv", help="write the imperfection table")
    s.add_argument("--pdf", metavar="OUT.pdf", help="write the coupon report")
    s.add_argument("--force", action="store_true", help="overwrite existing output files")
    s.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    s.set_defaults(func=cmd_assess)

    s = sub.add_parser("card", help="write the printable reference card (PDF)")
    s.add_argument("--out", required=True, metavar="card.pdf")
    s.add_argument("--marker-mm", type=_positive, default=20.0, help="marker side S in mm (default 20)")
    s.add_argument("--marker-id", type=int, default=0, choices=range(50), metavar="0..49", help="marker id in DICT_4X4_50")
    s.add_argument("--force", action="store_true")
    s.set_defaults(func=cmd_card)

    s = sub.add_parser("ui", help="start the local page (127.0.0.1)")
    s.add_argument("--address", default="127.0.0.1", help="listen address (default 127.0.0.1: this computer only)")
    s.add_argument("--port", type=int, default=8501)
    s.add_argument("--db", help="records database (default $SURFACES_DB or the user data folder)")
    s.set_defaults(func=cmd_ui)

    for mod, fn in (
        ("surfaces.limits_cli", "add_commands"),
        ("surfaces.batch", "add_commands"),
        ("surfaces.records", "add_commands"),
        ("surfaces.demo", "add_commands"),
        ("surfaces.bench", "add_commands"),
    ):
        try:
            m = __import__(mod, fromlist=[fn])
        except ImportError:
            continue
        if hasattr(m, fn):
            getattr(m, fn)(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        a = parser.parse_args(argv)
    except SurfacesError as e:
        print(f"surfaces: {e}", file=sys.stderr)
        return 2
    except SystemExit as e:  # --help / --version
        return int(e.code or 0) and 2
    if not getattr(a, "func", None):
        parser.print_help()
        return 2
    try:
        return int(a.func(a) or 0)
    except SurfacesError as e:
        print(f"surfaces: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("surfaces: interrupted", file=sys.stderr)
        return 130
    except (OSError, MemoryError) as e:
        print(f"surfaces: {e.__class__.__name__}: {e}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
