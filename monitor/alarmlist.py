"""The master alarm database of a line: every alarm point with its settings and rationalization.

ANSI/ISA-18.2-2016 asks for a master alarm database holding, for every alarm, its limit, priority,
deadband, delays and rationalization (cause, consequence, corrective action, time to respond) (clause on
the master alarm database and rationalization; from memory). :func:`rows` gives one flat record per
:class:`~spanwatch.rules.alarms.AlarmPoint` (numbers in the check's own value and in seconds, as the core
keeps them); :func:`table` lays them out for an 80-column terminal; :func:`render` picks table, CSV or JSON.

Units: ``limit`` and ``deadband`` are in ``unit``; a unit starting with ``%`` holds a fraction (0.02 is
2 %), so the table shows such numbers times 100 with ``%`` and CSV / JSON keep the fraction.
"""

from __future__ import annotations

import csv
import io
import json
import textwrap
from collections.abc import Sequence
from typing import Any

from spanwatch.rules.alarms import AlarmPoint

WIDTH = 80  # the terminal the table must fit
WRAP = 78  # rationalization text is wrapped to this width
COLUMNS = ("key", "check", "object", "level", "limit", "unit", "direction", "deadband", "on_delay_s", "off_delay_s",
           "priority", "cause", "consequence", "action", "response_time_s")
OPTIONAL = ("latched", "groups")  # shown when alarm points carry them
DIRECTION_TEXT = {"high": "value >= limit", "low": "value <= limit", "abs": "|value| >= limit"}
_OBJ, _LEVEL, _PRIO, _LIMIT, _DB, _DELAY = 22, 7, 8, 10, 9, 6


def _extra(p: AlarmPoint, name: str) -> Any:
    v = getattr(p, name, None)
    if isinstance(v, (tuple, list, set, frozenset)):
        return " ".join(sorted(map(str, v)))
    return v


def optional_fields(points: Sequence[AlarmPoint]) -> list[str]:
    """The optional fields (``latched``, ``groups``) that at least one of the points carries."""
    return [n for n in OPTIONAL if any(getattr(p, n, None) is not None for p in points)]


def rows(points: Sequence[AlarmPoint]) -> list[dict[str, Any]]:
    """One flat record per point: :data:`COLUMNS` (and the optional fields the points carry)."""
    extra = optional_fields(points)
    out = []
    for p in points:
        r: dict[str, Any] = {"key": p.key, "check": p.kind, "object": p.object_id, "level": p.level, "limit": p.limit,
                             "unit": p.unit, "direction": p.direction, "deadband": p.deadband,
                             "on_delay_s": p.on_delay, "off_delay_s": p.off_delay, "priority": p.priority,
                             "cause": p.cause, "consequence": p.consequence, "action": p.action,
                             "response_time_s": p.response_time}
        for n in extra:
            r[n] = _extra(p, n)
        out.append(r)
    return out


def number(v: float, unit: str) -> str:
    """A limit or deadband as a person reads it: fractions of a ``%`` unit times 100, short units appended.

    >>> number(0.02, "%"), number(0.05, "% of mean tension"), number(2.0, "x band"), number(0.8, "share")
    ('2 %', '5 %', '2 x band', '0.8')
    """
    if unit.startswith("%"):
        return f"{v * 100:.6g} %"
    if unit in ("x band", "s"):
        return f"{v:.6g} {unit}"
    return f"{v:.6g}"


def _row_line(obj: str, level: str, prio: str, limit: str, db: str, on: str, off: str, extra: str = "") -> str:
    return (f"  {obj:<{_OBJ}} {level:<{_LEVEL}} {prio:<{_PRIO}} {limit:<{_LIMIT}} {db:<{_DB}} {on:>{_DELAY}} "
            f"{off:>{_DELAY}}{extra}").rstrip()


