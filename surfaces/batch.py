"""Many photos at once: worker processes assess, this process records.

:func:`run_batch` sends each photo to a worker process
(:class:`concurrent.futures.ProcessPoolExecutor`, ``spawn`` start so workers
share no database handle), which runs :func:`surfaces.pipeline.assess_path`
and returns the assessment dict.  The parent alone writes to the records
store, one transaction per photo, so a batch stopped at any moment leaves a
consistent database, and running it again skips every photo already assessed
with the same settings (same SHA-256 and settings key) and finishes the rest.

A photo that fails gets a row with status ``error`` and its one-line message;
it never stops the batch.

Manifest CSV (optional): columns ``photo`` (required; relative to the batch
folder), ``coupon_id``, ``welder``, ``procedure``, ``process``, ``position``,
``material``, ``thickness_mm``, ``throat_mm``, ``wall_mm``, ``length_mm``
(nominal sizes of the coupon), ``test`` and ``limits`` (this photo's test and
limit set, instead of ``--test`` and ``--limits``), ``date`` (YYYY-MM-DD, the
test date) and ``note`` (read and left in the manifest).  Without a row a
photo's coupon id is its file name without suffix.
"""

from __future__ import annotations

import csv
import io
import math
import os
import signal
import sys
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field, replace
from datetime import date
from pathlib import Path
from typing import Any, Callable, Iterable

import multiprocessing as mp
import pandas as pd

from .atomic import OutputExistsError, write_bytes_atomic, write_text_atomic
from .model import TEST_TYPES, Settings, SurfacesError
from .records import Store, sha256_file

__all__ = [
    "IMAGE_SUFFIXES",
    "MANIFEST_COLUMNS",
    "ManifestError",
    "SUMMARY_COLUMNS",
    "TextProgress",
    "read_manifest",
    "run_batch",
]

IMAGE_SUFFIXES = frozenset({".jpg", ".jpeg", ".png", ".tif", ".tiff", ".webp", ".bmp"})
MANIFEST_COLUMNS: tuple[str, ...] = (
    "photo", "coupon_id", "welder", "procedure", "process", "position", "material",
    "thickness_mm", "throat_mm", "wall_mm", "length_mm", "test", "limits", "date", "note",
)
_NOMINAL_COLUMNS = ("thickness_mm", "throat_mm", "wall_mm", "length_mm")
SUMMARY_COLUMNS: tuple[str, ...] = (
    "photo", "coupon_id", "welder", "status", "result", "first_reason", "n_imperfections",
    "assessment_id", "photo_sha256", "error",
)


class ManifestError(SurfacesError):
    """The manifest CSV cannot be used (names the file and row)."""


@dataclass
class _Job:
    index: int
    path: Path
    coupon: dict
    settings: Settings
    sha256: str = ""
    tries: int = 0
    row: dict = field(default_factory=dict)


# --------------------------------------------------------------------------- inputs


def _is_photo(p: Path) -> bool:
    return p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES and not p.name.startswith(".")


def _collect(inputs: str | os.PathLike | Iterable[str | os.PathLike]) -> tuple[list[Path], Path | None]:
    """Photo paths in order, and the batch folder (when one folder was given)."""
    if isinstance(inputs, (str, os.PathLike)):
        folder = Path(inputs)
        if not folder.is_dir():
            raise SurfacesError(f"{folder} is not a folder; give a folder of photos or a list of photo files")
        return sorted((p for p in folder.iterdir() if _is_photo(p)), key=lambda p: p.name), folder
    out: list[Path] = []
    for item in inputs:
        p = Path(item)
        if p.is_dir():
            out += sorted((q for q in p.iterdir() if _is_photo(q)), key=lambda q: q.name)
        elif p.is_file():
            out.append(p)
        else:
            raise SurfacesError(f"{p} does not exist; check the photo path")
    return out, None


