"""The shift report as one self-contained HTML page: inline CSS (with a print stylesheet), the plots as PNG
``data:`` URIs, no script and nothing fetched, so it opens offline, can be mailed as one file and prints (or is
printed to PDF by a headless browser) as it shows.

Every time shown is the plant's local time (:class:`spanwatch.monitor.shifts.PlantClock`).
"""

from __future__ import annotations

import base64
import html
import math
from collections.abc import Sequence
from typing import Any

from spanwatch.monitor import reportplots as P
from spanwatch.monitor.shiftreport import NO_TRENDS, SAFETY_TEXT, ShiftReport, fmt_duration, shown_value
from spanwatch.rules import kpi as K

SECTIONS = ("Summary", "Safety note", "Alarm timeline", "Alarm rate per 10 minutes", "Top contributors",
            "Chattering, fleeting and standing alarms", "Time in alarm per check", "Shelved and out of service",
            "Alarm episodes", "Check trends")

CSS = """
body { font-family: "DejaVu Sans", Arial, Helvetica, sans-serif; color: #111; margin: 1.5em auto; max-width: 60em;
       line-height: 1.35; padding: 0 1em; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.2em; border-bottom: 2px solid #333; margin-top: 1.6em; padding-bottom: 0.1em; }
h3 { font-size: 1.0em; margin: 1.2em 0 0.3em; }
.meta { color: #333; margin: 0.1em 0; }
.safety { border: 2px solid #000; padding: 0.5em 0.8em; background: #f4f4f4; font-weight: bold; }
table { border-collapse: collapse; margin: 0.4em 0 0.8em; font-size: 0.9em; }
th, td { border: 1px solid #888; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #e6e6e6; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
td.nw { white-space: nowrap; }
.over { font-weight: bold; text-decoration: underline; }
img { max-width: 100%; height: auto; display: block; margin: 0.3em 0; }
.episode { border-top: 1px solid #999; padding-top: 0.4em; margin-top: 0.8em; display: flex; flex-wrap: wrap;
           gap: 1em; }
.episode .text { flex: 1 1 20em; font-size: 0.9em; }
.episode .plot { flex: 1 1 30em; }
.note { color: #333; font-style: italic; }
nav ol { columns: 2; font-size: 0.9em; }
@media print {
  @page { size: A4; margin: 14mm 12mm; }
  body { max-width: none; margin: 0; padding: 0; font-size: 10pt; }
  nav { display: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  img, table, .episode, figure { break-inside: avoid; page-break-inside: avoid; }
  a { color: inherit; text-decoration: none; }
  .safety { background: none; }
}
"""


def _e(x: object) -> str:
    return html.escape(str(x), quote=True)


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'


def _anchor(title: str) -> str:
    return "".join(ch if ch.isalnum() else "-" for ch in title.lower()).strip("-")


def _table(head: Sequence[str], rows: Sequence[Sequence[object]], numeric: Sequence[int] = (),
           nowrap: Sequence[int] = (), strong: int | None = None) -> str:
    """A table; ``strong``: the column whose cells starting with "above" are set apart (bold, underlined)."""
    th = "".join(f"<th>{_e(h)}</th>" for h in head)

    def cls(i: int, c: object) -> str:
        names = [n for n, cols in (("n", numeric), ("nw", nowrap)) if i in cols]
        if i == strong and str(c).startswith("above"):
            names.append("over")
        return f' class="{" ".join(names)}"' if names else ""

    body = "".join("<tr>" + "".join(f"<td{cls(i, c)}>{_e(c)}</td>" for i, c in enumerate(r)) + "</tr>"
                   for r in rows)
    return f"<table><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"


