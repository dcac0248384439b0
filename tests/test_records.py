"""The records store on a real SQLite file: round trip, re-judging, the log, concurrency."""

from __future__ import annotations

import copy
import hashlib
import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import cv2
import numpy as np
import pandas as pd
import pytest

from surfaces import limits
from surfaces.records import SCHEMA_VERSION, Store, StoreError, default_db_path
from test_report import make_assessment, synthetic_photo

REPO = Path(__file__).resolve().parents[1]

# An invented shop limit set (not from any standard): the verdicts below follow
# from it by construction.
DEMO_LIMITS = """
schema = "surfaces.limits/1"
name = "demo-shop-fillet"
title = "Demo shop fillet break limits (invented for tests)"
version = "1"
tests = ["fillet-break", "nick-break"]
source = "invented for tests"

[[rule]]
id = "no-cracks"
check = "not_permitted"
kinds = ["crack"]

[[rule]]
id = "pore-size"
check = "max_size"
kinds = ["pore"]
max = "2 mm"
"""


def photo_png(seed: int = 0) -> bytes:
    ok, buf = cv2.imencode(".png", synthetic_photo(seed=seed))
    assert ok
    return buf.tobytes()


@pytest.fixture
def limit_file(tmp_path) -> Path:
    p = tmp_path / "demo-shop-fillet.toml"
    p.write_text(DEMO_LIMITS)
    return p


def judged(limit_file: Path, *, seed: int = 0, rows=None, name: str | None = None) -> tuple[dict, bytes]:
    """A contract assessment of a real PNG, judged by surfaces.limits against the demo set."""
    data = photo_png(seed)
    sha = hashlib.sha256(data).hexdigest()
    a = make_assessment(rows=rows, sha=sha, name=name or f"CPN-{seed:04d}.png")
    a["settings"]["limits"] = str(limit_file)
    a = limits.judge_assessment(a, limits.load_limit_set(str(limit_file)))
    return a, data


def _strip(a: dict) -> dict:
    return {k: v for k, v in a.items() if k not in ("record", "automatic_imperfections")}


def test_save_reopen_rejudge_reproduces_verdict(tmp_path, limit_file):
    a, data = judged(limit_file)
    assert a["verdict"]["result"] == "reject"  # crack 4 by construction
    db = tmp_path / "r.sqlite3"
    with Store(db) as s:
        aid = s.save_assessment(a, data, coupon={"id": "CPN-0000", "welder": "W-17", "throat_mm": 10},
                                actor="ana")
    with Store(db) as s:  # re-open from disk
        back = s.get_assessment(aid)
        assert back["verdict"] == a["verdict"]
        assert back["imperfections"] == back["automatic_imperfections"]
        assert back["record"]["coupon"] == {"id": "CPN-0000", "welder": "W-17", "throat_mm": 10.0}
        assert back["record"]["reviewer"] is None
        assert s.rejudge(aid) == a["verdict"]
        # the photo copy is content-addressed and verified
        sha = a["photo"]["sha256"]
        assert s.photo_bytes(sha) == data
        assert (db.parent / "photos" / sha[:2] / f"{sha}.png").is_file()
        assert s.check() == []


def test_reopened_dict_equals_saved_json(tmp_path, limit_file):
    a, data = judged(limit_file)
    with Store(tmp_path / "r.sqlite3") as s:
        back = s.get_assessment(s.save_assessment(a, data, actor="ana"))
    from surfaces.report import jsonable

    assert _strip(back) == jsonable(a)  # NaN -> None is the only change (JSON contract)


