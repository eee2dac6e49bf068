"""The effective limits of every alarm point as ``check-config`` prints them: 80 columns, one line per point.

The numbers are what the alarm engine uses after the check's defaults, the ``[checks.KIND]`` table and
its per-object overrides are applied (:func:`spanwatch.monitor.checkset.alarm_points`). Per check kind a
heading with the value's unit and the direction that is abnormal, then per point: object, level,
the limit with the comparison (``>=``, ``<=``, ``|x| >=``), the deadband, the on and off delays in
seconds and the priority. A value in a unit starting with ``%`` is a fraction inside (0.02 is 2 %) and
is shown times 100 with ``%``; a ``flag`` check is abnormal when its flag is set. The rationalization
(cause, consequence, action) is in ``spanwatch alarm-list``.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence

from spanwatch.rules.alarms import AlarmPoint

WIDTH = 80
_OBJ, _LEVEL, _LIMIT, _DB, _DELAY = 22, 7, 14, 9, 5
_OPS = {"high": ">=", "low": "<=", "abs": "|x| >="}


def _num(v: float, unit: str) -> str:
    """A limit or deadband in the unit's short form.

    >>> _num(0.02, "% of setpoint"), _num(0.85, "share of capacity"), _num(2.0, "s"), _num(1.0, "x band")
    ('2 %', '0.85', '2 s', '1 x')
    """
    if unit.startswith("%"):
        return f"{v * 100:.4g} %"
    if unit == "s":
        return f"{v:.4g} s"
    if unit.startswith("x "):
        return f"{v:.4g} x"
    return f"{v:.4g}"


def limit_text(p: AlarmPoint) -> str:
    """The limit with its comparison: ``>= 0.85``, ``|x| >= 2 %``, ``flag set``.

    >>> from spanwatch.rules.alarms import AlarmPoint
    >>> limit_text(AlarmPoint("slip", "pull_1", "warning", 0.005, "abs", 0.001, 1.0, 5.0, "medium", "%",
    ...                       "", "", "", 60.0))
    '|x| >= 0.5 %'
    """
    if p.unit == "flag":
        return "flag set"
    return f"{_OPS.get(p.direction, p.direction)} {_num(p.limit, p.unit)}"


def _row(obj: str, level: str, limit: str, db: str, on: str, off: str, prio: str) -> str:
    return (f"  {obj:<{_OBJ}} {level:<{_LEVEL}} {limit:<{_LIMIT}} {db:<{_DB}} {on:>{_DELAY}} {off:>{_DELAY}} "
            f"{prio}").rstrip()


def limit_lines(points: Sequence[AlarmPoint]) -> list[str]:
    """Every point's effective settings as lines of at most :data:`WIDTH` characters, grouped by check kind."""
    kinds: dict[str, list[AlarmPoint]] = {}
    for p in points:
        kinds.setdefault(p.kind, []).append(p)
    out = [f"Effective alarm limits: {len(points)} alarm point(s) in {len(kinds)} check kind(s)",
           _row("object", "level", "limit", "deadband", "on s", "off s", "priority")]
    for kind, pts in kinds.items():
        units = sorted({p.unit for p in pts})
        out += textwrap.wrap(f"{kind}: unit {', '.join(units)}", width=WIDTH)
        for p in pts:
            obj = p.object_id
            if len(obj) > _OBJ:
                out += textwrap.wrap(obj, width=WIDTH - 2, initial_indent="  ", subsequent_indent="  ")
                obj = ""
            db = "-" if p.unit == "flag" else _num(p.deadband, p.unit)
            out.append(_row(obj, p.level, limit_text(p), db, f"{p.on_delay:g}", f"{p.off_delay:g}", p.priority))
    return out