def _number(text: str, col: str, where: str) -> float | None:
    text = text.strip()
    if not text:
        return None
    try:
        v = float(text.replace(",", "."))
    except ValueError:
        raise ManifestError(f"{where}: {col} = {text!r} is not a number of millimetres") from None
    if not (math.isfinite(v) and 0 < v < 1e5):
        raise ManifestError(f"{where}: {col} = {text!r} must be a positive size in mm")
    return v


def read_manifest(path: str | os.PathLike, *, folder: str | os.PathLike | None = None) -> dict[Path, dict]:
    """Read a batch manifest.

    Parameters
    ----------
    path : path-like
        The CSV file (UTF-8, header row; see the module docstring for columns).
    folder : path-like, optional
        The batch folder; photo paths are taken relative to it and must stay
        inside it.  Default: the manifest's own folder.

    Returns
    -------
    dict
        Resolved photo path -> coupon fields (``id``, ``welder``, ...; sizes as float).

    Raises
    ------
    ManifestError
        Unknown columns, a photo outside the batch folder or missing, a
        duplicate photo or coupon id, a bad number: the message names the row.
    """
    path = Path(path)
    base = Path(folder) if folder is not None else path.parent
    base_r = base.resolve()
    try:
        text = path.read_text(encoding="utf-8-sig")
    except OSError as err:
        raise ManifestError(f"cannot read the manifest {path} ({err.strerror}); check the path") from err
    except UnicodeDecodeError:
        raise ManifestError(f"manifest {path} is not UTF-8 text; save it as CSV UTF-8") from None
    reader = csv.DictReader(io.StringIO(text))
    cols = [c.strip() for c in (reader.fieldnames or [])]
    if "photo" not in cols:
        raise ManifestError(f"manifest {path} has no 'photo' column; the first line must name the columns "
                            f"({', '.join(MANIFEST_COLUMNS)})")
    unknown = [c for c in cols if c not in MANIFEST_COLUMNS]
    if unknown:
        raise ManifestError(f"manifest {path}: unknown column(s) {', '.join(unknown)}; "
                            f"use {', '.join(MANIFEST_COLUMNS)}")
    out: dict[Path, dict] = {}
    seen_ids: dict[str, int] = {}
    seen_photos: dict[Path, int] = {}
    for n, raw in enumerate(reader, start=2):
        row = {(k or "").strip(): (v or "").strip() for k, v in raw.items() if k is not None}
        if None in raw:
            raise ManifestError(f"manifest {path} row {n}: more cells than columns; check the commas")
        if not any(row.values()):
            continue
        where = f"manifest {path} row {n}"
        name = row.get("photo", "")
        if not name:
            raise ManifestError(f"{where}: the photo cell is empty; name the photo file")
        p = Path(name)
        full = (p if p.is_absolute() else base / p).resolve()
        if not full.is_relative_to(base_r):
            raise ManifestError(f"{where}: photo {name!r} is outside the batch folder {base}; "
                                "put the photo in the folder and name it relative to it")
        if not full.is_file():
            raise ManifestError(f"{where}: photo {name!r} not found in {base}; check the file name")
        if full in seen_photos:
            raise ManifestError(f"{where}: photo {name!r} is already listed in row {seen_photos[full]}")
        seen_photos[full] = n
        cid = row.get("coupon_id") or full.stem
        if cid in seen_ids:
            raise ManifestError(f"{where}: coupon id {cid!r} is already used in row {seen_ids[cid]}; "
                                "each coupon needs its own id")
        seen_ids[cid] = n
        coupon: dict[str, Any] = {"id": cid}
        for c in ("welder", "procedure", "process", "position", "material"):
            if row.get(c):
                coupon[c] = row[c]
        for c in _NOMINAL_COLUMNS:
            v = _number(row.get(c, ""), c, where)
            if v is not None:
                coupon[c] = v
        if row.get("test"):
            if row["test"] not in TEST_TYPES:
                raise ManifestError(f"{where}: test {row['test']!r} is not one of {', '.join(TEST_TYPES)}")
            coupon["test"] = row["test"]
        if row.get("date"):
            try:
                coupon["date"] = date.fromisoformat(row["date"]).isoformat()
            except ValueError:
                raise ManifestError(f"{where}: date {row['date']!r} is not a date; write it as YYYY-MM-DD") from None
        if row.get("limits"):
            coupon[_LIMITS_KEY] = _manifest_limits(row["limits"], base, where)
        out[full] = coupon
    return out


