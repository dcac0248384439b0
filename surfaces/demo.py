"""The demo: an invented fabrication shop's welder tests, loaded into a records store.

Everything here is fiction: *Brindlefen Fabrication Works* does not exist,
and its welders, trainees, inspector, procedures and coupon numbers are
made up.  The photos in ``demo_images/`` are synthetic (made by
:mod:`surfaces.synth`, rebuilt by ``scripts/make_demo.py``), each with its
ground truth beside it (``<name>.truth.json``), listed in
``demo_images/manifest.csv``.

The story: three qualified welders and two trainees test fillet-break,
nick-break and bend coupons over six weeks of autumn 2026.  Most coupons
pass, some fail clearly, and three carry an imperfection right at its limit,
which the tool must send to ``review``; an inspector then measures those
with a loupe and records the decision, and dismisses a mark that is not an
imperfection.  The trainees fail, retry and finally pass.

:func:`load_demo` assesses every demo photo with the real pipeline (nothing
is precomputed) and saves coupon + assessment, then the reviews.
:func:`ensure_demo` does that only for an empty store, so the page can call
it on every start.
"""

from __future__ import annotations

import argparse
import copy
import csv
import math
import os
import sys
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from .model import Settings, SurfacesError

__all__ = [
    "DEMO_DIR",
    "MANIFEST_COLUMNS",
    "PROCEDURES",
    "REVIEWS",
    "SCENARIO",
    "SHOP",
    "DemoError",
    "add_commands",
    "ensure_demo",
    "load_demo",
    "read_manifest",
    "settings_for",
]

DEMO_DIR = Path(__file__).resolve().parent.parent / "demo_images"
MANIFEST_COLUMNS = (
    "photo", "coupon_id", "welder", "procedure", "process", "position", "material", "test",
    "thickness_mm", "throat_mm", "wall_mm", "length_mm", "limits", "date", "note",
)  # fmt: skip

SHOP = "Brindlefen Fabrication Works (fictional)"
ACTOR = "demo"
MARKER_MM = 20.0  # every demo photo shows the card's default 20 mm marker

#: Invented people (stamp id -> name); no real person is meant.
WELDERS = {
    "BF-W01": "Hollis Fenwright",
    "BF-W02": "Juno Ashgrove",
    "BF-W03": "Tobin Marlowe-Reyes",
    "BF-T11": "Pell Quarrie (trainee)",
    "BF-T12": "Wren Talbeck (trainee)",
}
INSPECTOR = "Oona Bracklehurst (shop inspector)"

#: Invented welding procedure specifications.
PROCEDURES = {
    "BF-WPS-101": {"process": "FCAW-G", "position": "2F", "material": "S355J2 plate",
                   "joint": "T-joint fillet, 10 mm plate"},
    "BF-WPS-102": {"process": "GMAW", "position": "3F", "material": "S355J2 plate",
                   "joint": "T-joint fillet, vertical up, 12 mm plate"},
    "BF-WPS-204": {"process": "SMAW", "position": "5G", "material": "API 5L X52 pipe",
                   "joint": "pipe butt, cellulosic downhill, 9.5 mm wall"},
    "BF-WPS-310": {"process": "GMAW", "position": "3G", "material": "S355J2 plate",
                   "joint": "single-V butt, 10 mm plate, guided bend over a 40 mm former",
                   "former_diameter_mm": 40.0, "bend_angle_deg": 180.0},
}  # fmt: skip


class DemoError(SurfacesError):
    """The demo data cannot be loaded (missing folder, store in use by other records...)."""


@dataclass(frozen=True)
class DemoCoupon:
    """One demo coupon: its manifest row, the verdict its story needs, how its photo is made."""

    photo: str
    coupon_id: str
    welder: str  # stamp id, a key of WELDERS
    procedure: str
    test: str
    date: str
    limits: str
    expect: str  # the automatic verdict the story needs
    note: str
    render: dict  # "scene", "seed" and keyword options for surfaces.synth
    thickness_mm: float | None = None
    throat_mm: float | None = None
    wall_mm: float | None = None
    length_mm: float | None = None

    def manifest_row(self) -> dict:
        p = PROCEDURES[self.procedure]
        row = {
            "photo": self.photo, "coupon_id": self.coupon_id, "welder": f"{self.welder} {WELDERS[self.welder]}",
            "procedure": self.procedure, "process": p["process"], "position": p["position"],
            "material": p["material"], "test": self.test, "limits": self.limits, "date": self.date,
            "note": self.note,
        }  # fmt: skip
        for k in ("thickness_mm", "throat_mm", "wall_mm", "length_mm"):
            v = getattr(self, k)
            row[k] = "" if v is None else f"{v:g}"
        return row


