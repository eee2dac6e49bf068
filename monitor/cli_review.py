"""The review commands: ``spanwatch alarms`` (the alarm list, ``alarms show ID``), ``spanwatch kpi`` and
``spanwatch runs``, in the plant's local time (registered on the app of :mod:`spanwatch.monitor.cli`).

The plant's clock (time zone and shift calendar) comes from ``--config FILE`` when given, else from the
configuration the history kept for the run (``config_versions``), else UTC.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from spanwatch.monitor.cli import (
    DB_PASSWORD_HELP,
    DB_TIMEOUT,
    _history_url,
    _one_of,
    app,
    fail,
    history_errors,
    iso_or,
    open_history_reader,
    open_line,
)

if TYPE_CHECKING:
    from spanwatch.monitor.shifts import PlantClock
    from sqlalchemy.engine import Engine

DB_HELP = ("History: a SQLite file path or an SQLAlchemy URL (default: the config's daemon.history, else "
           "spanwatch.db).")
CONFIG_HELP = ("Line configuration (TOML): its time zone and shift calendar (default: the configuration the history "
               "kept for the run, else UTC).")
TIME_HELP = "plant time such as \"2026-03-02 06:00\", or ISO 8601 with an offset"


def terminal_width() -> int | None:
    """The terminal's width when standard output is one (``COLUMNS`` overrides it); None when piped."""
    return shutil.get_terminal_size().columns if sys.stdout.isatty() else None


def _open(db: str | None, db_password: str | None, config: Path | None, db_timeout: float
          ) -> tuple[Engine, str, PlantClock | None]:
    """The history opened to read, the URL to show, and the clock of ``--config`` (None without it)."""
    from spanwatch.monitor.shifts import PlantClock

    line = open_line(config) if config is not None else None
    url, shown = _history_url(db, db_password, line, reading=True)
    return open_history_reader(url, db_timeout), shown, (PlantClock.of(line.config) if line is not None else None)


def _kept_clock(engine: Engine, run: dict[str, Any] | None) -> PlantClock:
    """The clock of the configuration the history kept for ``run``, else UTC."""
    from spanwatch.connectors.history.queries import kept_config
    from spanwatch.monitor.alarmview import clock_from_kept
    from spanwatch.monitor.shifts import PlantClock

    if run is None:
        return PlantClock()
    return clock_from_kept(kept_config(engine, str(run["line"]), str(run["config_hash"]))) or PlantClock()


def _window(clock: PlantClock, since: str | None, until: str | None, shift: str | None, day: str | None,
            now: float) -> tuple[float | None, float | None, str]:
    """``--since/--until`` or ``--shift [--date]`` -> (start, end, a label); exits 2 with what was expected."""
    if day is not None and shift is None:
        fail("--date: give it with --shift NAME (the day the shift starts)")
    if shift is not None:
        if since is not None or until is not None:
            fail("--shift: give either --shift (with --date) or --since/--until, not both")
        try:
            a, b, label = clock.resolve(shift, day, now)
        except ValueError as exc:
            fail(f"--shift: {exc}")
        return a, b, f"shift {label}"
    start = end = None
    try:
        start = clock.parse(since) if since is not None else None
    except ValueError as exc:
        fail(f"--since: {exc}")
    try:
        end = clock.parse(until) if until is not None else None
    except ValueError as exc:
        fail(f"--until: {exc}")
    if start is not None and end is not None and not start < end:
        fail(f"--since: expected a time before --until, got {since} .. {until}")
    label = ""
    if start is not None or end is not None:
        a, b = (clock.fmt(x) if x is not None else "..." for x in (start, end))
        label = f"active {a} to {b}"
    return start, end, label


def _echo_wrapped(text: str, width: int | None) -> None:
    import textwrap

    typer.echo(text if width is None else "\n".join(textwrap.wrap(text, max(20, width), subsequent_indent="  ")))


ALARMS_HELP = "\n\n".join((
    "List alarms in plant time, or show one: spanwatch alarms show ID.",
    "Which runs: --run N, or --all-runs; by default the latest run when the history holds only replays (and demos), "
    "else every live (daemon) run; --line first narrows to one line.",
    "A window (--since/--until or --shift) selects every alarm active during it, also one standing since before it.",
    "Times: plant time (--config, else the configuration the history kept, else UTC); on a terminal the list fits "
    "its width, piped nothing is cut. CSV and JSON give values, peaks and limits in the unit named in their unit "
    "column (a % unit in per cent), times in ISO 8601 with the plant's offset and in epoch seconds.",
))


