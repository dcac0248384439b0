"""Fuzzing the three readers of user files: the photo loader, limit files, and ``surfaces judge`` input.

Property: whatever the bytes, the only failure is a documented clear error:
a :class:`surfaces.model.SurfacesError` subclass with a one-line message, and
through the command line exit 2 with one ``surfaces:`` line on stderr.
Budgets are bounded (``max_examples``, ``deadline=None``) so the whole file
runs in well under a minute.  Parser-level fuzz of limit sets is in
test_limits_properties.py; here the same kind of text goes through
``surfaces limits check`` and ``surfaces judge`` as a user runs them.
"""

from __future__ import annotations

import contextlib
import io
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from surfaces.cli import main
from surfaces.model import PhotoError, SurfacesError
from surfaces.photo import load_photo
from test_bad_input import cli, good_jpeg_bytes, good_png_bytes

# derandomize: CI runs the same bounded set of examples every time (a wider random search is a
# local run with --hypothesis-seed); findings are kept below as plain regression tests.
FUZZ = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow],
                database=None, derandomize=True)
SMALL = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                        HealthCheck.function_scoped_fixture],
                 database=None, derandomize=True)

JPEG = good_jpeg_bytes(240, 320)  # valid, just over the loader's 200 px minimum side
PNG = good_png_bytes(220, 260)


def _load_or_clear_error(data: bytes, name: str):
    try:
        photo = load_photo(data, name=name)
    except PhotoError as err:
        msg = str(err)
        assert msg and "\n" not in msg and name in msg, msg
        return None
    # whatever decodes is a proper photo: 8-bit RGB and its grey, same size
    assert photo.rgb.dtype == np.uint8 and photo.rgb.ndim == 3 and photo.rgb.shape[2] == 3
    assert photo.gray.shape == photo.rgb.shape[:2]
    assert min(photo.gray.shape) >= 200
    return photo


@FUZZ
@given(st.binary(max_size=2048))
def test_random_bytes(data):
    _load_or_clear_error(data, "random.jpg")


def _mutate(base: bytes, edits: list[tuple[int, int]], cut: int | None) -> bytes:
    b = bytearray(base)
    for pos, val in edits:
        b[pos % len(b)] = val
    if cut is not None:
        b = b[: cut % (len(b) + 1)]
    return bytes(b)


EDITS = st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), max_size=6)
HEAD_EDITS = st.lists(st.tuples(st.integers(0, 600), st.integers(0, 255)), min_size=1, max_size=4)


@FUZZ
@given(st.sampled_from(["jpeg", "png"]), HEAD_EDITS, st.none() | st.integers(0, 10**6))
def test_mutated_headers(kind, edits, cut):
    # bytes changed within the first 600: markers, IHDR (size, depth, colour type), CRCs, Huffman tables
    base = JPEG if kind == "jpeg" else PNG
    _load_or_clear_error(_mutate(base, edits, cut), f"mutated.{kind}")


@FUZZ
@given(st.sampled_from(["jpeg", "png"]), EDITS, st.none() | st.integers(0, 10**6))
def test_mutated_and_truncated_anywhere(kind, edits, cut):
    base = JPEG if kind == "jpeg" else PNG
    _load_or_clear_error(_mutate(base, edits, cut), f"cut.{kind}")


@FUZZ
@given(st.integers(0, len(PNG) - 13))
def test_every_png_truncation_point_refused(cut):
    # A PNG cut before its 12-byte IEND chunk (ISO/IEC 15948 section 11.2.5) has lost pixel data or
    # chunk structure: it must be refused, never decoded with a grey part.  (A cut inside IEND
    # itself leaves every pixel intact and may be read.)
    assert _load_or_clear_error(PNG[:cut], "cut.png") is None


# --------------------------------------------------------------------------- through the command line (in process)


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def _assert_clean(code: int, err: str, *names: str) -> None:
    assert code in (0, 2), (code, err)
    if code == 2:
        lines = err.strip("\n").split("\n")
        assert len(lines) == 1 and lines[0].startswith("surfaces: "), err
        assert "Traceback" not in err
        for n in names:
            assert n in lines[0], (n, err)


def _preset_text() -> str:
    from surfaces import limits as L

    return L.load_limit_set("aws-d1.1-fillet-break").text


PRESET = _preset_text()


@SMALL
@given(st.lists(st.tuples(st.integers(0, 10**5), st.integers(0, 30), st.text(max_size=10)), min_size=1,
                max_size=4))
def test_limits_check_on_edited_preset(tmp_path_factory, edits):
    text = PRESET
    for pos, cut, new in edits:
        pos %= max(len(text), 1)
        text = text[:pos] + new + text[pos + cut:]
    path = tmp_path_factory.mktemp("lim") / "edited.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    code, out, err = _run(["limits", "check", str(path)])
    _assert_clean(code, err, str(path))
    if code == 0:
        assert out.startswith("ok: ")


