"""``spanwatch report``: the shift report of one line over a shift or a window, as an 80-column terminal summary and
one self-contained HTML page (:mod:`spanwatch.monitor.shiftreport`, :mod:`spanwatch.monitor.reporthtml`), and as a
PDF printed from that page by headless Chromium.

Times are the plant's: the configuration given with ``--config``, else the one the history kept for the line (the
configuration of its latest run), else UTC and no shift calendar.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Annotated, Any

import typer
from spanwatch.monitor.cli import (
    DB_PASSWORD_HELP,
    DB_TIMEOUT,
    _history_url,
    app,
    console,
    fail,
    history_errors,
    open_history_reader,
    open_line,
)

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run")
PDF_TIMEOUT_S = 180.0


def print_pdf(html_file: Path, pdf: Path, *, chromium: str = CHROMIUM, timeout: float = PDF_TIMEOUT_S) -> None:
    """Print ``html_file`` to ``pdf`` with headless Chromium (a throw-away profile). RuntimeError says what failed:
    Chromium missing, failing, or no PDF written."""
    exe = chromium if os.path.isfile(chromium) and os.access(chromium, os.X_OK) else shutil.which("chromium")
    if exe is None:
        raise RuntimeError(f"--pdf: headless Chromium is needed to print the PDF and {chromium} is missing; install "
                           "it (Debian: apt-get install chromium) or leave out --pdf (the HTML prints from any "
                           "browser)")
    pdf = pdf.resolve()
    with tempfile.TemporaryDirectory(prefix="spanwatch-chromium-") as profile:
        args = [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--no-pdf-header-footer",
                f"--print-to-pdf={pdf}", html_file.resolve().as_uri()]
        try:
            proc = subprocess.run(args, capture_output=True, text=True, timeout=timeout)
        except subprocess.TimeoutExpired:
            raise RuntimeError(f"--pdf: Chromium did not finish printing within {timeout:g} s") from None
        except OSError as exc:
            raise RuntimeError(f"--pdf: cannot start {exe}: {exc.strerror or exc}") from None
    if proc.returncode != 0 or not pdf.exists() or pdf.stat().st_size == 0:
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-3:]
        raise RuntimeError(f"--pdf: Chromium exited {proc.returncode} without writing {pdf}" +
                           (": " + " | ".join(tail) if tail else ""))


def _kept(engine: Any, line: str, config_hash: str | None = None) -> dict[str, Any] | None:
    """The configuration the history kept for ``line``: of ``config_hash`` if given, else of its latest run."""
    from spanwatch.connectors.history import config_at
    from spanwatch.connectors.history.reportreads import kept_config

    if config_hash is not None:
        return kept_config(engine, line, config_hash)
    k = config_at(engine, line, time.time() + 1.0, last_used=True)
    if k is None:
        return None
    return kept_config(engine, line, k["config_hash"])


def _clock_of(kept: dict[str, Any] | None) -> tuple[Any, str, list[dict[str, Any]]]:
    """A kept configuration -> (its plant clock, plant name, alarm points as dicts); UTC and nothing without one."""
    from spanwatch.monitor.shifts import PlantClock

    if kept is None:
        return PlantClock(), "", []
    cfg = kept["data"].get("config") or {}
    line = cfg.get("line") or {}
    try:
        clock = PlantClock(line.get("timezone") or "UTC", cfg.get("shifts") or {})
    except ValueError:
        clock = PlantClock()
    return clock, str(line.get("plant") or ""), list(kept["data"].get("alarm_points") or [])


@app.command("report")
def report_cmd(
    db: Annotated[str | None, typer.Option(help="History (SQLite path or SQLAlchemy URL); default: the config's.")]
    = None,
    config: Annotated[Path | None, typer.Option("--config", "-c", help="The line's configuration (plant time, "
                                                "shifts, limits); default: the one the history kept.")] = None,
    line_name: Annotated[str | None, typer.Option("--line", help="The line (default: the config's, or the only "
                                                                 "line in the history); all: every line of the "
                                                                 "history, a plant report (plant time and shifts "
                                                                 "of the first line's configuration).")] = None,
    shift: Annotated[str | None, typer.Option(help="A shift of the calendar, e.g. early (with --date, or the latest "
                                                   "one).")] = None,
    day: Annotated[str | None, typer.Option("--date", help="With --shift: the day it starts, YYYY-MM-DD.")] = None,
    t_from: Annotated[str | None, typer.Option("--from", help="Instead of --shift: window start, plant time "
                                                              "(\"2026-03-02 06:00\") or ISO 8601 with offset.")]
    = None,
    t_to: Annotated[str | None, typer.Option("--to", help="With --from: window end, exclusive.")] = None,
    out: Annotated[Path, typer.Option(help="The HTML report to write.")] = Path("report.html"),
    pdf: Annotated[Path | None, typer.Option(help="Also print the report to this PDF (headless Chromium).")] = None,
    operators: Annotated[int, typer.Option(help="Operator positions sharing the alarms.", min=1)] = 1,
    max_episodes: Annotated[int, typer.Option(help="Alarm episodes shown in full with their signals.", min=0)] = 30,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 10.0,
) -> None:
    """A shift report: alarm timeline, rate against the ISA-18.2 / EEMUA 191 benchmarks, top contributors,
    nuisance alarms, time in alarm, shelved alarms, each episode's signals, check trends; terminal summary, HTML
    and PDF. Advisory only: not a safety function."""
    from spanwatch.connectors.history.reportreads import line_names, runs_in_window
    from spanwatch.monitor.reporthtml import render
    from spanwatch.monitor.shiftreport import gather, summary_text
    from spanwatch.monitor.shifts import PlantClock

    if shift is None and t_from is None:
        fail("report: give --shift NAME (with --date D) or --from T --to T")
    if shift is not None and (t_from is not None or t_to is not None):
        fail("report: give --shift or --from/--to, not both")
    if shift is None and t_to is None:
        fail("--to: with --from, give the window's end")
    if day is not None and shift is None:
        fail("--date: goes with --shift")
    if pdf is not None and pdf.resolve() == out.resolve():
        fail("--pdf: expected another file than --out")
    ln = open_line(config) if config is not None else None
    url, shown = _history_url(db, db_password, ln, reading=True)
    engine = open_history_reader(url, db_timeout)
    try:
        with history_errors(url, db_timeout):
            line = line_name or (ln.name if ln is not None else None)
            known = line_names(engine)
            plant_wide = line == "all" and "all" not in known
            title = None
            if plant_wide:
                if not known:
                    fail(f"--line: {shown} has no run")
                line, title = known[0], f"all lines ({', '.join(known)})"
            if line is None:
                if len(known) != 1:
                    fail(f"--line: name the line ({', '.join(known) or 'this history has no run'})")
                line = known[0]
            elif line not in known:
                fail(f"--line: no run of line {line!r} in {shown} (lines: {', '.join(known) or 'none'})")
            if ln is not None:
                clock, plant = PlantClock.of(ln.config), ln.config.line.plant or ""
                points = _points_of(ln)
                source = f"{config} (given)"
            else:
                kept = _kept(engine, line)
                clock, plant, points = _clock_of(kept)
                source = (f"kept by the history (config {kept['config_hash']}, {kept['config_file']})" if kept
                          else "none kept: UTC, no shift calendar, no limits")
            start, end, label = _window(clock, shift, day, t_from, t_to,
                                        where="the --config" if ln is not None else "the configuration kept")
            if ln is None:  # the configuration of the window's own first run, if it differs from the latest
                runs = runs_in_window(engine, start, end, line)
                if runs and kept is not None and runs[0]["config_hash"] != kept["config_hash"]:
                    k2 = _kept(engine, line, runs[0]["config_hash"])
                    if k2 is not None:
                        kept = k2
                        clock, plant, points = _clock_of(k2)
                        source = f"kept by the history (config {k2['config_hash']}, {k2['config_file']})"
                        start, end, label = _window(clock, shift, day, t_from, t_to, where="the configuration kept")
            report = gather(engine, line=None if plant_wide else line, plant=plant, start=start, end=end,
                            label=label, clock=clock, points=points, config_source=source, operators=operators,
                            max_episodes=max_episodes, title=title)
    finally:
        engine.dispose()
    page = render(report)
    try:
        out.write_text(page, encoding="utf-8")
    except OSError as exc:
        fail(f"--out: cannot write {out}: {exc.strerror or exc}")
    typer.echo(summary_text(report, width=min(console.width or 80, 80)))
    typer.echo(f"wrote {out}")
    if pdf is not None:
        try:
            print_pdf(out, pdf)
        except RuntimeError as exc:
            fail(str(exc))
        typer.echo(f"wrote {pdf}")


def _points_of(ln: Any) -> list[dict[str, Any]]:
    import dataclasses

    from spanwatch.monitor.checkset import alarm_points, build_checks

    return [dataclasses.asdict(p) for p in alarm_points(ln, build_checks(ln))]


def _window(clock: Any, shift: str | None, day: str | None, t_from: str | None, t_to: str | None, *,
            where: str) -> tuple[float, float, str]:
    if shift is not None:
        if not clock.shifts:
            fail(f"--shift: {where} has no shift calendar (add a [shifts] table to the line file and give it with "
                 "--config, or use --from/--to)" if where != "the configuration kept" or clock.tz.key != "UTC"
                 else "--shift: no shift calendar: give the line's configuration with --config (its [shifts] "
                 "table), or use --from/--to")
        try:
            return clock.resolve(shift, day, time.time())
        except ValueError as exc:
            fail(f"--shift/--date: {exc}")
    try:
        a = clock.parse(t_from or "")
    except ValueError as exc:
        fail(f"--from: {exc}")
    try:
        b = clock.parse(t_to or "")
    except ValueError as exc:
        fail(f"--to: {exc}")
    if not a < b:
        fail(f"--from: expected a time before --to, got {t_from} .. {t_to}")
    return a, b, "window"
