"""The commissioning commands on a recording: ``stats`` (the distribution of each check's value per line state),
``tune`` (a check's limit and on-delay swept, with the setting to paste), ``compare`` (two configs alarm by alarm)
and ``mark`` (labelled events kept beside the recording for ``tune``).

Output is at most 80 columns wide; ``--format csv`` / ``json`` give the same numbers for other tools.
Exit 2: a usage, configuration or recording problem (the message says what was expected).
"""

from __future__ import annotations

import math
import sys
from pathlib import Path
from typing import Annotated

import typer
from spanwatch.monitor.cli import SAFETY_NOTE, _one_of, app, check_plot, check_recording, fail, fail_config, open_line

RecArg = Annotated[Path, typer.Argument(help="Recording: CSV long form (.gz ok) or .parquet.")]
ConfigOpt = Annotated[Path, typer.Option("--config", "-c", help="Line configuration (TOML).")]
CheckOpt = Annotated[str | None, typer.Option("--check", help="Only this check kind, e.g. traction.")]
ObjectOpt = Annotated[str | None, typer.Option("--object", help="Only this roller, zone, winder or tag.")]




def wrap80(lines: list[str]) -> list[str]:
    from spanwatch.monitor.tuning import wrap80 as wrap

    return wrap(lines)


def _echo(lines: list[str]) -> None:
    typer.echo("\n".join(lines))


def _check_kind(check: str | None) -> None:
    from spanwatch.rules.catalog import CHECK_KINDS

    _one_of(check, sorted(CHECK_KINDS), "--check")


@app.command("stats")
def stats_cmd(
    recording: RecArg,
    config: ConfigOpt,
    check: CheckOpt = None,
    obj: ObjectOpt = None,
    plot: Annotated[Path | None, typer.Option(help="Write a plot (.png, .svg or .pdf): histogram and share of "
                                                   "time beyond, per line state.")] = None,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
) -> None:
    """Per check and object, the distribution of its value in each line state: percentiles, the share of valid
    time beyond the configured limits and a few around them, and the valid share."""
    import csv
    import json

    from spanwatch.monitor.checkstats import check_stats, render_table, rows, select_points
    from spanwatch.monitor.sweep import line_points

    _one_of(fmt, ("table", "csv", "json"), "--format")
    _check_kind(check)
    check_plot(plot)
    line = open_line(config)
    check_recording(recording)
    chosen = {(p.kind, p.object_id) for p in select_points(line_points(line), check, obj)}
    if plot is not None and len(chosen) > 12:
        fail(f"--plot: {len(chosen)} checks x objects make too many panels (at most 12): narrow with --check "
             "or --object")
    try:
        stats = check_stats(line, recording, check, obj)
    except ValueError as exc:
        fail(str(exc))
    if plot is not None:
        from spanwatch.monitor.tuneplots import stats_plot

        stats_plot(stats, plot)
    if fmt == "json":
        typer.echo(json.dumps(rows(stats), indent=1))
    elif fmt == "csv":
        out = rows(stats)
        w = csv.DictWriter(sys.stdout, fieldnames=[k for k in out[0] if k != "beyond"] if out else ["check"],
                           extrasaction="ignore", lineterminator="\n")
        w.writeheader()
        w.writerows(out)
    else:
        _echo(wrap80([*render_table(stats), *([f"plot: {plot}"] if plot else []), SAFETY_NOTE]))


def parse_limits(text: str) -> list[float]:
    """``A:B:N``: N limits from A to B (numbers, or quantities such as 2%); ValueError says what was expected."""
    import numpy as np
    from spanwatch.monitor import units as U

    parts = text.split(":")
    if len(parts) != 3:
        raise ValueError(f"expected FROM:TO:COUNT such as 0.5:1.0:11 or 2%:6%:9, got {text!r}")
    try:
        a, b = (U.to_si(x.strip(), U.DIMENSIONLESS) for x in parts[:2])
    except (ValueError, TypeError) as exc:
        raise ValueError(f"expected FROM:TO:COUNT with numbers such as 0.5 or 2%, got {text!r} ({exc})") from None
    if not parts[2].strip().isdigit() or not 2 <= int(parts[2]) <= 200:
        raise ValueError(f"expected a COUNT from 2 to 200 in FROM:TO:COUNT, got {parts[2]!r}")
    if not (math.isfinite(a) and math.isfinite(b)) or a == b:
        raise ValueError(f"expected two different finite limits in FROM:TO:COUNT, got {text!r}")
    return [float(f"{x:.6g}") for x in np.linspace(a, b, int(parts[2]))]