def _assessment() -> dict:
    """A saved assessment with a few imperfections (DEVELOPERS.md contract, sizes invented)."""
    def imp(i, kind, g, x):
        return {"id": i, "kind": kind, "iso6520": "2011", "confidence": 0.9, "greatest_mm": g, "greatest_u_mm": 0.05,
                "width_mm": g / 2, "width_u_mm": 0.05, "along_mm": g, "along_u_mm": 0.05, "across_mm": g / 2,
                "across_u_mm": 0.05, "area_mm2": g * g / 2, "area_u_mm2": 0.1, "x0_mm": x, "x1_mm": x + g,
                "y0_mm": 2.0, "y1_mm": 2.0 + g / 2, "cx_mm": x + g / 2, "cy_mm": 3.0, "dist_root_mm": 1.0,
                "dist_end_mm": x, "dist_edge_mm": 2.0, "at_edge": False, "at_root": False, "cause": "",
                "source": "auto", "status": "auto"}

    return {
        "schema": "surfaces.assessment/1", "tool": {"name": "surfaces", "version": "0.1.0"},
        "photo": {"name": "F-7.jpg", "sha256": "0" * 64, "width": 4000, "height": 3000},
        "test": "fillet-break", "settings": {"test": "fillet-break"}, "nominal": {"throat_mm": 6.0},
        "calibration": {"method": "marker", "px_per_mm": 20.0, "uncertainty_pct": 0.5},
        "face": {"length_mm": 150.0, "width_mm": 8.0, "area_mm2": 1200.0, "method": "auto"},
        "imperfections": [imp(1, "pore", 1.2, 20.0), imp(2, "inclusion", 2.6, 60.0), imp(3, "pore", 0.8, 90.0)],
        "limits": {"name": "old"}, "verdict": {"result": "review", "reasons": [], "details": []},
        "warnings": [], "cautions": [],
    }


BASE = _assessment()
json_scalars = (st.none() | st.booleans() | st.integers(-10**6, 10**6)
                | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=8)
                | st.sampled_from(["pore", "crack", "dismissed", "confirmed", "bend", "", "NaN", "-1"]))
json_values = st.recursive(json_scalars, lambda inner: st.lists(inner, max_size=3)
                           | st.dictionaries(st.text(max_size=6), inner, max_size=3), max_leaves=6)


def _paths(obj, prefix=()):
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _paths(v, prefix + (i,))


PATHS = [p for p in _paths(BASE) if p]


def _set(obj, path, value, delete):
    import copy

    obj = copy.deepcopy(obj)
    cur = obj
    for k in path[:-1]:
        cur = cur[k]
    if delete:
        del cur[path[-1]]
    else:
        cur[path[-1]] = value
    return obj


def _judge(tmp_path_factory, text: str) -> tuple[int, str, str, str]:
    path = tmp_path_factory.mktemp("judge") / "assessment.json"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    code, out, err = _run(["judge", str(path), "--limits", "aws-d1.1-fillet-break"])
    return code, out, err, str(path)


@SMALL
@given(st.lists(st.tuples(st.sampled_from(PATHS), json_values, st.booleans()), min_size=1, max_size=3))
def test_judge_on_mutated_assessment(tmp_path_factory, changes):
    a = BASE
    for path, value, delete in changes:
        try:
            a = _set(a, path, value, delete)
        except (KeyError, IndexError, TypeError):
            continue  # an earlier change removed or replaced this path
    code, out, err, name = _judge(tmp_path_factory, json.dumps(a))
    _assert_clean(code, err, name)
    if code == 0:
        assert out.startswith("verdict: ") and "caution:" in out


@SMALL
@given(st.integers(0, 10**5), st.binary(max_size=40))
def test_judge_on_cut_or_garbled_json(tmp_path_factory, cut, junk):
    text = json.dumps(BASE)
    text = text[: cut % (len(text) + 1)] + junk.decode("latin-1")
    code, _, err, name = _judge(tmp_path_factory, text)
    _assert_clean(code, err, name)


@pytest.mark.parametrize("nominal", [5, "6 mm", [[]]])
def test_judge_with_a_nominal_that_is_not_an_object(tmp_path_factory, nominal):
    # found by a wider run of test_judge_on_mutated_assessment (3000 examples)
    code, _, err, name = _judge(tmp_path_factory, json.dumps({**BASE, "nominal": nominal}))
    _assert_clean(code, err, name)
    assert code == 2 and "nominal" in err


def test_a_mutation_that_breaks_a_size_is_never_accepted(tmp_path_factory):
    # Safety side of the fuzz: a pore size made unreadable must not let a failing set pass silently.
    a = _set(BASE, ("imperfections", 1, "greatest_mm"), "big", False)
    code, out, err, _ = _judge(tmp_path_factory, json.dumps(a))
    assert code == 2 or not out.startswith("verdict: accept"), (out, err)


# --------------------------------------------------------------------------- a few through the real process


@pytest.mark.parametrize("seed", range(4))
def test_fuzzed_photos_through_the_real_command_line(tmp_path, seed):
    rng = np.random.default_rng(seed)
    base = bytearray(JPEG if seed % 2 == 0 else PNG)
    for _ in range(3):
        base[int(rng.integers(0, len(base)))] = int(rng.integers(0, 256))
    data = bytes(base[: int(rng.integers(len(base) // 3, len(base)))])
    path = tmp_path / f"fuzz-{seed}.{'jpg' if seed % 2 == 0 else 'png'}"
    path.write_bytes(data)
    proc = cli("assess", path, "--test", "fillet-break")
    assert proc.returncode == 2, proc.stderr  # a texture with no marker cannot pass even if it decodes
    err = proc.stderr.strip("\n").split("\n")
    assert len(err) == 1 and err[0].startswith("surfaces: ") and path.name in err[0], proc.stderr
    assert "Traceback" not in proc.stderr