def test_snapshot_survives_an_edited_limit_file(tmp_path, limit_file):
    a, data = judged(limit_file, rows=make_assessment()["imperfections"][:3])  # pore 2.5 mm, no crack
    assert a["verdict"]["result"] == "reject"
    with Store(tmp_path / "r.sqlite3") as s:
        aid = s.save_assessment(a, data, actor="ana")
        limit_file.write_text(DEMO_LIMITS.replace('max = "2 mm"', 'max = "5 mm"'))
        assert s.rejudge(aid) == a["verdict"]  # its own snapshot, not the edited file
        assert s.rejudge(aid, str(limit_file))["result"] == "accept"  # 2.5 + 2u < 5, no crack
        lax = limits.load_limit_set(str(limit_file))
        assert s.rejudge(aid, lax)["result"] == "accept"


def test_review_keeps_both_lists_and_rejudges_the_reviewed_one(tmp_path, limit_file):
    a, data = judged(limit_file)
    db = tmp_path / "r.sqlite3"
    with Store(db) as s:
        aid = s.save_assessment(a, data, actor="ana")
        reviewed = copy.deepcopy(_strip(s.get_assessment(aid)))
        for r in reviewed["imperfections"]:
            if r["kind"] in ("crack",) or r["id"] == 1:
                r["status"] = "dismissed"  # reviewer: scratch, not a crack; pore 1 is a shadow
        ls = limits.load_limit_set(str(limit_file))
        reviewed = limits.judge_assessment(reviewed, ls)
        assert reviewed["verdict"]["result"] == "accept"
        s.save_review(aid, reviewed, reviewer="Inspector B. Demo", note="crack 4 is a scratch")
    with Store(db) as s:
        back = s.get_assessment(aid)
        assert back["verdict"]["result"] == "accept"
        assert back["record"]["automatic_verdict"]["result"] == "reject"
        assert [r["status"] for r in back["automatic_imperfections"]] == [r["status"] for r in a["imperfections"]]
        assert [r["status"] for r in back["imperfections"]].count("dismissed") == 3
        assert back["record"]["reviewer"] == "Inspector B. Demo" and back["record"]["reviewed_at"]
        assert s.rejudge(aid) == reviewed["verdict"]
        log = s.log(aid)
        assert log["action"].tolist() == ["assessed", "reviewed"]
        change = log.iloc[1]["payload"]
        assert change["verdict_before"] == "reject" and change["verdict_after"] == "accept"
        assert sorted(change["changes"]["status"]) == ["1", "4"]
        assert change["note"] == "crack 4 is a scratch"
        h = s.history()
        assert h.loc[0, "result"] == "accept" and h.loc[0, "automatic_result"] == "reject"


def test_log_grows_and_refuses_update_and_delete(tmp_path, limit_file):
    db = tmp_path / "r.sqlite3"
    seen: list[tuple] = []
    with Store(db) as s:
        def snapshot():
            rows = [tuple(r) for r in s.log()[["seq", "at", "actor", "action"]].itertuples(index=False)]
            assert rows[: len(seen)] == seen  # nothing lost or changed
            assert len(rows) > len(seen)  # every change adds an entry
            seen[:] = rows

        s.save_coupon({"id": "CPN-9", "welder": "W-1"}, actor="ana")
        snapshot()
        s.save_coupon({"id": "CPN-9", "procedure": "WPS-D-2"}, actor="ana")
        snapshot()
        a, data = judged(limit_file)
        aid = s.save_assessment(a, data, coupon={"id": "CPN-9"}, actor="batch")
        snapshot()
        s.save_review(aid, _strip(s.get_assessment(aid)), reviewer="ana", note="looked")
        snapshot()
        assert s.get_coupon("CPN-9") == {"id": "CPN-9", "welder": "W-1", "procedure": "WPS-D-2"}
    raw = sqlite3.connect(db)
    try:
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            raw.execute("UPDATE log SET actor = 'mallory'")
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            raw.execute("DELETE FROM log")
        with pytest.raises(sqlite3.DatabaseError, match="cannot be deleted"):
            raw.execute("DELETE FROM assessments")
        with pytest.raises(sqlite3.DatabaseError, match="cannot be changed"):
            raw.execute("UPDATE assessments SET auto_imperfections_json = '[]'")
        raw.rollback()
        assert raw.execute("SELECT count(*) FROM log").fetchone()[0] == len(seen)
        assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    finally:
        raw.close()