def render(r: ShiftReport) -> str:
    """The whole page as a string."""
    c = r.clock
    k = r.kpis
    parts: list[str] = []

    def section(title: str, body: str) -> None:
        parts.append(f'<section id="{_anchor(title)}"><h2>{_e(title)}</h2>{body}</section>')

    runs = ", ".join(f"{x['id']} ({x['mode']}, {c.fmt(x['from'])} to {c.fmt(x['to'])})" for x in r.runs) \
        or "none: the history holds no data of this line in the window"
    header = (f"<h1>Shift report: {_e(r.line)}</h1>"
              f'<p class="meta">{_e(r.plant)}</p>'
              f'<p class="meta"><b>{_e(r.label)}</b>: {_e(c.fmt(r.start))} to {_e(c.fmt(r.end))} '
              f"(plant time, {_e(c.tz.key)}; {_e(fmt_duration(r.end - r.start))})</p>"
              f'<p class="meta">Runs covered: {_e(runs)}</p>'
              f'<p class="meta">Configuration: {_e(r.config_source)}</p>')
    nav = "<nav><ol>" + "".join(f'<li><a href="#{_anchor(s)}">{_e(s)}</a></li>' for s in SECTIONS) + "</ol></nav>"
    parts.append(header + nav)

    def judged(x: float, ok: float, most: float | None = None) -> str:
        if most is not None and x > most:
            return "above manageable"
        return ("above acceptable" if most is not None else "above") if x > ok else "within"

    summary = _table(["", "measured", "benchmark", "judged"], [
        ("annunciated alarms raised", k.raises, "", ""),
        ("advisory alarms raised", k.advisory_raises, "not annunciated", ""),
        ("raised while shelved, suppressed or out of service", k.hidden_raises, "not annunciated", ""),
        ("alarms per 10 min, average (per operator)", f"{k.avg_per_10min:.2f}",
         f"~{K.PER_10MIN_ACCEPTABLE:g} acceptable, ~{K.PER_10MIN_MANAGEABLE:g} manageable",
         judged(k.avg_per_10min, K.PER_10MIN_ACCEPTABLE, K.PER_10MIN_MANAGEABLE)),
        ("alarms per 10 min, maximum", f"{k.max_per_10min:g}", "", ""),
        ("10-min slots above ~1 / above ~2", f"{100 * k.share_slots_over_1:.0f} % / {100 * k.share_slots_over_2:.0f} %",
         "", ""),
        ("alarms per hour, average", f"{k.avg_per_hour:.1f}",
         f"~{K.PER_HOUR_ACCEPTABLE:g} acceptable, ~{K.PER_HOUR_MANAGEABLE:g} manageable",
         judged(k.avg_per_hour, K.PER_HOUR_ACCEPTABLE, K.PER_HOUR_MANAGEABLE)),
        ("time in flood", f"{100 * k.flood_time_share:.1f} % ({len(k.floods)} floods)",
         f"< ~{100 * K.FLOOD_TIME_SHARE_MAX:g} %", judged(k.flood_time_share, K.FLOOD_TIME_SHARE_MAX)),
        ("share of the top 10 alarms", f"{100 * k.top_share:.0f} %", f"<= ~{100 * K.TOP10_SHARE_MAX:g} %",
         judged(k.top_share, K.TOP10_SHARE_MAX) if k.raises else ""),
        ("chattering alarms", len(k.chattering_keys), "0", judged(len(k.chattering_keys), 0)),
        ("fleeting episodes", k.fleeting, "0", judged(k.fleeting, 0)),
        ("standing alarms", len(k.stale), f"< {K.STALE_MAX_PER_DAY} a day",
         judged(len(k.stale), K.STALE_MAX_PER_DAY - 1)),
        ("episodes active in the window", len(r.episodes), "", ""),
    ], numeric=(1,), strong=3)
    section("Summary", summary + '<p class="note">Benchmarks per operator position: ANSI/ISA-18.2-2016 clause 16, '
            "IEC 62682:2014 and EEMUA 191 (3rd ed.), from memory (see the README).</p>")
    section("Safety note", f'<p class="safety">{_e(SAFETY_TEXT)}</p>')
    section("Alarm timeline", _img(P.timeline(r.episodes, r.start, r.end, c), "alarm episodes per object"))
    section("Alarm rate per 10 minutes", _img(P.rate_plot(k.slot_counts, r.start, r.end, c, operators=k.operators,
                                                          acceptable=K.PER_10MIN_ACCEPTABLE,
                                                          manageable=K.PER_10MIN_MANAGEABLE,
                                                          flood=k.thresholds.flood_start),
                                              "alarms per 10 minutes with the benchmark lines"))
    top = _table(["alarm", "raises", "share"], [(t.key, t.count, f"{100 * t.share:.1f} %") for t in k.top],
                 numeric=(1, 2)) if k.top else "<p>No annunciated alarm was raised.</p>"
    section("Top contributors", top + f'<p class="note">Share of the {k.raises} annunciated raises; the top '
            f"{k.thresholds.top_n} together: {100 * k.top_share:.0f} %.</p>")
    section("Chattering, fleeting and standing alarms", _nuisance(r))
    section("Time in alarm per check", (_table(["check", "time in alarm", "share of the window", "episodes"], [
        (x["check"], fmt_duration(x["seconds"]), f"{100 * x['share']:.1f} %", x["episodes"]) for x in r.in_alarm],
        numeric=(1, 2, 3)) + _img(P.in_alarm_plot(r.in_alarm), "time in alarm per check")) if r.in_alarm
        else "<p>No alarm was active.</p>")
    section("Shelved and out of service", _hidden(r))
    section("Alarm episodes", _episodes(r))
    section("Check trends", _trends(r))
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>Shift report {_e(r.line)} {_e(r.label)}</title><style>{CSS}</style></head><body>"
            + "\n".join(parts) + "</body></html>\n")


def _nuisance(r: ShiftReport) -> str:
    k = r.kpis
    th = k.thresholds
    rows = [("chattering", f"{th.chatter_count} or more raises within {th.chatter_window:g} s",
             ", ".join(k.chattering_keys) or "none", k.chattering_raises),
            ("fleeting", f"cleared within {th.fleeting_s:g} s", ", ".join(k.fleeting_keys) or "none", k.fleeting),
            ("standing", f"active {fmt_duration(th.stale_s)} or more",
             ", ".join(f"{s.key} since {r.clock.fmt(s.raised_t)}" for s in k.stale) or "none", len(k.stale))]
    return _table(["kind", "definition", "alarms", "raises"], rows, numeric=(3,))


