"""`surfaces limits ...` and `surfaces judge` through the argparse verbs of limits_cli.

The parser is built here with ``add_commands``, the way ``surfaces.cli`` does,
and a SurfacesError becomes exit code 2 as the main command line does; one
test goes through ``surfaces.cli.main`` itself when it is there.  Expected
verdicts follow the AWS D1.1 / ISO 5817 values of ../shared/REFERENCES.md
(see test_presets.py for the value checks).
"""

from __future__ import annotations

import argparse
import json

import pytest

from surfaces import limits as L
from surfaces import limits_cli
from surfaces.model import SurfacesError
from test_limits import FACE, imp


def run(argv: list[str], capsys) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser(prog="surfaces")
    limits_cli.add_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    try:
        code = args.func(args)
    except SurfacesError as exc:
        out, _ = capsys.readouterr()
        return 2, out, str(exc)
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(autouse=True)
def user_home(tmp_path, monkeypatch):
    monkeypatch.setenv("SURFACES_HOME", str(tmp_path / "home"))
    return tmp_path / "home"


def assessment(rows, *, test="fillet-break", nominal=None) -> dict:
    return {
        "schema": "surfaces.assessment/1",
        "tool": {"name": "surfaces", "version": "0.1.0"},
        "photo": {"name": "coupon-A7.jpg", "sha256": "0" * 64, "width": 4000, "height": 3000},
        "test": test,
        "settings": {"test": test},
        "nominal": nominal or {},
        "calibration": {"method": "marker", "px_per_mm": 20.0, "uncertainty_pct": 0.4},
        "face": {**FACE, "method": "auto", "root_side": "y0", "warnings": []},
        "imperfections": rows,
        "limits": {"name": "old"},
        "verdict": {"result": "review", "reasons": ["old"], "details": []},
        "warnings": ["glare near the right end"],
        "cautions": [],
    }


@pytest.fixture()
def saved(tmp_path):
    rows = [imp(1, "pore", 2.0, u=0.02), imp(2, "pore", 2.7, u=0.05), imp(3, "inclusion", 1.0, u=0.02)]
    path = tmp_path / "A7.json"
    path.write_text(json.dumps(assessment(rows)))
    return path


def test_judge_prints_verdict_reasons_and_cautions(saved, capsys):
    code, out, _ = run(["judge", str(saved), "--limits", "aws-d1.1-fillet-break"], capsys)
    assert code == 0
    lines = out.splitlines()
    assert lines[0].startswith("verdict: reject  (aws-d1.1-fillet-break, version 1; AWS D1.1")
    # AWS D1.1 4.31.4.1: greatest dimension of a pore at most 3/32 in (found)
    assert "  - single-size: pore 2: greatest 2.7 +/- 0.1 mm > 3/32 in (2.381 mm)" in lines
    assert sum(line.startswith("caution: ") for line in lines) == len(L.CAUTIONS)


def test_hand_edited_assessment(saved, tmp_path, capsys):
    data = json.loads(saved.read_text())
    data["imperfections"][1]["status"] = "dismissed"  # the reviewer: a reflection, not a pore
    manual = imp(4, "pore", 2.2, u=0.05, source="manual", status="confirmed", conf=None)
    data["imperfections"].append(manual)
    edited = tmp_path / "A7-reviewed.json"
    edited.write_text(json.dumps(data))
    code, out, _ = run(["judge", str(edited), "--limits", "aws-d1.1-fillet-break"], capsys)
    # 2.0, 1.0 and 2.2 mm are each under 2.38 mm and sum to 5.2 mm < 9.525 mm: accept
    assert code == 0 and out.startswith("verdict: accept")
    assert "3 imperfection(s) judged (1 dismissed)" in out
    # the same face to ISO 5817 level B needs the throat ...
    code, out, _ = run(["judge", str(edited), "--limits", "iso-5817-b-fillet-break"], capsys)
    assert out.startswith("verdict: review") and "enter throat_mm (--throat-mm)" in out
    # ... and with a = 10 mm the single-pore limit is min(0.2 a, 3 mm) = 2 mm (from memory)
    code, out, _ = run(["judge", str(edited), "--limits", "iso-5817-b-fillet-break",
                        "--throat-mm", "10"], capsys)
    assert out.startswith("verdict: reject")
    assert "pore-size: pore 1: greatest 2 +/- 0.04 mm is within its uncertainty of" in out
    assert "pore-size: pore 4: greatest 2.2 +/- 0.1 mm > the smaller of 0.2 x throat and 3 mm = 2 mm for throat 10 mm" in out


def test_judge_json_out_is_atomic_and_never_overwrites(saved, tmp_path, capsys):
    out_path = tmp_path / "A7-judged.json"
    code, out, _ = run(["judge", str(saved), "--limits", "asme-ix-fillet-break", "--json", str(out_path),
                        "--wall-mm", "8"], capsys)
    assert code == 0 and f"wrote {out_path}" in out
    written = json.loads(out_path.read_text())
    original = json.loads(saved.read_text())
    # ASME IX QW-182: sum of lengths 2.0 + 2.7 + 1.0 = 5.7 mm <= 3/8 in, no single cap (found)
    assert written["verdict"]["result"] == "accept"
    assert written["limits"]["name"] == "asme-ix-fillet-break"
    assert written["nominal"] == {"wall_mm": 8.0}
    for key in ("photo", "calibration", "face", "imperfections", "warnings", "settings", "tool"):
        assert written[key] == original[key], key
    assert all(c in written["cautions"] for c in L.CAUTIONS)
    before = out_path.read_bytes()
    code, _, err = run(["judge", str(saved), "--limits", "aws-d1.1-fillet-break", "--json",
                        str(out_path)], capsys)
    assert code == 2 and "already exists" in err and "--force" in err
    assert out_path.read_bytes() == before  # saved work untouched
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    code, _, _ = run(["judge", str(saved), "--limits", "aws-d1.1-fillet-break", "--json",
                      str(out_path), "--force"], capsys)
    assert code == 0 and json.loads(out_path.read_text())["verdict"]["result"] == "reject"