# Photo options shared by every demo photo: 4 MP landscape, the default card,
# a moderate camera tilt, JPEG quality 80 (keeps the folder small).
_PHOTO = {"megapixels": 4.0, "aspect": 4 / 3, "portrait": False, "marker_mm": MARKER_MM, "jpeg_quality": 80}


def _fillet(seed, defects, *, tilt, length=80.0, width=6.0, ppm=14.0, **kw):
    return {"scene": "fracture", "seed": seed, "test": "fillet-break", "defects": defects, "tilt_deg": tilt,
            "length_mm": length, "width_mm": width, "px_per_mm": ppm, **_PHOTO, **kw}


def _nick(seed, defects, *, tilt, length=25.0, width=9.5, ppm=22.0, **kw):
    return {"scene": "fracture", "seed": seed, "test": "nick-break", "defects": defects, "tilt_deg": tilt,
            "length_mm": length, "width_mm": width, "px_per_mm": ppm, **_PHOTO, **kw}


def _bend(seed, defects, *, tilt, ppm=16.0, **kw):
    # 10 mm coupon over a 40 mm former: outer radius 20 + 10 = 30 mm
    return {"scene": "bend", "seed": seed, "defects": defects, "tilt_deg": tilt, "radius_mm": 30.0,
            "thickness_mm": 10.0, "width_mm": 38.0, "length_mm": 40.0, "px_per_mm": ppm, **_PHOTO, **kw}


FB, NB, BD = "aws-d1.1-fillet-break", "api-1104-break", "aws-d1.1-bend"