def test_find_done_matches_photo_and_settings(tmp_path, limit_file):
    a, data = judged(limit_file)
    key = json.dumps(a["settings"], sort_keys=True, default=str)
    with Store(tmp_path / "r.sqlite3") as s:
        assert s.find_done(a["photo"]["sha256"], key) is None
        aid = s.save_assessment(a, data, actor="ana")
        assert s.find_done(a["photo"]["sha256"], key) == aid
        assert s.find_done(a["photo"]["sha256"], key.replace("0.3", "0.5")) is None
        assert s.find_done("0" * 64, key) is None


def test_settings_key_matches_the_dataclass_key(tmp_path, limit_file):
    from dataclasses import asdict

    from surfaces.model import Settings

    st = Settings(test="fillet-break", min_size_mm=0.4, limits=str(limit_file), nominal={"throat_mm": 10.0})
    a, data = judged(limit_file)
    a["settings"] = json.loads(json.dumps(asdict(st), default=str))
    with Store(tmp_path / "r.sqlite3") as s:
        aid = s.save_assessment(a, data, actor="ana")
        assert s.find_done(a["photo"]["sha256"], st.key()) == aid


def test_history_and_stats(tmp_path, limit_file):
    rows_all = make_assessment()["imperfections"]
    plan = [  # (seed, batch, position, rows) -> verdict by construction of the demo set
        (1, "B1", "PF", rows_all),  # crack -> reject
        (2, "B1", "PF", rows_all[1:3]),  # no pore over 2 mm, no crack -> accept
        (3, "B1", "PC", rows_all[:1]),  # pore 2.5 mm -> reject
        (4, "B2", "PF", rows_all[1:3]),  # accept
    ]
    with Store(tmp_path / "r.sqlite3") as s:
        for seed, batch, pos, rows in plan:
            a, data = judged(limit_file, seed=seed, rows=copy.deepcopy(rows))
            s.save_assessment(a, data, actor="batch", coupon={
                "id": f"C-{seed}", "welder": "W-1" if seed < 3 else "W-2", "procedure": "WPS-D-1",
                "position": pos, "batch": batch})
        h = s.history()
        assert h["result"].tolist() == ["accept", "reject", "accept", "reject"]  # newest first
        assert s.history(welder="W-2")["coupon_id"].tolist() == ["C-4", "C-3"]
        st = s.stats(by=("batch",))
        b1 = st.set_index("batch").loc["B1"]
        assert (b1["n_assessments"], b1["n_reject"], b1["n_accept"]) == (3, 2, 1)
        assert b1["reject_rate"] == pytest.approx(2 / 3)
        # per failed rule of the demo set, once per assessment (seeds 1 and 3 fail pore-size, seed 1 no-cracks)
        assert b1["top_reasons"] == "pore-size: at most 2 mm (2); no-cracks: not permitted (1)"
        st2 = s.stats(by=("batch", "position"))
        assert len(st2) == 3 and st2["n_assessments"].sum() == 4
        with pytest.raises(StoreError, match="cannot group by"):
            s.stats(by=("colour",))


