"""The records store: coupons, assessments, photo copies and an append-only log.

One SQLite database (stdlib :mod:`sqlite3`, WAL mode) plus a folder of photo
copies beside it, named by content (``photos/ab/abcdef...jpg`` by SHA-256).

* Every change runs in one ``BEGIN IMMEDIATE`` transaction and appends to
  the ``log`` table; triggers refuse UPDATE and DELETE on the log and DELETE
  on assessments, so history is never lost.
* An assessment keeps both lists: the automatic imperfections as found and
  the reviewed ones, with the limit set it was judged against (a snapshot),
  so re-opening and re-judging it reproduces its verdict.
* The schema carries a version; :class:`Store` migrates an older database
  when it opens it and refuses one made by a newer release.
* The photo copy is written (atomically, hash-verified) before the row that
  names it is committed: a crash can leave an unreferenced copy, never a row
  without its photo.

Default location: ``$SURFACES_DB``, else ``$SURFACES_HOME/records.sqlite3``,
else ``~/.local/share/surfaces/records.sqlite3``.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import sqlite3
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

import pandas as pd

from .atomic import OutputExistsError, write_bytes_atomic
from .model import SurfacesError
from .report import jsonable

__all__ = ["COUPON_FIELDS", "SCHEMA_VERSION", "Store", "StoreError", "default_db_path", "photo_suffix"]


class StoreError(SurfacesError):
    """The records store cannot do what was asked (bad value, missing record, damaged file)."""


#: Coupon fields and their types (``float`` ones are millimetres).
COUPON_FIELDS: dict[str, type] = {
    "id": str, "welder": str, "procedure": str, "process": str, "position": str, "material": str,
    "thickness_mm": float, "throat_mm": float, "wall_mm": float, "length_mm": float,
    "test": str, "date": str, "batch": str,
}

SCHEMA_VERSION = 1

_MIGRATIONS: dict[int, str] = {
    1: """
    CREATE TABLE coupons (
        id TEXT PRIMARY KEY CHECK (length(id) > 0),
        welder TEXT, procedure TEXT, process TEXT, position TEXT, material TEXT,
        thickness_mm REAL, throat_mm REAL, wall_mm REAL, length_mm REAL,
        test TEXT, date TEXT, batch TEXT,
        created_at TEXT NOT NULL, updated_at TEXT NOT NULL
    );
    CREATE TABLE assessments (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        coupon_id TEXT REFERENCES coupons(id),
        photo_sha256 TEXT NOT NULL CHECK (length(photo_sha256) = 64),
        photo_name TEXT,
        photo_file TEXT NOT NULL,
        created_at TEXT NOT NULL,
        actor TEXT NOT NULL,
        tool_version TEXT,
        test TEXT,
        settings_json TEXT NOT NULL,
        settings_key TEXT NOT NULL,
        calibration_json TEXT,
        limits_json TEXT,
        limit_snapshot TEXT,
        auto_imperfections_json TEXT NOT NULL,
        reviewed_imperfections_json TEXT,
        auto_verdict_json TEXT NOT NULL,
        verdict_json TEXT NOT NULL,
        assessment_json TEXT NOT NULL,
        reviewed_json TEXT,
        result TEXT NOT NULL,
        reviewer TEXT,
        reviewed_at TEXT,
        review_note TEXT
    );
    CREATE INDEX assessments_done ON assessments(photo_sha256, settings_key);
    CREATE INDEX assessments_coupon ON assessments(coupon_id);
    CREATE TABLE log (
        seq INTEGER PRIMARY KEY AUTOINCREMENT,
        at TEXT NOT NULL,
        actor TEXT NOT NULL,
        action TEXT NOT NULL,
        assessment_id INTEGER,
        coupon_id TEXT,
        payload_json TEXT NOT NULL
    );
    CREATE INDEX log_assessment ON log(assessment_id);
    CREATE TRIGGER log_no_update BEFORE UPDATE ON log
        BEGIN SELECT RAISE(ABORT, 'the log is append-only: entries cannot be changed'); END;
    CREATE TRIGGER log_no_delete BEFORE DELETE ON log
        BEGIN SELECT RAISE(ABORT, 'the log is append-only: entries cannot be deleted'); END;
    CREATE TRIGGER assessments_no_delete BEFORE DELETE ON assessments
        BEGIN SELECT RAISE(ABORT, 'assessments are kept: they cannot be deleted'); END;
    CREATE TRIGGER assessments_keep_automatic BEFORE UPDATE OF
        photo_sha256, photo_file, settings_json, settings_key, auto_imperfections_json, auto_verdict_json,
        assessment_json, created_at ON assessments
        BEGIN SELECT RAISE(ABORT, 'the automatic result of an assessment cannot be changed'); END;
    """,
}


def default_db_path() -> Path:
    """``$SURFACES_DB``, else ``$SURFACES_HOME/records.sqlite3``, else ``~/.local/share/surfaces/...``."""
    if os.environ.get("SURFACES_DB"):
        return Path(os.environ["SURFACES_DB"]).expanduser()
    if os.environ.get("SURFACES_HOME"):
        return Path(os.environ["SURFACES_HOME"]).expanduser() / "records.sqlite3"
    return Path.home() / ".local" / "share" / "surfaces" / "records.sqlite3"


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


def _dumps(obj: Any) -> str:
    return json.dumps(jsonable(obj), ensure_ascii=False, allow_nan=False, separators=(",", ":"))


def _loads(text: str | None) -> Any:
    return None if text is None else json.loads(text)


def photo_suffix(data: bytes, name: str | None = None) -> str:
    """File suffix of a photo copy, from its first bytes (falls back to the name)."""
    head = bytes(data[:12])
    if head.startswith(b"\xff\xd8\xff"):
        return ".jpg"
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return ".png"
    if head[:4] in (b"II*\x00", b"MM\x00*"):
        return ".tif"
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return ".webp"
    if head[:2] == b"BM":
        return ".bmp"
    suffix = Path(name or "").suffix.lower()
    return suffix if re.fullmatch(r"\.[a-z0-9]{1,5}", suffix or "") else ".bin"


def _settings_key(settings: dict) -> str:
    """The same text as :meth:`surfaces.model.Settings.key` for a settings dict."""
    return json.dumps(settings, sort_keys=True, default=str)


class Store:
    """The records store.

    Parameters
    ----------
    path : path-like, optional
        The database file; default :func:`default_db_path`.  Its folder is
        created.  Photo copies go to ``photos/`` beside it.
    timeout_s : float, keyword-only
        How long a writer waits for another process's transaction.

    Examples
    --------
    >>> with Store(tmp_path / "r.sqlite3") as store:  # doctest: +SKIP
    ...     aid = store.save_assessment(assessment, photo_bytes, coupon={"id": "C-1"}, actor="ana")
    ...     store.get_assessment(aid)["verdict"]["result"]
    """

    def __init__(self, path: str | os.PathLike | None = None, *, timeout_s: float = 60.0):
        self.path = Path(path).expanduser() if path is not None else default_db_path()
        if self.path.is_dir():
            raise StoreError(f"{self.path} is a folder; give a database file name such as records.sqlite3")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise StoreError(f"cannot create the folder {self.path.parent} ({err.strerror}); choose another --db") from err
        self.photo_dir = self.path.parent / "photos"
        try:
            self._con = sqlite3.connect(self.path, timeout=timeout_s, isolation_level=None)
            self._con.row_factory = sqlite3.Row
            self._con.execute(f"PRAGMA busy_timeout = {int(timeout_s * 1000)}")
            mode = self._switch_to_wal(timeout_s)
            self._con.execute("PRAGMA synchronous = FULL")
            self._con.execute("PRAGMA foreign_keys = ON")
            if str(mode).lower() != "wal":
                raise StoreError(f"{self.path}: cannot switch the database to WAL mode; put it on a local disk")
            self._migrate()
        except sqlite3.DatabaseError as err:
            raise StoreError(f"{self.path} is not a usable records database ({err}); choose another --db") from err

    def _switch_to_wal(self, timeout_s: float) -> str:
        """``PRAGMA journal_mode = WAL``, retried while another process holds the file.

        SQLite can answer "database is locked" to a journal-mode change at once,
        without waiting on the busy timeout, when a second process is opening
        (and switching) the same new database at the same moment.
        """
        import time

        deadline = time.monotonic() + timeout_s
        pause = 0.01
        while True:
            try:
                return self._con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            except sqlite3.OperationalError as err:
                if "locked" not in str(err) and "busy" not in str(err):
                    raise
                if time.monotonic() + pause > deadline:
                    raise
                time.sleep(pause)
                pause = min(pause * 2, 0.5)

    # -- plumbing ----------------------------------------------------------
    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection (safe to call twice)."""
        con, self._con = getattr(self, "_con", None), None
        if con is not None:
            con.close()

    def _c(self) -> sqlite3.Connection:
        if self._con is None:
            raise StoreError(f"the records store {self.path} is closed; open it again")
        return self._con

    class _Tx:
        """``BEGIN IMMEDIATE`` ... ``COMMIT`` (``ROLLBACK`` on any error); SQLite errors become StoreError."""

        def __init__(self, con: sqlite3.Connection, path: Path):
            self.con, self.path = con, path

        def __enter__(self):
            try:
                self.con.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as err:
                raise StoreError(_sqlite_message(self.path, err)) from err
            return self.con

        def __exit__(self, et, ev, tb):
            if et is None:
                try:
                    self.con.execute("COMMIT")
                    return False
                except sqlite3.Error as err:
                    ev = err
            try:
                self.con.execute("ROLLBACK")
            except sqlite3.Error:
                pass
            if isinstance(ev, sqlite3.Error):
                raise StoreError(_sqlite_message(self.path, ev)) from ev
            return False

    def _tx(self) -> "Store._Tx":
        return Store._Tx(self._c(), self.path)

    def _read_version(self, con) -> int:
        has = con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'schema_version'").fetchone()
        return int(con.execute("SELECT max(version) FROM schema_version").fetchone()[0] or 0) if has else 0

    def _check_version(self, current: int) -> None:
        if current > SCHEMA_VERSION:
            raise StoreError(
                f"{self.path} was written by a newer surfaces (schema {current}, this one knows "
                f"{SCHEMA_VERSION}); upgrade surfaces to open it"
            )

    def _migrate(self) -> None:
        con = self._c()
        current = self._read_version(con)  # a read: no write lock when nothing is to do
        self._check_version(current)
        if current == SCHEMA_VERSION:
            return
        with self._tx():
            current = self._read_version(con)  # again under the lock: another process may have migrated
            self._check_version(current)
            con.execute("CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL)")
            for version in range(current + 1, SCHEMA_VERSION + 1):
                for stmt in _split_sql(_MIGRATIONS[version]):
                    con.execute(stmt)
                con.execute("INSERT INTO schema_version VALUES (?, ?)", (version, _now()))

    def schema_version(self) -> int:
        """The schema version of the open database."""
        return int(self._c().execute("SELECT max(version) FROM schema_version").fetchone()[0])

    def _log(self, con, *, actor: str, action: str, assessment_id: int | None = None,
             coupon_id: str | None = None, payload: dict | None = None) -> None:
        con.execute(
            "INSERT INTO log (at, actor, action, assessment_id, coupon_id, payload_json) VALUES (?,?,?,?,?,?)",
            (_now(), actor, action, assessment_id, coupon_id, _dumps(payload or {})),
        )

    # -- coupons -----------------------------------------------------------
    @staticmethod
    def _clean_coupon(coupon: dict) -> dict:
        unknown = sorted(set(coupon) - set(COUPON_FIELDS))
        if unknown:
            raise StoreError(f"unknown coupon field(s) {', '.join(unknown)}; known: {', '.join(COUPON_FIELDS)}")
        cid = str(coupon.get("id") or "").strip()
        if not cid:
            raise StoreError("a coupon needs an id (the coupon number stamped on it)")
        out: dict[str, Any] = {"id": cid}
        for k, typ in COUPON_FIELDS.items():
            if k == "id" or k not in coupon:
                continue
            v = coupon[k]
            if v is None or (isinstance(v, str) and not v.strip()):
                out[k] = None
            elif typ is float:
                try:
                    f = float(v)
                except (TypeError, ValueError):
                    raise StoreError(f"coupon {cid}: {k} = {v!r} is not a number of millimetres") from None
                if not (f > 0 and f < 1e5):
                    raise StoreError(f"coupon {cid}: {k} = {v!r} must be a positive size in mm")
                out[k] = f
            else:
                out[k] = str(v).strip()
        return out

    def _upsert_coupon(self, con, coupon: dict, actor: str) -> str:
        c = self._clean_coupon(coupon)
        now = _now()
        old = con.execute("SELECT * FROM coupons WHERE id = ?", (c["id"],)).fetchone()
        if old is None:
            cols = ["id"] + [k for k in COUPON_FIELDS if k != "id" and k in c]
            con.execute(
                f"INSERT INTO coupons ({', '.join(cols)}, created_at, updated_at) VALUES "
                f"({', '.join('?' * len(cols))}, ?, ?)",
                [c[k] for k in cols] + [now, now],
            )
            self._log(con, actor=actor, action="coupon-created", coupon_id=c["id"], payload=c)
        else:
            changes = {k: v for k, v in c.items() if k != "id" and old[k] != v}
            if changes:
                sets = ", ".join(f"{k} = ?" for k in changes)
                con.execute(f"UPDATE coupons SET {sets}, updated_at = ? WHERE id = ?",
                            list(changes.values()) + [now, c["id"]])
                self._log(con, actor=actor, action="coupon-changed", coupon_id=c["id"],
                          payload={"before": {k: old[k] for k in changes}, "after": changes})
        return c["id"]

    def save_coupon(self, coupon: dict, *, actor: str = "user") -> str:
        """Create or update a coupon; returns its id.  Only the given fields change."""
        with self._tx() as con:
            return self._upsert_coupon(con, coupon, actor)

    def get_coupon(self, coupon_id: str) -> dict | None:
        """The coupon as a dict, or ``None``."""
        row = self._c().execute("SELECT * FROM coupons WHERE id = ?", (coupon_id,)).fetchone()
        return None if row is None else {k: row[k] for k in COUPON_FIELDS if row[k] is not None}

    # -- photos ------------------------------------------------------------
    def _photo_rel(self, sha: str, suffix: str) -> str:
        return f"{sha[:2]}/{sha}{suffix}"

    def _store_photo(self, data: bytes, sha: str, suffix: str) -> str:
        rel = self._photo_rel(sha, suffix)
        dest = self.photo_dir / rel
        if dest.exists() and sha256_file(dest) == sha:
            return rel
        dest.parent.mkdir(parents=True, exist_ok=True)
        # A copy with the wrong content (damaged disk, killed writer on a
        # file system without atomic rename) is replaced by the verified bytes.
        try:
            write_bytes_atomic(dest, data, force=dest.exists())
        except OutputExistsError:  # another process stored the same photo just now
            if sha256_file(dest) != sha:
                write_bytes_atomic(dest, data, force=True)
        if sha256_file(dest) != sha:
            raise StoreError(f"the photo copy {dest} does not match its SHA-256 after writing; check the disk")
        return rel

    def photo_path(self, sha256: str) -> Path:
        """Path of the stored copy of the photo with this SHA-256."""
        row = self._c().execute("SELECT photo_file FROM assessments WHERE photo_sha256 = ? LIMIT 1",
                                (sha256,)).fetchone()
        if row is None:
            raise StoreError(f"no stored photo with SHA-256 {sha256}; check the hash")
        return self.photo_dir / row["photo_file"]

    def photo_bytes(self, sha256: str) -> bytes:
        """The stored photo's bytes, verified against its SHA-256."""
        path = self.photo_path(sha256)
        try:
            data = path.read_bytes()
        except OSError as err:
            raise StoreError(f"the photo copy {path} cannot be read ({err.strerror}); restore it from a backup") from err
        if hashlib.sha256(data).hexdigest() != sha256:
            raise StoreError(f"the photo copy {path} is damaged (SHA-256 differs); restore it from a backup")
        return data

    # -- assessments -------------------------------------------------------
    def save_assessment(self, assessment: dict, photo_bytes: bytes, *, coupon: dict | None = None,
                        actor: str, settings_key: str | None = None) -> int:
        """Store an automatic assessment with a verified copy of its photo.

        Parameters
        ----------
        assessment : dict
            The assessment (JSON contract).  ``photo.sha256`` must be the
            SHA-256 of ``photo_bytes``.
        photo_bytes : bytes
            The photo file as loaded.
        coupon : dict, optional
            Coupon fields (``id`` required); created or updated in the same
            transaction.
        actor : str
            Who or what saved it (user name, ``batch``...).
        settings_key : str, optional
            :meth:`surfaces.model.Settings.key` of the settings used (what
            :meth:`find_done` matches); default computed from
            ``assessment["settings"]`` the same way.

        Returns
        -------
        int
            The new assessment id.
        """
        actor = _actor(actor)
        a = jsonable(assessment)
        if not isinstance(a, dict) or not isinstance(a.get("photo"), dict):
            raise StoreError("the assessment has no photo section; save the dict returned by the pipeline")
        sha = str(a["photo"].get("sha256") or "")
        if not re.fullmatch(r"[0-9a-f]{64}", sha):
            raise StoreError(f"the assessment's photo SHA-256 {sha!r} is not 64 hex digits")
        data = bytes(photo_bytes)
        if hashlib.sha256(data).hexdigest() != sha:
            raise StoreError(
                f"the photo bytes given do not match the assessment's SHA-256 ({sha[:12]}...); "
                "save the same file that was assessed"
            )
        verdict = a.get("verdict") or {}
        result = str(verdict.get("result") or "")
        if result not in ("accept", "reject", "review"):
            raise StoreError(f"the assessment's verdict {result!r} is not accept, reject or review")
        settings = a.get("settings") or {}
        rel = self._store_photo(data, sha, photo_suffix(data, a["photo"].get("name")))
        snapshot = _limit_snapshot(a)
        with self._tx() as con:
            coupon_id = self._upsert_coupon(con, coupon, actor) if coupon else None
            cur = con.execute(
                """INSERT INTO assessments (coupon_id, photo_sha256, photo_name, photo_file, created_at, actor,
                   tool_version, test, settings_json, settings_key, calibration_json, limits_json, limit_snapshot,
                   auto_imperfections_json, auto_verdict_json, verdict_json, assessment_json, result)
                   VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)""",
                (
                    coupon_id, sha, a["photo"].get("name"), rel, _now(), actor,
                    (a.get("tool") or {}).get("version"), a.get("test"), _dumps(settings),
                    settings_key or _settings_key(settings), _dumps(a.get("calibration")), _dumps(a.get("limits")), snapshot,
                    _dumps(a.get("imperfections") or []), _dumps(verdict), _dumps(verdict), _dumps(a), result,
                ),
            )
            aid = int(cur.lastrowid)
            self._log(con, actor=actor, action="assessed", assessment_id=aid, coupon_id=coupon_id, payload={
                "photo_sha256": sha, "photo_name": a["photo"].get("name"), "result": result,
                "reasons": verdict.get("reasons") or [], "n_imperfections": len(a.get("imperfections") or []),
            })
        return aid

    def save_review(self, assessment_id: int, reviewed_assessment: dict, *, reviewer: str,
                    note: str | None = None) -> None:
        """Store a reviewer's version (edited list + verdict); the automatic one is kept.

        Each call appends to the log with the changes (imperfections added,
        dismissed or edited; verdict before and after).
        """
        reviewer = str(reviewer or "").strip()
        if not reviewer:
            raise StoreError("a review needs the reviewer's name; give --reviewer")
        r = jsonable(reviewed_assessment)
        verdict = (r or {}).get("verdict") or {}
        result = str(verdict.get("result") or "")
        if result not in ("accept", "reject", "review"):
            raise StoreError(f"the reviewed verdict {result!r} is not accept, reject or review; judge it first")
        with self._tx() as con:
            row = con.execute("SELECT * FROM assessments WHERE id = ?", (int(assessment_id),)).fetchone()
            if row is None:
                raise StoreError(f"no assessment {assessment_id} in {self.path}; check the id")
            if (r.get("photo") or {}).get("sha256", row["photo_sha256"]) != row["photo_sha256"]:
                raise StoreError(f"the reviewed assessment is of another photo than assessment {assessment_id}")
            before = _loads(row["reviewed_imperfections_json"] or row["auto_imperfections_json"])
            after = r.get("imperfections") or []
            old_verdict = _loads(row["verdict_json"])
            now = _now()
            con.execute(
                """UPDATE assessments SET reviewed_imperfections_json = ?, reviewed_json = ?, verdict_json = ?,
                   result = ?, reviewer = ?, reviewed_at = ?, review_note = ? WHERE id = ?""",
                (_dumps(after), _dumps(r), _dumps(verdict), result, reviewer, now, note, int(assessment_id)),
            )
            self._log(con, actor=reviewer, action="reviewed", assessment_id=int(assessment_id),
                      coupon_id=row["coupon_id"], payload={
                          "note": note, "changes": _list_changes(before, after),
                          "verdict_before": old_verdict.get("result"), "verdict_after": result,
                          "reasons_after": verdict.get("reasons") or [],
                      })

    def get_assessment(self, assessment_id: int) -> dict:
        """Re-open an assessment.

        Returns the assessment dict as last saved (the reviewed version if
        there is one) with two extra keys: ``automatic_imperfections`` (as
        found) and ``record`` (id, coupon, created_at, actor, reviewer,
        reviewed_at, review_note, automatic verdict, reviewed list or None).
        """
        row = self._c().execute("SELECT * FROM assessments WHERE id = ?", (int(assessment_id),)).fetchone()
        if row is None:
            raise StoreError(f"no assessment {assessment_id} in {self.path}; check the id")
        return self._assemble(row)

    def _assemble(self, row: sqlite3.Row) -> dict:
        a = _loads(row["reviewed_json"] or row["assessment_json"])
        a["automatic_imperfections"] = _loads(row["auto_imperfections_json"])
        coupon = self.get_coupon(row["coupon_id"]) if row["coupon_id"] else None
        a["record"] = {
            "id": int(row["id"]),
            "coupon": coupon,
            "created_at": row["created_at"],
            "actor": row["actor"],
            "settings_key": row["settings_key"],
            "photo_file": str(self.photo_dir / row["photo_file"]),
            "automatic_verdict": _loads(row["auto_verdict_json"]),
            "reviewed_imperfections": _loads(row["reviewed_imperfections_json"]),
            "reviewer": row["reviewer"],
            "reviewed_at": row["reviewed_at"],
            "review_note": row["review_note"],
            "limit_snapshot": row["limit_snapshot"],
        }
        return a

    def rejudge(self, assessment_id: int, limit_set: Any = None) -> dict:
        """Judge a stored assessment again (the reviewed list if reviewed).

        Parameters
        ----------
        assessment_id : int
        limit_set : optional
            A limit set object, a preset name or file path, or ``None`` for
            the snapshot stored with the assessment (reproduces its verdict).

        Returns
        -------
        dict
            The verdict (``result``, ``reasons``, ``details``).  Nothing is
            stored.
        """
        from . import limits

        a = self.get_assessment(assessment_id)
        if limit_set is None:
            limit_set = _limit_set_from_snapshot(a["record"]["limit_snapshot"], a)
        elif isinstance(limit_set, (str, os.PathLike)):
            limit_set = limits.load_limit_set(str(limit_set))
        stripped = {k: v for k, v in a.items() if k not in ("record", "automatic_imperfections")}
        return _judge(stripped, limit_set)

    def find_done(self, sha256: str, settings_key: str) -> int | None:
        """Id of the newest assessment of this photo with these settings, or ``None``."""
        row = self._c().execute(
            "SELECT max(id) FROM assessments WHERE photo_sha256 = ? AND settings_key = ?", (sha256, settings_key)
        ).fetchone()
        return None if row[0] is None else int(row[0])

    def assessment_ids(self) -> list[int]:
        """All assessment ids, oldest first."""
        return [int(r[0]) for r in self._c().execute("SELECT id FROM assessments ORDER BY id")]

    # -- tables ------------------------------------------------------------
    _HISTORY_SQL = """
        SELECT a.id AS assessment_id, a.created_at, a.coupon_id, c.welder, c.procedure, c.process,
               c.position, c.material, c.batch, a.test, a.photo_name, a.photo_sha256, a.result,
               a.verdict_json, a.auto_verdict_json, a.reviewer, a.reviewed_at,
               a.reviewed_imperfections_json, a.auto_imperfections_json
        FROM assessments a LEFT JOIN coupons c ON c.id = a.coupon_id
    """

    def history(self, welder: str | None = None) -> pd.DataFrame:
        """One row per assessment (newest first), optionally of one welder."""
        sql = self._HISTORY_SQL + (" WHERE c.welder = ?" if welder else "") + " ORDER BY a.id DESC"
        rows = self._c().execute(sql, (welder,) if welder else ()).fetchall()
        out = []
        for r in rows:
            verdict = _loads(r["verdict_json"]) or {}
            imps = _loads(r["reviewed_imperfections_json"] or r["auto_imperfections_json"]) or []
            reasons = verdict.get("reasons") or []
            out.append({
                "assessment_id": int(r["assessment_id"]), "created_at": r["created_at"], "coupon_id": r["coupon_id"],
                "welder": r["welder"], "procedure": r["procedure"], "process": r["process"],
                "position": r["position"], "material": r["material"], "batch": r["batch"], "test": r["test"],
                "photo_name": r["photo_name"], "photo_sha256": r["photo_sha256"], "result": r["result"],
                "automatic_result": (_loads(r["auto_verdict_json"]) or {}).get("result"),
                "first_reason": reasons[0] if reasons else "",
                "n_imperfections": sum(1 for i in imps if i.get("status") != "dismissed"),
                "reviewer": r["reviewer"], "reviewed_at": r["reviewed_at"],
            })
        return pd.DataFrame(out, columns=_HISTORY_COLUMNS)

    def stats(self, by: Iterable[str] = ("batch", "procedure", "position")) -> pd.DataFrame:
        """Reject rates and most frequent reasons, grouped by coupon fields.

        Counts the latest assessment of each photo and coupon only (a photo
        assessed again does not count twice).  Reasons are counted per rule
        that failed or needed review (``rule: limit``, from the verdict's
        details), once per assessment; verdicts without details count their
        reason texts with numbers replaced by ``#``.
        """
        by = tuple(by)
        allowed = {"batch", "procedure", "position", "process", "material", "welder", "test"}
        bad = [b for b in by if b not in allowed]
        if bad:
            raise StoreError(f"cannot group by {', '.join(bad)}; choose from {', '.join(sorted(allowed))}")
        h = self.history()
        cols = list(by) + ["n_assessments", "n_accept", "n_reject", "n_review", "reject_rate", "top_reasons"]
        if h.empty:
            return pd.DataFrame(columns=cols)
        h = h.sort_values("assessment_id").drop_duplicates(["photo_sha256", "coupon_id"], keep="last")
        verdicts = {int(r[0]): _loads(r[1]) for r in self._c().execute("SELECT id, verdict_json FROM assessments")}
        groups = []
        keys = list(by)
        h[keys] = h[keys].astype(object).where(h[keys].notna(), "")
        for key, g in h.groupby(keys, sort=True, dropna=False) if keys else [((), h)]:
            key = key if isinstance(key, tuple) else (key,)
            n = len(g)
            counts = g["result"].value_counts()
            reasons: Counter[str] = Counter()
            for aid in g["assessment_id"]:
                v = verdicts.get(int(aid)) or {}
                if v.get("result") == "accept":
                    continue
                for reason in _reason_keys(v):
                    reasons[reason] += 1
            top = "; ".join(f"{r} ({c})" for r, c in reasons.most_common(3))
            groups.append(dict(zip(keys, key)) | {
                "n_assessments": n, "n_accept": int(counts.get("accept", 0)),
                "n_reject": int(counts.get("reject", 0)), "n_review": int(counts.get("review", 0)),
                "reject_rate": float(counts.get("reject", 0)) / n, "top_reasons": top,
            })
        return pd.DataFrame(groups, columns=cols)

    def log(self, assessment_id: int | None = None) -> pd.DataFrame:
        """The log, oldest first, optionally of one assessment; ``payload`` parsed."""
        sql = "SELECT seq, at, actor, action, assessment_id, coupon_id, payload_json FROM log"
        args: tuple = ()
        if assessment_id is not None:
            sql += " WHERE assessment_id = ?"
            args = (int(assessment_id),)
        rows = self._c().execute(sql + " ORDER BY seq", args).fetchall()
        return pd.DataFrame(
            [{"seq": r["seq"], "at": r["at"], "actor": r["actor"], "action": r["action"],
              "assessment_id": r["assessment_id"], "coupon_id": r["coupon_id"],
              "payload": _loads(r["payload_json"])} for r in rows],
            columns=["seq", "at", "actor", "action", "assessment_id", "coupon_id", "payload"],
        )

    def check(self) -> list[str]:
        """Problems found (empty = healthy): SQLite integrity and every photo copy's hash."""
        con = self._c()
        problems = [r[0] for r in con.execute("PRAGMA integrity_check") if r[0] != "ok"]
        for r in con.execute("SELECT id, photo_sha256, photo_file FROM assessments ORDER BY id"):
            p = self.photo_dir / r["photo_file"]
            if not p.exists():
                problems.append(f"assessment {r['id']}: photo copy {p} is missing")
            elif sha256_file(p) != r["photo_sha256"]:
                problems.append(f"assessment {r['id']}: photo copy {p} does not match its SHA-256")
        return problems