#: The coupons, oldest first.  Limits quoted in notes are from the presets
#: (AWS D1.1 fillet break: no pore or inclusion over 3/32 in = 2.38 mm; API
#: 1104: gas pocket at most 1/16 in = 1.59 mm, slag at most 1/8 in long;
#: AWS D1.1 bend: no discontinuity over 1/8 in = 3 mm).
SCENARIO: tuple[DemoCoupon, ...] = (
    DemoCoupon(
        "fb_0907_w01.jpg", "BF-2609-FB01", "BF-W01", "BF-WPS-101", "fillet-break", "2026-09-07", FB, "accept",
        "Requalification, sound fracture face.",
        _fillet(7101, "none", tilt=8.0), thickness_mm=10, throat_mm=6, length_mm=80),
    DemoCoupon(
        "fb_0908_w02.jpg", "BF-2609-FB02", "BF-W02", "BF-WPS-102", "fillet-break", "2026-09-08", FB, "accept",
        "Three small pores, well under the single-size and sum limits.",
        _fillet(8102, [{"kind": "pore", "d_mm": 0.9, "x_mm": 22, "y_mm": 3.0},
                       {"kind": "pore", "d_mm": 1.1, "x_mm": 51, "y_mm": 2.6},
                       {"kind": "pore", "d_mm": 0.8, "x_mm": 66, "y_mm": 3.4}], tilt=14.0),
        thickness_mm=12, throat_mm=6, length_mm=80),
    DemoCoupon(
        "nb_0910_w01.jpg", "BF-2609-NB01", "BF-W01", "BF-WPS-204", "nick-break", "2026-09-10", NB, "accept",
        "One small gas pocket, under 1/16 in.",
        _nick(7201, [{"kind": "pore", "d_mm": 0.8, "x_mm": 11, "y_mm": 4.5}], tilt=10.0),
        wall_mm=9.5, length_mm=25),
    DemoCoupon(
        "fb_0914_t11.jpg", "BF-2609-FB03", "BF-T11", "BF-WPS-101", "fillet-break", "2026-09-14", FB, "reject",
        "Trainee, first attempt: incomplete root fusion along part of the root.",
        _fillet(10103, [{"kind": "unfused", "side": "root", "length_mm": 24, "width_mm": 1.8, "x_mm": 28,
                         "tint": "purple"}], tilt=12.0),
        thickness_mm=10, throat_mm=6, length_mm=80),
    DemoCoupon(
        "nb_0917_t12.jpg", "BF-2609-NB02", "BF-T12", "BF-WPS-204", "nick-break", "2026-09-17", NB, "reject",
        "Trainee, first attempt: an elongated slag inclusion longer than 1/8 in.",
        _nick(7202, [{"kind": "inclusion", "length_mm": 5.0, "width_mm": 1.2, "x_mm": 13, "y_mm": 5.0,
                      "angle_deg": 4}], tilt=16.0),
        wall_mm=9.5, length_mm=25),
    DemoCoupon(
        "fb_0918_w03.jpg", "BF-2609-FB04", "BF-W03", "BF-WPS-102", "fillet-break", "2026-09-18", FB, "reject",
        "A large pore well over 3/32 in.",
        _fillet(7104, [{"kind": "pore", "d_mm": 3.6, "x_mm": 47, "y_mm": 3.0}], tilt=6.0),
        thickness_mm=12, throat_mm=6, length_mm=80),
    DemoCoupon(
        "bd_0921_w02.jpg", "BF-2609-BD01", "BF-W02", "BF-WPS-310", "bend", "2026-09-21", BD, "accept",
        "Face bend, sound convex surface.",
        _bend(7301, "none", tilt=9.0), thickness_mm=10, length_mm=40),
    DemoCoupon(
        "bd_0921_w03.jpg", "BF-2609-BD02", "BF-W03", "BF-WPS-310", "bend", "2026-09-21", BD, "reject",
        "Root bend: an open crack across the coupon, over 1/8 in.",
        _bend(7302, [{"kind": "crack", "length_mm": 5.5, "width_mm": 0.3, "angle_deg": 90, "x_mm": 21,
                      "y_mm": 19, "edge": ""}], tilt=11.0), thickness_mm=10, length_mm=40),
    DemoCoupon(
        "fb_0928_t11.jpg", "BF-2609-FB05", "BF-T11", "BF-WPS-101", "fillet-break", "2026-09-28", FB, "review",
        "Trainee, second attempt: one pore right at the 3/32 in limit.",
        _fillet(13105, [{"kind": "pore", "d_mm": 2.42, "x_mm": 58, "y_mm": 3.0}], tilt=10.0),
        thickness_mm=10, throat_mm=6, length_mm=80),
    DemoCoupon(
        "nb_1001_t12.jpg", "BF-2610-NB03", "BF-T12", "BF-WPS-204", "nick-break", "2026-10-01", NB, "review",
        "Trainee, second attempt: a gas pocket right at 1/16 in.",
        _nick(10203, [{"kind": "pore", "d_mm": 1.55, "x_mm": 9, "y_mm": 5.0}], tilt=13.0),
        wall_mm=9.5, length_mm=25),
    DemoCoupon(
        "fb_1012_t11.jpg", "BF-2610-FB06", "BF-T11", "BF-WPS-101", "fillet-break", "2026-10-12", FB, "accept",
        "Trainee, third attempt: one small pore; qualified.",
        _fillet(7106, [{"kind": "pore", "d_mm": 0.7, "x_mm": 64, "y_mm": 2.8}], tilt=15.0),
        thickness_mm=10, throat_mm=6, length_mm=80),
    DemoCoupon(
        "bd_1015_t12.jpg", "BF-2610-BD03", "BF-T12", "BF-WPS-310", "bend", "2026-10-15", BD, "review",
        "Trainee's bend coupon: one open discontinuity right at 1/8 in.",
        _bend(7303, [{"kind": "crack", "length_mm": 3.0, "width_mm": 0.3, "angle_deg": 80, "x_mm": 17,
                      "y_mm": 15, "edge": ""}], tilt=8.0), thickness_mm=10, length_mm=40),
)  # fmt: skip


@dataclass(frozen=True)
class DemoReview:
    """An inspector's review of one demo coupon.

    ``measure``: the inspector's own reading of the greatest dimension (mm) of
    the detection matched to the truth imperfection ``truth_index`` (status
    ``edited``, 1-sigma ``u_mm``; the kind set to what the inspector sees); ``dismiss_unmatched``: dismiss every
    detection that matches no truth imperfection (a mark, not a defect).
    """

    coupon_id: str
    note: str
    measure: tuple[tuple[int, float], ...] = ()
    u_mm: float = 0.03
    dismiss_unmatched: bool = False
    confirm_rest: bool = True