def parse_delays(text: str) -> list[float]:
    """``0s,2s,5s``: on-delays (durations; a bare number is seconds)."""
    from spanwatch.monitor import units as U

    out = []
    for part in text.split(","):
        try:
            text = part.strip()
            bare = text.replace(".", "", 1).isdigit()
            s = U.to_si(float(text) if bare else text, U.TIME, default_unit="s")
        except (ValueError, TypeError):
            raise ValueError(f"expected durations separated by commas such as 0s,2s,5s, got {part.strip()!r}") from None
        if not (math.isfinite(s) and 0 <= s <= 3600):
            raise ValueError(f"expected on-delays from 0 to 1 h, got {part.strip()!r}")
        out.append(s)
    return list(dict.fromkeys(out))


def parse_rate(text: str) -> float:
    """``N/DURATION`` (``1/8h``, ``2/h``, ``0.5 / 1 h``) -> raises per hour."""
    from spanwatch.monitor import units as U

    count, sep, per = text.partition("/")
    try:
        n = float(count) if sep else math.nan
        d = U.to_si(per.strip() if per.strip()[:1].isdigit() else f"1 {per.strip()}", U.TIME)
    except (ValueError, TypeError):
        n, d = math.nan, math.nan
    if not (math.isfinite(n) and n >= 0 and math.isfinite(d) and d > 0):
        raise ValueError(f"expected COUNT/DURATION such as 1/8h or 2/h, got {text!r}")
    return n * 3600.0 / d