@app.command("alarms", help=ALARMS_HELP)
def alarms_cmd(
    what: Annotated[list[str] | None, typer.Argument(help="show ID: one alarm in full (limits, rationalization, "
                                                          "the signals around its raise, actions).",
                                                     show_default=False)] = None,
    db: Annotated[str | None, typer.Option(help=DB_HELP, show_default=False)] = None,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help=CONFIG_HELP)] = None,
    line: Annotated[str | None, typer.Option(help="Only the runs of this line (a plant's history holds many).")]
    = None,
    run: Annotated[int | None, typer.Option(help="Only this run (spanwatch runs lists them).")] = None,
    all_runs: Annotated[bool, typer.Option("--all-runs", help="Every run, not only the default ones.")] = False,
    check: Annotated[str | None, typer.Option(help="Only this check kind, e.g. traction.")] = None,
    obj: Annotated[str | None, typer.Option("--object", help="Only this roller, zone, winder or tag.")] = None,
    priority: Annotated[str | None, typer.Option(
        help="Only this priority: advisory, low, medium, high, urgent.")] = None,
    level: Annotated[str | None, typer.Option(help="Only this level: warning or alarm.")] = None,
    since: Annotated[str | None, typer.Option(help=f"Alarms active at or after this time: {TIME_HELP}.")] = None,
    until: Annotated[str | None, typer.Option(help=f"Alarms raised before this time: {TIME_HELP}.")] = None,
    shift: Annotated[str | None, typer.Option(help="Alarms active during this shift of the line's calendar; "
                                                   "the latest such shift unless --date.")] = None,
    day: Annotated[str | None, typer.Option("--date", help="With --shift: the day it starts, YYYY-MM-DD.")] = None,
    active: Annotated[bool, typer.Option("--active", help="Only alarms not yet cleared.")] = False,
    sort: Annotated[str, typer.Option(help="time, duration (longest first), peak (farthest past its limit first) "
                                           "or priority (most urgent first).")] = "time",
    by: Annotated[str | None, typer.Option(help="A summary per check or per object instead of the list: count, "
                                                "time in alarm, peak, share.")] = None,
    wide: Annotated[bool, typer.Option("--wide", help="More columns: value at raise, limit, level, line state, "
                                                      "run, first-out, chattering (wider than 80 columns).")] = False,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 10.0,
) -> None:
    if what:
        if len(what) != 2 or what[0] != "show" or not what[1].isdigit():
            fail(f"expected nothing, or show ID (an alarm id as the list gives it), got {' '.join(what)!r}")
        _show_alarm(int(what[1]), db, db_password, config, fmt, db_timeout)
        return
    import csv
    import json
    import time

    from spanwatch.connectors.history.models import Level
    from spanwatch.connectors.history.queries import episode_extras, list_runs, review_episodes
    from spanwatch.monitor import alarmview as V
    from spanwatch.monitor.schema import PRIORITIES
    from spanwatch.rules.catalog import CHECK_KINDS

    _one_of(fmt, ("table", "csv", "json"), "--format")
    _one_of(check, sorted(CHECK_KINDS), "--check")
    _one_of(priority, PRIORITIES, "--priority")
    _one_of(level, [v.value for v in Level], "--level")
    _one_of(sort, V.SORTS, "--sort")
    _one_of(by, V.BY, "--by")
    if run is not None and all_runs:
        fail("--run: give either --run N or --all-runs, not both")
    engine, shown, clock = _open(db, db_password, config, db_timeout)
    with history_errors(shown, db_timeout):
        runs = list_runs(engine, line)
        if run is not None:
            chosen = [r for r in runs if r["id"] == run]
            if not chosen:
                fail(f"--run: no run {run}" + (f" of line {line!r}" if line else "") + " in this history "
                     "(spanwatch runs lists them)")
            run_ids, why = [run], f"run {run}"
        elif all_runs:
            run_ids, why = [r["id"] for r in runs], "every run"
        else:
            run_ids, why = V.default_runs(runs)
        if line is not None and not runs:
            fail(f"--line: no run of line {line!r} in this history (spanwatch runs lists the lines)")
        by_id = {r["id"]: r for r in runs}
        latest = by_id[max(run_ids)] if run_ids else None
        clock = clock or _kept_clock(engine, latest)
        now = time.time()
        start, end, label = _window(clock, since, until, shift, day, now)
        rows = review_episodes(engine, run_ids=run_ids, kind=check, object_id=obj, priority=priority, level=level,
                               start=start, end=end, active_only=active)
        extras = episode_extras(engine, [int(r["id"]) for r in rows])
    engine.dispose()
    for r in rows:
        r.update(extras.get(int(r["id"]), dict.fromkeys(("state", "first_out", "chattering", "cause", "consequence",
                                                          "corrective_action", "response_time"))))
    # an alarm still active counts to its run's end of data (a replay), or to now (a live run)
    ends = {i: (r["data_end_t"] if r["mode"] != "daemon" and r["data_end_t"] is not None else now)
            for i, r in by_id.items()}
    rows = V.sort_rows(rows, sort, ends)
    width = terminal_width()
    if by is not None:
        groups = V.summary(rows, by, ends, start, end)
        if fmt == "json":
            typer.echo(json.dumps(groups, indent=1))
        elif fmt == "csv":
            w = csv.DictWriter(sys.stdout, fieldnames=[by, "count", "time_in_alarm_s", "peak", "unit", "peak_check",
                                                       "share"], lineterminator="\n")
            w.writeheader()
            w.writerows(groups)
        else:
            _echo_wrapped(f"{len(rows)} alarm(s) by {by}, {why}; {label + '; ' if label else ''}"
                          f"plant time {clock.tz.key}", width)
            typer.echo("\n".join(V.summary_lines(groups, by, width)))
        return
    if fmt == "json":
        typer.echo(json.dumps([V.export_row(r, clock) for r in rows], indent=1))
    elif fmt == "csv":
        w = csv.DictWriter(sys.stdout, fieldnames=V.EXPORT_COLUMNS, lineterminator="\n")
        w.writeheader()
        w.writerows(V.export_row(r, clock) for r in rows)
    else:
        lines = {r.get("line") for r in rows}
        where = f" of line {line}" if line else (f" of line {next(iter(lines))}" if len(lines) == 1 else "")
        _echo_wrapped(f"{len(rows)} alarm(s), {why}{where}; {label + '; ' if label else ''}"
                      f"plant time {clock.tz.key}", width)
        if rows:
            typer.echo("\n".join(V.list_lines(rows, clock, ends, width, wide=wide)))