REVIEWS: tuple[DemoReview, ...] = (
    DemoReview("BF-2609-FB05", "Measured the pore with a 10x loupe and graticule: 2.45 mm, over 3/32 in. "
               "Reject; retest after coaching on travel speed.", measure=((0, 2.45),)),
    DemoReview("BF-2610-NB03", "Measured the gas pocket with a 10x loupe and graticule: 1.50 mm, "
               "within 1/16 in. Accept.", measure=((0, 1.50),), dismiss_unmatched=True),
    DemoReview("BF-2610-BD03", "Opening measured with a loupe: 2.9 mm, within 1/8 in; no slag at its root. "
               "Accept.", measure=((0, 2.90),), dismiss_unmatched=True),
    DemoReview("BF-2609-FB02", "Checked every mark; the tool's list is right.", dismiss_unmatched=True),
)


# --------------------------------------------------------------------------- manifest


def read_manifest(folder: str | os.PathLike | None = None) -> list[dict]:
    """Rows of ``manifest.csv`` in ``folder`` (default :data:`DEMO_DIR`), oldest date first.

    Sizes are floats (``None`` when empty); every row's photo must exist.
    """
    folder = Path(folder) if folder is not None else DEMO_DIR
    path = folder / "manifest.csv"
    if not path.is_file():
        raise DemoError(f"no demo manifest at {path}; rebuild the demo photos with scripts/make_demo.py")
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        missing = [c for c in MANIFEST_COLUMNS if c not in (reader.fieldnames or [])]
        if missing:
            raise DemoError(f"{path} lacks column(s) {', '.join(missing)}; rebuild it with scripts/make_demo.py")
        rows = []
        for n, raw in enumerate(reader, start=2):
            row = {k: (raw.get(k) or "").strip() for k in MANIFEST_COLUMNS}
            for k in ("thickness_mm", "throat_mm", "wall_mm", "length_mm"):
                try:
                    row[k] = float(row[k]) if row[k] else None
                except ValueError:
                    raise DemoError(f"{path} row {n}: {k} = {row[k]!r} is not a number") from None
            if not (folder / row["photo"]).is_file():
                raise DemoError(f"{path} row {n}: photo {row['photo']} is missing; rebuild with scripts/make_demo.py")
            rows.append(row)
    return sorted(rows, key=lambda r: (r["date"], r["coupon_id"]))


def settings_for(row: dict) -> Settings:
    """The settings an inspector would use for a manifest row."""
    nominal = {k: row[k] for k in ("thickness_mm", "throat_mm", "wall_mm", "length_mm") if row.get(k)}
    extra = {}
    proc = PROCEDURES.get(row.get("procedure") or "", {})
    if row["test"] == "bend":
        for k in ("former_diameter_mm", "bend_angle_deg"):
            if k in proc:
                extra[k] = proc[k]
    return Settings(test=row["test"], marker_mm=MARKER_MM, limits=row["limits"] or None, nominal=nominal, **extra)


def _coupon(row: dict) -> dict:
    c = {"id": row["coupon_id"], "test": row["test"], "date": row["date"],
         "batch": f"{row['date'][:7]} welder tests"}
    for k in ("welder", "procedure", "process", "position", "material"):
        if row.get(k):
            c[k] = row[k]
    for k in ("thickness_mm", "throat_mm", "wall_mm", "length_mm"):
        if row.get(k):
            c[k] = row[k]
    return c


# --------------------------------------------------------------------------- reviews


