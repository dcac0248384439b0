"""Acceptance limits: limit sets in TOML, presets, and judging an imperfection table.

A *limit set* is a small TOML file (schema ``surfaces.limits/1``) that names
the test types it applies to and lists *rules*.  Presets ship in
``surfaces/presets/*.toml``; users copy one, edit it and save it in their own
folder (``$SURFACES_HOME/limits/`` or ``~/.local/share/surfaces/limits/``).
This module never imports OpenCV: it judges a table.

Judging
-------
Every rule returns ``pass``, ``fail`` or ``review`` and the verdict is
``reject`` if any rule fails (rules with ``outcome = "review"`` give
``review`` instead), ``review`` if any rule is undecided, else ``accept``.

* **Uncertainty.**  Measured sizes carry a 1-sigma uncertainty (``*_u_mm``
  columns).  Comparisons use the expanded uncertainty ``U = k * u`` with the
  coverage factor ``k = COVERAGE_K = 2`` (about 95 % for a normal error).
  For a maximum ``X`` ("shall not exceed X", equal passes): ``v + U <= X``
  passes, ``v - U > X`` fails, anything between is ``review``.  For a
  minimum (separation) the mirror image holds.  Reasons print ``v +/- U``.
* **Sums and areas** add the values (``math.fsum``, independent of order)
  and combine the parts' uncertainties by root-sum-square.  That assumes the
  parts' errors are independent; the scale error of the calibration is common
  to all parts and adds linearly, so for many parts the root-sum-square
  understates it (by up to ``sqrt(n)``).  The calibration uncertainty is
  usually small next to the edge-finding error the segmenter reports; this is
  a known simplification, stated here and in ``CAUTIONS``.
* **Separations** are gaps along the weld between the extents ``x0_mm`` ..
  ``x1_mm`` of two imperfections.  Each end of an extent is taken to carry
  ``along_u_mm / sqrt(2)``, so a gap carries ``sqrt((ua^2 + ub^2) / 2)``.
* **Unknown uncertainty** (a missing ``*_u_mm`` column or an empty cell) is
  taken as 0 for the arithmetic, but a rule whose decision rests on such a
  value (it fails, or it passes with that imperfection counted) gives
  ``review`` and says which column is missing.
* **Low confidence.**  A detection whose ``confidence`` is below the set's
  ``min_confidence`` (default 0.5) counts towards ``review`` but never
  alone towards ``reject``: if a rule fails only because of such detections
  the verdict is ``review``.  Rows a reviewer ``confirmed`` or ``edited``
  and ``manual`` rows count as confident; ``dismissed`` rows are not judged.
* **Doubtful kind.**  A pore and a slag inclusion (or a crack and an
  elongated inclusion) can look alike; limits differ by kind.  An unreviewed
  detection whose runner-up kind ``kind_alt`` has probability ``kind_alt_p``
  of at least ``KIND_DOUBT_P`` is judged once more as that kind; if the
  coupon would then be rejected (or, for an accept, sent to review), an
  ``accept`` becomes ``review`` with a reason naming the detection and the
  rule.  A cause read off the kind (a bend opening's ``pore`` or ``slag``)
  moves with it, so slag called a pore also loses a corner rule's "ignored
  unless from slag".  A reject stays a reject; a confirmed or edited row is
  taken as the reviewer says.
* **Root side not known.**  Rules may judge an unfused region differently
  at the root (``where = { at_root = true }``, incomplete root penetration)
  and away from it (lack of fusion).  The face finder does not yet tell the
  root edge from the other long edge, so a measured row without
  ``dist_root_mm`` has ``at_root`` only as "touches a long edge"; a band
  along the root that the face outline runs past reads as "not at the root".
  Each such unreviewed detection is judged once more with ``at_root`` the
  other way, and a worse verdict sends an ``accept`` to ``review`` (as for a
  doubtful kind).
* **Part of the face not assessed.**  When the face finder says part of the
  face is out of the photo or under the reference card (the assessment's
  ``face.unseen``), a coupon that is not rejected
  anyway goes to ``review``: what was not seen cannot be passed.
* **Cut by a face end.**  An unreviewed imperfection that some rule judges
  and that lies within ``END_CUT_MM`` of an end of the face found may go on
  past that end (a cavity at the end of a break can end the face the tool
  finds): its full size is not known, so a coupon that is not rejected
  anyway goes to ``review`` naming it.
* **Thresholds** (smallest size that counts, corner sizes, band limits) are
  also compared with ``U``: an imperfection within its uncertainty of a
  threshold is counted when asking "could this fail?" and left out when
  asking "does this surely fail?".  So every rule's pass test is monotone: an
  added or a larger imperfection can only make a pass harder.  That is what
  makes "adding an imperfection never turns reject into accept" and
  "shrinking never turns accept into reject" hold.
* **Nominal dimensions** (``thickness_mm``, ``throat_mm``, ``wall_mm``,
  ``length_mm``): a limit given as a fraction of one that is missing gives
  ``review`` with a reason naming the dimension to enter; when the rule also
  has an absolute cap and a value exceeds the cap, it fails anyway (the limit
  is the smaller of the two).

Schema (``surfaces.limits/1``)
------------------------------
Top level: ``schema``, ``name`` (letters, digits, ``.``, ``_``, ``-``),
``title``, ``version``, ``tests`` (any of ``fillet-break``, ``nick-break``,
``bend``), ``source``, ``clause``, ``edition``, ``note``,
``min_confidence`` (0..1, default 0.5) and one ``[[rule]]`` table per rule.

Every rule has ``id``, ``check``, ``kinds`` (``pore``, ``inclusion``,
``unfused``, ``crack`` or ``any``) and may have ``where`` (``{ at_root =
true }``, ``{ cause = [...] }``, ``{ iso6520 = ["2017"] }``), ``measure``
(``greatest`` default, ``width``, ``along``, ``across``), ``min_size`` (the
smallest size that counts; smaller is ignored by this rule), ``outcome``
(``reject`` default, or ``review`` for a rule that may only send the coupon
to a person), ``clause``, ``confidence`` (``found``, ``memory``, ``added``
for our own safety additions, ``user``) and ``note``.  The checks:

=================  ==========================================================
``not_permitted``  any counted imperfection fails
``max_size``       ``max`` and/or ``max_fraction`` x ``of`` (``thickness``,
                   ``throat``, ``wall``, ``length``): the limit is the smaller
``max_count``      ``max_count`` (a whole number)
``max_sum``        sum of ``measure`` at most ``max`` (or fraction); with
                   ``window`` in any window of that length along the weld,
                   and ``short_fraction`` x the weld length for a weld
                   shorter than the window
``max_area``       total area at most ``max`` (``"2 %"``) of the face area
``min_separation`` gaps along the weld at least ``min``
``band_sum``       sum of sizes over ``above`` (up to ``up_to``; larger ones
                   count as ``up_to``) at most ``max``
``corner``         imperfections at a coupon edge (``at_edge``, or
                   ``dist_edge_mm <= edge_within``): ``ignore_up_to`` /
                   ``ignore_below`` / ``ignore_any_size = true``; ``beyond =
                   "count"`` (the other rules then apply) or ``"retest"``
                   (review: replacement specimen); never ignored when
                   ``cause`` is in ``unless_cause``.  One per set.
=================  ==========================================================

Units
-----
Lengths are written with their unit as the standard states it:
``"3/32 in"``, ``"2.5 mm"``.  When a standard prints a rounded metric value
beside an inch value the rule says so:
``{ value = "3/32 in", printed = "2.5 mm", use = "safer" }``.  ``use`` picks
the reading compared against: ``safer`` (default: the smaller for a maximum,
the larger for a minimum), ``stated`` or ``printed``.
"""

from __future__ import annotations

import copy
import json
import math
import os
import re
import tomllib
from dataclasses import dataclass, field, replace
from fractions import Fraction
from pathlib import Path
from typing import Any, Iterable

import pandas as pd

from .atomic import write_text_atomic
from .model import KIND_CAUSE, KINDS, TEST_TYPES, SurfacesError

__all__ = [
    "KIND_DOUBT_P",
    "CAUTIONS",
    "COVERAGE_K",
    "LimitSet",
    "LimitsError",
    "Quantity",
    "Rule",
    "Verdict",
    "default_preset_for",
    "judge",
    "judge_assessment",
    "limits_summary",
    "list_presets",
    "list_user_sets",
    "load_limit_set",
    "parse_limit_set",
    "read_limit_file",
    "save_user_set",
    "to_toml",
    "user_folder",
]

SCHEMA = "surfaces.limits/1"
#: Coverage factor applied to the 1-sigma ``*_u_mm`` columns.
COVERAGE_K: float = 2.0
DEFAULT_MIN_CONFIDENCE: float = 0.5
INCH_MM: float = 25.4
PRESET_DIR = Path(__file__).with_name("presets")

#: Standard cautions shown on the page and printed in every report.
CAUTIONS: tuple[str, ...] = (
    "Check every limit against the edition of the code or standard in force for the job; "
    "values marked 'memory' were not checked against a published copy.",
    "Final acceptance is for qualified personnel under the applicable codes, contract and "
    "local rules; this result assists them and does not replace them.",
    "An 'accept' is only as good as the detection: imperfections the photo does not show "
    "(too small, low contrast, glare, hidden in the fracture texture) are not judged.",
    "Sizes come from one photo of the face plane; sums combine uncertainties by "
    "root-sum-square, which understates a common scale error.",
)

CHECKS = (
    "not_permitted",
    "max_size",
    "max_count",
    "max_sum",
    "max_area",
    "min_separation",
    "band_sum",
    "corner",
)
MEASURES = {
    "greatest": ("greatest_mm", "greatest_u_mm"),
    "width": ("width_mm", "width_u_mm"),
    "along": ("along_mm", "along_u_mm"),
    "across": ("across_mm", "across_u_mm"),
}
NOMINALS = ("thickness", "throat", "wall", "length")
CONFIDENCES = ("found", "memory", "added", "user")
CAUSES = ("slag", "unfused", "pore")
OUTCOMES = ("reject", "review")
_KIND_CHOICES = KINDS + ("any",)
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")

