"""Command-line verbs for limit sets and re-judging saved assessments.

``surfaces.cli`` calls :func:`add_commands` with its sub-parsers.  Every
handler takes the parsed ``argparse.Namespace`` (``args.func(args)``) and
returns an exit code: 0 when the command did its work (whatever the verdict).
Bad input raises :class:`surfaces.limits.LimitsError`; the main command line
prints its one-line message and exits 2.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from . import limits as L

__all__ = [
    "add_commands",
    "cmd_judge",
    "cmd_limits_check",
    "cmd_limits_copy",
    "cmd_limits_list",
    "cmd_limits_show",
]

_NOMINAL_FLAGS = ("thickness", "throat", "wall", "length")


def add_commands(subparsers) -> None:
    """Add ``limits list|show|check|copy`` and ``judge`` to ``subparsers``."""
    lim = subparsers.add_parser(
        "limits", help="acceptance limit sets: list, show, check, copy",
        description="Limit sets are small TOML files: shipped presets and your own copies.")
    sub = lim.add_subparsers(dest="limits_command", metavar="COMMAND", required=True)

    p = sub.add_parser("list", help="list presets and your own sets")
    p.set_defaults(func=cmd_limits_list)

    p = sub.add_parser("show", help="show one set's rules, sources and units")
    p.add_argument("name", metavar="NAME", help="preset name, your set's name, or a .toml path")
    p.add_argument("--toml", action="store_true", help="print the TOML text instead")
    p.set_defaults(func=cmd_limits_show)

    p = sub.add_parser("check", help="validate a limit file")
    p.add_argument("file", metavar="FILE")
    p.set_defaults(func=cmd_limits_check)

    p = sub.add_parser("copy", help="copy a set as your own, to edit")
    p.add_argument("name", metavar="NAME", help="the set to copy")
    p.add_argument("newname", metavar="NEWNAME", help="name of your copy")
    p.add_argument("--out", metavar="FILE", help="write here instead of your limits folder")
    p.add_argument("--force", action="store_true", help="replace an existing file")
    p.set_defaults(func=cmd_limits_copy)

    j = subparsers.add_parser(
        "judge", help="re-judge a saved assessment JSON against a limit set",
        description="Re-judges the imperfections of a saved assessment (rows with status "
                    "'dismissed' are skipped) without the photo.")
    j.add_argument("assessment", metavar="ASSESSMENT.json")
    j.add_argument("--limits", required=True, metavar="NAME|FILE",
                   help="preset name, your set's name, or a .toml path")
    j.add_argument("--json", dest="json_out", metavar="OUT",
                   help="write the assessment with the new limits and verdict")
    j.add_argument("--force", action="store_true", help="let --json replace an existing file")
    for dim in _NOMINAL_FLAGS:
        j.add_argument(f"--{dim}-mm", type=float, default=None, metavar="MM",
                       help=f"nominal {dim} in mm (overrides the assessment's)")
    j.set_defaults(func=cmd_judge)


def _confidence_counts(ls: L.LimitSet) -> str:
    counts: dict[str, int] = {}
    for r in ls.rules:
        counts[r.confidence] = counts.get(r.confidence, 0) + 1
    return ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))


def cmd_limits_list(args: argparse.Namespace) -> int:
    """Print presets and the user's sets, one a line."""
    rows = [(s, "preset") for s in L.list_presets()]
    rows += [(s, "yours") for s in L.list_user_sets()]
    width = max(len(s.name) for s, _ in rows)
    for s, where in rows:
        print(f"{s.name:<{width}}  {where:<6}  {','.join(s.tests):<23}  {s.title}  "
              f"[{_confidence_counts(s)}]")
    print(f"your folder: {L.user_folder()}")
    return 0


