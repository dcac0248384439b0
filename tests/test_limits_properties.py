"""Properties of the judge (hypothesis) and a bounded fuzz of the limit-file parser.

* adding an imperfection never turns ``reject`` into ``accept``;
* shrinking every size never turns ``accept`` into ``reject`` (in fact an
  ``accept`` stays ``accept``: every rule's pass test is monotone by design);
* the verdict does not depend on the order of the rows;
* arbitrary text never makes the parser raise anything but ``LimitsError``.

The sets tried are every preset for every test it applies to, plus one set
that uses every rule form with thresholds (smallest size, band, window,
corner ignore-below), which are where monotonicity is easiest to lose.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pandas as pd
import pytest
import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from surfaces import limits as L
from test_limits import CONTRACT_COLUMNS, imp

EVERY_FORM = L.parse_limit_set(tomli_w.dumps({
    "schema": "surfaces.limits/1", "name": "every-form",
    "tests": ["fillet-break", "nick-break", "bend"], "min_confidence": 0.6,
    "rule": [
        {"id": "np", "check": "not_permitted", "kinds": ["crack"], "min_size": "0.5 mm"},
        {"id": "root", "check": "not_permitted", "kinds": ["unfused"], "where": {"at_root": True}},
        {"id": "size", "check": "max_size", "kinds": ["pore", "inclusion"], "max": "4 mm",
         "max_fraction": 0.5, "of": "throat"},
        {"id": "count", "check": "max_count", "kinds": ["pore"], "max_count": 3, "min_size": "1 mm"},
        {"id": "sum", "check": "max_sum", "kinds": ["any"], "max": "12 mm", "min_size": "0.6 mm"},
        {"id": "win", "check": "max_sum", "kinds": ["unfused", "inclusion"], "measure": "along",
         "max": "8 mm", "window": "40 mm"},
        {"id": "winG", "check": "max_sum", "kinds": ["pore"], "max": "6 mm", "window": "30 mm"},
        {"id": "area", "check": "max_area", "kinds": ["pore"], "max": "1.5 %"},
        {"id": "sep", "check": "min_separation", "kinds": ["inclusion"], "min": "1/2 in"},
        {"id": "band", "check": "band_sum", "kinds": ["any"], "above": "1 mm", "up_to": "3 mm",
         "max": "7 mm"},
        {"id": "corner", "check": "corner", "kinds": ["crack", "pore"], "ignore_below": "5 mm",
         "unless_cause": ["slag"]},
    ],
}))

# Each rule form alone and with the corner rule, so that no other rule masks a fault.
_CORNER = next(r for r in EVERY_FORM.rules if r.check == "corner")
ALONE = [replace(EVERY_FORM, name=f"{r.id}-alone", rules=rules)
         for r in EVERY_FORM.rules if r.check != "corner"
         for rules in ((r,), (r, _CORNER))]

SETS = [(ls, test) for ls in L.list_presets() for test in ls.tests]
SETS += [(ls, "bend") for ls in [EVERY_FORM, *ALONE]]
NOMINAL = {"thickness_mm": 10.0, "throat_mm": 6.0, "wall_mm": 8.0, "length_mm": 150.0}
FACE = {"length_mm": 150.0, "width_mm": 10.0, "area_mm2": 600.0}
RANK = {"accept": 0, "review": 1, "reject": 2}

# sizes near the thresholds of the sets (0.5, 0.79, 1, 1.59, 2.38, 3, 4, 5, 6 mm) turn up often
NEAR = [0.45, 0.5, 0.55, 0.8, 1.0, 1.05, 1.6, 2.3, 2.4, 2.9, 3.0, 3.1, 3.9, 4.1, 4.9, 5.0, 5.1,
        5.9, 6.0, 6.1, 6.5]
sizes = st.sampled_from(NEAR) | st.floats(min_value=0.05, max_value=14.0, allow_nan=False)
ratios = st.floats(min_value=0.1, max_value=1.0, allow_nan=False)
item_spec = st.fixed_dictionaries({
    "kind": st.sampled_from(["pore", "inclusion", "unfused", "crack"]),
    "greatest": sizes,
    "along_r": ratios,
    "width_r": ratios,
    "u": st.sampled_from([0.0, 0.02, 0.05, 0.1, 0.3]),
    "conf": st.sampled_from([0.95, 0.95, 0.95, 0.3]) | st.floats(min_value=0.05, max_value=1.0),
    "x0": st.floats(min_value=0.0, max_value=140.0),
    "at_edge": st.booleans(),
    "at_root": st.booleans(),
    "cause": st.sampled_from(["", "", "slag", "unfused", "pore"]),
    "iso6520": st.sampled_from(["2011", "2017", "301"]),
    "status": st.sampled_from(["auto"] * 6 + ["confirmed", "dismissed"]),
})


def make_row(ident: int, spec: dict, f: float = 1.0) -> dict:
    """A row from a spec, every size scaled by ``f`` about the same centre."""
    g = spec["greatest"]
    along, width = g * spec["along_r"], g * spec["width_r"]
    shrink = (1.0 - f) * along / 2.0
    row = imp(ident, spec["kind"], g * f, u=spec["u"], conf=spec["conf"], along=along * f,
              width=width * f, area=math.pi / 4 * g * width * f * f,
              at_edge=spec["at_edge"], at_root=spec["at_root"], cause=spec["cause"],
              iso6520=spec["iso6520"], status=spec["status"])
    row["x0_mm"], row["x1_mm"] = spec["x0"] + shrink, spec["x0"] + along - shrink
    return row


def judge(rows: list[dict], ls, test):
    t = pd.DataFrame(rows, columns=list(CONTRACT_COLUMNS))
    return L.judge(t, face=FACE, nominal=NOMINAL, limit_set=ls, test=test)


# every set gets its own examples, so that no set is left to chance
PROPS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
each_set = pytest.mark.parametrize("set_test", SETS, ids=[f"{ls.name}-{t}" for ls, t in SETS])


@each_set
@PROPS
@given(specs=st.lists(item_spec, max_size=8), extra=item_spec)
def test_adding_an_imperfection_never_turns_reject_into_accept(set_test, specs, extra):
    ls, test = set_test
    rows = [make_row(i + 1, s) for i, s in enumerate(specs)]
    before = judge(rows, ls, test).result
    after = judge(rows + [make_row(len(rows) + 1, extra)], ls, test).result
    assert not (before == "reject" and after == "accept"), (ls.name, before, after)
    # the same fact the other way round: an accept stays possible only if it was there before
    if after == "accept":
        assert before == "accept"


@each_set
@PROPS
@given(specs=st.lists(item_spec, max_size=8),
       f=st.sampled_from([0.5, 0.9, 0.97]) | st.floats(min_value=0.05, max_value=1.0))
def test_shrinking_every_size_never_turns_accept_into_reject(set_test, specs, f):
    ls, test = set_test
    before = judge([make_row(i + 1, s) for i, s in enumerate(specs)], ls, test)
    after = judge([make_row(i + 1, s, f) for i, s in enumerate(specs)], ls, test)
    assert not (before.result == "accept" and after.result == "reject")
    if before.result == "accept":  # stronger: every pass test is monotone in size
        assert after.result == "accept", (ls.name, after.reasons)


@each_set
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(specs=st.lists(item_spec, max_size=8), rnd=st.randoms(use_true_random=False))
def test_verdict_does_not_depend_on_row_order(set_test, specs, rnd):
    ls, test = set_test
    rows = [make_row(i + 1, s) for i, s in enumerate(specs)]
    shuffled = rows[:]
    rnd.shuffle(shuffled)
    a, b = judge(rows, ls, test), judge(shuffled, ls, test)
    assert a == b


# --------------------------------------------------------------------------- parser fuzz

FUZZ = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _parse_only_limits_error(text: str):
    try:
        result = L.parse_limit_set(text, origin="fuzz")
    except L.LimitsError as exc:
        msg = str(exc)
        assert msg.startswith("limit set fuzz") and "\n" not in msg.strip("\n"), msg
        return None
    assert isinstance(result, L.LimitSet)
    return result


@FUZZ
@given(st.text(max_size=400))
def test_arbitrary_text_raises_only_limits_error(text):
    _parse_only_limits_error(text)


PRESET_TEXTS = [ls.text for ls in L.list_presets()]


@FUZZ
@given(st.sampled_from(PRESET_TEXTS), st.lists(
    st.tuples(st.integers(min_value=0, max_value=4000), st.integers(min_value=0, max_value=40),
              st.text(max_size=12)), min_size=1, max_size=4))
def test_edited_presets_raise_only_limits_error(text, edits):
    # a person editing a preset: cut a piece somewhere and type something else there
    for pos, cut, new in edits:
        pos %= max(len(text), 1)
        text = text[:pos] + new + text[pos + cut:]
    _parse_only_limits_error(text)


KEYS = ["schema", "name", "tests", "rule", "id", "check", "kinds", "max", "min", "max_fraction",
        "of", "window", "above", "up_to", "min_size", "max_count", "where", "at_root",
        "ignore_up_to", "ignore_below", "ignore_any_size", "beyond", "unless_cause", "measure",
        "outcome", "confidence", "value", "unit", "printed", "use", "min_confidence", "short_fraction", "zz"]
VALUES = ["surfaces.limits/1", "x", "bend", "fillet-break", "pore", "any", "max_size", "corner",
          "band_sum", "max_sum", "min_separation", "max_area", "max_count", "not_permitted",
          "3 mm", "1/8 in", "-1 mm", "2 %", "1/0 in", "mm", "wall", "retest", "printed", "1e999 mm"]
scalars = (st.sampled_from(VALUES) | st.integers(-5, 10**6) | st.booleans()
           | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=8))
values = st.recursive(scalars, lambda inner: st.lists(inner, max_size=3)
                      | st.dictionaries(st.sampled_from(KEYS), inner, max_size=4), max_leaves=12)


@FUZZ
@given(st.dictionaries(st.sampled_from(KEYS), values, max_size=8),
       st.lists(st.dictionaries(st.sampled_from(KEYS), values, max_size=8), max_size=3))
def test_structured_nonsense_raises_only_limits_error(top, rules):
    data = {"schema": "surfaces.limits/1", "name": "f", "tests": ["bend"], **top}
    if rules:
        data["rule"] = rules
    try:
        text = tomli_w.dumps(data)
    except (TypeError, ValueError):
        return  # not representable in TOML at all
    result = _parse_only_limits_error(text)
    if result is not None:  # whatever it accepted must judge an empty table and write back
        assert L.parse_limit_set(L.to_toml(result)) == result