def _show_alarm(episode_id: int, db: str | None, db_password: str | None, config: Path | None, fmt: str,
                db_timeout: float) -> None:
    """``spanwatch alarms show ID``: one alarm in plant time with its limits, rationalization, the signals kept
    around its raise (min, mean and max before and after), transitions and actions (80 columns)."""
    import json
    import textwrap

    from spanwatch.connectors.history import episode_detail
    from spanwatch.connectors.history.queries import episode_context, list_runs
    from spanwatch.monitor import alarmview as V

    _one_of(fmt, ("table", "json"), "--format")
    engine, shown, clock = _open(db, db_password, config, db_timeout)
    with history_errors(shown, db_timeout):
        d = episode_detail(engine, episode_id)
        if d is None:
            fail(f"alarm {episode_id} is not in this history (spanwatch alarms lists the ids)")
        run = next((r for r in list_runs(engine) if r["id"] == d["run"]), None)
        clock = clock or _kept_clock(engine, run)
        context = V.context_summary(episode_context(engine, episode_id), float(d["raised_t"]))
    engine.dispose()
    unit = str(d["unit"])
    if fmt == "json":
        d.update({"line": run["line"] if run else None, "raised": clock.iso(d["raised_t"]),
                  "cleared": clock.iso(d["cleared_t"]) or None, "value": V.in_unit(d["value"], unit),
                  "peak": V.in_unit(d["peak"], unit), "limit": V.in_unit(d["limit"], unit),
                  "context_summary": context})
        for e in d["events"]:
            e.update(time=clock.iso(e["t"]), value=V.in_unit(e["value"], unit), limit=V.in_unit(e["limit"], unit))
        for a in d["actions"]:
            a["time"] = clock.iso(a["t"])
        typer.echo(json.dumps(d, indent=1, default=str))
        return

    def at(t: float | None) -> str:
        return clock.fmt(t, seconds=True) if t is not None else "-"

    dur = None if d["cleared_t"] is None else d["cleared_t"] - d["raised_t"]
    out = [f"alarm {d['id']}: {d['check']} {d['object']} {d['level']} ({d['priority']} priority)",
           f"  line     {run['line'] if run else '?'}; run {d['run']}; config {str(d['config_hash'])[:12]}",
           f"  raised   {at(d['raised_t'])} ({clock.tz.key})  value {V.full_value(d['value'], unit)}",
           f"  cleared  {at(d['cleared_t']) if d['cleared_t'] is not None else 'active'}"
           + (f" after {V.duration_text(dur)}" if dur is not None else "")
           + (f"  peak {V.full_value(d['peak'], unit)}" if d["peak"] is not None else ""),
           f"  limit    {V.full_value(d['limit'], unit)}; line state {d['line_state']}"]
    flags = [name for name in ("first_out", "chattering") if d.get(name)]
    if flags:
        out.append("  marked   " + ", ".join(f.replace("_", "-") for f in flags))
    if d.get("blames"):
        out += textwrap.wrap("look at  " + ", ".join(d["blames"]), 78, initial_indent="  ", subsequent_indent=" " * 11)
    if d["check"] == "drift" and d.get("detail"):
        from spanwatch.monitor.present import drift_text

        det = d["detail"]
        out += textwrap.wrap("drift    " + drift_text(str(d["object"]), det, now=float(d["raised_t"])), 78,
                             initial_indent="  ", subsequent_indent=" " * 11)
        if det.get("change_time") is not None:
            out.append(f"  changed  about {at(float(det['change_time']))} (estimate)")
    if any(d.get(k) for k in ("cause", "consequence", "corrective_action")):
        out.append("rationalization")
    for label, key in (("cause", "cause"), ("if ignored", "consequence"), ("do", "corrective_action")):
        if d.get(key):
            out += textwrap.wrap(str(d[key]), 78, initial_indent=f"  {label + ':':12}", subsequent_indent=" " * 14)
    if d.get("response_time") is not None:
        out.append(f"  {'respond in':12}{d['response_time']:g} s")
    if context:
        out.append("signals around the raise (min, mean, max)")
        out += V.context_lines(context)
    if d["events"]:
        out.append("transitions")
        out += [f"  {at(e['t'])} {e['event']:5} {V.full_value(e['value'], unit)} [{e['line_state']}]"
                for e in d["events"]]
    if d["actions"]:
        out.append("lifecycle and operator actions")
        for a in d["actions"]:
            who = f" by {a['user']}" if a["user"] else ""
            out += textwrap.wrap(f"{at(a['t'])} {a['action'].replace('_', ' ')}{who}: {a['before']} -> {a['after']}",
                                 78, initial_indent="  ", subsequent_indent="      ")
            if a["until"] is not None:
                out.append("      until " + ("it clears" if a["one_shot"] else at(a["until"])))
            if a["comment"]:
                out += textwrap.wrap(str(a["comment"]), 78, initial_indent="      ", subsequent_indent="      ")
    typer.echo("\n".join(out))