def test_bad_input_gives_clear_errors(tmp_path, limit_file):
    a, data = judged(limit_file)
    with Store(tmp_path / "r.sqlite3") as s:
        with pytest.raises(StoreError, match="do not match"):
            s.save_assessment(a, data + b"x", actor="ana")
        with pytest.raises(StoreError, match="needs an id"):
            s.save_coupon({"welder": "W-1"})
        with pytest.raises(StoreError, match="positive size"):
            s.save_coupon({"id": "C", "thickness_mm": -3})
        with pytest.raises(StoreError, match="unknown coupon field"):
            s.save_coupon({"id": "C", "colour": "red"})
        with pytest.raises(StoreError, match="actor"):
            s.save_assessment(a, data, actor=" ")
        aid = s.save_assessment(a, data, actor="ana")
        with pytest.raises(StoreError, match="reviewer"):
            s.save_review(aid, a, reviewer="")
        with pytest.raises(StoreError, match="no assessment 999"):
            s.get_assessment(999)
        # nothing half-saved by the refused calls
        assert len(s.history()) == 1 and s.log()["action"].tolist() == ["assessed"]
    junk = tmp_path / "junk.sqlite3"
    junk.write_bytes(b"not a database at all" * 100)
    with pytest.raises(StoreError, match="not a usable records database"):
        Store(junk)


def test_damaged_photo_copy_is_detected_and_repaired(tmp_path, limit_file):
    a, data = judged(limit_file)
    with Store(tmp_path / "r.sqlite3") as s:
        s.save_assessment(a, data, actor="ana")
        p = s.photo_path(a["photo"]["sha256"])
        p.write_bytes(data[:-10])
        with pytest.raises(StoreError, match="damaged"):
            s.photo_bytes(a["photo"]["sha256"])
        assert len(s.check()) == 1
        s.save_assessment(a, data, actor="ana")  # saving the photo again restores the copy
        assert s.photo_bytes(a["photo"]["sha256"]) == data and s.check() == []


def test_busy_database_gives_a_clear_error(tmp_path, limit_file):
    a, data = judged(limit_file)
    db = tmp_path / "r.sqlite3"
    Store(db).close()
    other = sqlite3.connect(db, isolation_level=None)
    other.execute("BEGIN IMMEDIATE")  # another program holds the write lock
    try:
        with Store(db, timeout_s=0.2) as s:
            with pytest.raises(StoreError, match="busy"):
                s.save_assessment(a, data, actor="ana")
    finally:
        other.execute("ROLLBACK")
        other.close()
    with Store(db) as s:  # nothing half-saved; works once the other program is done
        assert s.history().empty
        s.save_assessment(a, data, actor="ana")
        assert len(s.history()) == 1


def test_schema_version_and_newer_database_refused(tmp_path):
    db = tmp_path / "r.sqlite3"
    with Store(db) as s:
        assert s.schema_version() == SCHEMA_VERSION
    with Store(db) as s:  # opening again does not re-run migrations
        assert s.schema_version() == SCHEMA_VERSION
    raw = sqlite3.connect(db)
    raw.execute("INSERT INTO schema_version VALUES (?, 'later')", (SCHEMA_VERSION + 1,))
    raw.commit()
    raw.close()
    with pytest.raises(StoreError, match="newer surfaces"):
        Store(db)


def test_default_path_follows_environment(tmp_path, monkeypatch):
    monkeypatch.delenv("SURFACES_DB", raising=False)
    monkeypatch.delenv("SURFACES_HOME", raising=False)
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert default_db_path() == tmp_path / "home" / ".local" / "share" / "surfaces" / "records.sqlite3"
    monkeypatch.setenv("SURFACES_HOME", str(tmp_path / "sh"))
    assert default_db_path() == tmp_path / "sh" / "records.sqlite3"
    monkeypatch.setenv("SURFACES_DB", str(tmp_path / "x.db"))
    assert default_db_path() == tmp_path / "x.db"
    with Store() as s:
        assert s.path == tmp_path / "x.db"


