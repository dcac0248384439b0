"""Nothing lost: real processes killed with SIGKILL while they write, and --force on the command line.

Two kinds of kill:

* **injected**: the child process runs the real code with one function
  wrapped so that the process sends itself SIGKILL at an exact point (data
  in the temporary file but not yet renamed; photo copy written but the row
  not committed; inside the transaction; just after COMMIT);
* **external**: the parent sends SIGKILL at an arbitrary moment of a real
  ``surfaces assess`` or of a loop of saves.

After every kill: the database passes ``PRAGMA integrity_check`` and every
photo copy its SHA-256 (:meth:`Store.check`), every save the child reported
as done is there (records lost = 0), and an output file is either absent,
the old one, or complete.  Already covered elsewhere and not repeated here:
a killed batch resumes (test_batch.py), two processes calling the store at
once (test_records.py), atomic writer unit tests (test_report.py).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import cv2
import pandas as pd
import pytest

from surfaces.records import Store
from test_bad_input import REPO, assert_refused, cli, deep_photos, roi_of  # noqa: F401 - deep_photos is a fixture

ENV = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + str(REPO / "tests"))

# A child that runs the real command line with one fault point armed.
_KILL_AT = r"""
import os, signal, sys
point, target = sys.argv[1], sys.argv[2]
argv = sys.argv[3:]

def die():
    os.kill(os.getpid(), signal.SIGKILL)