_COMMON_RULE_KEYS = (
    "id", "check", "kinds", "where", "measure", "min_size",
    "outcome", "clause", "confidence", "note",
)
_CHECK_KEYS: dict[str, tuple[str, ...]] = {
    "not_permitted": (),
    "max_size": ("max", "max_fraction", "of"),
    "max_count": ("max_count",),
    "max_sum": ("max", "max_fraction", "of", "window", "short_fraction"),
    "max_area": ("max",),
    "min_separation": ("min",),
    "band_sum": ("above", "up_to", "max"),
    "corner": ("edge_within", "ignore_up_to", "ignore_below", "ignore_any_size",
               "beyond", "unless_cause"),
}
_TOP_KEYS = ("schema", "name", "title", "version", "tests", "source", "clause",
             "edition", "note", "min_confidence", "rule")
#: For each quantity key: does a *smaller* reading make the rule stricter?
_SMALLER_IS_SAFER = {
    "max": True, "min": False, "above": True, "up_to": False, "window": False,
    "min_size": True, "edge_within": False, "ignore_up_to": True,
    "ignore_below": True,
}


class LimitsError(SurfacesError):
    """A limit set, an assessment file or a judging request that cannot be used."""


# --------------------------------------------------------------------------- values


def _fmt(x: float, nd: int = 2) -> str:
    """``nd`` decimals, trailing zeros dropped (``3``, ``2.38``, ``12.7``)."""
    if x is None or not math.isfinite(x):
        return "?"
    s = f"{x:.{nd}f}"
    return s.rstrip("0").rstrip(".") if "." in s else s


def _fmt_near(x: float, limit: float | None) -> str:
    """A measured value with as many decimals as it takes to sit on the right side of the limit shown."""
    nd = 2
    if limit is not None and math.isfinite(x) and math.isfinite(limit) and x != limit:
        shown = float(_fmt(limit, 3))
        while nd < 6 and (float(_fmt(x, nd)) <= shown) != (x <= limit):
            nd += 1
    return _fmt(x, nd)


@dataclass(frozen=True)
class Quantity:
    """A limit value in the unit the standard states.

    ``stated`` keeps the number as written (``"3/32"``); ``printed_mm`` is a
    rounded metric value the standard prints beside it, if any; ``use`` picks
    the reading compared against (``safer``, ``stated``, ``printed``);
    ``smaller_is_safer`` is set by the key the value belongs to.
    """

    stated: str
    unit: str  # "mm", "in" or "%"
    value: float  # in ``unit``
    printed_mm: float | None = None
    printed: str | None = None
    use: str = "safer"
    smaller_is_safer: bool = True

    @property
    def exact_mm(self) -> float:
        """The stated value in mm, converted exactly (1 in = 25.4 mm) and rounded once."""
        if self.unit != "in":
            return self.value
        exact = _parse_number(self.stated)
        if exact is None:  # only for hand-built objects
            return self.value * INCH_MM
        return float(exact * Fraction(127, 5))

    @property
    def mm(self) -> float:
        """The reading compared against, in mm (or percent for ``%``)."""
        if self.printed_mm is None or self.use == "stated":
            return self.exact_mm
        if self.use == "printed":
            return self.printed_mm
        pick = min if self.smaller_is_safer else max
        return pick(self.exact_mm, self.printed_mm)

    @property
    def reading(self) -> str:
        """Which reading is used and why, for ``limits show``."""
        if self.printed_mm is None:
            return "exact" if self.unit == "in" else "as stated"
        used = "printed" if self.mm == self.printed_mm and self.mm != self.exact_mm else "exact"
        why = {"safer": "the safer reading", "stated": "chosen: stated", "printed": "chosen: printed"}
        return (f"{used} ({why[self.use]}; exact {_fmt(self.exact_mm, 4)} mm, "
                f"printed {_fmt(self.printed_mm, 3)} mm)")

    def label(self) -> str:
        """``3/32 in (2.38 mm)``, ``3 mm``, ``2 %``."""
        if self.unit == "%":
            return f"{self.stated} %"
        if self.unit == "mm" and self.printed_mm is None:
            return f"{self.stated} mm"
        return f"{self.stated} {self.unit} ({_fmt(self.mm, 3)} mm)"

    def to_toml_value(self) -> Any:
        text = f"{self.stated} {self.unit}"
        if self.printed is None and self.use == "safer":
            return text
        out: dict[str, Any] = {"value": text}
        if self.printed is not None:
            out["printed"] = self.printed
        if self.use != "safer":
            out["use"] = self.use
        return out


@dataclass(frozen=True)
class Rule:
    """One acceptance rule; see the module docstring and ``limits show``."""

    id: str
    check: str
    kinds: tuple[str, ...]
    clause: str = ""
    confidence: str = "user"
    note: str = ""
    outcome: str = "reject"
    measure: str = "greatest"
    where: tuple[tuple[str, Any], ...] = ()
    min_size: Quantity | None = None
    max: Quantity | None = None
    max_fraction: float | None = None
    of: str | None = None
    max_count: int | None = None
    window: Quantity | None = None
    short_fraction: float | None = None  # limit for a weld shorter than the window
    min: Quantity | None = None
    above: Quantity | None = None
    up_to: Quantity | None = None
    edge_within: Quantity | None = None
    ignore_up_to: Quantity | None = None
    ignore_below: Quantity | None = None
    ignore_any_size: bool = False
    beyond: str = "count"
    unless_cause: tuple[str, ...] = ()
    line: int | None = field(default=None, compare=False)

    def limit_label(self) -> str:
        """The limit in words, both units where the standard uses inches."""
        if self.check == "not_permitted":
            return "not permitted"
        if self.check == "max_count":
            return f"at most {self.max_count}"
        if self.check == "min_separation":
            return f"at least {self.min.label()}"
        if self.check == "corner":
            if self.ignore_any_size:
                return "ignored at any size"
            q = self.ignore_up_to or self.ignore_below
            word = "up to" if self.ignore_up_to else "below"
            tail = "; larger: replacement specimen" if self.beyond == "retest" else ""
            return f"ignored {word} {q.label()}{tail}"
        text = self.bound_text()
        if self.check == "band_sum":
            text = f"sum of sizes over {self.above.label()} up to {self.up_to.label()}: at most {text}"
        elif self.check == "max_sum":
            text = f"sum at most {text}" + (f" in any {self.window.label()}" if self.window else "")
            if self.short_fraction is not None:
                text += f" ({_fmt(self.short_fraction * 100)} % of a weld shorter than that)"
        elif self.check == "max_area":
            text = f"at most {text} of the face area"
        else:
            text = f"at most {text}"
        return text

    def bound_text(self) -> str:
        """The maximum alone: ``3/32 in (2.38 mm)``, ``the smaller of 0.2 x throat and 3 mm``."""
        parts = []
        if self.max_fraction is not None:
            parts.append(f"{_fmt(self.max_fraction)} x {self.of}")
        if self.max is not None:
            parts.append(self.max.label())
        return f"the smaller of {parts[0]} and {parts[1]}" if len(parts) == 2 else parts[0]

    def to_toml_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"id": self.id, "check": self.check, "kinds": list(self.kinds)}
        if self.where:
            d["where"] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.where}
        if self.measure != "greatest":
            d["measure"] = self.measure
        for key in ("min_size", "max", "max_fraction", "of", "max_count", "window", "short_fraction", "min",
                    "above", "up_to", "edge_within", "ignore_up_to", "ignore_below"):
            val = getattr(self, key)
            if val is not None:
                d[key] = val.to_toml_value() if isinstance(val, Quantity) else val
        if self.ignore_any_size:
            d["ignore_any_size"] = True
        if self.check == "corner" and self.beyond != "count":
            d["beyond"] = self.beyond
        if self.unless_cause:
            d["unless_cause"] = list(self.unless_cause)
        if self.outcome != "reject":
            d["outcome"] = self.outcome
        for key in ("clause", "confidence", "note"):
            if getattr(self, key):
                d[key] = getattr(self, key)
        return d


@dataclass(frozen=True)
class LimitSet:
    """A validated limit set.  ``origin`` is where it was read from."""

    name: str
    title: str
    version: str
    tests: tuple[str, ...]
    rules: tuple[Rule, ...]
    source: str = ""
    clause: str = ""
    edition: str = ""
    note: str = ""
    min_confidence: float = DEFAULT_MIN_CONFIDENCE
    origin: str = field(default="<text>", compare=False)
    kind: str = field(default="text", compare=False)  # preset, user, file, text
    text: str = field(default="", compare=False, repr=False)

    def applies_to(self, test: str) -> bool:
        return test in self.tests

    def summary(self) -> dict:
        """The ``limits`` object of the assessment JSON (see :func:`limits_summary`)."""
        return limits_summary(self)


@dataclass(frozen=True)
class Verdict:
    """``accept``, ``reject`` or ``review`` with one-line reasons and per-rule details."""

    result: str
    reasons: tuple[str, ...]
    details: tuple[dict, ...]

    def to_dict(self) -> dict:
        return {"result": self.result, "reasons": list(self.reasons),
                "details": [dict(d) for d in self.details]}


# --------------------------------------------------------------------------- parsing


class _Where:
    """Locates keys of a TOML text by line, for error messages."""

    _KEY = re.compile(r'^\s*("([^"]*)"|[A-Za-z0-9_-]+)\s*=')

    def __init__(self, text: str, origin: str):
        self.origin = origin
        self.lines: dict[tuple, int] = {}
        table: tuple = ()
        counts: dict[str, int] = {}
        for n, line in enumerate(text.splitlines(), 1):
            s = line.strip()
            if s.startswith("[["):
                name = s[2:].split("]]")[0].strip()
                counts[name] = counts.get(name, -1) + 1
                table = (name, counts[name])
                self.lines.setdefault(table, n)
            elif s.startswith("["):
                table = (s[1:].split("]")[0].strip(),)
                self.lines.setdefault(table, n)
            else:
                m = self._KEY.match(s)
                if m:
                    key = m.group(2) if m.group(2) is not None else m.group(1)
                    self.lines.setdefault(table + (key,), n)

    def fail(self, path: tuple, message: str) -> LimitsError:
        line = None
        for cut in range(len(path), 0, -1):
            line = self.lines.get(tuple(path[:cut]))
            if line is not None:
                break
        at = f" line {line}" if line else ""
        return LimitsError(f"limit set {self.origin}{at}: {message}")


