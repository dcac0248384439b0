"""Local security: where the page listens, the upload cap, no code from user data, safe file names.

* The page listens on 127.0.0.1 unless the user asks otherwise, and then a
  warning says so (``surfaces ui --address``); checked on the command it
  builds and on a real server's listening socket (``/proc/net/tcp``).
* Uploads are capped (the server's ``maxUploadSize`` and the page's own check).
* The package never unpickles, evals or execs anything and never runs a
  shell: an AST scan of ``surfaces/`` and ``ui/`` fails on any new use.
* File names that come from users (uploads, photo names in records, limit-set
  names, manifest rows) never choose where a file lands on disk.
"""

from __future__ import annotations

import ast
import hashlib
import os
import re
import signal
import socket
import subprocess
import sys
import time
import tomllib
import urllib.request
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from surfaces import cli as surfaces_cli
from surfaces.model import PhotoError
from test_bad_input import REPO, assert_refused, cli

sys.path.insert(0, str(REPO))  # ui/ is a folder of the checkout, not part of the package
from ui import helpers as H  # noqa: E402


# --------------------------------------------------------------------------- where the page listens


def _ui_command(monkeypatch, capsys, *argv) -> tuple[list[str], str]:
    seen = {}

    def fake_call(cmd, env=None):
        seen["cmd"], seen["env"] = cmd, env
        return 0

    monkeypatch.setattr(subprocess, "call", fake_call)
    assert surfaces_cli.main(["ui", *argv]) == 0
    return seen["cmd"], capsys.readouterr().err


def _opt(cmd: list[str], name: str) -> str:
    return cmd[cmd.index(name) + 1]


def test_ui_listens_on_loopback_by_default_without_warning(monkeypatch, capsys):
    cmd, err = _ui_command(monkeypatch, capsys)
    assert _opt(cmd, "--server.address") == "127.0.0.1"
    assert err == ""


@pytest.mark.parametrize("address", ["0.0.0.0", "192.168.1.20", "::"])
def test_ui_on_another_address_warns(monkeypatch, capsys, address):
    cmd, err = _ui_command(monkeypatch, capsys, "--address", address)
    assert _opt(cmd, "--server.address") == address
    lines = err.strip().split("\n")
    assert len(lines) == 1 and "warning" in lines[0] and address in lines[0] and "network" in lines[0], err


def test_upload_cap_is_the_same_everywhere(monkeypatch, capsys):
    cmd, _ = _ui_command(monkeypatch, capsys)
    assert int(_opt(cmd, "--server.maxUploadSize")) == H.MAX_UPLOAD_MB
    conf = tomllib.loads((REPO / ".streamlit" / "config.toml").read_text())
    assert conf["server"]["maxUploadSize"] == H.MAX_UPLOAD_MB
    assert conf["server"]["address"] == "127.0.0.1"
    assert conf["client"]["showErrorDetails"] == "none"  # no traceback on the page


def test_page_refuses_an_upload_over_the_cap():
    H.check_upload(b"\xff" * (H.MAX_UPLOAD_MB * 2**20), "just-under.jpg")  # at the cap: accepted
    with pytest.raises(PhotoError) as ei:
        H.check_upload(b"\xff" * (H.MAX_UPLOAD_MB * 2**20 + 1), "too-big.jpg")
    msg = str(ei.value)
    assert "\n" not in msg and "too-big.jpg" in msg and f"{H.MAX_UPLOAD_MB} MB" in msg


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _listening(port: int) -> list[str]:
    """Local addresses with a LISTEN socket on ``port``, from /proc/net/tcp{,6} (Linux proc(5))."""
    out = []
    for name in ("tcp", "tcp6"):
        path = Path("/proc/net") / name
        if not path.exists():
            continue
        for line in path.read_text().splitlines()[1:]:
            f = line.split()
            addr, p = f[1].rsplit(":", 1)
            if int(p, 16) == port and f[3] == "0A":  # 0A = TCP_LISTEN
                out.append(addr)
    return out


@pytest.mark.skipif(not Path("/proc/net/tcp").exists(), reason="needs Linux /proc/net/tcp")
def test_real_page_server_listens_only_on_loopback(tmp_path):
    port = _free_port()
    env = dict(os.environ, PYTHONPATH=str(REPO), SURFACES_DB=str(tmp_path / "r.sqlite3"),
               SURFACES_HOME=str(tmp_path))
    log = (tmp_path / "ui.log").open("w")
    proc = subprocess.Popen([sys.executable, "-m", "surfaces", "ui", "--port", str(port)], cwd=REPO, env=env,
                            stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 120  # a wait for the server, not a speed check
        while True:
            assert proc.poll() is None, (tmp_path / "ui.log").read_text()
            try:
                if urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2).read() == b"ok":
                    break
            except OSError:
                pass
            assert time.monotonic() < deadline, (tmp_path / "ui.log").read_text()
            time.sleep(0.2)
        addrs = _listening(port)
        # 0100007F is 127.0.0.1 in /proc's little-endian hex; IPv6 loopback ::1 is also local-only
        assert addrs and set(addrs) <= {"0100007F", "00000000000000000000000001000000"}, addrs
        assert "warning" not in (tmp_path / "ui.log").read_text()
    finally:
        os.killpg(proc.pid, signal.SIGTERM)  # our own child's session: the CLI and its streamlit
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
        log.close()


# --------------------------------------------------------------------------- no code from data


#: Calls that run code, unpickle data or start a shell.  Any use in the package fails the
#: test unless it is listed in ALLOWED with the reason it is safe.
DANGEROUS_CALLS = {"eval", "exec", "compile", "__import__", "os.system", "os.popen", "os.execv", "os.execl",
                   "os.spawnl", "pickle.load", "pickle.loads", "marshal.load", "marshal.loads", "shelve.open",
                   "pd.read_pickle", "pandas.read_pickle", "yaml.load", "yaml.unsafe_load", "torch.load",
                   "dill.load", "dill.loads", "joblib.load"}