_LIMITS_KEY = "_limits"  # a row's limit set: a setting of the job, not a coupon field


def _manifest_limits(text: str, base: Path, where: str) -> str:
    """The limit set named in a manifest row, checked now (not after the photos are assessed)."""
    from .limits import load_limit_set

    looks_like_path = text.endswith(".toml") or "/" in text or os.sep in text
    name = str((base / text).resolve()) if looks_like_path and not Path(text).is_absolute() else text
    try:
        load_limit_set(name)
    except SurfacesError as err:
        raise ManifestError(f"{where}: limits: {' '.join(str(err).split())}") from None
    return name


# --------------------------------------------------------------------------- workers


def _init_worker() -> None:
    # The parent handles Ctrl-C; workers stop when the pool is shut down.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        import cv2

        cv2.setNumThreads(1)  # one process per core already
    except Exception:  # pragma: no cover
        pass
    try:  # import the pipeline now, while the parent is still hashing the photos
        from . import pipeline  # noqa: F401
    except Exception:  # pragma: no cover - the first photo reports it
        pass


def _ready() -> int:
    return os.getpid()


def _start_pool(workers: int) -> ProcessPoolExecutor:
    """A pool of ``workers`` spawned processes, started at once (not on the first photo)."""
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"), initializer=_init_worker)
    for _ in range(workers):
        pool.submit(_ready)
    return pool


def _pipeline_assess(path: Path, settings: Settings) -> dict:
    from .pipeline import assess_path

    return assess_path(path, settings).assessment


def _one_line(err: BaseException) -> str:
    text = " ".join(str(err).split())
    if isinstance(err, SurfacesError):
        return text or type(err).__name__
    return f"internal error ({type(err).__name__}: {text}); please report it with the photo"


def _work(path: str, settings: Settings, assess_fn: Callable[[Path, Settings], dict] | None) -> tuple[dict | None, str | None]:
    try:
        fn = assess_fn or _pipeline_assess
        return fn(Path(path), settings), None
    except MemoryError:
        return None, "not enough memory to assess this photo; close other programs or use fewer --workers"
    except Exception as err:  # noqa: BLE001 - every failure becomes a row
        return None, _one_line(err)


# --------------------------------------------------------------------------- progress


class TextProgress:
    """A plain text progress bar on a stream (stderr by default).

    On a terminal one line is redrawn; otherwise one line per photo.
    """

    def __init__(self, stream=None, *, width: int = 30):
        self.stream = stream or sys.stderr
        self.width = width
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.counts: dict[str, int] = {}

    def __call__(self, done: int, total: int, row: dict) -> None:
        status = row.get("result") or row.get("status") or ""
        self.counts[status] = self.counts.get(status, 0) + 1
        filled = int(round(self.width * done / total)) if total else self.width
        bar = "#" * filled + "." * (self.width - filled)
        tail = ", ".join(f"{k} {v}" for k, v in sorted(self.counts.items()))
        line = f"[{bar}] {done}/{total}  {row.get('photo', '')}: {status}  ({tail})"
        if self.tty:
            self.stream.write("\r" + line[:200].ljust(120))
            if done == total:
                self.stream.write("\n")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()


# --------------------------------------------------------------------------- the batch


def _job_settings(settings: Settings, coupon: dict, limits: str | None = None) -> Settings:
    """``settings`` with this coupon's nominal sizes, test and limit set from its manifest row."""
    nominal = dict(settings.nominal or {})
    for c in _NOMINAL_COLUMNS:
        if coupon.get(c) is not None:
            nominal[c] = coupon[c]
    changes = {}
    if nominal != dict(settings.nominal or {}):
        changes["nominal"] = nominal
    if coupon.get("test") and coupon["test"] != settings.test:
        changes["test"] = coupon["test"]
    if limits and limits != settings.limits:
        changes["limits"] = limits
    return replace(settings, **changes) if changes else settings