_HISTORY_COLUMNS = [
    "assessment_id", "created_at", "coupon_id", "welder", "procedure", "process", "position", "material",
    "batch", "test", "photo_name", "photo_sha256", "result", "automatic_result", "first_reason",
    "n_imperfections", "reviewer", "reviewed_at",
]


def _sqlite_message(path: Path, err: sqlite3.Error) -> str:
    text = str(err)
    if "locked" in text or "busy" in text:
        return f"the records database {path} is busy (another program is writing to it); try again when it is done"
    if "full" in text:
        return f"the records database {path} cannot grow (disk full); free some space and try again"
    if "readonly" in text or "read-only" in text:
        return f"the records database {path} is read-only; choose a --db you can write to"
    return f"the records database {path} refused the change ({text}); nothing was saved"


def _actor(actor: str) -> str:
    actor = str(actor or "").strip()
    if not actor:
        raise StoreError("say who saves the record (actor); give a user name")
    return actor


def _split_sql(script: str) -> list[str]:
    """Split a migration script into statements (triggers keep their inner ';')."""
    out, buf = [], []
    for line in script.strip().splitlines():
        buf.append(line)
        text = "\n".join(buf).strip()
        if text.endswith(";") and sqlite3.complete_statement(text):
            out.append(text)
            buf = []
    if "\n".join(buf).strip():
        out.append("\n".join(buf).strip())
    return out