@app.command("runs")
def runs_cmd(
    db: Annotated[str | None, typer.Option(help=DB_HELP, show_default=False)] = None,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help=CONFIG_HELP)] = None,
    line: Annotated[str | None, typer.Option(help="Only the runs of this line.")] = None,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 10.0,
) -> None:
    """List the runs a history holds: line, source (a replayed file, live, a demo), config file and hash, the span
    of data in plant time, the number of alarms, and how it ended ("running?": still running, or killed and not
    yet found so by the next run of its line)."""
    import csv
    import json

    from spanwatch.connectors.history.queries import list_runs
    from spanwatch.monitor import alarmview as V

    _one_of(fmt, ("table", "csv", "json"), "--format")
    engine, shown, clock = _open(db, db_password, config, db_timeout)
    clocks: dict[tuple[str, str], PlantClock] = {}
    with history_errors(shown, db_timeout):
        runs = list_runs(engine, line)
        for r in runs:
            key = (str(r["line"]), str(r["config_hash"]))
            if key not in clocks:
                clocks[key] = clock or _kept_clock(engine, r)
    engine.dispose()

    def clock_of(r: dict[str, Any]) -> PlantClock:
        return clocks[(str(r["line"]), str(r["config_hash"]))]

    if fmt in ("json", "csv"):
        rows = []
        for r in runs:
            c = clock_of(r)
            rows.append({"id": r["id"], "line": r["line"], "mode": r["mode"], "source": r["source"],
                         "config_file": r["config_file"], "config_hash": r["config_hash"],
                         **{k.removesuffix("_t"): c.iso(r[k]) or None for k in ("started_t", "finished_t",
                                                                                "data_start_t", "data_end_t")},
                         **{k.removesuffix("_t") + "_epoch": r[k] for k in ("started_t", "finished_t", "data_start_t",
                                                                            "data_end_t")},
                         "timezone": c.tz.key, "alarms": r["alarms"], "end": r["end"]})
        if fmt == "json":
            typer.echo(json.dumps(rows, indent=1))
        else:
            w = csv.DictWriter(sys.stdout, fieldnames=list(rows[0]) if rows else ["id"], lineterminator="\n")
            w.writeheader()
            w.writerows(rows)
        return
    width = terminal_width()
    zones = sorted({clock_of(r).tz.key for r in runs})
    _echo_wrapped(f"{len(runs)} run(s)" + (f" of line {line}" if line else "") + f" in {shown}; plant time "
                  f"{', '.join(zones) or 'UTC'}", width)
    if runs:
        typer.echo("\n".join(V.runs_lines(runs, clock_of, width)))