def _wrap(label: str, text: str, indent: str) -> list[str]:
    return textwrap.wrap(text, width=WRAP, initial_indent=f"{indent}{label}", subsequent_indent=indent + "  ",
                         break_on_hyphens=False) or [f"{indent}{label}".rstrip()]


def _rationale(p: AlarmPoint) -> tuple[str, str, str, float]:
    return (p.cause, p.consequence, p.action, p.response_time)


def table(points: Sequence[AlarmPoint], title: str = "") -> list[str]:
    """The points as text lines of at most :data:`WIDTH` characters, grouped by check kind.

    Per kind: a heading (kind, number of points, unit, when the value is abnormal), one line per point (object,
    level, priority, limit, deadband, on / off delay in s, and the optional fields), then the rationalization
    wrapped to :data:`WRAP` columns, once for the kind when every point shares it, else once per distinct text
    with the points it belongs to.
    """
    out = textwrap.wrap(title, width=WRAP) if title else []
    kinds: dict[str, list[AlarmPoint]] = {}
    for p in points:
        kinds.setdefault(p.kind, []).append(p)
    out.append(f"{len(points)} alarm point(s) in {len(kinds)} check kind(s)")
    extra = optional_fields(points)
    for kind, pts in kinds.items():
        out.append("")
        units = sorted({p.unit for p in pts})
        dirs = sorted({DIRECTION_TEXT.get(p.direction, p.direction) for p in pts})
        out += _wrap("", f"== {kind} ({len(pts)}): unit {', '.join(units)}; abnormal at {' or '.join(dirs)}", "")
        head = _row_line("object", "level", "priority", "limit", "deadband", "on s", "off s", "")
        out.append(head)
        for p in pts:
            obj = p.object_id
            if len(obj) > _OBJ:
                out += _wrap("", obj, "  ")
                obj = ""
            out.append(_row_line(obj, p.level, p.priority, number(p.limit, p.unit), number(p.deadband, p.unit),
                                 f"{p.on_delay:g}", f"{p.off_delay:g}", ""))
            if "latched" in extra and getattr(p, "latched", False):  # a line of its own: the row has no room
                out.append("    latched: stays annunciated after the return to normal until reset")
            if "groups" in extra and _extra(p, "groups"):
                out += _wrap("groups: ", str(_extra(p, "groups")), "    ")
        texts: dict[tuple[str, str, str, float], list[AlarmPoint]] = {}
        for p in pts:
            texts.setdefault(_rationale(p), []).append(p)
        for (cause, consequence, action, response), owners in texts.items():
            indent = "  "
            if len(texts) > 1:
                names = ", ".join(f"{p.object_id} {p.level}" for p in owners)
                out += _wrap("for ", f"{names}:", "  ")
                indent = "    "
            out += _wrap("Cause: ", cause, indent)
            out += _wrap("Consequence: ", consequence, indent)
            out += _wrap("Corrective action: ", action, indent)
            out.append(f"{indent}Response time: {response:g} s")
    return out


def to_csv(points: Sequence[AlarmPoint]) -> str:
    """CSV with a header row of :data:`COLUMNS` (and the optional fields present)."""
    data = rows(points)
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=[*COLUMNS, *optional_fields(points)], lineterminator="\n")
    w.writeheader()
    w.writerows(data)
    return buf.getvalue()


def to_json(points: Sequence[AlarmPoint]) -> str:
    """A JSON list of :func:`rows` (non-finite numbers, which no alarm point should have, become null)."""
    clean = [{k: (None if isinstance(v, float) and v != v else v) for k, v in r.items()} for r in rows(points)]
    return json.dumps(clean, indent=1) + "\n"


def render(points: Sequence[AlarmPoint], fmt: str, title: str = "") -> str:
    """The points as ``table``, ``csv`` or ``json`` text."""
    if fmt == "csv":
        return to_csv(points)
    if fmt == "json":
        return to_json(points)
    if fmt == "table":
        return "\n".join(table(points, title)) + "\n"
    raise ValueError(f"expected format table, csv or json, got {fmt!r}")