@app.command("tune")
def tune_cmd(
    recording: RecArg,
    config: ConfigOpt,
    check: Annotated[str, typer.Option("--check", help="The check kind to tune, e.g. traction.")],
    obj: ObjectOpt = None,
    level: Annotated[str, typer.Option(help="The limit to sweep: warning or alarm.")] = "warning",
    limits: Annotated[str | None, typer.Option(help="FROM:TO:COUNT, e.g. 0.5:1.0:11 or 2%:6%:9 (default: from "
                                                     "the values the recording holds).")] = None,
    on_delay: Annotated[str | None, typer.Option("--on-delay", help="On-delays to sweep too, e.g. 0s,2s,5s "
                                                                    "(default: as configured).")] = None,
    target_rate: Annotated[str, typer.Option(help="False raises allowed, COUNT/DURATION, e.g. 1/8h.")] = "1/8h",
    grace: Annotated[float, typer.Option(help="Seconds after a labelled event's end in which a raise still "
                                              "counts as found.", min=0.0)] = 60.0,
    guard: Annotated[int, typer.Option(help="Steps of the limit grid to move away from normal beyond the most "
                                            "sensitive setting that meets the target.", min=0)] = 1,
    plot: Annotated[Path | None, typer.Option(help="Write a plot (.png, .svg or .pdf).")] = None,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
) -> None:
    """Sweep a check's limit (and on-delay) over a recording: alarms, time in alarm and, against labelled events
    (the simulator's truth file, spanwatch mark), what each setting finds; suggest the setting for a target
    rate of false raises and print the config lines to paste."""
    import csv
    import json

    from spanwatch.monitor.checkstats import select_points
    from spanwatch.monitor.marks import MarksError, labels_for
    from spanwatch.monitor.shifts import PlantClock
    from spanwatch.monitor.sweep import keep_results, line_points
    from spanwatch.monitor.tuning import paste_lines, render, tune

    _one_of(fmt, ("table", "csv", "json"), "--format")
    _check_kind(check)
    _one_of(level, ("warning", "alarm"), "--level")
    check_plot(plot)
    try:
        grid = parse_limits(limits) if limits is not None else None
    except ValueError as exc:
        fail(f"--limits: {exc}")
    try:
        delays = parse_delays(on_delay) if on_delay is not None else None
    except ValueError as exc:
        fail(f"--on-delay: {exc}")
    try:
        target = parse_rate(target_rate)
    except ValueError as exc:
        fail(f"--target-rate: {exc}")
    line = open_line(config)
    check_recording(recording)
    points = [p for p in select_points(line_points(line), check, obj)]
    if not points:
        objs = sorted({p.object_id for p in line_points(line) if p.kind == check})
        fail(f"--object: expected an object {check} runs on ({', '.join(objs) or 'none on this line'}), got {obj!r}"
             if obj else f"--check: {check} has no alarm point on this line (disabled?)")
    if not any(p.level == level for p in points):
        fail(f"--level: {check} has no {level} limit here; expected one of "
             f"{', '.join(sorted({p.level for p in points}))}")
    try:
        labels = labels_for(recording)
    except MarksError as exc:
        fail(str(exc))
    try:
        kept = keep_results(line, recording, check, obj)
        res = tune(kept, line, level=level, limits=grid, on_delays=delays, labels=labels, target_per_hour=target,
                   grace=grace, guard=guard)
    except ValueError as exc:
        fail(str(exc))
    sec = line.config.checks.get(check)
    overrides = [o for o, t in (sec.overrides.items() if sec else ()) if getattr(t, level) is not None]
    if plot is not None:
        from spanwatch.monitor.tuneplots import tune_plot

        tune_plot(res, plot)
    if fmt in ("csv", "json"):
        rows = [{"limit": s.limit, "on_delay_s": s.on_delay, "raises": s.raises, "false_raises": s.false_raises,
                 "false_per_hour": round(s.false_rate, 6) if math.isfinite(s.false_rate) else None,
                 "time_in_alarm_s": round(s.time_in_alarm, 3), "found": s.detected, "events": len(res.relevant),
                 "mean_delay_s": round(s.mean_delay, 3) if s.delays else None, "order_ok": s.order_ok,
                 "suggested": s is res.suggestion} for s in res.settings]
        if fmt == "json":
            typer.echo(json.dumps({"check": res.kind, "object": res.object_id, "level": res.level, "unit": res.unit,
                                   "target_per_hour": target, "settings": rows,
                                   "paste": paste_lines(res, res.suggestion, overrides) if res.suggestion else None},
                                  indent=1))
        else:
            w = csv.DictWriter(sys.stdout, fieldnames=list(rows[0]), lineterminator="\n")
            w.writeheader()
            w.writerows(rows)
        return
    clk = PlantClock.of(line.config)
    _echo([*render(res, lambda t: clk.fmt(t, seconds=True), overrides), *([f"plot: {plot}"] if plot else []),
           *wrap80(["", SAFETY_NOTE])])