def test_judge_bad_inputs_exit_2_with_one_line(saved, tmp_path, capsys):
    bad_json = tmp_path / "broken.json"
    bad_json.write_text('{"schema": "surfaces.assessment/1",\n "test": }')
    code, _, err = run(["judge", str(bad_json), "--limits", "aws-d1.1-bend"], capsys)
    assert code == 2 and "not valid JSON at line 2" in err
    code, _, err = run(["judge", str(tmp_path / "none.json"), "--limits", "aws-d1.1-bend"], capsys)
    assert code == 2 and "not found" in err
    code, _, err = run(["judge", str(saved), "--limits", "aws-d1.1-bend"], capsys)
    assert code == 2 and "is for bend, not fillet-break" in err
    code, _, err = run(["judge", str(saved), "--limits", "no-such-set"], capsys)
    assert code == 2 and "no limit set named 'no-such-set'" in err
    code, _, err = run(["judge", str(saved), "--limits", "aws-d1.1-fillet-break", "--throat-mm", "-3"],
                       capsys)
    assert code == 2 and "throat_mm" in err
    for e in (err,):
        assert "\n" not in e


GOOD = """schema = "surfaces.limits/1"
name = "shop-fillet"
tests = ["fillet-break"]

[[rule]]
id = "pores"
check = "max_size"
kinds = ["pore"]
max = "2 mm"
"""


@pytest.mark.parametrize("old, new, words", [
    ('tests = ["fillet-break"]', 'tests = ["fillet-break"', ["not valid TOML", "line 5"]),  # where the parser noticed
    ('max = "2 mm"', 'maximum = "2 mm"', ["line 9", "unknown key 'maximum'"]),
    ('max = "2 mm"', 'max = "-2 mm"', ["line 9", "'max'", "negative"]),
    ('max = "2 mm"', 'max = "two mm"', ["line 9", "'max'", "not a number"]),
    ('max = "2 mm"', 'max = 2', ["line 9", "'max'", "missing unit"]),
    ('max = "2 mm"', 'max = "2 cm"', ["line 9", "unit 'cm'"]),
])
def test_malformed_limit_files(tmp_path, capsys, saved, old, new, words):
    path = tmp_path / "shop.toml"
    path.write_text(GOOD.replace(old, new))
    for argv in (["limits", "check", str(path)], ["judge", str(saved), "--limits", str(path)]):
        code, _, err = run(argv, capsys)
        assert code == 2 and "\n" not in err and str(path) in err
        for w in words:
            assert w in err, (w, err)


def test_limits_check_list_show_copy(tmp_path, capsys, user_home, saved):
    path = tmp_path / "shop.toml"
    path.write_text(GOOD)
    code, out, _ = run(["limits", "check", str(path)], capsys)
    assert code == 0 and out.startswith("ok: shop-fillet version 1, 1 rules, for fillet-break")
    code, out, _ = run(["limits", "list"], capsys)
    assert code == 0 and len([x for x in out.splitlines() if " preset " in x]) == 11
    code, out, _ = run(["limits", "show", "aws-d1.1-bend"], capsys)
    assert "band-sum: any: greatest sum of sizes over 1/32 in (0.794 mm)" in out
    assert "compared as 3 mm: printed (the safer reading" in out and "edition:" in out
    code, out, _ = run(["limits", "show", "aws-d1.1-bend", "--toml"], capsys)
    assert L.parse_limit_set(out) == L.load_limit_set("aws-d1.1-bend")
    code, out, _ = run(["limits", "copy", "aws-d1.1-fillet-break", "shop-a"], capsys)
    copy = user_home / "limits" / "shop-a.toml"
    assert code == 0 and str(copy) in out and copy.is_file()
    code, out, _ = run(["limits", "list"], capsys)
    assert any(line.startswith("shop-a ") and " yours " in line for line in out.splitlines())
    code, out, _ = run(["judge", str(saved), "--limits", "shop-a"], capsys)
    assert out.startswith("verdict: reject  (shop-a")
    code, _, err = run(["limits", "copy", "aws-d1.1-fillet-break", "shop-a"], capsys)
    assert code == 2 and "already exists" in err
    out_file = tmp_path / "elsewhere.toml"
    code, out, _ = run(["limits", "copy", "shop-a", "shop-b", "--out", str(out_file)], capsys)
    assert code == 0 and L.read_limit_file(out_file).name == "shop-b"
    code, _, err = run(["limits", "check", str(tmp_path / "missing.toml")], capsys)
    assert code == 2 and "not found" in err


def test_through_the_main_command_line(saved, tmp_path, capsys):
    cli = pytest.importorskip("surfaces.cli")
    if not hasattr(cli, "main"):
        pytest.skip("surfaces.cli has no main yet")
    bad = tmp_path / "bad.toml"
    bad.write_text(GOOD.replace('max = "2 mm"', 'max = "2"'))
    assert cli.main(["limits", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "line 9" in err and "missing unit" in err and len(err.strip().splitlines()) == 1
    assert cli.main(["judge", str(saved), "--limits", "aws-d1.1-fillet-break"]) == 0
    assert capsys.readouterr().out.startswith("verdict: reject")