def _hidden(r: ShiftReport) -> str:
    if not r.hidden:
        return "<p>No alarm was shelved or out of service during this window.</p>"
    c = r.clock
    rows = []
    for h in r.hidden:
        until = "" if h["what"] != "shelved" else (
            "until it clears" if h["one_shot"] else f"shelved until {c.fmt(h['until'])}"
            if h["until"] is not None and math.isfinite(h["until"]) else "")
        to = c.fmt(h["to"]) if h["to"] is not None else "still at the end"
        rows.append((h["key"], h["what"], c.fmt(h["from"]), to, h["ended_by"] or until, h["user"] or "?",
                     h["comment"] or "(no reason given)"))
    return _table(["alarm", "state", "from", "to", "ended by", "who", "why"], rows, nowrap=(2, 3, 5))


def _episodes(r: ShiftReport) -> str:
    if not r.details:
        return "<p>No alarm was raised in this window.</p>"
    c = r.clock
    minutes_of: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for m in r.trends:
        minutes_of.setdefault((str(m["check"]), str(m["object"])), []).append(m)
    out = []
    for d in r.details:
        unit = str(d.get("unit") or "")
        near = [m for m in minutes_of.get((str(d["check"]), str(d["object"])), [])
                if abs(float(m["t"]) - float(d["raised_t"])) <= 600.0]
        facts = [("raised", c.fmt(d["raised_t"], seconds=True)),
                 ("cleared", c.fmt(d["cleared_t"], seconds=True) if d.get("cleared_t") else "still active"),
                 ("lasted", fmt_duration(float(d["cleared_t"]) - float(d["raised_t"])) if d.get("cleared_t")
                  else "-"),
                 ("value at the raise", shown_value(d.get("value"), unit)),
                 ("peak", shown_value(d.get("peak"), unit)), ("limit", _limit(d, unit)),
                 ("line state", d.get("line_state") or "-")]
        if d.get("hidden"):
            facts.append(("shown to the operator", "no: shelved, suppressed or out of service"))
        for label, key in (("cause", "cause"), ("if ignored", "consequence"), ("do", "corrective_action")):
            if d.get(key):
                facts.append((label, d[key]))
        if d.get("response_time") is not None:
            facts.append(("respond within", f"{d['response_time']:g} s"))
        dl = "".join(f"<tr><th>{_e(a)}</th><td>{_e(b)}</td></tr>" for a, b in facts)
        acts = [a for a in d.get("actions", []) if a.get("origin") == "operator" or a.get("comment")]
        said = "".join(f"<li>{_e(c.fmt(a['t'], seconds=True))} {_e(a['action'].replace('_', ' '))}"
                       f"{' by ' + _e(a['user']) if a.get('user') else ''}"
                       f"{': ' + _e(a['comment']) if a.get('comment') else ''}</li>" for a in acts)
        comments = f"<p><b>Operator actions and comments</b></p><ul>{said}</ul>" if said else \
            "<p><b>Operator actions and comments:</b> none</p>"
        title = f"#{d['id']} {d['check']} on {d['object']}: {d['level']} ({d['priority']} priority)"
        out.append(f'<div class="episode"><div class="text"><h3>{_e(title)}</h3><table>{dl}</table>{comments}</div>'
                   f'<div class="plot">{_img(P.episode_plot(d, c, near), "signals around the raise of " + title)}'
                   "</div></div>")
    if r.more_episodes:
        out.append(f'<p class="note">{r.more_episodes} more episodes raised in this window are not shown in full '
                   "(advisory ones left out first); spanwatch alarms lists them and spanwatch alarms show ID details "
                   "one.</p>")
    return "".join(out)


def _trends(r: ShiftReport) -> str:
    if not r.trends:
        return f"<p>{_e(NO_TRENDS)}.</p>"
    by: dict[str, list[dict[str, Any]]] = {}
    for m in r.trends:
        by.setdefault(str(m["check"]), []).append(m)
    out = []
    for check, rows in by.items():
        limits = {o: pts for (kind, o), pts in r.limits.items() if kind == check}
        out.append(_img(P.trend_plot(check, rows, limits, r.start, r.end, r.clock), f"trend of {check}"))
    return "".join(out)


def _limit(d: dict[str, Any], unit: str) -> str:
    """The limit as its alarm reads it: ``>= 0.8``, ``|x| >= 1.00 x band``; a flag's is the flag being set."""
    from spanwatch.monitor.present import fmt_limit

    lim = d.get("limit")
    if unit == "flag":
        return "flag set"
    if lim is None or not math.isfinite(lim):
        return "-"
    direction = d.get("direction")
    if direction not in ("high", "low", "abs"):
        return shown_value(lim, unit)
    text = fmt_limit(float(lim), unit, direction)
    return text if unit.startswith("%") else f"{text} {unit}".rstrip()