if point in ("temp-written", "temp-half"):
    real_fsync = os.fsync
    def fsync(fd):
        try:
            path = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:
            path = ""
        if os.path.basename(path).startswith("." + target + "."):
            if point == "temp-half":  # as if the disk got only half of it
                os.ftruncate(fd, os.fstat(fd).st_size // 2)
            die()
        return real_fsync(fd)
    os.fsync = fsync
elif point == "before-rename":
    real_link, real_replace = os.link, os.replace
    def link(src, dst, *a, **k):
        if os.path.basename(str(dst)) == target:
            die()
        return real_link(src, dst, *a, **k)
    def replace(src, dst, *a, **k):
        if os.path.basename(str(dst)) == target:
            die()
        return real_replace(src, dst, *a, **k)
    os.link, os.replace = link, replace
from surfaces.cli import main
sys.exit(main(argv))
"""


def _killed_cli(point: str, target: str, *argv) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", _KILL_AT, point, target, *map(str, argv)], cwd=REPO, env=ENV,
                          capture_output=True, text=True, timeout=900, stdin=subprocess.DEVNULL)


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") and p.name.endswith(".tmp"))


# --------------------------------------------------------------------------- killed while writing a report


@pytest.fixture(scope="module")
def saved_assessment(tmp_path_factory) -> Path:
    """An assessment JSON for `surfaces judge` (invented coupon, test_fuzz's contract example)."""
    from test_fuzz import BASE

    p = tmp_path_factory.mktemp("judge") / "F-7.json"
    p.write_text(json.dumps(BASE))
    return p


POINTS = ["temp-written", "temp-half", "before-rename"]


@pytest.mark.parametrize("point", POINTS)
@pytest.mark.parametrize("existing", [False, True])
def test_killed_judge_json_leaves_old_file_or_none(saved_assessment, tmp_path, point, existing):
    out = tmp_path / "out.json"
    old = b'{"old": "report, must survive"}\n'
    if existing:
        out.write_bytes(old)
    argv = ["judge", saved_assessment, "--limits", "aws-d1.1-fillet-break", "--json", out] + (
        ["--force"] if existing else [])
    proc = _killed_cli(point, out.name, *argv)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    if existing:
        assert out.read_bytes() == old
    else:
        assert not out.exists()
    # The next run is not blocked by what the killed one left (a hidden .out.json.*.tmp at most).
    again = cli(*argv)
    assert again.returncode == 0, again.stderr
    assert json.loads(out.read_text())["verdict"]["result"] in ("accept", "reject", "review")


@pytest.fixture(scope="module")
def photo_args(deep_photos) -> list[str]:
    return [str(deep_photos["rgb8"]), "--test", "fillet-break", "--roi", roi_of(deep_photos)]


@pytest.mark.parametrize("point", ["temp-half", "before-rename"])
def test_killed_assess_json_leaves_no_half_written_file(photo_args, tmp_path, point):
    out = tmp_path / "a.json"
    proc = _killed_cli(point, out.name, "assess", *photo_args, "--json", out, "-q")
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert not out.exists()
    assert all(n.startswith(".a.json.") for n in _leftovers(tmp_path))


def _complete(path: Path) -> bool:
    """The output is whole: it parses / decodes to the end (independent readers: json, pandas, OpenCV, pdfinfo)."""
    if path.suffix == ".json":
        json.loads(path.read_text())
    elif path.suffix == ".csv":
        pd.read_csv(path)
    elif path.suffix == ".png":
        assert cv2.imread(str(path)) is not None
    elif path.suffix == ".pdf":
        data = path.read_bytes()
        assert data.startswith(b"%PDF") and data.rstrip().endswith(b"%%EOF")
        if shutil.which("pdfinfo"):  # poppler-utils (.ci/run installs it); else the markers above are the check
            subprocess.run(["pdfinfo", str(path)], check=True, capture_output=True)
    return True


def test_assess_killed_at_any_moment_leaves_only_complete_reports(photo_args, tmp_path):
    names = ("a.json", "a.csv", "a.png", "a.pdf")

    def argv(folder: Path) -> list[str]:
        return ["assess", *photo_args, "--json", folder / names[0], "--csv", folder / names[1],
                "--overlay", folder / names[2], "--pdf", folder / names[3], "-q"]

    full = tmp_path / "full"
    full.mkdir()
    t0 = time.monotonic()
    proc = cli(*argv(full))
    length = time.monotonic() - t0  # only to place one kill mid-analysis; nothing is asserted on it
    assert proc.returncode == 0, proc.stderr
    assert all(_complete(full / n) for n in names)
    # Kill mid-analysis, then the moment each report's temporary file or final name shows up
    # in the folder (polled every millisecond): the write phase itself.
    stages = [("time", 0.5)] + [("appears", x) for x in (".a.json.", "a.json", ".a.csv.", ".a.png.", "a.png",
                                                          ".a.pdf.", "a.pdf")]
    kills = 0
    for k, (how, what) in enumerate(stages):
        folder = tmp_path / f"k{k}"
        folder.mkdir()
        p = subprocess.Popen([sys.executable, "-m", "surfaces", *map(str, argv(folder))], cwd=REPO, env=ENV,
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL)
        deadline = time.monotonic() + (what * length if how == "time" else 900)
        while p.poll() is None and time.monotonic() < deadline:
            if how == "appears" and any(n.startswith(what) for n in os.listdir(folder)):
                break
            time.sleep(0.001)
        if p.poll() is None:
            p.send_signal(signal.SIGKILL)
            kills += 1
        p.wait()
        for n in names:
            if (folder / n).exists():
                assert _complete(folder / n), (how, what, n)
        assert all(n.startswith(tuple("." + x for x in names)) for n in _leftovers(folder))
    assert kills >= len(stages) - 2  # nearly every run was really cut short


# --------------------------------------------------------------------------- --force on the command line


@pytest.fixture(scope="module")
def force_runs(photo_args, tmp_path_factory) -> dict:
    """For each report kind: a run against an existing file without --force, then with --force."""
    folder = tmp_path_factory.mktemp("force")
    kinds = {"json": "r.json", "csv": "r.csv", "overlay": "r.png", "pdf": "r.pdf"}

    def run(kind):
        d = folder / kind
        d.mkdir()
        out = d / kinds[kind]
        out.write_bytes(b"an older report: keep me\n")
        refused = cli("assess", *photo_args, f"--{kind}", out, "-q")
        kept = out.read_bytes()
        forced = cli("assess", *photo_args, f"--{kind}", out, "-q", "--force")
        return out, refused, kept, forced

    with ThreadPoolExecutor(4) as ex:
        futs = {k: ex.submit(run, k) for k in kinds}
        return {k: f.result() for k, f in futs.items()}


@pytest.mark.parametrize("kind", ["json", "csv", "overlay", "pdf"])
def test_existing_report_needs_force(force_runs, kind):
    out, refused, kept, forced = force_runs[kind]
    assert_refused(refused, str(out), words=("--force",))
    assert kept == b"an older report: keep me\n"
    assert forced.returncode == 0, forced.stderr
    assert out.read_bytes() != kept and _complete(out)
    assert _leftovers(out.parent) == []


def test_refused_assess_writes_none_of_its_outputs(photo_args, tmp_path):
    (tmp_path / "r.pdf").write_bytes(b"old")
    proc = cli("assess", *photo_args, "--json", tmp_path / "r.json", "--pdf", tmp_path / "r.pdf", "-q")
    assert_refused(proc, "r.pdf", words=("--force",))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.pdf"]


# --------------------------------------------------------------------------- killed while saving a record


_SAVER = r"""
import hashlib, os, signal, sys
from surfaces import records
from surfaces.records import Store
from test_report import make_assessment

db, tag, n, point = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
def die():
    os.kill(os.getpid(), signal.SIGKILL)

armed = [False]
if point == "photo-written":
    real = records.write_bytes_atomic
    def wrapped(*a, **k):
        out = real(*a, **k)
        if armed[0]:
            die()
        return out
    records.write_bytes_atomic = wrapped
elif point == "in-transaction":
    real = Store._log
    def wrapped(self, *a, **k):
        real(self, *a, **k)
        if armed[0]:
            die()
    Store._log = wrapped
elif point == "after-commit":
    real = Store._Tx.__exit__
    def wrapped(self, *a):
        out = real(self, *a)
        if armed[0]:
            die()
        return out
    Store._Tx.__exit__ = wrapped

with Store(db) as s:
    for i in range(n):
        data = f"{tag}-{i}".encode() * 400
        sha = hashlib.sha256(data).hexdigest()
        armed[0] = i == n - 1 and point != "none"
        aid = s.save_assessment(make_assessment(sha=sha, name=f"{tag}-{i}.jpg"), data,
                                coupon={"id": f"{tag}-{i}", "welder": tag}, actor=tag)
        print("saved", aid, sha, flush=True)
"""


def _saver(db: Path, tag: str, n: int, point: str, **kw) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", _SAVER, str(db), tag, str(n), point], cwd=REPO, env=ENV,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def _reported(out: str) -> dict[int, str]:
    return {int(w[1]): w[2] for w in (line.split() for line in out.splitlines()) if w and w[0] == "saved"}


def _assert_consistent(db: Path, reported: dict[int, str]) -> int:
    """Integrity, photo copies, no reported save lost, one 'assessed' log entry per row; returns rows."""
    with Store(db) as s:
        assert s.check() == []
        h = s.history()
        have = dict(zip(h["assessment_id"].astype(int), h["photo_sha256"]))
        lost = {aid: sha for aid, sha in reported.items() if have.get(aid) != sha}
        assert lost == {}, f"records lost: {lost}"
        for aid in have:
            a = s.get_assessment(aid)
            assert hashlib.sha256(s.photo_bytes(a["photo"]["sha256"])).hexdigest() == a["photo"]["sha256"]
            assert a["record"]["coupon"] is not None  # the coupon came in the same transaction
    raw = sqlite3.connect(db)
    try:
        assert raw.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"  # the store's write-ahead log
        n_log = raw.execute("SELECT count(*) FROM log WHERE action = 'assessed'").fetchone()[0]
        n_rows = raw.execute("SELECT count(*) FROM assessments").fetchone()[0]
        n_coupons = raw.execute("SELECT count(*) FROM coupons").fetchone()[0]
    finally:
        raw.close()
    assert n_log == n_rows == len(have) == n_coupons
    return n_rows


@pytest.mark.parametrize("point, last_saved", [("photo-written", False), ("in-transaction", False),
                                               ("after-commit", True)])
def test_save_killed_at_each_step(tmp_path, point, last_saved):
    db = tmp_path / "r.sqlite3"
    p = _saver(db, "S", 4, point)
    out, err = p.communicate(timeout=300)
    assert p.returncode == -signal.SIGKILL, err
    reported = _reported(out)
    assert len(reported) == 3  # the fourth save was killed before it could report
    rows = _assert_consistent(db, reported)
    assert rows == (4 if last_saved else 3)
    # the killed save can simply be done again (its photo copy, if written, is reused)
    p = _saver(db, "T", 1, "none")
    out, err = p.communicate(timeout=300)
    assert p.returncode == 0, err
    _assert_consistent(db, {**reported, **_reported(out)})


def test_saves_killed_at_random_moments_lose_nothing(tmp_path):
    db = tmp_path / "r.sqlite3"
    reported: dict[int, str] = {}
    kills = 0
    for round_ in range(6):
        p = _saver(db, f"R{round_}", 10_000, "none")
        got = 0
        while got < 3 + 2 * round_:  # a different point in the loop each round
            line = p.stdout.readline()
            assert line, p.stderr.read()
            got += line.startswith("saved")
            reported.update(_reported(line))
        p.send_signal(signal.SIGKILL)
        kills += 1
        rest, _ = p.communicate(timeout=60)
        reported.update(_reported(rest))
        assert p.returncode == -signal.SIGKILL
        _assert_consistent(db, reported)
    assert kills == 6 and len(reported) >= sum(3 + 2 * r for r in range(6))


# --------------------------------------------------------------------------- two batches on one database


_BATCH = r"""
import sys
from surfaces.batch import run_batch
from test_batch import fake_assess, SETTINGS
out = run_batch(sys.argv[1], settings=SETTINGS, db=sys.argv[2], workers=2, assess_fn=fake_assess, actor=sys.argv[3])
print(dict(out["status"].value_counts()))
"""


def test_two_batch_processes_on_one_database(tmp_path):
    from test_bad_input import texture

    db = tmp_path / "shared.sqlite3"
    names = {t: [f"{t}-{i:02d}{'-crack' if i % 3 == 0 else ''}.png" for i in range(8)] for t in "AB"}
    for k, (tag, files) in enumerate(names.items()):
        (tmp_path / tag).mkdir()
        for i, name in enumerate(files):  # every photo its own content: its own SHA-256
            cv2.imwrite(str(tmp_path / tag / name), texture(48, 64, seed=100 * k + i))
    env = dict(ENV, FAKE_SLEEP_S="0.05")
    procs = [subprocess.Popen([sys.executable, "-c", _BATCH, str(tmp_path / t), str(db), f"batch-{t}"], cwd=REPO,
                              env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for t in "AB"]
    outs = [p.communicate(timeout=600) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0, err[-3000:]
        assert "'done': 8" in out.replace("np.int64(8)", "8"), out
    with Store(db) as s:
        h = s.history()
    assert sorted(h["coupon_id"]) == sorted(Path(n).stem for files in names.values() for n in files)
    assert sorted(h["result"]) == sorted("reject" if "crack" in n else "accept"
                                         for files in names.values() for n in files)  # fake_assess's rule
    _assert_consistent(db, {})