@app.command("kpi")
def kpi_cmd(
    db: Annotated[str | None, typer.Option(help=DB_HELP, show_default=False)] = None,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help=CONFIG_HELP)] = None,
    since: Annotated[str | None, typer.Option(help=f"Window start: {TIME_HELP} (default: 24 h before --until).")]
    = None,
    until: Annotated[str | None, typer.Option(help=f"Window end, exclusive: {TIME_HELP} (default: now).")] = None,
    shift: Annotated[str | None, typer.Option(help="Instead of --since/--until: this shift of the calendar.")]
    = None,
    day: Annotated[str | None, typer.Option("--date", help="With --shift: the day it starts, YYYY-MM-DD.")] = None,
    line: Annotated[str | None, typer.Option(help="Only the runs of this line (default: every line).")] = None,
    operators: Annotated[int, typer.Option(help="Operator positions sharing the alarms.", min=1)] = 1,
    fmt: Annotated[str, typer.Option("--format", help="text or json.")] = "text",
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 10.0,
) -> None:
    """Alarm-system KPIs of a window (ISA-18.2 / IEC 62682 / EEMUA 191): alarm rates, floods, top 10, chattering,
    fleeting, stale alarms and the priority distribution, beside their benchmarks."""
    import json
    import time

    from spanwatch.connectors.history.queries import list_runs
    from spanwatch.monitor.kpireport import kpi_dict, kpi_text, load_episodes
    from spanwatch.rules.kpi import alarm_kpis

    _one_of(fmt, ("text", "json"), "--format")
    engine, shown, clock = _open(db, db_password, config, db_timeout)
    with history_errors(shown, db_timeout):
        if clock is None:
            runs = list_runs(engine, line)
            clock = _kept_clock(engine, runs[-1] if runs else None)
        now = time.time()
        start, end, label = _window(clock, since, until, shift, day, now)
        end = now if end is None else end
        start = end - 86400.0 if start is None else start
        if not start < end:
            fail(f"--since: expected a time before --until, got {since or iso_or(start)} .. {until or iso_or(end)}")
        episodes = load_episodes(engine, start, end, line)
    engine.dispose()
    k = alarm_kpis(episodes, start, end, operators=operators)
    if fmt == "json":
        typer.echo(json.dumps(kpi_dict(k), indent=1))
    else:
        head = f"{label}: " if label.startswith("shift") else ""
        typer.echo(f"{head}{clock.fmt(start)} to {clock.fmt(end)} plant time ({clock.tz.key})"
                   + (f", line {line}" if line else ""))
        typer.echo(kpi_text(k, width=min(terminal_width() or 80, 80), clock=clock))