def _parse_number(text: str) -> Fraction | None:
    """``"2.5"``, ``"3/32"``, ``"1-1/2"`` or ``"1 1/2"`` as an exact fraction."""
    text = text.strip()
    m = re.fullmatch(r"[-+]?(\d+(\.\d*)?|\.\d+)([eE][-+]?\d{1,3})?", text)
    if m:
        return Fraction(text)
    m = re.fullmatch(r"([-+]?)(?:(\d+)[- ])?(\d+)/(\d+)", text)
    if m:
        if int(m.group(4)) == 0:
            return None
        val = Fraction(int(m.group(3)), int(m.group(4))) + int(m.group(2) or 0)
        return -val if m.group(1) == "-" else val
    return None


class _Parser:
    def __init__(self, text: str, origin: str):
        self.where = _Where(text, origin)
        self.text = text

    def err(self, path: tuple, msg: str) -> LimitsError:
        return self.where.fail(path, msg)

    @staticmethod
    def _name(path: tuple, rule_id: str | None = None) -> str:
        key = path[-1]
        if path and path[0] == "rule":
            who = f"rule '{rule_id}'" if rule_id else f"rule {path[1] + 1}"
            return f"{who} key '{key}'"
        return f"key '{key}'"

    # scalar helpers ----------------------------------------------------------------
    def string(self, d: dict, key: str, path: tuple, *, required=False, default="",
               choices: Iterable[str] | None = None, label: str = "") -> str:
        if key not in d:
            if required:
                raise self.err(path[:-1] or path, f"missing key '{key}'{label}")
            return default
        val = d[key]
        if isinstance(val, bool) or not isinstance(val, (str, int, float)):
            raise self.err(path, f"{label or self._name(path)} must be text, not {type(val).__name__}")
        val = str(val)
        if choices is not None and val not in choices:
            raise self.err(path, f"{label or self._name(path)}: '{val}' is not one of {', '.join(choices)}")
        return val

    def strings(self, d: dict, key: str, path: tuple, *, choices, required=False,
                label: str = "") -> tuple[str, ...]:
        if key not in d:
            if required:
                raise self.err(path[:-1], f"missing key '{key}'{label}")
            return ()
        val = d[key]
        if isinstance(val, str):
            val = [val]
        if not isinstance(val, list) or not val or not all(isinstance(v, str) for v in val):
            raise self.err(path, f"{label or self._name(path)} must be a list of text such as "
                                 f"[\"{choices[0]}\"]")
        bad = [v for v in val if v not in choices]
        if bad:
            raise self.err(path, f"{label or self._name(path)}: '{bad[0]}' is not one of "
                                 f"{', '.join(choices)}")
        if len(set(val)) != len(val):
            raise self.err(path, f"{label or self._name(path)} lists a value twice")
        return tuple(val)

    def number(self, d: dict, key: str, path: tuple, *, lo: float, hi: float,
               label: str, integer=False) -> float | int | None:
        if key not in d:
            return None
        val = d[key]
        if isinstance(val, bool) or not isinstance(val, (int, float)) or (
                integer and not isinstance(val, int)):
            kind = "a whole number" if integer else "a number"
            raise self.err(path, f"{label} must be {kind}, not {val!r}")
        if not math.isfinite(val):
            raise self.err(path, f"{label} must be a finite number, not {val!r}")
        if val < 0:
            raise self.err(path, f"{label} must not be negative ({val!r})")
        if not (lo <= val <= hi):
            raise self.err(path, f"{label} must be between {lo:g} and {hi:g}, not {val!r}")
        return val

    def quantity(self, d: dict, key: str, path: tuple, *, units: tuple[str, ...],
                 label: str) -> Quantity | None:
        if key not in d:
            return None
        raw = d[key]
        printed = None
        printed_mm = None
        use = "safer"
        example = '"2 %"' if units == ("%",) else '"3 mm" or "1/8 in"'
        if isinstance(raw, dict):
            extra = set(raw) - {"value", "unit", "printed", "use"}
            if extra:
                raise self.err(path, f"{label}: unknown key '{sorted(extra)[0]}' "
                                     "(allowed: value, unit, printed, use)")
            if "value" not in raw:
                raise self.err(path, f"{label}: missing 'value'")
            value = raw["value"]
            if "unit" in raw:
                unit = raw["unit"]
                if not isinstance(unit, str):
                    raise self.err(path, f"{label}: 'unit' must be text such as \"mm\"")
                if isinstance(value, bool) or not isinstance(value, (int, float, str)):
                    raise self.err(path, f"{label}: 'value' must be a number")
                value = f"{value} {unit}"
            use = raw.get("use", "safer")
            if use not in ("safer", "stated", "printed"):
                raise self.err(path, f"{label}: 'use' must be safer, stated or printed, not {use!r}")
            if "printed" in raw:
                pq = self._quantity_text(raw["printed"], path, units=("mm",),
                                         label=f"{label} 'printed'", example='"2.5 mm"')
                printed, printed_mm = f"{pq[0]} mm", pq[1]
            elif use == "printed":
                raise self.err(path, f"{label}: use = \"printed\" needs a 'printed' value")
        else:
            value = raw
        stated, val, unit = self._quantity_text(value, path, units=units, label=label,
                                                example=example)
        if printed is not None and unit != "in":
            raise self.err(path, f"{label}: 'printed' is only for values stated in inches")
        if unit == "%" and val > 100:
            raise self.err(path, f"{label} must be at most 100 %, not {val:g} %")
        return Quantity(stated=stated, unit=unit, value=val, printed_mm=printed_mm,
                        printed=printed, use=use,
                        smaller_is_safer=_SMALLER_IS_SAFER.get(key, True))

    def _quantity_text(self, value, path, *, units, label, example):
        if isinstance(value, bool) or isinstance(value, (int, float)):
            raise self.err(path, f"{label}: missing unit in {value!r}; write it with its unit, "
                                 f"e.g. {example}")
        if not isinstance(value, str):
            raise self.err(path, f"{label} must be text with a unit, e.g. {example}")
        m = re.fullmatch(r"\s*(.*?)\s*([A-Za-z%][A-Za-z0-9%]*)?\s*", value)
        num_text, unit = m.group(1), m.group(2)
        if unit is None:
            raise self.err(path, f"{label}: missing unit in {value!r}; write e.g. {example}")
        if unit not in units:
            raise self.err(path, f"{label}: unit '{unit}' is not allowed here; use "
                                 f"{' or '.join(units)}, e.g. {example}")
        num = _parse_number(num_text)
        try:
            num = None if num is None else float(num)
        except OverflowError:
            num = None
        if num is None or not math.isfinite(num):
            raise self.err(path, f"{label}: {num_text!r} is not a number; write e.g. {example}")
        if num < 0:
            raise self.err(path, f"{label} must not be negative ({value!r})")
        return num_text, num, unit

    # structure ---------------------------------------------------------------------
    def limit_set(self, data: dict, *, origin: str) -> LimitSet:
        for key in data:
            if key not in _TOP_KEYS:
                raise self.err((key,), f"unknown key '{key}' (allowed: {', '.join(_TOP_KEYS)})")
        schema = self.string(data, "schema", ("schema",), required=True)
        if schema != SCHEMA:
            raise self.err(("schema",), f"schema must be \"{SCHEMA}\", not {schema!r}")
        name = self.string(data, "name", ("name",), required=True)
        if not _NAME_RE.match(name):
            raise self.err(("name",), f"name {name!r} must be 1-64 letters, digits, '.', '_' "
                                      "or '-', starting with a letter or digit")
        tests = self.strings(data, "tests", ("tests",), choices=TEST_TYPES, required=True,
                             label="key 'tests'")
        min_conf = self.number(data, "min_confidence", ("min_confidence",), lo=0, hi=1,
                               label="key 'min_confidence'")
        rules_raw = data.get("rule")
        if rules_raw is None:
            raise self.err((), "no [[rule]] tables: a limit set needs at least one rule")
        if not isinstance(rules_raw, list) or not all(isinstance(r, dict) for r in rules_raw):
            raise self.err(("rule",), "'rule' must be written as [[rule]] tables")
        if not rules_raw:
            raise self.err(("rule",), "no [[rule]] tables: a limit set needs at least one rule")
        rules = tuple(self.rule(r, i) for i, r in enumerate(rules_raw))
        ids = [r.id for r in rules]
        for i, rid in enumerate(ids):
            if rid in ids[:i]:
                raise self.err(("rule", i, "id"), f"rule id '{rid}' is used twice; ids must differ")
        if sum(r.check == "corner" for r in rules) > 1:
            raise self.err(("rule",), "more than one corner rule; write one corner rule per set")
        return LimitSet(
            name=name,
            title=self.string(data, "title", ("title",), default=name),
            version=self.string(data, "version", ("version",), default="1"),
            tests=tests,
            rules=rules,
            source=self.string(data, "source", ("source",)),
            clause=self.string(data, "clause", ("clause",)),
            edition=self.string(data, "edition", ("edition",)),
            note=self.string(data, "note", ("note",)),
            min_confidence=DEFAULT_MIN_CONFIDENCE if min_conf is None else float(min_conf),
            origin=origin,
            text=self.text,
        )

    def rule(self, r: dict, i: int) -> Rule:
        p = ("rule", i)
        rid = r.get("id")
        if not isinstance(rid, str) or not _NAME_RE.match(rid):
            if "id" not in r:
                raise self.err(p, f"rule {i + 1}: missing key 'id' (a short name such as \"pore-size\")")
            raise self.err(p + ("id",), f"rule {i + 1}: id {rid!r} must be a short name of "
                                        "letters, digits, '.', '_' or '-'")
        who = f"rule '{rid}'"
        check = self.string(r, "check", p + ("check",), required=True, choices=CHECKS,
                            label=f" in {who}" if "check" not in r else f"{who} key 'check'")
        allowed = _COMMON_RULE_KEYS + _CHECK_KEYS[check]
        for key in r:
            if key not in allowed:
                raise self.err(p + (key,), f"{who}: unknown key '{key}' for a {check} rule "
                                           f"(allowed: {', '.join(allowed)})")

        def lab(key):
            return f"{who} key '{key}'"

        kinds = self.strings(r, "kinds", p + ("kinds",), choices=_KIND_CHOICES, required=True,
                             label=lab("kinds") if "kinds" in r else f" in {who}")
        measure = self.string(r, "measure", p + ("measure",), default="greatest",
                              choices=tuple(MEASURES), label=lab("measure"))
        length = ("mm", "in")

        def q(key, units=length):
            return self.quantity(r, key, p + (key,), units=units, label=lab(key))

        fields: dict[str, Any] = dict(
            id=rid, check=check, kinds=kinds, measure=measure,
            clause=self.string(r, "clause", p + ("clause",), label=lab("clause")),
            confidence=self.string(r, "confidence", p + ("confidence",), default="user",
                                   choices=CONFIDENCES, label=lab("confidence")),
            note=self.string(r, "note", p + ("note",), label=lab("note")),
            outcome=self.string(r, "outcome", p + ("outcome",), default="reject",
                                choices=OUTCOMES, label=lab("outcome")),
            where=self.where_filter(r, p, who),
            min_size=q("min_size"),
            line=self.where.lines.get(p),
        )
        need = []
        if check in ("max_size", "max_sum"):
            fields["max"] = q("max")
            fields["max_fraction"] = self.number(r, "max_fraction", p + ("max_fraction",),
                                                 lo=0, hi=10, label=lab("max_fraction"))
            if fields["max_fraction"] == 0:
                raise self.err(p + ("max_fraction",), f"{lab('max_fraction')} must be more than 0")
            fields["of"] = self.string(r, "of", p + ("of",), default=None, choices=NOMINALS,
                                       label=lab("of"))
            if fields["max"] is None and fields["max_fraction"] is None:
                raise self.err(p, f"{who}: a {check} rule needs 'max' (e.g. \"3 mm\") "
                                  "and/or 'max_fraction' with 'of'")
            if (fields["max_fraction"] is None) != (fields["of"] is None):
                raise self.err(p + ("max_fraction" if "max_fraction" in r else "of",),
                               f"{who}: 'max_fraction' and 'of' go together "
                               f"(e.g. max_fraction = 0.5 and of = \"wall\")")
            if check == "max_sum":
                fields["window"] = q("window")
                if fields["window"] is not None and fields["window"].mm <= 0:
                    raise self.err(p + ("window",), f"{lab('window')} must be more than 0 mm")
                fields["short_fraction"] = self.number(r, "short_fraction", p + ("short_fraction",),
                                                       lo=0, hi=1, label=lab("short_fraction"))
                if fields["short_fraction"] is not None and fields["window"] is None:
                    raise self.err(p + ("short_fraction",), f"{who}: 'short_fraction' needs a 'window'")
        elif check == "max_count":
            fields["max_count"] = self.number(r, "max_count", p + ("max_count",), lo=0, hi=1e9,
                                              label=lab("max_count"), integer=True)
            need = ["max_count"]
        elif check == "max_area":
            fields["max"] = q("max", ("%",))
            need = ["max"]
        elif check == "min_separation":
            fields["min"] = q("min")
            need = ["min"]
        elif check == "band_sum":
            fields.update(above=q("above"), up_to=q("up_to"), max=q("max"))
            need = ["above", "up_to", "max"]
        elif check == "corner":
            fields["edge_within"] = q("edge_within")
            fields["ignore_up_to"] = q("ignore_up_to")
            fields["ignore_below"] = q("ignore_below")
            if "ignore_any_size" in r and not isinstance(r["ignore_any_size"], bool):
                raise self.err(p + ("ignore_any_size",), f"{lab('ignore_any_size')} must be true or false")
            fields["ignore_any_size"] = bool(r.get("ignore_any_size", False))
            modes = [k for k in ("ignore_up_to", "ignore_below") if fields[k] is not None]
            modes += ["ignore_any_size"] if fields["ignore_any_size"] else []
            if len(modes) != 1:
                raise self.err(p, f"{who}: a corner rule needs exactly one of ignore_up_to, "
                                  "ignore_below or ignore_any_size = true")
            fields["beyond"] = self.string(r, "beyond", p + ("beyond",), default="count",
                                           choices=("count", "retest"), label=lab("beyond"))
            if fields["ignore_any_size"] and "beyond" in r:
                raise self.err(p + ("beyond",), f"{who}: 'beyond' has no meaning with ignore_any_size")
            fields["unless_cause"] = self.strings(r, "unless_cause", p + ("unless_cause",),
                                                  choices=CAUSES, label=lab("unless_cause"))
        for key in need:
            if fields.get(key) is None:
                raise self.err(p, f"{who}: a {check} rule needs key '{key}'")
        if check == "band_sum" and fields["up_to"].mm <= fields["above"].mm:
            raise self.err(p + ("up_to",), f"{lab('up_to')} must be larger than 'above'")
        return Rule(**fields)

    def where_filter(self, r: dict, p: tuple, who: str) -> tuple:
        if "where" not in r:
            return ()
        w = r["where"]
        path = p + ("where",)
        if not isinstance(w, dict):
            raise self.err(path, f"{who} key 'where' must be a table such as {{ at_root = true }}")
        out = []
        for key in sorted(w):
            val = w[key]
            if key == "at_root":
                if not isinstance(val, bool):
                    raise self.err(path, f"{who} where.at_root must be true or false")
                out.append((key, val))
            elif key in ("cause", "iso6520"):
                if isinstance(val, str):
                    val = [val]
                if not isinstance(val, list) or not val or not all(isinstance(v, str) for v in val):
                    raise self.err(path, f"{who} where.{key} must be a list of text")
                if key == "cause" and any(v not in CAUSES + ("",) for v in val):
                    raise self.err(path, f"{who} where.cause: use {', '.join(CAUSES)}")
                out.append((key, tuple(val)))
            else:
                raise self.err(path, f"{who}: unknown key 'where.{key}' (allowed: at_root, cause, iso6520)")
        return tuple(out)