def _summary_row(job: _Job) -> dict:
    return {"photo": job.path.name, "coupon_id": job.coupon.get("id"), "welder": job.coupon.get("welder"),
            "status": None, "result": None, "first_reason": "", "n_imperfections": None,
            "assessment_id": None, "photo_sha256": job.sha256 or None, "error": None}


def _fill_from_assessment(row: dict, a: dict) -> None:
    v = a.get("verdict") or {}
    reasons = v.get("reasons") or []
    row["result"] = v.get("result")
    row["first_reason"] = reasons[0] if reasons else ""
    row["n_imperfections"] = sum(1 for i in a.get("imperfections") or [] if i.get("status") != "dismissed")


def run_batch(
    inputs: str | os.PathLike | Iterable[str | os.PathLike],
    *,
    settings: Settings,
    db: str | os.PathLike | None = None,
    manifest: str | os.PathLike | None = None,
    workers: int | None = None,
    progress: Callable[[int, int, dict], None] | None = None,
    batch: str | None = None,
    actor: str = "batch",
    summary_csv: str | os.PathLike | None = None,
    summary_pdf: str | os.PathLike | None = None,
    force: bool = False,
    assess_fn: Callable[[Path, Settings], dict] | None = None,
) -> pd.DataFrame:
    """Assess many photos and record them; resumes an interrupted batch.

    Parameters
    ----------
    inputs : folder or list of paths
        A folder (its photos, not sub-folders) or a list of photo files.
    settings : Settings
        Settings for every photo; a manifest's ``thickness_mm``,
        ``throat_mm`` and ``wall_mm`` replace the nominal sizes per photo.
    db : path-like, optional
        The records database (default :func:`surfaces.records.default_db_path`).
    manifest : path-like, optional
        CSV mapping photos to coupons (see :func:`read_manifest`).
    workers : int, optional
        Worker processes (default ``os.cpu_count()``); ``1`` assesses in this
        process without a pool.
    progress : callable, optional
        ``progress(done, total, row)`` after each photo, e.g. :class:`TextProgress`.
    batch : str, optional
        Batch name recorded on each coupon (default: the folder name).
    actor : str
        Recorded as the author of each new assessment.
    summary_csv, summary_pdf : path-like, optional
        Write the summary table there at the end (checked before any work:
        an existing file needs ``force``).
    assess_fn : callable, optional
        ``assess_fn(path, settings) -> assessment dict``, a module-level
        function (it is sent to the workers); default the pipeline.

    Returns
    -------
    pandas.DataFrame
        One row per photo in input order, columns :data:`SUMMARY_COLUMNS`;
        ``status`` is ``done``, ``skipped`` (already in the store) or ``error``.
    """
    if workers is None:
        workers = os.cpu_count() or 1
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise SurfacesError(f"--workers {workers!r}: give a whole number of 1 or more")
    for out in (summary_csv, summary_pdf):
        if out is not None and Path(out).exists() and not force:
            raise OutputExistsError(f"{out} already exists; pass --force to replace it or choose another name")
    photos, folder = _collect(inputs)
    meta: dict[Path, dict] = {}
    if manifest is not None:
        base = folder if folder is not None else Path(manifest).parent
        meta = read_manifest(manifest, folder=base)
        known = {p.resolve() for p in photos}
        photos += [p for p in meta if p not in known]
    if batch is None:
        batch = folder.resolve().name if folder is not None else (Path(manifest).parent.resolve().name if manifest else None)
    jobs: list[_Job] = []
    for i, p in enumerate(photos):
        coupon = dict(meta.get(p.resolve()) or {"id": p.stem})
        limits = coupon.pop(_LIMITS_KEY, None)
        coupon.setdefault("test", settings.test)
        if batch:
            coupon.setdefault("batch", batch)
        jobs.append(_Job(i, p, coupon, _job_settings(settings, coupon, limits)))
    seen_ids: dict[str, Path] = {}
    for j in jobs:
        cid = j.coupon["id"]
        if cid in seen_ids:
            raise ManifestError(f"photos {seen_ids[cid].name} and {j.path.name} both give coupon id {cid!r}; "
                                "rename one or list them in a manifest with their own coupon ids")
        seen_ids[cid] = j.path

    total = len(jobs)
    done_count = 0

    def finish(job: _Job) -> None:
        nonlocal done_count
        done_count += 1
        if progress is not None:
            progress(done_count, total, dict(job.row))

    # the workers start (and import the pipeline) while this process hashes the
    # photos and looks them up in the store
    pool = _start_pool(min(workers, total)) if workers > 1 and total > 1 else None
    try:
        _run_jobs(jobs, pool, store_path=db, workers=workers, assess_fn=assess_fn, actor=actor, finish=finish)
    finally:
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)
    return _finish_summary(jobs, batch, summary_csv, summary_pdf, force)