def reviewed_assessment(assessment: dict, truth: dict, review: DemoReview) -> dict:
    """The assessment as the inspector leaves it after ``review``, judged again.

    Detections are related to the truth with :func:`surfaces.evaluate.match`.
    A measured truth imperfection that the tool missed is added as a manual
    row (the inspector saw it).
    """
    from . import evaluate
    from .limits import judge_assessment, load_limit_set

    a = copy.deepcopy(assessment)
    rows = a.get("imperfections") or []
    m = evaluate.match(a, truth)
    by_truth = {int(r.truth_index): int(r.det_id) for r in m.itertuples() if r.truth_index >= 0 and r.det_id >= 0}
    unmatched = {int(r.det_id) for r in m.itertuples() if r.truth_index < 0}
    measured = {}
    for ti, reading in review.measure:
        did = by_truth.get(ti)
        if did is None:  # the tool missed it: the inspector adds it by hand
            t = evaluate.truth_table({**truth, "imperfections": [truth["imperfections"][ti]]}).iloc[0].to_dict()
            t.update(id=max([int(r["id"]) for r in rows] + [0]) + 1, source="manual", status="edited",
                     greatest_mm=reading, greatest_u_mm=review.u_mm)
            for c in ("width_u_mm", "along_u_mm", "across_u_mm"):
                t[c] = review.u_mm
            t["area_u_mm2"] = 2 * review.u_mm * max(t.get("greatest_mm") or 0, 0.1)
            rows.append({k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in t.items()})
        else:
            measured[did] = (reading, truth["imperfections"][ti])
    for r in rows:
        rid = int(r["id"])
        if rid in measured:  # the inspector's reading, and the kind the inspector sees
            reading, t = measured[rid]
            r.update(status="edited", greatest_mm=reading, greatest_u_mm=review.u_mm, kind=t["kind"],
                     iso6520=str(t.get("iso6520") or r.get("iso6520") or ""))
        elif review.dismiss_unmatched and rid in unmatched and r.get("source") != "manual":
            r["status"] = "dismissed"
        elif review.confirm_rest and r.get("status") == "auto":
            r["status"] = "confirmed"
    a["imperfections"] = rows
    ls = load_limit_set((a.get("limits") or {}).get("name") or a["settings"]["limits"])
    return judge_assessment(a, ls)


# --------------------------------------------------------------------------- loading