def parse_limit_set(text: str, *, origin: str = "<text>") -> LimitSet:
    """Parse and validate a limit set from TOML text.

    Parameters
    ----------
    text : str
        The TOML text (schema ``surfaces.limits/1``).
    origin : str, keyword-only
        Shown in error messages (a file path, ``<page>``...).

    Raises
    ------
    LimitsError
        With a one-line message naming the key and the line.
    """
    if not isinstance(text, str):
        raise LimitsError(f"limit set {origin}: expected TOML text, not {type(text).__name__}")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise LimitsError(f"limit set {origin}: not valid TOML: {exc}") from None
    except (ValueError, RecursionError) as exc:  # e.g. absurd nesting
        raise LimitsError(f"limit set {origin}: not valid TOML: {exc}") from None
    parser = _Parser(text, origin)
    try:
        return parser.limit_set(data, origin=origin)
    except LimitsError:
        raise
    except (TypeError, ValueError, AttributeError, KeyError, IndexError, RecursionError) as exc:
        raise LimitsError(f"limit set {origin}: cannot read it ({exc}); check the file "
                          "against 'surfaces limits show' of a preset") from None


# --------------------------------------------------------------------------- writing


def _toml_scalar(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_scalar(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_scalar(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def to_toml(limit_set: LimitSet) -> str:
    """The limit set as TOML text that :func:`parse_limit_set` reads back equal."""
    ls = limit_set
    lines = [f"# {ls.title}", "# Written by surfaces; check every value against the edition in force.", ""]
    top = {"schema": SCHEMA, "name": ls.name, "title": ls.title, "version": ls.version,
           "tests": list(ls.tests), "source": ls.source, "clause": ls.clause,
           "edition": ls.edition, "note": ls.note}
    for k, v in top.items():
        if v != "" or k in ("schema", "name"):
            lines.append(f"{k} = {_toml_scalar(v)}")
    if ls.min_confidence != DEFAULT_MIN_CONFIDENCE:
        lines.append(f"min_confidence = {_toml_scalar(float(ls.min_confidence))}")
    for rule in ls.rules:
        lines += ["", "[[rule]]"]
        lines += [f"{k} = {_toml_scalar(v)}" for k, v in rule.to_toml_dict().items()]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------- files


def user_folder() -> Path:
    """``$SURFACES_HOME/limits`` or ``~/.local/share/surfaces/limits``."""
    home = os.environ.get("SURFACES_HOME")
    if home:
        return Path(home).expanduser() / "limits"
    return Path.home() / ".local" / "share" / "surfaces" / "limits"


def _read_file(path: Path, *, kind: str) -> LimitSet:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise LimitsError(f"limit set file {path} not found: check the path or run "
                          "'surfaces limits list'") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise LimitsError(f"limit set file {path} cannot be read: {exc}") from None
    ls = parse_limit_set(text, origin=str(path))
    return replace(ls, kind=kind)


def read_limit_file(path: str | Path) -> LimitSet:
    """Read and validate one limit file, whatever its name."""
    return _read_file(Path(path).expanduser(), kind="file")


def list_presets() -> list[LimitSet]:
    """All shipped presets, sorted by name."""
    out = [_read_file(p, kind="preset") for p in sorted(PRESET_DIR.glob("*.toml"))]
    return sorted(out, key=lambda s: s.name)


def list_user_sets(*, folder: Path | None = None) -> list[LimitSet]:
    """The user's own sets; unreadable files are skipped by ``list`` (``check`` names the fault)."""
    folder = Path(folder) if folder else user_folder()
    out = []
    for p in sorted(folder.glob("*.toml")) if folder.is_dir() else []:
        try:
            out.append(_read_file(p, kind="user"))
        except LimitsError:
            continue
    return out


def _preset_names() -> list[str]:
    return sorted(p.stem for p in PRESET_DIR.glob("*.toml"))


def load_limit_set(name_or_path: str, *, folder: Path | None = None) -> LimitSet:
    """A preset by name, a user set by name, or a ``.toml`` file by path."""
    text = str(name_or_path)
    looks_like_path = text.endswith(".toml") or os.sep in text or "/" in text
    if not looks_like_path:
        preset = PRESET_DIR / f"{text}.toml"
        if _NAME_RE.match(text) and preset.is_file():
            return _read_file(preset, kind="preset")
        user = (Path(folder) if folder else user_folder()) / f"{text}.toml"
        if _NAME_RE.match(text) and user.is_file():
            return _read_file(user, kind="user")
        raise LimitsError(f"no limit set named {text!r}: run 'surfaces limits list' "
                          f"(presets: {', '.join(_preset_names())}) or give a .toml path")
    return _read_file(Path(text).expanduser(), kind="file")


def _renamed_text(text: str, new_name: str, old: LimitSet) -> str | None:
    """Change only the top-level ``name`` line, keeping the comments."""
    pat = re.compile(r'^(name\s*=\s*)(["\']).*?\2[ \t]*(#.*)?$', re.M)
    m = pat.search(text)
    if not m or re.search(r"^\s*\[", text[: m.start()], re.M):
        return None
    head = (f"# Your copy of '{old.name}' (version {old.version}). Set confidence = \"user\" "
            "on every rule you change.\n")
    new = head + text[: m.start()] + f"{m.group(1)}{json.dumps(new_name)}" + text[m.end():]
    tpat = re.compile(r'^(title\s*=\s*)"([^"\\]*)"[ \t]*(#.*)?$', re.M)
    t = tpat.search(new)
    if t and not re.search(r"^\s*\[", new[: t.start()], re.M):
        title = f"{t.group(2)} (copy '{new_name}')"
        new = new[: t.start()] + f"{t.group(1)}{json.dumps(title)}" + new[t.end():]
        old = replace(old, title=title)
    try:
        if replace(parse_limit_set(new), name=old.name) != old:
            return None
    except LimitsError:
        return None
    return new


def _atomic_write(path: Path, text: str, *, force: bool) -> Path:
    """Write via :mod:`surfaces.atomic`, creating the user folder when needed."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LimitsError(f"cannot create folder {path.parent} ({exc.strerror}): choose another folder") from None
    return write_text_atomic(path, text, force=force)


def save_user_set(limit_set: LimitSet, name: str, *, folder: Path | None = None,
                  force: bool = False, path: Path | None = None) -> Path:
    """Save ``limit_set`` under ``name`` in the user folder (or at ``path``).

    Keeps the comments of the original text when only the name changes.
    Refuses a preset's name and an existing file unless ``force``.
    """
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise LimitsError(f"set name {name!r} must be 1-64 letters, digits, '.', '_' or '-' "
                          "(no folders), starting with a letter or digit")
    if name in _preset_names():
        raise LimitsError(f"'{name}' is the name of a preset: choose another name for your own set")
    text = None
    if limit_set.text:
        try:
            if parse_limit_set(limit_set.text) == limit_set:
                text = _renamed_text(limit_set.text, name, limit_set)
        except LimitsError:
            text = None
    if text is None:
        text = to_toml(replace(limit_set, name=name))
    parse_limit_set(text, origin=name)  # never write a file that cannot be read back
    target = Path(path) if path else (Path(folder) if folder else user_folder()) / f"{name}.toml"
    return _atomic_write(target, text, force=force)


_DEFAULTS = {
    "fillet-break": "aws-d1.1-fillet-break",
    "nick-break": "api-1104-break",
    "bend": "aws-d1.1-bend",
}


def default_preset_for(test: str) -> str:
    """Name of the preset used when the user chose none."""
    if test not in _DEFAULTS:
        raise LimitsError(f"unknown test type {test!r}: use one of {', '.join(TEST_TYPES)}")
    return _DEFAULTS[test]


def limits_summary(limit_set: LimitSet) -> dict:
    """The ``limits`` object of the assessment JSON."""
    ls = limit_set
    return {
        "name": ls.name, "title": ls.title, "version": ls.version, "tests": list(ls.tests),
        "source": ls.source, "clause": ls.clause, "edition": ls.edition, "note": ls.note,
        "origin": ls.kind if ls.kind == "preset" else ls.origin,
        "min_confidence": ls.min_confidence, "coverage_k": COVERAGE_K,
        "rules": [{"id": r.id, "check": r.check, "kinds": list(r.kinds), "limit": r.limit_label(),
                   "clause": r.clause, "confidence": r.confidence, "outcome": r.outcome}
                  for r in ls.rules],
    }


# --------------------------------------------------------------------------- judging


def _num(v) -> float:
    if v is None or isinstance(v, bool):
        return math.nan
    try:
        f = float(v)
    except (TypeError, ValueError):
        return math.nan
    return f


def _text(v) -> str:
    """A table cell as text; empty for None/NaN, ``2011`` for 2011.0."""
    if v is None:
        return ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return str(int(v)) if v == int(v) else str(v)
    try:
        if pd.isna(v):
            return ""
    except (TypeError, ValueError):
        pass
    return str(v).strip()


def _flag(v) -> bool | None:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return None
    if isinstance(v, str):
        return v.strip().lower() in ("true", "1", "yes")
    try:
        return bool(v)
    except (TypeError, ValueError):
        return None


@dataclass
class _Item:
    id: int
    kind: str
    row: dict
    confident: bool
    conf: float
    reviewed: bool = False  # a person confirmed or edited it, or added it by hand

    def value(self, measure: str) -> tuple[float, float, bool]:
        """(value, expanded U, uncertainty known) for a measure or ``area``."""
        col, ucol = ("area_mm2", "area_u_mm2") if measure == "area" else MEASURES[measure]
        v = _num(self.row.get(col))
        u = _num(self.row.get(ucol))
        known = math.isfinite(u) and u >= 0
        return v, (COVERAGE_K * u if known else 0.0), known

    def label(self) -> str:
        return f"{self.kind} {self.id}"


def _items_label(items: list[_Item]) -> str:
    kinds: dict[str, list[int]] = {}
    for it in items:
        kinds.setdefault(it.kind, []).append(it.id)
    return "; ".join(f"{k} {', '.join(map(str, ids))}" for k, ids in kinds.items()) or "none"


@dataclass
class _Ctx:
    ls: LimitSet
    nominal: dict
    face: dict
    corner: Rule | None
    unknown_cols: set = field(default_factory=set)


@dataclass
class _Out:
    status: str = "pass"  # pass, fail, review
    reasons: list = field(default_factory=list)
    value: float | None = None
    u: float | None = None
    limit_mm: float | None = None
    items: list = field(default_factory=list)

    def add(self, status: str, reason: str):
        order = {"pass": 0, "review": 1, "fail": 2}
        if order[status] > order[self.status]:
            self.status = status
        self.reasons.append((status, reason))


def _table_items(table: pd.DataFrame, ls: LimitSet) -> tuple[list[_Item], int, list[str]]:
    if not isinstance(table, pd.DataFrame):
        raise LimitsError(f"the imperfection table must be a pandas DataFrame, not {type(table).__name__}")
    notes = []
    if len(table) and "kind" not in table.columns:
        raise LimitsError("the imperfection table has no 'kind' column: it cannot be judged")
    items, dismissed, seen = [], 0, set()
    if table.columns.duplicated().any():
        dup = table.columns[table.columns.duplicated()][0]
        raise LimitsError(f"the imperfection table has the column {dup!r} twice: keep one")
    cols = [str(c) for c in table.columns]
    # column-wise tolist() is much faster than to_dict("records") and gives Python scalars
    records = [dict(zip(cols, vals)) for vals in zip(*(table[c].tolist() for c in table.columns))]
    for n, row in enumerate(records):
        status = _text(row.get("status")).lower() or "auto"
        if status == "dismissed":
            dismissed += 1
            continue
        ident = _num(row.get("id"))
        if not math.isfinite(ident) or ident != int(ident):
            raise LimitsError(f"imperfection on table row {n + 1} has no whole-number id: give it one")
        ident = int(ident)
        if ident in seen:
            raise LimitsError(f"imperfection id {ident} appears twice: ids must be unique")
        seen.add(ident)
        kind = _text(row.get("kind")).lower()
        if kind not in KINDS:
            raise LimitsError(f"imperfection {ident} has kind {row.get('kind')!r}: use one of {', '.join(KINDS)}")
        conf = _num(row.get("confidence"))
        reviewed = status in ("confirmed", "edited") or _text(row.get("source")) == "manual"
        confident = reviewed or not math.isfinite(conf) or conf >= ls.min_confidence
        items.append(_Item(id=ident, kind=kind, row=row, confident=confident, conf=conf, reviewed=reviewed))
    items.sort(key=lambda it: it.id)
    return items, dismissed, notes


def _takes_kind(rule: Rule, kind: str) -> bool:
    return "any" in rule.kinds or kind in rule.kinds


def _matches(rule: Rule, item: _Item) -> bool:
    if not _takes_kind(rule, item.kind):
        return False
    for key, want in rule.where:
        if key == "at_root":
            got = _flag(item.row.get("at_root"))
            if got is None:  # unknown: count it where it would be stricter
                got = want
            if got != want:
                return False
        elif key == "cause":
            if _text(item.row.get("cause")) not in want:
                return False
        elif key == "iso6520":
            if _text(item.row.get("iso6520")) not in want:
                return False
    return True


def _in_corner_zone(corner: Rule, item: _Item) -> bool:
    if corner.edge_within is not None:
        d = _num(item.row.get("dist_edge_mm"))
        if math.isfinite(d):
            return d <= corner.edge_within.mm
    return bool(_flag(item.row.get("at_edge")))


def _corner_state(corner: Rule | None, item: _Item) -> str:
    """``none`` (not a corner case), ``ignored``, ``maybe``, ``counted`` or ``retest``."""
    if corner is None or not _matches(corner, item) or not _in_corner_zone(corner, item):
        return "none"
    if _text(item.row.get("cause")) in corner.unless_cause:
        return "none"
    if corner.ignore_any_size:
        return "ignored"
    v, U, _ = item.value(corner.measure)
    if not math.isfinite(v):
        return "maybe" if corner.beyond == "count" else "retest"
    if corner.ignore_up_to is not None:
        s = corner.ignore_up_to.mm
        surely_in, surely_out = v + U <= s, v - U > s
    else:
        s = corner.ignore_below.mm
        surely_in, surely_out = v + U < s, v - U >= s
    if surely_in:
        return "ignored"
    if corner.beyond == "retest":
        return "retest"
    return "counted" if surely_out else "maybe"


def _members(rule: Rule, items: list[_Item], ctx: _Ctx) -> tuple[list[_Item], list[_Item], dict]:
    """Items that could count (``possible``) and that surely count (``sure``)."""
    possible, sure, why = [], [], {}
    for it in items:
        if not _matches(rule, it):
            continue
        reasons = []
        if rule.check != "corner":
            state = _corner_state(ctx.corner, it)
            if state in ("ignored", "retest"):
                continue
            if state == "maybe":
                reasons.append("near the corner size limit")
        if rule.min_size is not None:
            v, U, _ = it.value(rule.measure)
            if math.isfinite(v):
                if v + U < rule.min_size.mm:
                    continue
                if v - U < rule.min_size.mm:
                    reasons.append(f"within its uncertainty of the smallest size that counts "
                                   f"({rule.min_size.label()})")
            else:
                reasons.append(f"{MEASURES[rule.measure][0]} unknown")
        if not it.confident:
            reasons.append(f"confidence {it.conf:.2f} below {ctx.ls.min_confidence:.2f}: "
                           "confirm or dismiss it")
        possible.append(it)
        if not reasons:
            sure.append(it)
        why[it.id] = reasons
    return possible, sure, why


def _limit(rule: Rule, ctx: _Ctx) -> tuple[float | None, float | None, str | None]:
    """(limit, upper bound of the limit, missing nominal key)."""
    cap = rule.max.mm if rule.max is not None else None
    if rule.max_fraction is None:
        return cap, cap, None
    key = f"{rule.of}_mm"
    nom = _num(ctx.nominal.get(key))
    if not (math.isfinite(nom) and nom > 0):
        return None, cap, key
    frac = rule.max_fraction * nom
    return (frac if cap is None else min(frac, cap)), cap, None


def _limit_text(rule: Rule, ctx: _Ctx, limit: float | None) -> str:
    if rule.max_fraction is None:
        return rule.max.label()
    if limit is None:
        return rule.bound_text()
    nom = _num(ctx.nominal.get(f"{rule.of}_mm"))
    return f"{rule.bound_text()} = {_fmt(limit, 3)} mm for {rule.of} {_fmt(nom, 3)} mm"


_DIM_WORDS = {"thickness": "plate thickness", "throat": "throat", "wall": "wall thickness",
              "length": "weld length"}


def _missing_dim(key: str) -> str:
    dim = key[:-3]
    return f"the limit needs the nominal {_DIM_WORDS.get(dim, dim)}: enter {key} (--{dim}-mm)"


def _uncertain_tail(unknown: bool, col: str) -> str:
    return f" (uncertainty unknown: {col} missing; measure it or review by hand)" if unknown else ""


def _eval_not_permitted(rule, possible, sure, why, ctx, out):
    where = "".join(f" {'at' if v else 'not at'} the root" for k, v in rule.where if k == "at_root")
    for it in possible:
        if it in sure:
            out.add("fail", f"{rule.id}: {it.label()}{where}: not permitted")
        else:
            out.add("review", f"{rule.id}: {it.label()}{where}: not permitted, but "
                              f"{'; '.join(why[it.id])}")
    out.items = [it.id for it in possible]


def _eval_max_size(rule, possible, sure, why, ctx, out):
    col = MEASURES[rule.measure][0]
    limit, cap, missing = _limit(rule, ctx)
    out.limit_mm = limit
    ucol = MEASURES[rule.measure][1]
    for it in possible:
        v, U, known = it.value(rule.measure)
        head = f"{rule.id}: {it.label()}: {rule.measure} "
        if not math.isfinite(v):
            out.add("review", f"{head}unknown ({col} missing): measure it")
            continue
        lim = limit if limit is not None else cap
        meas = f"{_fmt_near(v, lim)} +/- {_fmt(U)} mm"
        if lim is not None and v - U > lim:
            text = f"{head}{meas} > {_limit_text(rule, ctx, limit) if limit is not None else rule.max.label()}"
            if it in sure and known:
                out.add("fail", text)
            else:
                more = why[it.id] + ([] if known else [f"uncertainty unknown ({ucol} missing)"])
                out.add("review", f"{text}, but {'; '.join(more)}")
        elif limit is None:
            out.add("review", f"{head}{meas}: {_missing_dim(missing)}")
        elif v + U > limit:
            out.add("review", f"{head}{meas} is within its uncertainty of "
                              f"{_limit_text(rule, ctx, limit)}")
        elif not known:
            out.add("review", f"{head}{_fmt_near(v, limit)} mm <= {_limit_text(rule, ctx, limit)}"
                              f"{_uncertain_tail(True, ucol)}")
        out.items.append(it.id)


def _sum(items: list[_Item], measure: str, clip: float | None = None,
         weights: dict | None = None):
    """(sum, expanded U by root-sum-square, all uncertainties known)."""
    vals, us, known = [], [], True
    for it in items:
        v, U, k = it.value(measure)
        w = 1.0 if weights is None else weights[it.id]
        vals.append(w * (min(v, clip) if clip is not None else v))
        us.append(w * U)
        known &= k
    return math.fsum(vals), math.sqrt(math.fsum(u * u for u in us)), known


def _compare_word(value: float, limit: float) -> str:
    return ">" if value > limit else "is within its uncertainty of"


def _low_tail(pos: list[_Item], sur: list[_Item], why: dict) -> str:
    """Why some counted imperfections do not surely count (low confidence, thresholds)."""
    low = [it for it in pos if it not in sur]
    if not low:
        return ""
    words = sorted({w for it in low for w in why.get(it.id, [])}) or [
        "within their uncertainty of a threshold of the rule"]
    return f", counting {_items_label(low)} ({'; '.join(words)})"


def _decide_upper(rule, out, *, lo, lo_known, hi, limit, text_fail, text_review, text_unknown):
    """Shared logic of the sum-like rules: fail on the lower bound, pass on the upper."""
    if lo > limit:
        if lo_known:
            out.add("fail", text_fail)
        else:
            out.add("review", text_fail + text_unknown)
    elif hi > limit:
        out.add("review", text_review)
    elif text_unknown:
        out.add("review", f"{rule.id}: the result rests on values{text_unknown}")


def _windows(items: list[_Item], L: float, measure: str) -> list[tuple[float, list[_Item], dict]]:
    """Every window ``[s, s + L]`` along the weld where the sum can peak.

    Lengths along the weld (``along``) count with the part inside the window;
    other measures count whole when the imperfection reaches into the window
    (the stricter reading).  Both are piecewise linear in ``s``, so the
    maximum is at a window edge meeting an imperfection's end.
    """
    spans = []
    for it in items:
        x0, x1 = _num(it.row.get("x0_mm")), _num(it.row.get("x1_mm"))
        if not (math.isfinite(x0) and math.isfinite(x1)):
            return []
        spans.append((min(x0, x1), max(x0, x1), it))
    starts = sorted({v for a, b, _ in spans for v in (a, b, a - L, b - L)})
    out = []
    for s in starts:
        inside, weights = [], {}
        for a, b, it in spans:
            if b < s or a > s + L:
                continue
            if measure == "along" and b > a:
                weights[it.id] = max(0.0, min(b, s + L) - max(a, s)) / (b - a)
            else:
                weights[it.id] = 1.0
            inside.append(it)
        out.append((s, inside, weights))
    return out


def _eval_max_sum(rule, possible, sure, why, ctx, out, *, band=False):
    measure = rule.measure
    if band:
        lo_t, hi_t = rule.above.mm, rule.up_to.mm
        limit, missing = rule.max.mm, None

        def in_band(items, surely):
            res = []
            for it in items:
                v, U, _ = it.value(measure)
                if not math.isfinite(v) or (v - U > lo_t if surely else v + U > lo_t):
                    res.append(it)
            return res
        possible = in_band(possible, False)
        sure = in_band(sure, True)
        clip = hi_t
        what = f"sum of {measure} over {rule.above.label()}"
        lim_text = rule.max.label()
    else:
        limit, cap, missing = _limit(rule, ctx)
        clip = None
        what = f"sum of {measure}"
        lim_text = _limit_text(rule, ctx, limit)
        if rule.short_fraction is not None and limit is not None:
            weld = _num(ctx.nominal.get("length_mm"))
            if not (math.isfinite(weld) and weld > 0):
                weld = _num(ctx.face.get("length_mm"))
            if not (math.isfinite(weld) and weld > 0):
                if possible:
                    out.add("review", f"{rule.id}: the weld length is unknown, so the short-weld "
                                      f"limit cannot be applied: {_missing_dim('length_mm')}")
                return
            if weld < rule.window.mm and rule.short_fraction * weld < limit:
                limit = rule.short_fraction * weld
                lim_text = (f"{_fmt(rule.short_fraction * 100)} % of the {_fmt(weld, 3)} mm weld "
                            f"({_fmt(limit, 3)} mm)")
    col, ucol = MEASURES[measure]
    out.items = [it.id for it in possible]
    if not possible:
        return
    nan = [it for it in possible if not math.isfinite(it.value(measure)[0])]
    if nan:
        out.add("review", f"{rule.id}: {_items_label(nan)}: {col} unknown: measure it")
        return
    if rule.window is not None:
        L = rule.window.mm
        wp, ws = _windows(possible, L, measure), _windows(sure, L, measure)
        if not wp:
            out.add("review", f"{rule.id}: the window sum needs x0_mm and x1_mm of each imperfection")
            return
        best_p = max(wp, key=lambda w: sum(_sum(w[1], measure, clip, w[2])[:2]))

        def low(w):
            S, U, _ = _sum(w[1], measure, clip, w[2])
            return S - U
        best_s = max(ws, key=low, default=(None, [], {}))
        groups = [(best_p[0], best_s[0], best_p[1], best_s[1], best_p[2], best_s[2])]
    else:
        groups = [(None, None, possible, sure, None, None)]
    for start, start_s, pos, sur, w_pos, w_sur in groups:
        S_hi, U_hi, k_hi = _sum(pos, measure, clip, w_pos)
        S_lo, U_lo, k_lo = _sum(sur, measure, clip, w_sur)
        hi, lo = S_hi + U_hi, (S_lo - U_lo) if sur else -math.inf
        out.value, out.u = S_hi, U_hi
        def in_window(x0):
            return f" in the {rule.window.label()} window from x = {_fmt(x0)} mm" if x0 is not None else ""
        win, win_s = in_window(start), in_window(start_s)
        if limit is None:
            if cap is not None and lo > cap:
                _decide_upper(rule, out, lo=lo, lo_known=k_lo, hi=hi, limit=cap,
                              text_fail=f"{rule.id}: {_items_label(sur)}{win_s}: {what} "
                                        f"{_fmt_near(S_lo, cap)} +/- {_fmt(U_lo)} mm > {rule.max.label()}",
                              text_review="", text_unknown=_uncertain_tail(not k_lo, ucol))
            else:
                out.add("review", f"{rule.id}: {_items_label(pos)}{win}: {what} {_fmt(S_hi)} "
                                  f"+/- {_fmt(U_hi)} mm: {_missing_dim(missing)}")
            return
        out.limit_mm = limit
        _decide_upper(
            rule, out, lo=lo, lo_known=k_lo, hi=hi, limit=limit,
            text_fail=f"{rule.id}: {_items_label(sur)}{win_s}: {what} {_fmt_near(S_lo, limit)} +/- {_fmt(U_lo)} mm "
                      f"> {lim_text}",
            text_review=f"{rule.id}: {_items_label(pos)}{win}: {what} {_fmt_near(S_hi, limit)} +/- {_fmt(U_hi)} mm "
                        f"{_compare_word(S_hi, limit)} {lim_text}{_low_tail(pos, sur, why)}",
            text_unknown=_uncertain_tail(not k_hi, ucol))


def _eval_max_area(rule, possible, sure, why, ctx, out):
    out.items = [it.id for it in possible]
    if not possible:
        return
    area = _num(ctx.face.get("area_mm2"))
    nan = [it for it in possible if not math.isfinite(it.value("area")[0])]
    if nan:
        out.add("review", f"{rule.id}: {_items_label(nan)}: area_mm2 unknown: measure it")
        return
    if not (math.isfinite(area) and area > 0):
        out.add("review", f"{rule.id}: {_items_label(possible)}: the face area is unknown, so the "
                          f"area percentage cannot be judged: outline the face")
        return
    S_hi, U_hi, k_hi = _sum(possible, "area")
    S_lo, U_lo, k_lo = _sum(sure, "area")

    def pct(x: float) -> float:
        return x * 100.0 / area

    limit = rule.max.value
    out.value, out.u, out.limit_mm = pct(S_hi), pct(U_hi), limit

    def text(items, S, U):
        return (f"{rule.id}: {_items_label(items)}: total area {_fmt_near(pct(S), limit)} +/- {_fmt(pct(U))} % "
                f"of the face ({_fmt(S)} of {_fmt(area)} mm2)")
    hi, lo = pct(S_hi + U_hi), (pct(S_lo - U_lo) if sure else -math.inf)
    _decide_upper(rule, out, lo=lo, lo_known=k_lo, hi=hi, limit=limit,
                  text_fail=text(sure, S_lo, U_lo) + f" > {rule.max.label()}",
                  text_review=text(possible, S_hi, U_hi) + f" {_compare_word(pct(S_hi), limit)} "
                              f"{rule.max.label()}{_low_tail(possible, sure, why)}",
                  text_unknown=_uncertain_tail(not k_hi, "area_u_mm2"))


def _gap(a: _Item, b: _Item) -> tuple[float, float, bool]:
    a0, a1 = _num(a.row.get("x0_mm")), _num(a.row.get("x1_mm"))
    b0, b1 = _num(b.row.get("x0_mm")), _num(b.row.get("x1_mm"))
    gap = max(0.0, b0 - a1, a0 - b1)
    _, ua, ka = a.value("along")
    _, ub, kb = b.value("along")
    return gap, math.sqrt((ua * ua + ub * ub) / 2.0), ka and kb


def _eval_min_separation(rule, possible, sure, why, ctx, out):
    out.items = [it.id for it in possible]
    need = rule.min.mm
    out.limit_mm = need
    if len(possible) < 2:
        return
    bad = [it for it in possible
           if not (math.isfinite(_num(it.row.get("x0_mm"))) and math.isfinite(_num(it.row.get("x1_mm"))))]
    if bad:
        out.add("review", f"{rule.id}: {_items_label(bad)}: x0_mm/x1_mm unknown, separation "
                          "cannot be judged")
        return
    for i, a in enumerate(possible):
        for b in possible[i + 1:]:
            g, U, known = _gap(a, b)
            text = f"{rule.id}: {a.label()} and {b.label()}: {_fmt_near(g, need)} +/- {_fmt(U)} mm apart"
            if g + U < need:
                if a in sure and b in sure and known:
                    out.add("fail", f"{text} < {rule.min.label()}")
                else:
                    more = why[a.id] + why[b.id] + ([] if known else ["uncertainty unknown (along_u_mm missing)"])
                    out.add("review", f"{text} < {rule.min.label()}, but {'; '.join(more)}")
            elif g - U < need:
                out.add("review", f"{text} is within its uncertainty of {rule.min.label()}")
            elif not known:
                out.add("review", f"{text} >= {rule.min.label()}{_uncertain_tail(True, 'along_u_mm')}")


def _eval_corner(rule, possible, sure, why, ctx, out):
    for it in possible:
        state = _corner_state(rule, it)
        if state == "none":
            continue
        v, U, known = it.value(rule.measure)
        meas = f"{rule.measure} {_fmt(v)} +/- {_fmt(U)} mm"
        causes = "/".join(rule.unless_cause) or "internal"
        if state == "ignored":
            out.add("pass", f"note: {rule.id}: {it.label()} at a coupon edge ({meas}, no "
                            f"{causes} cause seen) is not counted: {rule.limit_label()}")
        elif state == "retest":
            q = rule.ignore_up_to or rule.ignore_below
            out.add("review", f"{rule.id}: {it.label()} at a coupon edge: {meas} "
                              f"{'>' if v - U > q.mm else 'may exceed'} {q.label()} with no "
                              f"{causes} cause seen: disregard this coupon and test a "
                              "replacement specimen")
        out.items.append(it.id)


_EVAL = {
    "not_permitted": _eval_not_permitted,
    "max_size": _eval_max_size,
    "max_count": None,
    "max_sum": _eval_max_sum,
    "max_area": _eval_max_area,
    "min_separation": _eval_min_separation,
    "band_sum": lambda *a: _eval_max_sum(*a, band=True),
    "corner": _eval_corner,
}


def _eval_max_count(rule, possible, sure, why, ctx, out):
    out.items = [it.id for it in possible]
    out.value, out.limit_mm = len(possible), rule.max_count
    if len(sure) > rule.max_count:
        out.add("fail", f"{rule.id}: {len(sure)} counted ({_items_label(sure)}) > at most {rule.max_count}")
    elif len(possible) > rule.max_count:
        low = [it for it in possible if it not in sure]
        out.add("review", f"{rule.id}: {len(possible)} counted ({_items_label(possible)}) > at most "
                          f"{rule.max_count}, but {_items_label(low)}: "
                          f"{'; '.join(sorted({w for it in low for w in why[it.id]}))}")


_EVAL["max_count"] = _eval_max_count


def _check_nominal(nominal: dict | None) -> dict:
    out = {}
    for key, val in (nominal or {}).items():
        if val is None:
            continue
        if key not in ("thickness_mm", "throat_mm", "wall_mm", "length_mm"):
            continue
        v = _num(val)
        if not (math.isfinite(v) and v > 0):
            raise LimitsError(f"nominal {key} = {val!r} must be a positive number of mm")
        out[key] = v
    return out


def judge(table: pd.DataFrame, *, face: dict, nominal: dict, limit_set: LimitSet,
          test: str, check_kinds: bool = True) -> Verdict:
    """Judge an imperfection table against a limit set.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per imperfection, columns as in DEVELOPERS.md (optional
        columns may be missing).  Rows with ``status == "dismissed"`` are skipped.
    face : dict
        ``length_mm``, ``width_mm``, ``area_mm2`` of the face.
    nominal : dict
        ``thickness_mm``, ``throat_mm``, ``wall_mm``, ``length_mm`` (any may be absent).
    limit_set : LimitSet
    test : str
        ``fillet-break``, ``nick-break`` or ``bend``.
    check_kinds : bool
        Also judge each unreviewed imperfection as its runner-up kind
        (``kind_alt``, when ``kind_alt_p >= KIND_DOUBT_P``); a verdict that
        would then be worse makes an ``accept`` a ``review`` (see the module
        notes).

    Returns
    -------
    Verdict
        ``accept``, ``reject`` or ``review``; reasons name the rule, the
        imperfection, the value with ``U = 2 u`` and the limit.

    Raises
    ------
    LimitsError
        The set does not apply to ``test``, or the table cannot be read.
    """
    if test not in TEST_TYPES:
        raise LimitsError(f"unknown test type {test!r}: use one of {', '.join(TEST_TYPES)}")
    if not limit_set.applies_to(test):
        raise LimitsError(f"limit set '{limit_set.name}' is for {', '.join(limit_set.tests)}, not "
                          f"{test}: choose a set for {test} (e.g. '{default_preset_for(test)}')")
    items, dismissed, _ = _table_items(table, limit_set)
    corner = next((r for r in limit_set.rules if r.check == "corner"), None)
    ctx = _Ctx(ls=limit_set, nominal=_check_nominal(nominal), face=dict(face or {}), corner=corner)
    fails, reviews, notes, details = [], [], [], []
    for rule in limit_set.rules:
        possible, sure, why = _members(rule, items, ctx)
        out = _Out()
        _EVAL[rule.check](rule, possible, sure, why, ctx, out)
        status = out.status
        for st, reason in out.reasons:
            if st == "fail":
                (fails if rule.outcome == "reject" else reviews).append(reason)
            elif st == "review":
                reviews.append(reason)
            else:
                notes.append(reason)
        details.append({
            "rule": rule.id, "check": rule.check, "kinds": list(rule.kinds),
            "status": status, "outcome": rule.outcome, "limit": rule.limit_label(),
            "limit_mm": out.limit_mm, "value": out.value, "u_expanded": out.u,
            "items": sorted(set(out.items)), "clause": rule.clause,
            "confidence": rule.confidence, "messages": [r for _, r in out.reasons],
        })
    if fails:
        result, reasons = "reject", fails + reviews
    elif reviews:
        result, reasons = "review", reviews
    else:
        result = "accept"
        reasons = [f"accept: all {len(limit_set.rules)} rules of '{limit_set.name}' pass for "
                   f"{len(items)} imperfection(s) judged ({dismissed} dismissed)"]
    if check_kinds and result != "reject":
        def doubt(rule_id: str, limit: str, messages: list[str], ids: list[int]) -> None:
            # a doubt the rules cannot see: the coupon goes to review, its reasons first
            nonlocal result, reasons
            if messages:
                result, reasons = "review", messages + (reasons if result == "review" else [])
                details.append({
                    "rule": rule_id, "check": rule_id, "kinds": [], "status": "review", "outcome": "review",
                    "limit": limit, "limit_mm": None, "value": None, "u_expanded": None, "items": ids,
                    "clause": "", "confidence": "", "messages": messages,
                })

        unseen = (face or {}).get("unseen") or []
        unseen = [unseen] if isinstance(unseen, str) else list(unseen)
        doubt("face-unseen", "part of the face not in the assessment",
              [f"part of the face is not assessed ({str(w).split(':')[0]}): an accept needs the whole face; "
               "retake the photo or examine that part" for w in unseen], [])
        cut = _cut_by_end(items, limit_set)
        doubt("face-end", f"imperfection within {END_CUT_MM:g} mm of a face end", [r for r, _ in cut],
              [i for _, i in cut])
        doubt("kind-doubt", f"runner-up kind probability >= {KIND_DOUBT_P:g}",
              *_kind_doubts(table, items, face=face, nominal=nominal, limit_set=limit_set, test=test,
                            accepted=result == "accept"))
        doubt("root-doubt", "root side of the face not known",
              *_root_doubts(table, items, face=face, nominal=nominal, limit_set=limit_set, test=test,
                            accepted=result == "accept"))
    return Verdict(result=result, reasons=tuple(reasons + notes), details=tuple(details))


#: An unreviewed imperfection this close to an end of the face found may be cut
#: by that end: a dark cavity at the end of a fracture face stops the texture the
#: face finder follows, so the face can end inside it, and then only part of the
#: imperfection is measured (the segmenter leaves the outermost 0.25 mm of the
#: face to the face's own edge, so a cut one stops about there).
END_CUT_MM = 0.4


def _cut_by_end(items: list, limit_set: LimitSet) -> list[tuple[str, int]]:
    """Reasons to review: unreviewed imperfections some rule judges that reach an end of the face."""
    out = []
    for it in items:
        if it.reviewed or not any(_takes_kind(r, it.kind) for r in limit_set.rules):
            continue
        d = _num(it.row.get("dist_end_mm"))
        if math.isfinite(d) and d <= END_CUT_MM:
            g = _num(it.row.get("greatest_mm"))
            size = f" ({g:.2f} mm measured)" if math.isfinite(g) else ""
            out.append((f"face-end: {it.label()}{size} reaches an end of the face found ({d:.2f} mm from it): "
                        "it may go on past the outline, so its full size is not known; check that end of the face "
                        "on the overlay (or give --roi), then confirm or correct it", it.id))
    return out


#: A detection whose second most probable kind has at least this probability is
#: also judged as that kind (pore and slag inclusion look alike on a photo).
KIND_DOUBT_P = 0.2


def _rejudged(table: pd.DataFrame, ident: pd.Series, item_id: int, changes: dict, *, face, nominal,
              limit_set: LimitSet, test: str) -> tuple[str, str]:
    """The verdict and its first reason (notes skipped) with one row's columns set to ``changes``."""
    t2 = table.copy()
    for col, value in changes.items():
        t2[col] = t2[col].astype(object) if col in t2.columns else None
        t2.loc[ident == item_id, col] = value
    v2 = judge(t2, face=face, nominal=nominal, limit_set=limit_set, test=test, check_kinds=False)
    return v2.result, next((r for r in v2.reasons if not r.startswith("note")), v2.reasons[0])


def _kind_doubts(table: pd.DataFrame, items: list, *, face, nominal, limit_set: LimitSet, test: str,
                 accepted: bool) -> tuple[list[str], list[int]]:
    """Reasons to review: unreviewed detections that, judged as their runner-up kind, make the verdict worse."""
    if "kind_alt" not in table.columns or "id" not in table.columns:
        return [], []
    worse = ("reject", "review") if accepted else ("reject",)
    out, ids = [], []
    ident = pd.to_numeric(table["id"], errors="coerce")
    for it in items:
        if it.reviewed:
            continue  # a person has settled the kind
        alt, p = _text(it.row.get("kind_alt")).lower(), _num(it.row.get("kind_alt_p"))
        if alt not in KINDS or alt == it.kind or not (math.isfinite(p) and p >= KIND_DOUBT_P):
            continue
        changes = {"kind": alt}
        if "cause" in table.columns and _text(it.row.get("cause")) in ("", KIND_CAUSE.get(it.kind, "")):
            # a cause the detector read off the kind goes with the kind: slag that was called a pore
            # must lose a corner rule's "ignored unless from slag" as well
            changes["cause"] = KIND_CAUSE.get(alt, "")
        result, first = _rejudged(table, ident, it.id, changes, face=face, nominal=nominal, limit_set=limit_set,
                                  test=test)
        if result in worse:
            conf = f", p {it.conf:.2f}" if math.isfinite(it.conf) else ""
            out.append(f"kind-doubt: imperfection {it.id} was called {it.kind}{conf} but may be {alt} "
                       f"(p {p:.2f}); judged as {alt} the coupon would be {result} ({first}): "
                       "confirm or correct its kind")
            ids.append(it.id)
    return out, ids


def _root_unknown(row: dict) -> bool:
    """True when the row's ``at_root`` was not measured from a known root edge.

    :mod:`surfaces.measure` gives ``dist_root_mm`` only when the face's root
    side is known; without it ``at_root`` only says "touches a long edge",
    which misses a band along the root that the face outline runs past.
    """
    if not math.isfinite(_num(row.get("dist_root_mm"))):
        return "dist_edge_mm" in row or "dist_root_mm" in row  # a measured row; a bare table is taken as given
    return False


def _root_doubts(table: pd.DataFrame, items: list, *, face, nominal, limit_set: LimitSet, test: str,
                 accepted: bool) -> tuple[list[str], list[int]]:
    """Reasons to review: unreviewed detections whose place (at the root or not) is a guess and decides.

    The set's rules that ask ``where = { at_root = ... }`` judge a region
    differently at the root (incomplete root penetration) and away from it
    (lack of fusion).  When the root side of the face is not known, each such
    detection is judged again with ``at_root`` the other way; a verdict that
    would then be worse sends the coupon to review, like :func:`_kind_doubts`.
    """
    root_rules = [r for r in limit_set.rules if any(k == "at_root" for k, _ in r.where)]
    if "id" not in table.columns or not root_rules:
        return [], []
    worse = ("reject", "review") if accepted else ("reject",)
    out, ids = [], []
    ident = pd.to_numeric(table["id"], errors="coerce")
    for it in items:
        if it.reviewed or not _root_unknown(it.row) or not any(_takes_kind(r, it.kind) for r in root_rules):
            continue
        was = bool(_flag(it.row.get("at_root")))
        result, first = _rejudged(table, ident, it.id, {"at_root": not was}, face=face, nominal=nominal,
                                  limit_set=limit_set, test=test)
        if result in worse:
            place = "away from the root" if not was else "at the root"
            other = "at the root" if not was else "away from it"
            out.append(f"root-doubt: {it.label()} was judged {place}, but the root side of the face is not known; "
                       f"judged {other} the coupon would be {result} ({first}): check where the root is on "
                       "the overlay, then confirm or correct it")
            ids.append(it.id)
    return out, ids


def judge_assessment(assessment: dict, limit_set: LimitSet, *,
                     nominal_override: dict | None = None) -> dict:
    """Re-judge a saved assessment dict (the JSON contract) without the photo.

    Returns a new dict whose ``limits``, ``verdict``, ``nominal`` and
    ``cautions`` are replaced; everything else is copied unchanged.
    """
    if not isinstance(assessment, dict) or not str(assessment.get("schema", "")).startswith(
            "surfaces.assessment/"):
        raise LimitsError("not an assessment: expected a JSON object with "
                          "\"schema\": \"surfaces.assessment/1\"")
    test = assessment.get("test")
    if test not in TEST_TYPES:
        raise LimitsError(f"assessment 'test' is {test!r}: set it to one of {', '.join(TEST_TYPES)}")
    rows = assessment.get("imperfections") or []
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise LimitsError("assessment 'imperfections' must be a list of objects, one per imperfection")
    raw_nominal = assessment.get("nominal") or {}
    if not isinstance(raw_nominal, dict):
        raise LimitsError(
            f"assessment 'nominal' must be a table of dimensions in mm (e.g. {{\"throat_mm\": 6}}), not {type(raw_nominal).__name__}"
        )
    nominal = dict(raw_nominal)
    for k, v in (nominal_override or {}).items():
        if v is not None:
            nominal[k] = v
    face = assessment.get("face") or {}
    if not isinstance(face, dict):
        raise LimitsError("assessment 'face' must be an object with length_mm, width_mm, area_mm2")
    verdict = judge(pd.DataFrame(rows), face=face, nominal=nominal, limit_set=limit_set, test=test)
    out = copy.deepcopy(assessment)
    out["nominal"] = _check_nominal(nominal)
    out["limits"] = limits_summary(limit_set)
    out["verdict"] = _json_safe(verdict.to_dict())
    cautions = list(out.get("cautions") or [])
    out["cautions"] = cautions + [c for c in CAUTIONS if c not in cautions]
    return out


def _json_safe(obj):
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    return obj