def _run_jobs(jobs, pool, *, store_path, workers, assess_fn, actor, finish) -> None:
    with Store(store_path) as store:
        pending: list[_Job] = []
        in_batch: dict[tuple[str, str], _Job] = {}
        for j in jobs:
            j.row = _summary_row(j)
            try:
                j.sha256 = sha256_file(j.path)
            except OSError as err:
                j.row.update(status="error", error=f"cannot read {j.path} ({err.strerror}); check the file")
                finish(j)
                continue
            j.row["photo_sha256"] = j.sha256
            key = (j.sha256, j.settings.key())
            prev = store.find_done(*key)
            if prev is not None:
                _fill_from_assessment(j.row, store.get_assessment(prev))
                j.row.update(status="skipped", assessment_id=prev)
                finish(j)
            elif key in in_batch:
                j.row.update(status="skipped", error=f"same photo as {in_batch[key].path.name}")
                finish(j)
            else:
                in_batch[key] = j
                pending.append(j)

        def record(job: _Job, a: dict | None, err: str | None) -> None:
            if err is None:
                try:
                    sha = str((a or {}).get("photo", {}).get("sha256", ""))
                    if sha != job.sha256:
                        raise SurfacesError(f"{job.path.name} changed while the batch ran; run the batch again")
                    data = job.path.read_bytes()
                    aid = store.save_assessment(a, data, coupon=job.coupon, actor=actor,
                                                settings_key=job.settings.key())
                    _fill_from_assessment(job.row, a)
                    job.row.update(status="done", assessment_id=aid)
                except OSError as e:
                    err = f"cannot read {job.path} again ({e.strerror}); check the file"
                except SurfacesError as e:
                    err = _one_line(e)
            if err is not None:
                job.row.update(status="error", error=err, result=None)
            finish(job)

        if pool is None or len(pending) <= 1:
            for j in pending:
                record(j, *_work(str(j.path), j.settings, assess_fn))
        else:
            _run_pool(pending, min(workers, len(pending)), assess_fn, record, pool=pool)


def _finish_summary(jobs, batch, summary_csv, summary_pdf, force) -> pd.DataFrame:
    summary = pd.DataFrame([j.row for j in jobs], columns=list(SUMMARY_COLUMNS))
    for c in ("assessment_id", "n_imperfections"):
        summary[c] = summary[c].astype("Int64")
    if summary_csv is not None or summary_pdf is not None:
        from . import report

        if summary_csv is not None:
            write_text_atomic(summary_csv, report.batch_csv(summary), force=force)
        if summary_pdf is not None:
            title = f"Batch summary: {batch}" if batch else "Batch summary"
            write_bytes_atomic(summary_pdf, report.batch_pdf(summary, title=title), force=force)
    return summary