def _rule_lines(rule: L.Rule) -> list[str]:
    kinds = ", ".join(rule.kinds)
    where = "".join(f" {k}={v}" for k, v in rule.where)
    what = {"not_permitted": "", "corner": "", "max_count": "count ", "max_area": "area ",
            "min_separation": "gap along the weld "}.get(rule.check, f"{rule.measure} ")
    out = [f"  {rule.id}: {kinds}{where}: {what}{rule.limit_label()}"
           + (" (gives review, not reject)" if rule.outcome == "review" else "")]
    for key in ("max", "min", "above", "up_to", "window", "min_size", "ignore_up_to",
                "ignore_below", "edge_within"):
        q = getattr(rule, key)
        if isinstance(q, L.Quantity) and q.unit == "in":
            out.append(f"      {key} = {q.stated} in, compared as {L._fmt(q.mm)} mm: {q.reading}")
    if rule.min_size is not None:
        out.append(f"      smaller than {rule.min_size.label()} is not counted by this rule")
    if rule.unless_cause:
        out.append(f"      except when the cause is {', '.join(rule.unless_cause)}")
    out.append(f"      clause {rule.clause or '-'}; confidence {rule.confidence}"
               + (f"; {rule.note}" if rule.note else ""))
    return out


def cmd_limits_show(args: argparse.Namespace) -> int:
    """Print one set in words (or its TOML with ``--toml``)."""
    ls = L.load_limit_set(args.name)
    if args.toml:
        print(ls.text or L.to_toml(ls), end="")
        return 0
    lines = [
        f"{ls.name}  ({ls.kind}, version {ls.version}; {ls.origin})",
        ls.title,
        f"applies to: {', '.join(ls.tests)}",
        f"source: {ls.source or '-'}",
        f"clause: {ls.clause or '-'}",
        f"edition: {ls.edition or '-'}",
    ]
    if ls.note:
        lines.append(f"note: {ls.note}")
    lines.append(f"review: a value within U = {L.COVERAGE_K:g} x its 1-sigma uncertainty of a limit, "
                 f"or a deciding detection with confidence below {ls.min_confidence:g}; "
                 "a value equal to a maximum passes")
    lines.append("rules:")
    for rule in ls.rules:
        lines += _rule_lines(rule)
    lines += [f"caution: {c}" for c in L.CAUTIONS]
    print("\n".join(lines))
    return 0


def cmd_limits_check(args: argparse.Namespace) -> int:
    """Validate a limit file; print a one-line summary."""
    path = Path(args.file)
    if not path.is_file():
        raise L.LimitsError(f"limit set file {path} not found: check the path")
    ls = L.read_limit_file(path)
    print(f"ok: {ls.name} version {ls.version}, {len(ls.rules)} rules, for {', '.join(ls.tests)} "
          f"[{_confidence_counts(ls)}]")
    return 0


def cmd_limits_copy(args: argparse.Namespace) -> int:
    """Copy a set under a new name into the user folder (or ``--out``)."""
    ls = L.load_limit_set(args.name)
    path = L.save_user_set(ls, args.newname, force=args.force,
                           path=Path(args.out).expanduser() if args.out else None)
    print(f"saved {path}: edit it, then run 'surfaces limits check {path}'")
    return 0


def _read_assessment(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise L.LimitsError(f"assessment file {path} not found: check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise L.LimitsError(f"assessment file {path} cannot be read: {exc}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise L.LimitsError(f"assessment file {path} is not valid JSON at line {exc.lineno}, "
                            f"column {exc.colno}: {exc.msg}") from None
    if not isinstance(data, dict):
        raise L.LimitsError(f"assessment file {path} must hold one JSON object")
    return data


def cmd_judge(args: argparse.Namespace) -> int:
    """Re-judge a saved assessment; print the verdict, reasons and cautions."""
    src = Path(args.assessment)
    assessment = _read_assessment(src)
    ls = L.load_limit_set(args.limits)
    override = {f"{d}_mm": getattr(args, f"{d}_mm") for d in _NOMINAL_FLAGS}
    try:
        result = L.judge_assessment(assessment, ls, nominal_override=override)
    except L.LimitsError as exc:
        raise L.LimitsError(f"{src}: {exc}") from None
    verdict = result["verdict"]
    print(f"verdict: {verdict['result']}  ({ls.name}, version {ls.version}; {ls.source}, "
          f"{ls.clause}; {ls.edition})")
    for reason in verdict["reasons"]:
        print(f"  - {reason}")
    for caution in result["cautions"]:
        print(f"caution: {caution}")
    if args.json_out:
        out = Path(args.json_out)
        text = json.dumps(result, indent=2, ensure_ascii=False) + "\n"
        L._atomic_write(out, text, force=args.force)
        print(f"wrote {out}")
    return 0