DANGEROUS_MODULES = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "joblib", "cloudpickle"}
ALLOWED = {
    ("surfaces/cli.py", "__import__"): "imports its own sub-command modules from a constant tuple of names",
}


def _name(node: ast.AST) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return f"{_name(node.value)}.{node.attr}"
    return ""


def _findings(path: Path, rel: str) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=rel)
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [f"{rel}:{node.lineno} import {a.name}" for a in node.names
                      if a.name.split(".")[0] in DANGEROUS_MODULES]
        elif isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] in DANGEROUS_MODULES:
            found.append(f"{rel}:{node.lineno} from {node.module} import")
        elif isinstance(node, ast.Call):
            name = _name(node.func)
            if name in DANGEROUS_CALLS and (rel, name) not in ALLOWED:
                found.append(f"{rel}:{node.lineno} {name}()")
            for kw in node.keywords:
                if kw.arg == "shell" and not (isinstance(kw.value, ast.Constant) and kw.value.value is False):
                    found.append(f"{rel}:{node.lineno} {name}(shell=...)")
                if kw.arg == "allow_pickle" and not (isinstance(kw.value, ast.Constant) and kw.value.value is False):
                    found.append(f"{rel}:{node.lineno} {name}(allow_pickle=...)")
    return found


def _sources() -> list[tuple[Path, str]]:
    out = []
    for top in ("surfaces", "ui"):
        for p in sorted((REPO / top).rglob("*.py")):
            out.append((p, p.relative_to(REPO).as_posix()))
    return out


def test_no_pickle_eval_exec_or_shell_in_the_package():
    files = _sources()
    assert len(files) > 20  # the scan really sees the package
    found = [f for p, rel in files for f in _findings(p, rel)]
    assert found == [], "new uses of code-running calls; remove them or justify in ALLOWED:\n" + "\n".join(found)


def test_the_scan_catches_what_it_looks_for(tmp_path):
    # the scanner itself: each pattern in a throw-away file is reported
    bad = tmp_path / "bad.py"
    bad.write_text("import pickle\nfrom marshal import loads\nimport subprocess, os\n"
                   "eval('1')\nexec('x=1')\nos.system('ls')\nsubprocess.run('ls', shell=True)\n"
                   "import numpy as np\nnp.load('a.npy', allow_pickle=True)\n__import__('os')\n")
    found = _findings(bad, "surfaces/bad.py")
    for what in ("import pickle", "from marshal", "eval()", "exec()", "os.system()", "shell=...",
                 "allow_pickle=...", "__import__()"):
        assert any(what in f for f in found), (what, found)
    assert not any("__import__" in f for f in _findings(bad, "surfaces/cli.py"))  # allowed only there


def test_allowed_import_is_from_constants_only():
    tree = ast.parse((REPO / "surfaces" / "cli.py").read_text())
    loops = [n for n in ast.walk(tree) if isinstance(n, ast.For)
             and any(isinstance(c, ast.Call) and _name(c.func) == "__import__" for c in ast.walk(n))]
    assert loops, "the allowed __import__ moved: review ALLOWED"
    for loop in loops:
        assert isinstance(loop.iter, ast.Tuple) and all(
            isinstance(e, ast.Tuple) and all(isinstance(x, ast.Constant) for x in e.elts) for e in loop.iter.elts)


# --------------------------------------------------------------------------- user file names


SAFE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


@settings(max_examples=300, deadline=None, database=None)
@given(st.text(max_size=200) | st.sampled_from(["../../etc/passwd", "..\\..\\boot.ini", ".bashrc", "/abs/x.jpg",
                                                "C:\\Users\\a\\b.JPG", "a/../../b.png", "\u0000x.jpg",
                                                "con.jpg", "..", ".", "", "\u202egpj.exe"]))
def test_upload_names_are_sanitised(raw):
    name = H.safe_name(raw)
    assert SAFE.fullmatch(name), name
    assert len(name) <= 80 and "/" not in name and "\\" not in name and not name.startswith(".")
    folder = Path("/srv/uploads")
    assert (folder / name).parent == folder  # joined to a folder it stays in that folder


def test_record_photo_copy_is_named_by_content_not_by_the_user(tmp_path):
    from surfaces.records import Store
    from test_report import make_assessment

    data = b"\xff\xd8\xff\xe0 photo bytes" * 100
    sha = hashlib.sha256(data).hexdigest()
    a = make_assessment(sha=sha, name="../../../outside/evil.jpg.sh")
    db = tmp_path / "store" / "r.sqlite3"
    with Store(db) as s:
        aid = s.save_assessment(a, data, coupon={"id": "../../C-1"}, actor="ana")
        path = Path(s.get_assessment(aid)["record"]["photo_file"])
    assert path == tmp_path / "store" / "photos" / sha[:2] / f"{sha}.jpg"  # suffix from the JPEG signature
    assert sorted(p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*") if p.is_file()
                  and not p.name.startswith("r.sqlite3")) == [f"store/photos/{sha[:2]}/{sha}.jpg"]


def test_limit_set_copy_name_cannot_leave_the_folder(tmp_path):
    env = dict(os.environ, SURFACES_HOME=str(tmp_path / "home"))
    for bad in ("../evil", "sub/evil", ".hidden", "a" * 65):
        proc = cli("limits", "copy", "aws-d1.1-bend", bad, env=env)
        assert_refused(proc, bad[:20], words=("letters, digits",))
    assert not (tmp_path / "evil.toml").exists() and not (tmp_path / "home").exists()
