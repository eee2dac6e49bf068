"""How alarms and values read to a person: units of the trade, ISO times, one line per transition."""

from __future__ import annotations

import math

from spanwatch.rules.alarms import Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.lifecycle import LifecycleEvent

# advisory alarms are journal only (not annunciated): dim, as a clear
PRIORITY_STYLE = {"urgent": "bold reverse red", "high": "bold red", "medium": "yellow", "low": "cyan",
                  "advisory": "dim"}


def fmt_value(value: float | None, unit: str) -> str:
    """A check value in its unit: ``%`` scales by 100; ``flag`` shows nothing; ``x band`` a multiple."""
    if value is None or not math.isfinite(value):
        return "-"
    if unit.startswith("%"):
        return f"{value * 100:.2f} {unit}"
    if unit == "flag":
        return "on" if value >= 0.5 else "off"
    if unit == "x band":
        return f"{value:+.2f} x band"
    return f"{value:.3f} {unit}"


def fmt_limit(limit: float, unit: str, direction: str) -> str:
    op = {"high": ">=", "low": "<=", "abs": "|x| >="}[direction]
    if unit.startswith("%"):
        return f"{op} {limit * 100:g} %"
    if unit == "flag":
        return ""
    return f"{op} {limit:g}"


def transition_line(tr: Transition, t0: float | None = None) -> tuple[str, str]:
    """One line describing a transition and the rich style to print it with.

    With ``t0`` (the demo), a short line that fits an 80-column terminal: the time since ``t0``, RAISE or
    clear, check, object, level, the value (raise) or peak (clear) and the limit; the priority is its colour.
    Without, the full line: source time, priority and line state too.
    """
    p = tr.point
    if t0 is not None:
        verb = "RAISE" if tr.event == "raise" else "clear"
        value = fmt_value(tr.value if tr.event == "raise" else tr.peak, p.unit)
        limit = fmt_limit(p.limit, p.unit, p.direction)
        text = (f"+{_mmss(tr.t - t0)} {verb} {p.kind} {p.object_id} {p.level}: "
                f"{'' if tr.event == 'raise' else 'peak '}{value}")
        if limit and len(text) + len(limit) + 3 <= 79:  # the limit when the line has room for it (80 columns)
            text += f" ({limit})"
        style = PRIORITY_STYLE.get(p.priority, "") if tr.event == "raise" else "dim"
        return text, style
    clock = _clock(tr.t)
    rel = f" (+{_mmss(tr.t - t0)})" if t0 is not None else ""
    verb = "RAISE" if tr.event == "raise" else "clear"
    value = fmt_value(tr.value if tr.event == "raise" else tr.peak, p.unit)
    what = "value" if tr.event == "raise" else "peak"
    limit = fmt_limit(p.limit, p.unit, p.direction)
    text = (f"{clock}{rel} {verb:5} {p.priority:6} {p.kind + ' ' + p.object_id:34} {p.level:7} {what} {value}"
            f"{f' (limit {limit})' if limit else ''} [{state_name(tr.line_state)}]")
    style = PRIORITY_STYLE.get(p.priority, "") if tr.event == "raise" else "dim"
    return text, style


def quiet_suppression(e: LifecycleEvent) -> bool:
    """A suppression by design that starts or ends while the alarm is normal: recorded, not worth a line.

    >>> from spanwatch.rules.lifecycle import Action, AlarmState as S
    >>> quiet_suppression(LifecycleEvent(0.0, "k", Action.SUPPRESS, S.NORMAL, S.SUPPRESSED))
    True
    >>> quiet_suppression(LifecycleEvent(0.0, "k", Action.SUPPRESS, S.UNACK, S.SUPPRESSED))
    False
    """
    quiet = {"normal", "suppressed"}
    return e.action in ("suppress", "unsuppress") and e.before.value in quiet and e.after.value in quiet