def _run_pool(pending: list[_Job], workers: int, assess_fn, record, *, pool: ProcessPoolExecutor | None = None) -> None:
    """Run jobs in a process pool (``pool`` first, if given); a dead worker costs at most its photo."""
    queue = list(pending)
    max_in_flight = 2 * workers
    while queue:
        if pool is None:
            pool = _start_pool(workers)
        running: dict[Future, _Job] = {}
        broken = False
        try:
            while (queue or running) and not broken:
                while queue and len(running) < max_in_flight:
                    j = queue.pop(0)
                    j.tries += 1
                    running[pool.submit(_work, str(j.path), j.settings, assess_fn)] = j
                finished, _ = wait(running, return_when=FIRST_COMPLETED)
                for f in finished:
                    j = running.pop(f)
                    try:
                        a, err = f.result()
                    except BrokenProcessPool:
                        broken = True
                        if j.tries >= 2:
                            record(j, None, "a worker process died while assessing this photo "
                                            "(out of memory?); try it alone with --workers 1")
                        else:
                            queue.insert(0, j)
                        continue
                    except Exception as e:  # noqa: BLE001 - e.g. unpicklable result
                        a, err = None, _one_line(e)
                    record(j, a, err)
            if broken:  # the jobs still running were lost with the pool: try them again
                for j in running.values():
                    queue.insert(0, j)
        except BaseException:
            pool.shutdown(wait=False, cancel_futures=True)
            for proc in list(getattr(pool, "_processes", {}).values() or []):
                proc.terminate()
            raise
        pool.shutdown(wait=not broken, cancel_futures=True)
        pool = None
        if not broken:
            break


# --------------------------------------------------------------------------- command line


def add_commands(sub) -> None:
    """``surfaces batch``: hooked into :mod:`surfaces.cli`."""
    from .cli import _add_photo_args

    p = sub.add_parser("batch", help="assess a folder of photos into the records store (resumable)")
    p.add_argument("inputs", nargs="+", metavar="FOLDER_OR_PHOTO", help="a folder of photos, or photo files")
    _add_photo_args(p)
    p.add_argument("--db", help="records database (default $SURFACES_DB or the user data folder)")
    p.add_argument("--manifest", metavar="CSV", help="CSV mapping photos to coupon ids, welders and nominal sizes; its test and limits "
                   "columns replace --test and --limits for their photos")
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: one per core)")
    p.add_argument("--batch-name", help="batch name stored with each coupon (default: the folder name)")
    p.add_argument("--summary-csv", metavar="OUT.csv", help="write the summary table")
    p.add_argument("--summary-pdf", metavar="OUT.pdf", help="write the summary report")
    p.add_argument("--actor", default=os.environ.get("USER") or "batch", help="who runs the batch (recorded)")
    p.add_argument("--force", action="store_true", help="replace existing summary files")
    p.add_argument("--quiet", action="store_true", help="no progress bar or table")
    p.set_defaults(func=cmd_batch)


def cmd_batch(a) -> int:
    from .cli import settings_from_args

    settings = settings_from_args(a)
    inputs = a.inputs[0] if len(a.inputs) == 1 and Path(a.inputs[0]).is_dir() else a.inputs
    out = run_batch(
        inputs, settings=settings, db=a.db, manifest=a.manifest, workers=a.workers,
        progress=None if a.quiet else TextProgress(), batch=a.batch_name, actor=a.actor,
        summary_csv=a.summary_csv, summary_pdf=a.summary_pdf, force=a.force,
    )
    if not a.quiet:
        print(summary_text(out))
    return 0


def summary_text(out: pd.DataFrame) -> str:
    """A few lines for the terminal: counts, then one line per photo."""
    counts = out["status"].value_counts().to_dict()
    results = out["result"].value_counts().to_dict()
    head = (f"{len(out)} photo(s): " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
            + ("  |  " + ", ".join(f"{k} {v}" for k, v in sorted(results.items())) if results else ""))
    lines = [head]
    for r in out.itertuples():
        what = r.error if r.status == "error" else f"{r.result}  {r.first_reason or ''}".rstrip()
        aid = "" if pd.isna(r.assessment_id) else f"#{r.assessment_id}"
        lines.append(f"  {r.photo:<28} {r.coupon_id or '':<16} {r.status:<8} {aid:>6}  {what}")
    return "\n".join(lines)