def sha256_file(path: Path) -> str:
    """SHA-256 (hex) of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _reason_keys(verdict: dict) -> set[str]:
    keys = set()
    for d in verdict.get("details") or []:
        if isinstance(d, dict) and d.get("rule") and d.get("status") in ("fail", "review"):
            limit = f": {d['limit']}" if d.get("limit") else ""
            keys.add(f"{d['rule']}{limit}" + (" (review)" if d.get("status") == "review" else ""))
    if not keys:
        keys = {_reason_pattern(x) for x in verdict.get("reasons") or []}
    return keys


def _reason_pattern(reason: str) -> str:
    return re.sub(r"\d+(?:[.,]\d+)?", "#", str(reason)).strip()


def _list_changes(before: list[dict], after: list[dict]) -> dict:
    b = {str(x.get("id")): x for x in before or []}
    a = {str(x.get("id")): x for x in after or []}
    added = [k for k in a if k not in b]
    removed = [k for k in b if k not in a]
    status = {k: [b[k].get("status"), a[k].get("status")] for k in a if k in b and b[k].get("status") != a[k].get("status")}
    edited = [k for k in a if k in b and k not in status and _dumps(a[k]) != _dumps(b[k])]
    return {"added": added, "removed": removed, "status": status, "edited": edited}


# -- limit snapshots -------------------------------------------------------
def _limit_snapshot(a: dict) -> str:
    """JSON text that rebuilds the limit set the assessment was judged against.

    ``{"summary": <the assessment's limits section>, "toml": <the full set>}``;
    the full set is taken from :mod:`surfaces.limits` by the name or path the
    assessment records and kept only when its summary matches the one the
    assessment was judged with (same rules, same version).
    """
    from . import limits

    lim = a.get("limits") or {}
    snap: dict[str, Any] = {"summary": {k: v for k, v in lim.items() if k != "toml"}}
    if isinstance(lim.get("toml"), str):  # the full set travelled with the assessment
        snap["toml"] = lim["toml"]
        return _dumps(snap)
    source = (a.get("settings") or {}).get("limits") or lim.get("name")
    if source:
        try:
            ls = limits.load_limit_set(str(source))
        except SurfacesError:
            ls = None
        if ls is not None and _same_limits(jsonable(limits.limits_summary(ls)), lim):
            snap["toml"] = limits.to_toml(ls)
    return _dumps(snap)


def _same_limits(a: dict, b: dict) -> bool:
    keys = ("name", "version", "rules", "min_confidence")
    return all(_dumps(a.get(k)) == _dumps(b.get(k)) for k in keys)


def _limit_set_from_snapshot(snapshot: str | None, a: dict) -> Any:
    from . import limits

    snap = _loads(snapshot) or {}
    rid = (a.get("record") or {}).get("id")
    if snap.get("toml"):
        return limits.parse_limit_set(snap["toml"], origin=f"snapshot of assessment {rid}")
    raise StoreError(
        f"assessment {rid} has no stored copy of its limit set "
        f"({(snap.get('summary') or {}).get('name') or 'unnamed'}); give a limit set to judge it against"
    )


def _judge(assessment: dict, limit_set: Any) -> dict:
    from . import limits

    out = limits.judge_assessment(assessment, limit_set)
    return jsonable(out["verdict"])


# -- command line ------------------------------------------------------------


def add_commands(sub) -> None:
    """``surfaces records ...``: hooked into :mod:`surfaces.cli`."""
    rec = sub.add_parser("records", help="look into the records store: history, show, rejudge, stats, log, check")
    rs = rec.add_subparsers(dest="records_cmd", metavar="COMMAND")
    rec.set_defaults(func=lambda a: (rec.print_help(), 2)[1])

    def with_db(p):
        p.add_argument("--db", help="records database (default $SURFACES_DB or the user data folder)")
        return p

    p = with_db(rs.add_parser("history", help="one line per assessment, newest first"))
    p.add_argument("--welder", help="only this welder's coupons")
    p.add_argument("--csv", metavar="OUT.csv", help="write the table as CSV instead")
    p.add_argument("--force", action="store_true")
    p.set_defaults(func=_cmd_history)

    p = with_db(rs.add_parser("show", help="re-open an assessment and write its reports"))
    p.add_argument("id", type=int)
    for opt in ("json", "csv", "overlay", "pdf"):
        p.add_argument(f"--{opt}", metavar=f"OUT.{'png' if opt == 'overlay' else opt}")
    p.add_argument("--force", action="store_true", help="replace existing files")
    p.set_defaults(func=_cmd_show)

    p = with_db(rs.add_parser("rejudge", help="judge a stored assessment again (its own limit set by default)"))
    p.add_argument("id", type=int)
    p.add_argument("--limits", help="another limit set: a preset name or a .toml file")
    p.set_defaults(func=_cmd_rejudge)

    p = with_db(rs.add_parser("stats", help="reject rates and top reasons by batch, procedure, position..."))
    p.add_argument("--by", default="batch,procedure,position", help="comma-separated coupon fields")
    p.set_defaults(func=_cmd_stats)

    p = with_db(rs.add_parser("log", help="the append-only log (of one assessment)"))
    p.add_argument("id", type=int, nargs="?")
    p.set_defaults(func=_cmd_log)

    p = with_db(rs.add_parser("check", help="database integrity and every photo copy's SHA-256"))
    p.set_defaults(func=_cmd_check)


def _print_table(df: pd.DataFrame) -> None:
    with pd.option_context("display.width", 200, "display.max_columns", 30, "display.max_colwidth", 60):
        print(df.to_string(index=False) if len(df) else "(none)")


def _cmd_history(a) -> int:
    from .atomic import write_text_atomic

    with Store(a.db) as s:
        h = s.history(welder=a.welder)
    if a.csv:
        write_text_atomic(a.csv, h.to_csv(index=False, lineterminator="\n"), force=a.force)
        return 0
    _print_table(h[["assessment_id", "created_at", "coupon_id", "welder", "test", "result", "automatic_result",
                    "n_imperfections", "reviewer", "first_reason"]])
    return 0


def _cmd_show(a) -> int:
    from . import report
    from .photo import load_photo

    with Store(a.db) as s:
        rec = s.get_assessment(a.id)
        need_photo = a.overlay or a.pdf
        photo = load_photo(s.photo_bytes(rec["photo"]["sha256"]), name=rec["photo"].get("name")) if need_photo else None
    if a.json:
        report.write_json(a.json, rec, force=a.force)
    if a.csv:
        report.write_csv(a.csv, rec, force=a.force)
    if a.overlay:
        report.write_overlay_png(a.overlay, photo.rgb, rec, force=a.force)
    if a.pdf:
        report.write_pdf(a.pdf, rec, photo.rgb, force=a.force)
    r = rec["record"]
    v = rec["verdict"]
    print(f"assessment {r['id']}  coupon {(r['coupon'] or {}).get('id', '-')}  photo {rec['photo'].get('name')}")
    print(f"verdict    {v['result'].upper()}" + (f"  (automatic: {r['automatic_verdict']['result']})"
                                                 if r["reviewer"] else "  (not reviewed)"))
    for reason in v.get("reasons") or []:
        print(f"  - {reason}")
    if r["reviewer"]:
        print(f"reviewed   by {r['reviewer']} at {r['reviewed_at']}" + (f": {r['review_note']}" if r["review_note"] else ""))
    return 0


def _cmd_rejudge(a) -> int:
    with Store(a.db) as s:
        before = s.get_assessment(a.id)["verdict"]
        v = s.rejudge(a.id, a.limits)
    print(f"stored     {before['result'].upper()}")
    print(f"re-judged  {v['result'].upper()}" + ("" if a.limits else "  (its own limit set)"))
    for reason in v.get("reasons") or []:
        print(f"  - {reason}")
    return 0


def _cmd_stats(a) -> int:
    by = tuple(x.strip() for x in a.by.split(",") if x.strip())
    with Store(a.db) as s:
        _print_table(s.stats(by=by))
    return 0


def _cmd_log(a) -> int:
    with Store(a.db) as s:
        log = s.log(a.id)
    log = log.assign(payload=log["payload"].map(lambda p: json.dumps(p, ensure_ascii=False)[:100]))
    _print_table(log)
    return 0


def _cmd_check(a) -> int:
    with Store(a.db) as s:
        problems = s.check()
        n = len(s.assessment_ids())
    if problems:
        for p in problems:
            print(p)
        raise StoreError(f"{len(problems)} problem(s) in {s.path}; restore the named files from a backup")
    print(f"ok: {n} assessment(s), database intact, every photo copy matches its SHA-256")
    return 0