_WRITER = r"""
import hashlib, json, sys
sys.path[:0] = [sys.argv[1], sys.argv[1] + "/tests"]
from surfaces.records import Store
from test_report import make_assessment
db, tag, n = sys.argv[2], sys.argv[3], int(sys.argv[4])
with Store(db) as s:
    for i in range(n):
        data = f"{tag}-{i}".encode() * 50  # photo bytes: content only matters for the hash
        a = make_assessment(sha=hashlib.sha256(data).hexdigest(), name=f"{tag}-{i}.bin")
        s.save_assessment(a, data, coupon={"id": f"{tag}-{i}", "welder": tag, "batch": tag}, actor=tag)
        s.save_coupon({"id": "shared", "welder": tag}, actor=tag)
        same = b"one photo saved by both processes" * 50  # both race to store the same copy
        s.save_assessment(make_assessment(sha=hashlib.sha256(same).hexdigest(), name="same.bin"), same,
                          actor=tag)
print("ok")
"""


def test_two_processes_writing_at_once_do_not_corrupt(tmp_path):
    db = tmp_path / "shared.sqlite3"
    n = 40
    procs = [subprocess.Popen([sys.executable, "-c", _WRITER, str(REPO), str(db), tag, str(n)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for tag in ("P1", "P2")]
    outs = [p.communicate(timeout=300) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0, err
        assert out.strip() == "ok"
    with Store(db) as s:
        assert s.check() == []  # PRAGMA integrity_check == ok and every photo hash-verified
        h = s.history()
        assert len(h) == 4 * n and h["assessment_id"].is_unique
        assert sorted(h["coupon_id"].dropna()) == sorted(f"{t}-{i}" for t in ("P1", "P2") for i in range(n))
        assert (h["photo_name"] == "same.bin").sum() == 2 * n
        log = s.log()
        assert (log["action"] == "assessed").sum() == 4 * n
        assert log["seq"].is_monotonic_increasing and log["seq"].is_unique


def test_records_command_line(tmp_path, limit_file, capsys):
    from surfaces.cli import main

    db = tmp_path / "r.sqlite3"
    a, data = judged(limit_file)
    with Store(db) as s:
        aid = s.save_assessment(a, data, coupon={"id": "CPN-7", "welder": "W-9", "batch": "B7"}, actor="ana")
    assert main(["records", "history", "--db", str(db)]) == 0
    out = capsys.readouterr().out
    assert "CPN-7" in out and "W-9" in out and "reject" in out
    outs = {k: tmp_path / f"r.{k}" for k in ("json", "csv", "png", "pdf")}
    assert main(["records", "show", str(aid), "--db", str(db), "--json", str(outs["json"]), "--csv", str(outs["csv"]),
                 "--overlay", str(outs["png"]), "--pdf", str(outs["pdf"])]) == 0
    assert "REJECT" in capsys.readouterr().out
    assert json.loads(outs["json"].read_text())["verdict"] == a["verdict"]
    assert outs["png"].read_bytes()[:4] == b"\x89PNG" and outs["pdf"].read_bytes()[:4] == b"%PDF"
    # writing again without --force is refused with one line, exit 2
    assert main(["records", "show", str(aid), "--db", str(db), "--json", str(outs["json"])]) == 2
    assert "pass --force" in capsys.readouterr().err
    assert main(["records", "rejudge", str(aid), "--db", str(db)]) == 0
    out = capsys.readouterr().out
    assert "re-judged  REJECT  (its own limit set)" in out and "no-cracks: crack 4: not permitted" in out
    assert main(["records", "stats", "--db", str(db), "--by", "batch"]) == 0
    assert "B7" in capsys.readouterr().out
    assert main(["records", "log", str(aid), "--db", str(db)]) == 0
    assert "assessed" in capsys.readouterr().out
    assert main(["records", "check", "--db", str(db)]) == 0
    assert capsys.readouterr().out.startswith("ok: 1 assessment(s)")
    with Store(db) as s:
        s.photo_path(a["photo"]["sha256"]).write_bytes(b"damaged")
    assert main(["records", "check", "--db", str(db)]) == 2
    cap = capsys.readouterr()
    assert "does not match its SHA-256" in cap.out and "1 problem(s)" in cap.err
    assert main(["records", "show", "999", "--db", str(db)]) == 2
    assert "no assessment 999" in capsys.readouterr().err