def lifecycle_line(e: LifecycleEvent, t0: float) -> str:
    """A lifecycle change as one short line for the demo: time since ``t0``, what, which alarm, who, the states.

    >>> from spanwatch.rules.lifecycle import Action, AlarmState as S
    >>> lifecycle_line(LifecycleEvent(75.0, "traction:R3:alarm", Action.ACK, S.UNACK, S.ACKED, user="op"), 0.0)
    '+01:15 ACK traction R3 alarm by op (unack -> acked)'
    """
    what = {"out_of_service": "OUT OF SERVICE", "return_to_service": "IN SERVICE",
            "shelve_expired": "UNSHELVED"}.get(e.action.value, e.action.value.upper())
    who = f" by {e.user}" if e.user else ""
    text = f"+{_mmss(e.t - t0)} {what} {e.key.replace(':', ' ')}{who} ({e.before.value} -> {e.after.value})"
    if e.action == "suppress" and e.comment:
        text += f": {e.comment}"
    return text if len(text) <= 79 else text[:76] + "..."


def drift_text(object_id: str, detail: dict[str, float | None], now: float | None = None) -> str:
    """What a drift alarm carries, in its residual's unit: the estimated change point and the size of the change
    against the baseline it was learnt with (a ratio's change in per cent).

    >>> drift_text("draw.s5", {"change_time": 100.0, "shift": 3.2, "mean": 0.5, "sigma": 1.1}, now=400.0)
    'draw residual moved by +3.200 N/m (baseline 0.500 +- 1.100 N/m), since about 5 min before'
    >>> drift_text("draw.gain.s5", {"change_time": 370.0, "shift": 0.029, "mean": 1.0, "sigma": 0.002}, now=400.0)
    'draw gain residual moved by +2.9 % (baseline 1.0000 +- 0.0020 x predicted), since about 30 s before'
    """
    from spanwatch.rules.driftcheck import residual_of

    r = residual_of(object_id)
    unit = r.unit if r is not None else ""
    name = (r.name if r is not None else object_id).replace(".", " ")
    shift, mean, sigma = detail.get("shift"), detail.get("mean"), detail.get("sigma")
    finite = [v is not None and math.isfinite(v) for v in (shift, mean, sigma)]
    if unit.startswith("x "):  # a ratio: its change in per cent
        size = f"{shift * 100:+.1f} %" if finite[0] else "-"
        base = f"{mean:.4f} +- {sigma:.4f} {unit}" if finite[1] and finite[2] else ""
    else:
        size = fmt_value(shift, unit)
        size = size if not finite[0] or size.startswith("-") else "+" + size
        base = (f"{fmt_value(mean, unit).removesuffix(' ' + unit)} +- {fmt_value(sigma, unit)}"
                if finite[1] and finite[2] else "")
    text = f"{name} residual moved by {size}" + (f" (baseline {base})" if base else "")
    ct = detail.get("change_time")
    if ct is not None and now is not None and math.isfinite(ct):
        ago = max(0.0, now - ct)
        text += f", since about {ago:.0f} s before" if ago < 120 else f", since about {ago / 60:.0f} min before"
    return text


def transition_log_line(tr: Transition) -> str:
    """A transition as one log line: :func:`transition_line` without its column padding.

    Source time, RAISE or clear, priority, check and object, level, the value (raise) or peak (clear)
    in its unit, the limit and the line state; a drift's raise adds what moved, by how much and since when; a raise
    names the things to look at (:func:`spanwatch.rules.base.blames_of`: a draw alarm its zone's tension tag and
    rollers) when they are more than its object.
    """
    text = " ".join(transition_line(tr)[0].split())
    if tr.event == "raise" and tr.point.kind == "drift" and tr.detail:
        text += "; " + drift_text(tr.point.object_id, dict(tr.detail), now=tr.t)
    if tr.event == "raise" and tr.point.blames and tr.point.blames != (tr.point.object_id,):
        text += "; look at " + ", ".join(tr.point.blames)
    return text


def mmss(seconds: float) -> str:
    """Seconds as ``mm:ss`` (hours roll into the minutes)."""
    return _mmss(seconds)


def _clock(t: float) -> str:
    from datetime import UTC, datetime

    return datetime.fromtimestamp(t, UTC).strftime("%H:%M:%S.%f")[:-4] + "Z"


def _mmss(seconds: float) -> str:
    s = max(0, int(seconds))
    return f"{s // 60:02d}:{s % 60:02d}"