@app.command("compare")
def compare_cmd(
    recording: RecArg,
    config: Annotated[list[Path], typer.Option("--config", "-c", help="The line configuration A; given twice, "
                                                                      "the second is B.")],
    sets: Annotated[list[str] | None, typer.Option("--set", help="B is A (or the second --config) with this "
                                                                 "change, KEY.PATH=VALUE, e.g. "
                                                                 "checks.traction.alarm=0.9; repeat for more.")]
    = None,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
) -> None:
    """The same recording through two configs (A and B, or A and A with --set changes): alarm by alarm side by
    side, and the difference in raises and time in alarm per check."""
    import csv
    import json

    from spanwatch.monitor.compare import compare, config_with, render, rows, run_alarms
    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.shifts import PlantClock

    _one_of(fmt, ("table", "csv", "json"), "--format")
    sets = sets or []
    if not 1 <= len(config) <= 2 or (len(config) == 1 and not sets):
        fail(f"expected --config A --config B, or --config A with one or more --set KEY.PATH=VALUE; got "
             f"{len(config)} --config and {len(sets)} --set")
    line_a = open_line(config[0])
    try:
        line_b = config_with(config[-1], sets)
        from spanwatch.monitor.checkset import alarm_points, build_checks, suppression_rules

        checks = build_checks(line_b)
        suppression_rules(line_b, alarm_points(line_b, checks), checks)
    except ConfigError as exc:
        fail_config(exc)
    check_recording(recording)
    try:
        a, b = run_alarms(line_a, recording), run_alarms(line_b, recording)
    except ValueError as exc:
        fail(str(exc))
    c = compare(a, b)
    if fmt == "json":
        typer.echo(json.dumps({"a": str(config[0]), "b": line_b.file, "alarms": rows(c),
                               "per_check": {k: {"raises_a": na, "raises_b": nb, "seconds_a": round(c.times[k][0], 3),
                                                 "seconds_b": round(c.times[k][1], 3)}
                                             for k, (na, nb) in c.counts.items()}}, indent=1))
        return
    if fmt == "csv":
        out = rows(c)
        w = csv.DictWriter(sys.stdout, fieldnames=["key", "a_raised", "a_cleared", "a_seconds", "b_raised",
                                                   "b_cleared", "b_seconds"], lineterminator="\n")
        w.writeheader()
        w.writerows(out)
        return
    clk = PlantClock.of(line_a.config)
    _echo(wrap80([*render(c, lambda t: clk.fmt(t, seconds=True), str(config[0]), line_b.file), "",
                  SAFETY_NOTE]))


@app.command("mark")
def mark_cmd(
    recording: RecArg,
    start: Annotated[str | None, typer.Option("--from", help="Start of the event: plant time (with --config) "
                                                             "such as \"2026-03-02 06:01\", or ISO 8601 with an "
                                                             "offset.")] = None,
    end: Annotated[str | None, typer.Option("--to", help="End of the event, as --from.")] = None,
    label: Annotated[str | None, typer.Option(help="What happened, e.g. \"pull 2 slipped\".")] = None,
    objects: Annotated[list[str] | None, typer.Option("--object", help="The roller, zone, winder or tag an "
                                                                       "alarm must name to be on the right "
                                                                       "object (repeat for more; none: any).")]
    = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help="Line configuration: its time zone "
                                                                       "reads --from and --to.")] = None,
) -> None:
    """Label an event in a recording (kept in X.marks.json beside it) for spanwatch tune; without --from and --to,
    list the marks and the simulator's faults it already has."""
    from spanwatch.monitor.marks import Label, MarksError, add_mark, labels_for, marks_path_for
    from spanwatch.monitor.shifts import PlantClock

    check_recording(recording)
    clk = PlantClock.of(open_line(config).config) if config is not None else PlantClock("UTC")
    if start is None and end is None and label is None and not objects:
        try:
            labels = labels_for(recording)
        except MarksError as exc:
            fail(str(exc))
        if not labels:
            typer.echo(f"{recording}: no labelled events (no truth file, no marks)")
        elif config is None:
            typer.echo("times in UTC (--config FILE shows them in plant time)")
        for lb in labels:
            typer.echo(f"{clk.fmt(lb.start, seconds=True)} to {clk.fmt(lb.end, seconds=True, date_too=False)} "
                       f"{lb.origin:5} {lb.label}" + (f" ({', '.join(lb.objects)})" if lb.objects else ""))
        return
    if start is None or end is None or not (label or "").strip():
        fail("mark: expected --from, --to and --label together (or none of them, to list the marks)")
    try:
        t0, t1 = clk.parse(start), clk.parse(end)
    except ValueError as exc:
        fail(f"--from/--to: {exc}")
    if not t1 > t0:
        fail(f"--to: expected a time after --from, got {start} .. {end}")
    path = marks_path_for(recording)
    try:
        n = add_mark(path, recording, Label((label or "").strip(), t0, t1, tuple(objects or ())), iso=clk.iso)
    except MarksError as exc:
        fail(str(exc))
    except OSError as exc:
        fail(f"{path}: cannot write it ({exc.strerror or exc})")
    typer.echo(f"marked {label!r} from {clk.fmt(t0, seconds=True)} to {clk.fmt(t1, seconds=True)} in {path} "
               f"({n} mark{'s' if n != 1 else ''})")