@contextmanager
def _lock(db_path: Path):
    """An exclusive lock beside the database while the demo is loaded (POSIX; no-op elsewhere)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        yield
        return
    db_path.parent.mkdir(parents=True, exist_ok=True)
    with open(db_path.with_name(db_path.name + ".demo-lock"), "w") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


@dataclass
class DemoSummary:
    db: str
    added: list[dict] = field(default_factory=list)  # coupon_id, assessment_id, result, expected
    skipped: list[str] = field(default_factory=list)  # coupon ids already in the store
    reviews: list[dict] = field(default_factory=list)
    mismatches: list[str] = field(default_factory=list)  # story verdicts the pipeline did not give

    def text(self) -> str:
        lines = [f"demo: {SHOP}, {len(self.added)} coupon(s) assessed into {self.db}"]
        for a in self.added:
            flag = "" if a["result"] == a["expected"] else f"   (story: {a['expected']})"
            lines.append(f"  {a['coupon_id']:<14} {a['date']}  {a['test']:<12} {a['result']:<7}{flag}")
        for r in self.reviews:
            lines.append(f"  review {r['coupon_id']:<14} {r['before']} -> {r['after']}  by {r['reviewer']}")
        if self.skipped:
            lines.append(f"  already in the store, left as they are: {', '.join(self.skipped)}")
        for m in self.mismatches:
            lines.append(f"warning: {m}")
        return "\n".join(lines)


def _existing_coupons(store) -> set[str]:
    h = store.history()
    return set(h["coupon_id"].dropna()) if len(h) else set()


def load_demo(db_path: str | os.PathLike | None = None, *, folder: str | os.PathLike | None = None,
              force: bool = False, progress: Callable[[int, int, str], None] | None = None) -> DemoSummary:
    """Assess the demo photos into a records store, with the reviews.

    Parameters
    ----------
    db_path : path-like, optional
        The records database (default :func:`surfaces.records.default_db_path`).
    folder : path-like, optional
        The demo folder (default :data:`DEMO_DIR`).
    force : bool
        Also load into a store that already holds other records (the demo
        coupons are added beside them; nothing is removed).  Without it such a
        store is refused.  Demo coupons already in the store are never added twice.
    progress : callable, optional
        ``progress(done, total, coupon_id)``.

    Returns
    -------
    DemoSummary
    """
    from .records import default_db_path

    db = Path(db_path).expanduser() if db_path is not None else default_db_path()
    with _lock(db):
        return _load(db, folder=folder, force=force, progress=progress)


def _load(db: Path, *, folder, force: bool, progress) -> DemoSummary:
    from .photo import load_photo
    from .pipeline import assess
    from .records import Store

    rows = read_manifest(folder)
    base = Path(folder) if folder is not None else DEMO_DIR
    story = {c.coupon_id: c for c in SCENARIO}
    summary = DemoSummary(db=str(db))
    with Store(db) as store:
        have = _existing_coupons(store)
        demo_ids = {r["coupon_id"] for r in rows}
        others = have - demo_ids
        if others and not force:
            raise DemoError(
                f"{db} already holds {len(others)} coupon(s) that are not demo data; give another --db "
                "for a fresh demo store, or --force to add the demo coupons beside them"
            )
        ids = {}
        for k, row in enumerate(rows):
            cid = row["coupon_id"]
            if progress:
                progress(k, len(rows), cid)
            if cid in have:
                summary.skipped.append(cid)
                continue
            path = base / row["photo"]
            data = path.read_bytes()
            photo = load_photo(data, name=row["photo"])
            try:
                res = assess(photo, settings_for(row))
            except SurfacesError as err:  # the pipeline cannot read this photo: leave it out, say so
                summary.mismatches.append(f"demo coupon {cid}: not assessed ({err})")
                continue
            aid = store.save_assessment(res.assessment, data, coupon=_coupon(row), actor=ACTOR)
            ids[cid] = (aid, res.assessment, path)
            result = res.assessment["verdict"]["result"]
            expected = story[cid].expect if cid in story else result
            summary.added.append({"coupon_id": cid, "assessment_id": aid, "result": result, "expected": expected,
                                  "date": row["date"], "test": row["test"]})
            if result != expected:
                summary.mismatches.append(f"demo coupon {cid}: the pipeline says {result}, the story needs {expected}")
        for rv in REVIEWS:
            if rv.coupon_id not in ids:
                continue
            aid, a, path = ids[rv.coupon_id]
            truth = _read_truth(path)
            r = reviewed_assessment(a, truth, rv)
            store.save_review(aid, r, reviewer=INSPECTOR, note=rv.note)
            summary.reviews.append({"coupon_id": rv.coupon_id, "before": a["verdict"]["result"],
                                    "after": r["verdict"]["result"], "reviewer": INSPECTOR})
        if progress:
            progress(len(rows), len(rows), "")
    return summary


def _read_truth(photo_path: Path) -> dict:
    import json

    t = photo_path.with_suffix(".truth.json")
    try:
        return json.loads(t.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise DemoError(f"cannot read the demo truth {t} ({err}); rebuild with scripts/make_demo.py") from None


def ensure_demo(db_path: str | os.PathLike | None = None, *, folder: str | os.PathLike | None = None,
                progress: Callable[[int, int, str], None] | None = None) -> DemoSummary | None:
    """Fill an *empty* store with the demo; do nothing to a store that holds any assessment.

    Idempotent and safe to call on every page start (a lock beside the
    database keeps two callers from loading it twice).  Returns the summary
    when it loaded the demo, else ``None``.
    """
    from .records import Store, default_db_path

    db = Path(db_path).expanduser() if db_path is not None else default_db_path()
    with Store(db) as store:  # quick look without the lock
        if store.assessment_ids():
            return None
    with _lock(db):
        with Store(db) as store:  # again under the lock: another caller may have loaded it meanwhile
            if store.assessment_ids():
                return None
        return _load(db, folder=folder, force=False, progress=progress)


# --------------------------------------------------------------------------- CLI


def cmd_demo(a: argparse.Namespace) -> int:
    def say(done, total, cid):
        if cid and not a.quiet:
            print(f"demo: assessing {cid} ({done + 1}/{total})", file=sys.stderr)

    s = load_demo(a.db, folder=a.folder, force=a.force, progress=say)
    print(s.text())
    print("open the page with: surfaces ui" + (f" --db {a.db}" if a.db else ""))
    return 0


def add_commands(sub) -> None:
    """Register ``surfaces demo`` on the CLI's sub-parsers."""
    p = sub.add_parser("demo", help="load the demo shop's coupons (synthetic photos) into a records store")
    p.add_argument("--db", help="records database to fill (default $SURFACES_DB or the user data folder)")
    p.add_argument("--force", action="store_true",
                   help="add the demo coupons to a store that already holds other records (nothing is removed)")
    p.add_argument("--folder", help=argparse.SUPPRESS)
    p.add_argument("-q", "--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_demo)
