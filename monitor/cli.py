"""The ``spanwatch`` command line (typer + rich).

Exit codes: 0 success, 1 the command ran but found a problem it was asked to find,
2 usage or configuration error (the message names the file, the key and what was expected).
"""

from __future__ import annotations

import contextlib
import errno
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, NoReturn

import typer
from rich.console import Console
from spanwatch import __version__

# Start-up: only typer and rich.console load with the command line. numpy, pint, pydantic, SQLAlchemy,
# asyncua, paho and the line model load inside the commands that use them (benchmarks/startup.py).
if TYPE_CHECKING:
    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.line import Line
    from sqlalchemy.engine import Engine

app = typer.Typer(
    name="spanwatch",
    help="Streaming monitor for web-handling lines: traction, slip, draw, roll build and sensor health. "
    "Advisory only: not a safety function.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
# Piped output (logs, CI, files) gets a fixed, wide layout; a terminal gets its own width.
console = Console(width=None if sys.stdout.isatty() else 140)
err_console = Console(stderr=True, width=None if sys.stderr.isatty() else 140)

SAFETY_NOTE = (
    "spanwatch is advisory: it is not a safety function and does not replace guarding, safety-rated "
    "controls or lock-out. Defer to local codes and qualified practice."
)


def _print_version(value: bool) -> None:
    if value:
        typer.echo(f"spanwatch {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[bool, typer.Option("--version", help="Print the version and exit.", is_eager=True,
                                          callback=_print_version)] = False,
) -> None:
    """spanwatch: streaming monitor for web-handling lines (advisory only; not a safety function)."""


def fail_config(exc: ConfigError) -> None:
    """Print a configuration error (one line per problem) and exit with status 2."""
    lines = str(exc).splitlines() or [""]
    err_console.print(f"configuration error: {lines[0]}", style="bold red", highlight=False, markup=False,
                      soft_wrap=True)
    for more in lines[1:]:
        err_console.print(more, highlight=False, markup=False, soft_wrap=True)
    raise typer.Exit(code=2)


def fail(message: str) -> NoReturn:
    """Print one line (what went wrong and what to do) on stderr and exit with status 2."""
    err_console.print(message, highlight=False, markup=False, soft_wrap=True)
    raise typer.Exit(code=2)


def _one_of(value: str | None, choices: Sequence[str], option: str) -> None:
    """Exit 2 unless ``value`` is None or one of ``choices``; the message lists them and the nearest one."""
    if value is None or value in choices:
        return
    import difflib

    near = difflib.get_close_matches(value, choices, n=1, cutoff=0.6)
    fail(f"{option}: expected one of {', '.join(choices)}, got {value!r}" + (f" (did you mean {near[0]}?)"
                                                                              if near else ""))


def check_recording(path: Path) -> None:
    """Exit 2 unless ``path`` is an existing file (a recording the commands on a recording read)."""
    if not path.exists():
        fail(f"{path}: no such recording")
    if path.is_dir():
        fail(f"{path}: a folder, not a recording (CSV long form: time,tag,value,quality; .gz ok; or .parquet)")


def check_plot(plot: Path | None) -> None:
    """Exit 2 unless ``plot`` (if given) names a .png, .svg or .pdf file in an existing folder."""
    if plot is None:
        return
    if plot.suffix.lower() not in (".png", ".svg", ".pdf"):
        fail(f"--plot: expected a file ending .png, .svg or .pdf, got {str(plot)!r}")
    if not plot.parent.is_dir():
        fail(f"--plot: the folder {plot.parent} does not exist")


def open_line(path: Path) -> Line:
    """Load a line and its alarm settings (and suppression rules), exiting with status 2 on any config problem."""
    from spanwatch.monitor.checkset import alarm_points, build_checks, suppression_rules
    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.line import load_line

    try:
        line = load_line(path)
        checks = build_checks(line)
        suppression_rules(line, alarm_points(line, checks), checks)
    except ConfigError as exc:
        fail_config(exc)
    return line


def _tension(v: float | None) -> str:
    from spanwatch.monitor import units as U

    if v is None:
        return "-"
    return f"{v:.0f} N/m ({U.from_si(v, 'pli'):.2f} pli)"


def _speed(v: float) -> str:
    from spanwatch.monitor import units as U

    return f"{U.from_si(v, 'm/min'):.0f} m/min ({U.from_si(v, 'fpm'):.0f} fpm)"


@app.command("check-config")
def check_config(
    file: Annotated[Path, typer.Argument(help="Line configuration (TOML).")],
) -> None:
    """Validate a line configuration and print the derived line, each driven roller's capacity and the effective
    limits of every alarm point."""
    from rich.table import Table
    from spanwatch.monitor import units as U
    from spanwatch.monitor.checkset import alarm_points, build_checks

    line = open_line(file)
    cfg = line.config
    lw, mat = cfg.line, cfg.material
    console.print(f"[bold]{lw.name}[/]  {lw.plant}   config {file} (hash {line.config_hash})")
    console.print(f"material: {mat.name}; caliper {U.from_si(mat.caliper, 'um'):.1f} um "
                  f"({U.from_si(mat.caliper, 'thou'):.2f} mil), width {U.from_si(mat.width, 'mm'):.0f} mm, "
                  f"E {mat.modulus / 1e9:.2f} GPa; top speed {_speed(lw.max_speed)}")
    console.print("web path: " + " -> ".join(
        f"[bold]{e}[/]" if line.elements[e].driven else e for e in line.path), highlight=False)

    zt = Table(title="Tension zones (spans between driven elements)", title_justify="left")
    for col in ("zone", "spans", "length", "tension tag", "setpoint"):
        zt.add_column(col)
    for z in line.zones:
        sp = line.zone_setpoints(z)
        setpoint = " -> ".join(_tension(s) for s in sp) if sp else "-"
        zt.add_row(z.id, ", ".join(z.spans), f"{z.length:.2f} m", z.tension_tag or "-", setpoint)
    console.print(zt)

    ct = Table(title="Driven-roller traction capacity: largest tension ratio held (capstan equation; "
                     "air film by Knox–Sweeney)", title_justify="left")
    for col in ("roller", "at", "mu_eff", "air film", "max ratio", "safe ratio", "demanded", "share of safe"):
        ct.add_column(col, justify="right" if col not in ("roller", "at") else "left")
    for el in line.driven_rollers:
        sec = el.section
        for label, speed in (("standstill", 0.0), (f"top speed {U.from_si(lw.max_speed, 'm/min'):.0f} m/min",
                                                   lw.max_speed)):
            cap = line.roller_capacity(el.id, speed)
            share = cap["share_of_safe"]
            colour = "red" if share >= 1 else "yellow" if share >= 0.8 else "green"
            ct.add_row(f"{el.id}: wrap {U.from_si(sec.wrap, 'deg'):.0f} deg, mu {cap['mu']:.2f}, SF "
                       f"{sec.safety_factor:g}" if speed == 0 else "", label, f"{cap['mu_eff']:.3f}",
                       f"{cap['air_film'] * 1e6:.2f} um", f"{cap['max_ratio']:.2f}", f"{cap['safe_ratio']:.2f}",
                       f"{cap['demanded_ratio']:.2f}", f"[{colour}]{share:.2f}[/]")
    console.print(ct)
    console.print(f"air model: {lw.air_film_model}, speed convention: {lw.air_speed_convention}, "
                  f"air viscosity {line.viscosity:.4g} Pa s at {lw.air_temperature - 273.15:.1f} degC")
    _print_design_margins(line)

    if cfg.sources:
        from spanwatch.monitor.sources import SOURCE_KINDS

        st = Table(title="Live sources", title_justify="left")
        for col in ("source", "kind", "where", "tags"):
            st.add_column(col)
        for name, spec in cfg.sources.items():
            where = SOURCE_KINDS[spec.kind].where(spec)
            st.add_row(name, spec.kind, where, str(len(line.tags_of_source(name))))
        console.print(st)
        from spanwatch.connectors.secrets import redact_url, shown_secret

        d = cfg.daemon
        console.print(f"spanwatch run: history {redact_url(d.history)}"
                      + (f" (password {shown_secret(d.history_password)})" if d.history_password else "")
                      + f", HTTP {d.http or 'off'}", highlight=False, markup=False, soft_wrap=True)

    checks = build_checks(line)
    points = alarm_points(line, checks)
    kinds: dict[str, list[str]] = {}
    rests: dict[str, str] = {}
    for c in checks:
        kinds.setdefault(c.kind, []).append(c.object_id)
        rests[c.kind] = type(c).rests_on
    kt = Table(title=f"Checks ({len(checks)}) and alarm points ({len(points)})", title_justify="left")
    for col in ("check", "objects", "rests on"):
        kt.add_column(col)
    for kind, objs in kinds.items():
        shown = ", ".join(objs) if len(objs) <= 4 else f"{len(objs)} {'tags' if kind.startswith('tag_') else 'objects'}"
        kt.add_row(kind, shown, rests[kind])
    console.print(kt)
    _print_drift_design(checks, line)
    _print_limits(points)
    _print_period_findings(line)
    for w in line.warnings:  # what the config exposes (spanwatch.monitor.exposure); spanwatch run logs them too
        console.print(f"WARNING: {w}", style="bold yellow", highlight=False, markup=False, soft_wrap=True)
    console.print(f"[dim]{SAFETY_NOTE}[/]")


def _print_limits(points: list) -> None:  # type: ignore[type-arg]
    """check-config's effective limits of every alarm point (spanwatch.monitor.limitstable), 80 columns."""
    from spanwatch.monitor.limitstable import limit_lines

    for text in limit_lines(points):
        console.print(text, highlight=False, markup=False, soft_wrap=True)


def _print_period_findings(line: Line) -> None:
    """Sample periods the config's own sources cannot deliver (spanwatch.monitor.periods), one warning each."""
    from spanwatch.monitor.periods import config_findings

    for f in config_findings(line):
        console.print(f"WARNING: sample period: {f}", style="bold yellow", highlight=False, markup=False,
                      soft_wrap=True)


def _print_drift_design(checks: list, line: Line) -> None:
    """The drift detectors of ``check-config``: per residual, the design from the engineer's terms."""
    from rich.table import Table
    from spanwatch.monitor.driftreport import drift_designs

    designs = drift_designs(checks)
    if not designs:
        console.print("drift detection: off ([drift] enabled = false)")
        return
    d = line.config.drift
    console.print(f"drift detection: batch means of {d.period:g} s, baselines from {d.learn / 60:g} min of good "
                  f"running per operating point; one false alarm per {d.false_alarm_interval / 86400:g} days of "
                  f"running over the {sum(len(x.objects) for x in designs)} detectors", highlight=False)
    dt = Table(title="Drift detectors", title_justify="left")
    for col in ("residual", "objects", "detector", "shift", "design", "delay"):
        dt.add_column(col)
    for x in designs:
        objs = ", ".join(x.objects) if len(x.objects) <= 2 else f"{len(x.objects)} objects"
        delay = f"{x.delay / 60:.0f} min" if x.delay is not None else "-"
        dt.add_row(x.residual, objs, x.detector, f"{x.shift:g} sigma", x.params, delay)
    console.print(dt)


def _print_design_margins(line: Line) -> None:
    """check-config's design-margin table (spanwatch.monitor.design) and what it finds, in plain sentences."""
    from rich.table import Table
    from spanwatch.monitor.design import design_findings, design_margins

    margins = design_margins(line)
    dt = Table(title="Design margin of each driven roller at its setpoints: share of its capacity used against "
                     "the safe share 1/SF (the live traction alarm watches the share of capacity)",
               title_justify="left")
    for col in ("roller", "where", "speed", "ratio", "capacity", "share used", "margin", "safe share"):
        dt.add_column(col, justify="left" if col in ("roller", "where") else "right")
    labels = {"standstill": "at rest (dry COF)", "end of roll": "end of roll (taper end)",
              "end of roll at top speed": "end of roll, top speed"}
    last = None
    for m in margins:
        u = m.utilisation
        colour = "red" if m.slips else "yellow" if not m.within_design else "green"
        dt.add_row(m.roller if m.roller != last else "", labels.get(m.point, m.point), f"{m.speed * 60:.0f} m/min",
                   f"{m.demanded_ratio:.2f}", f"{m.capacity_ratio:.2f}",
                   f"[{colour}]{'lifted' if u == float('inf') else f'{u:.0%}'}[/]",
                   f"{m.margin:.2f}", f"{m.safe_share:.0%}")
        last = m.roller
    console.print(dt)
    findings = design_findings(margins)
    for f in findings:
        console.print(f"DESIGN: {f}", style="bold yellow", highlight=False, markup=False, soft_wrap=True)
    if not findings:
        console.print("design: every driven roller stays within its safe share 1/SF in ordinary running.",
                      highlight=False, markup=False, soft_wrap=True)


@app.command("simulate")
def simulate_cmd(
    scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML): speed profile, roll changes, faults.")],
    out: Annotated[Path | None, typer.Option("--out", "-o", help="Recording to write: .csv, .csv.gz or .parquet.")]
    = None,
    time_format: Annotated[str, typer.Option(help="CSV time column: 'iso' (ISO 8601, UTC) or 'epoch' seconds.")]
    = "iso",
    progress: Annotated[bool, typer.Option(help="Show a progress bar.")] = True,
    serve_opcua: Annotated[str | None, typer.Option(help="Serve the line live as an OPC UA server at this "
                                                          "endpoint, e.g. opc.tcp://127.0.0.1:4840.")] = None,
    publish_mqtt: Annotated[str | None, typer.Option(help="Publish the line live to this MQTT broker, HOST:PORT.")]
    = None,
    topic_prefix: Annotated[str, typer.Option(help="Topic prefix for --publish-mqtt.")] = "quillmere",
    batch: Annotated[str, typer.Option(help="--publish-mqtt: each message carries a tag's samples of this long "
                                            "as arrays, e.g. \"0.5 s\" (0: one sample per message).")] = "0 s",
    speedup: Annotated[float, typer.Option(help="Live only: simulated seconds per wall-clock second.")] = 1.0,
) -> None:
    """Run the simulated line through a scenario: to a recording (and its ground truth), or live (OPC UA, MQTT)."""
    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine, load_scenario
    from spanwatch.monitor.simulate import simulate_to_file

    try:
        sc, cfg = load_scenario(scenario)
        line = load_line(cfg)
    except ConfigError as exc:
        fail_config(exc)
    _one_of(time_format, ("iso", "epoch"), "--time-format")
    if sum(x is not None for x in (out, serve_opcua, publish_mqtt)) != 1:
        fail("expected exactly one of --out, --serve-opcua or --publish-mqtt")
    if not 0 < speedup < float("inf"):
        fail(f"--speedup: expected a positive number, got {speedup}")
    sim = SimulatedLine(line, sc)
    if publish_mqtt is not None:
        import asyncio

        from spanwatch.monitor.simulate import SimulateError
        from spanwatch.monitor.simulate import publish_mqtt as publish

        host, _, port = publish_mqtt.rpartition(":")
        if not port.isdigit() or not 1 <= int(port) <= 65535:
            fail(f"--publish-mqtt: expected HOST:PORT such as 127.0.0.1:1883, got {publish_mqtt!r}")
        from spanwatch.monitor import units as U

        try:
            batch_s = U.to_si(batch, U.TIME)
        except ValueError as exc:
            fail(f"--batch: {exc}")
        if not 0.0 <= batch_s <= 60.0:
            fail(f"--batch: expected a duration from 0 s to 60 s, got {batch!r}")
        try:
            asyncio.run(publish(sim, host or "127.0.0.1", int(port), prefix=topic_prefix, speedup=speedup,
                                batch=batch_s, console=console))
        except SimulateError as exc:
            fail(str(exc))
        return
    if serve_opcua is not None:
        import asyncio

        from spanwatch.monitor.simulate import SimulateError, serve_forever
        from spanwatch.monitor.sources import opc_endpoint

        try:
            opc_endpoint(serve_opcua)
        except ValueError as exc:
            fail(f"--serve-opcua: {exc}")
        import logging

        logging.getLogger("asyncua").setLevel(logging.CRITICAL)  # a traceback for a port in use; the line below says it
        console.print(f"serving {line.name} at {serve_opcua} ({speedup:g}x); Ctrl-C stops", highlight=False)
        try:
            with contextlib.suppress(KeyboardInterrupt):
                asyncio.run(serve_forever(sim, serve_opcua, speedup=speedup))
        except SimulateError as exc:
            fail(str(exc))
        return
    assert out is not None
    if not out.parent.is_dir():
        fail(f"--out: the folder {out.parent} does not exist: create it, or write the recording elsewhere")
    try:
        rows, truth_path = simulate_to_file(sim, out, time_format=time_format, progress=progress,
                                            console=err_console)
    except OSError as exc:
        fail(f"--out: cannot write {exc.filename or out}: {exc.strerror or exc}")
    console.print(f"wrote {rows} samples ({sc.scenario.duration / 60:.1f} simulated minutes) to {out}; "
                  f"ground truth in {truth_path}", highlight=False)


def _db_url(db: str) -> str:
    return db if "://" in db else f"sqlite:///{db}"


@contextlib.contextmanager
def history_errors(db: str, timeout: float | None = None) -> Iterator[None]:
    """Any failure of the history ``db`` inside (opening, reading, writing, its lock): one line, exit 2, with every
    password in it hidden.

    The line names the database (password hidden) and says what is wrong: no such file, unreadable,
    read-only, locked by another process beyond the timeout, corrupt or not a database, another program's
    database, a schema revision this version does not know, another daemon writing the line.
    """
    from spanwatch.connectors.history.errors import HistoryError, classify
    from spanwatch.connectors.secrets import redact_urls_in
    from sqlalchemy.exc import SQLAlchemyError

    try:
        yield
    except HistoryError as exc:
        err_console.print(redact_urls_in(str(exc)), highlight=False, markup=False, soft_wrap=True)
        raise typer.Exit(2) from None
    except SQLAlchemyError as exc:
        err_console.print(redact_urls_in(str(classify(exc, _db_url(db), timeout=timeout))), highlight=False,
                          markup=False, soft_wrap=True)
        raise typer.Exit(2) from None


def open_history_reader(db: str, timeout: float) -> Engine:
    """The history ``db`` opened to read (nothing in it changes), or one line and exit 2."""
    from spanwatch.connectors.history import open_reader

    with history_errors(db, timeout):
        return open_reader(_db_url(db), timeout=timeout)


DB_TIMEOUT = "Seconds to wait for a database another process holds locked, then give up (exit 2)."


DB_PASSWORD_HELP = ("The database password as env:NAME or file:/path (not in --db, where ps shows it to every user); "
                    "default: daemon.history_password in the config.")


def _history_url(db: str | None, db_password: str | None, line: Line | None = None, *,
                 reading: bool = False) -> tuple[str, str]:
    """The history to open: (URL to connect with, its password resolved; the URL to show, password hidden).

    ``db`` (``--db``) or else the config's ``[daemon] history``; the password from ``db_password``
    (``--db-password``) or else ``[daemon] history_password``. Exits 2 with one line on an unknown database
    kind, an unresolvable password reference, or (writing) a SQLite file whose folder does not exist.
    """
    from spanwatch.connectors.secrets import SecretError, is_reference, redact_url, url_password, url_with_password

    if db is not None or line is None:
        url, where, fix = _db_url(db or "spanwatch.db"), "--db", "give another with --db"
    else:
        url, where, fix = line.config.daemon.history, f"{line.file}: daemon.history", "set [daemon] history or --db"
    shown = redact_url(db if db is not None else url)
    ref, ref_where = db_password, "--db-password"
    if ref is None and line is not None and db is None:
        ref, ref_where = line.config.daemon.history_password, f"{line.file}: daemon.history_password"
    if db_password is not None and not is_reference(db_password):
        fail("--db-password: expected env:NAME or file:/path, got a password (on the command line every user of "
             "this machine sees it in ps)")
    if db is not None and url_password(url):
        err_console.print("warning: --db holds a password, which every user of this machine sees in ps; give it "
                          "with --db-password env:NAME", style="yellow", highlight=False, markup=False, soft_wrap=True)
    from sqlalchemy.engine import make_url

    try:
        parsed = make_url(url)
        parsed.get_dialect()
    except Exception:
        fail(f"{where}: expected a SQLite file path or an SQLAlchemy URL such as sqlite:///q2.db or "
             f"postgresql+psycopg://user@host/db, got {shown!r}")
    try:
        full = url_with_password(url, ref)
    except SecretError as exc:
        fail(f"{ref_where}: {exc}")
    file = parsed.database if parsed.get_backend_name() == "sqlite" else None
    if not reading and file and file != ":memory:" and not file.startswith("file:"):
        folder = Path(file).parent
        if not folder.is_dir():
            fail(f"{where}: the folder {folder} of the history {shown} does not exist: create it, or {fix}")
    return full, shown


@app.command("replay")
def replay_cmd(
    recording: Annotated[Path, typer.Argument(help="Recording: CSV long form (time,tag,value,quality; .gz ok) "
                                                   "or .parquet.")],
    config: Annotated[Path, typer.Option("--config", "-c", help="Line configuration (TOML).")],
    db: Annotated[str, typer.Option(help="History: a SQLite file path or an SQLAlchemy URL.")] = "spanwatch.db",
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    progress: Annotated[bool, typer.Option(help="Show a progress bar.")] = True,
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 30.0,
) -> None:
    """Run a recording through the checks as fast as the CPU allows; alarms go to the history database."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn, TransferSpeedColumn
    from spanwatch.monitor.replay import replay

    line = open_line(config)
    if not recording.exists():
        fail(f"{recording}: no such recording")
    if recording.is_dir():
        fail(f"{recording}: a folder, not a recording (CSV long form: time,tag,value,quality; .gz ok; or .parquet)")
    url, shown = _history_url(db, db_password)
    bar = Progress(TextColumn("replay"), BarColumn(), TransferSpeedColumn(), TimeRemainingColumn(),
                   console=err_console, disable=not progress)
    with bar:
        task = bar.add_task("replay", total=recording.stat().st_size)
        try:
            with history_errors(url, db_timeout):
                summary = replay(line, recording, url, timeout=db_timeout,
                                 progress=lambda pos, tot: bar.update(task, completed=pos))
        except ValueError as exc:
            err_console.print(str(exc), highlight=False)
            raise typer.Exit(2) from None
    console.print(f"replayed {summary.samples} samples, {summary.frames} frames, "
                  f"{summary.seconds_of_data / 60:.1f} min of data in {summary.wall_seconds:.2f} s "
                  f"({summary.speedup:.0f}x real time); run {summary.run_id} in {shown}", highlight=False,
                  markup=False)
    if summary.raised:
        console.print("alarms raised: " + ", ".join(f"{k} {n}" for k, n in sorted(summary.raised.items())))
    else:
        console.print("alarms raised: none")
    where = "rows" if recording.suffix.lower() == ".parquet" else "lines"  # a Parquet file has rows, no lines
    for r in summary.input_rows:
        refs = ", ".join(str(x) for x in r["refs"][:10])  # type: ignore[index]
        console.print(f"input: {r['tag']}: {r['count']} x {r['reason']}" + (f" ({where} {refs})" if refs else ""),
                      highlight=False)
    for m in summary.period_mismatches:  # a tag set at another sample period than it arrives at
        console.print(f"WARNING: sample period: {m.text()}", style="bold yellow", highlight=False, markup=False,
                      soft_wrap=True)


@app.command("alarm-list")
def alarm_list_cmd(
    config: Annotated[Path | None, typer.Option("--config", help="Line configuration (TOML).")] = None,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
    check: Annotated[str | None, typer.Option(help="Only this check kind, e.g. traction.")] = None,
    db: Annotated[str | None, typer.Option(help="Instead of --config: the alarm list a history kept (with --line "
                                                 "and --at).")] = None,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    line_name: Annotated[str | None, typer.Option("--line", help="With --db: the line.")] = None,
    at: Annotated[str | None, typer.Option(help="With --db: the moment (ISO 8601 with offset; default: now).")]
    = None,
    db_timeout: Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)] = 10.0,
) -> None:
    """Print the master alarm database: every alarm point with its settings and rationalization; from a config
    file, or as it was in force at a moment (--db --line --at)."""
    from spanwatch.monitor.alarmlist import render
    from spanwatch.rules.catalog import CHECK_KINDS

    _one_of(fmt, ("table", "csv", "json"), "--format")
    _one_of(check, sorted(CHECK_KINDS), "--check")
    if (config is None) == (db is None):
        fail("alarm-list: give --config FILE, or --db (with --line and optionally --at)")
    if config is not None:
        from spanwatch.monitor.checkset import alarm_points, build_checks

        line = open_line(config)
        points = alarm_points(line, build_checks(line))
        title = f"{line.config.line.name}: master alarm list ({config})"
    else:
        points, title = _kept_alarm_points(db or "", db_password, line_name, at, db_timeout)
    points = [p for p in points if check is None or p.kind == check]
    typer.echo(render(points, fmt, title=title), nl=False)


def _kept_alarm_points(db: str, db_password: str | None, line_name: str | None, at: str | None,
                       db_timeout: float) -> tuple[list, str]:  # type: ignore[type-arg]
    """The alarm points a history kept for ``line_name`` in force at ``at`` (``config_versions``), and a title."""
    import json
    import time

    from spanwatch.connectors.history import config_at
    from spanwatch.rules.alarms import AlarmPoint
    from spanwatch.rules.values import parse_iso

    if not line_name:
        fail("--line: with --db, name the line (spanwatch alarms lists runs and their lines)")
    try:
        t = parse_iso(at) if at is not None else time.time()
    except ValueError as exc:
        fail(f"--at: {exc}")
    url, shown = _history_url(db, db_password, reading=True)
    engine = open_history_reader(url, db_timeout)
    with history_errors(url, db_timeout):
        kept = config_at(engine, line_name, t, last_used=True)
    engine.dispose()
    if kept is None:
        fail(f"{shown}: no run of line {line_name!r} started before {at or 'now'}, or its configuration was not kept")
    data = json.loads(kept["content"])
    if not isinstance(data, dict) or "alarm_points" not in data:
        fail(f"{shown}: the configuration kept for line {line_name!r} has no alarm list")
    names = {f for f in AlarmPoint.__dataclass_fields__}
    points = [AlarmPoint(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in p.items() if k in names})
              for p in data["alarm_points"]]
    when = "in force at" if kept["covering"] else "last used before"
    return points, (f"{line_name}: master alarm list {when} {at or 'now'} (config {kept['config_hash']} of run "
                    f"{kept['run']}, saved {kept['saved']} by {kept['saved_by'] or 'unknown'})")


def iso_or(t: float) -> str:
    from spanwatch.rules.values import iso

    return iso(t) or "-"


@app.command("demo")
def demo_cmd(
    scenario: Annotated[Path | None, typer.Option(help="Scenario file, or the name of a shipped one such as "
                                                   "cof-drop (see spanwatch examples); default: the demo.")] = None,
    speedup: Annotated[float, typer.Option(help="Simulated seconds per wall-clock second.")] = 6.0,
    duration: Annotated[str | None, typer.Option(help="Stop after this much simulated time, e.g. '2 min'.")] = None,
    db: Annotated[Path | None, typer.Option(help="Keep the alarm history in this SQLite file.")] = None,
    pace: Annotated[bool, typer.Option(help="Pace against the wall clock (off: as fast as possible, in process).")]
    = True,
    transport: Annotated[str, typer.Option(help="opcua: through an embedded OPC UA server and the OPC UA client; "
                                                "direct: samples straight into the pipeline.")] = "opcua",
) -> None:
    """Watch a simulated line raise traction, roll-build and sensor alarms as they happen (no arguments needed)."""
    from spanwatch.monitor import units as U
    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.demo import run_demo

    dur = None
    if duration is not None:
        try:
            dur = U.to_si(duration, U.TIME)
        except U.UnitError as exc:
            err_console.print(f"--duration: {exc}")
            raise typer.Exit(2) from None
    if not 0 < speedup < float("inf"):
        fail(f"--speedup: expected a positive number, got {speedup}")
    _one_of(transport, ("opcua", "direct"), "--transport")
    if db is not None and not db.parent.is_dir():
        fail(f"--db: the folder {db.parent} does not exist: create it, or give another path")
    try:
        with history_errors(str(db) if db is not None else "the demo's history"):
            run_demo(console, scenario=scenario, speedup=speedup, duration=dur, db=db, pace=pace, transport=transport)
    except ConfigError as exc:
        fail_config(exc)


@app.command("run")
def run_cmd(
    config: Annotated[Path, typer.Option("--config", "-c", help="Line configuration with sources (TOML).")],
    db: Annotated[str | None, typer.Option(help="History (SQLite path or SQLAlchemy URL); default: daemon.history "
                                                "in the config.")] = None,
    db_password: Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)] = None,
    http: Annotated[str | None, typer.Option(help="HOST:PORT for /healthz and /metrics; default: daemon.http in the "
                                                  "config.")] = None,
    log_level: Annotated[str | None, typer.Option(help="debug, info, warning or error.")] = None,
) -> None:
    """Run the monitor as a daemon on the live sources of the config (OPC UA, MQTT) until SIGTERM or Ctrl-C."""
    import asyncio
    import logging

    from spanwatch.monitor.config import ConfigError
    from spanwatch.monitor.daemon import run_daemon
    from spanwatch.monitor.httpd import parse_address

    line = open_line(config)
    if not line.config.sources:
        fail_config(ConfigError(config, "sources", "expected at least one [sources.NAME] table (kind = \"opcua\", "
                                                   "\"mqtt\" or \"simulated\") for spanwatch run"))
    _one_of(log_level, ("debug", "info", "warning", "error"), "--log-level")
    address = line.config.daemon.http if http is None else http
    if address:
        try:
            host, port = parse_address(address)
        except ValueError as exc:
            if http is None:
                fail_config(ConfigError(line.file, "daemon.http", str(exc)))
            fail(f"--http: {exc}")
        _can_listen(host, port, address)
    url, _shown = _history_url(db, db_password, line)
    level = (log_level or line.config.daemon.log_level).upper()
    logging.basicConfig(level=getattr(logging, level, logging.INFO),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    if level != "DEBUG":  # asyncua logs a traceback for every lost connection; the connector reports it once
        logging.getLogger("asyncua").setLevel(logging.CRITICAL)
        logging.getLogger("alembic").setLevel(logging.WARNING)  # "Context impl SQLiteImpl." at every start
    logging.getLogger("spanwatch").info("spanwatch %s monitoring %s; %s", __version__, line.name, SAFETY_NOTE)
    try:
        with history_errors(url, line.config.daemon.history_timeout):
            asyncio.run(run_daemon(line, history_url=url, http=http))
    except OSError as exc:
        if exc.errno in _LISTEN_PROBLEMS:  # the port was taken between the check above and the start
            fail(f"cannot listen on {address}: {_LISTEN_PROBLEMS[exc.errno]}")
        from spanwatch.connectors.secrets import redact_urls_in

        fail(f"cannot start: {redact_urls_in(str(exc))}")


_LISTEN_PROBLEMS = {
    errno.EADDRINUSE: "the port is in use (another spanwatch run, or another program): stop it, or choose another "
                      "port with --http HOST:PORT or [daemon] http",
    errno.EADDRNOTAVAIL: "not an address of this machine: use 127.0.0.1:PORT or one of its own addresses with "
                         "--http or [daemon] http",
    errno.EACCES: "no permission (ports below 1024 need privileges): choose a port above 1024 with --http or "
                  "[daemon] http",
}


def _can_listen(host: str, port: int, address: str) -> None:
    """Exit 2 with one line, before anything starts, when the HTTP endpoint could not listen on ``host:port``."""
    import socket

    if port == 0:
        return
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except OSError:
        fail(f"cannot listen on {address}: the host name {host} does not resolve; use an address such as "
             "127.0.0.1 with --http or [daemon] http")
    for family, kind, proto, _name, where in infos[:1]:
        with socket.socket(family, kind, proto) as s:
            s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as asyncio's server does
            try:
                s.bind(where)
            except OSError as exc:
                fail(f"cannot listen on {address}: {_LISTEN_PROBLEMS.get(exc.errno or 0, exc.strerror or str(exc))}")


@app.command("opcua-browse")
def opcua_browse_cmd(
    endpoint: Annotated[str, typer.Argument(help="Server endpoint, e.g. opc.tcp://10.0.0.5:4840.")],
    node: Annotated[str | None, typer.Option(help="Start node id (default: the Objects folder).")] = None,
    depth: Annotated[int, typer.Option(help="How many levels to descend.")] = 3,
    fmt: Annotated[str, typer.Option("--format", help="table or toml (a [tags] skeleton).")] = "table",
) -> None:
    """List the variables under a node of an OPC UA server, to fill in the tag map."""
    import asyncio
    import logging

    from rich.table import Table
    from spanwatch.connectors.opcua import OpcUaSessionError, browse
    from spanwatch.connectors.secrets import redact, redact_url
    from spanwatch.monitor.sources import opc_endpoint

    _one_of(fmt, ("table", "toml"), "--format")
    if depth < 1:
        fail(f"--depth: expected at least 1 level, got {depth}")
    try:
        opc_endpoint(endpoint)
    except ValueError as exc:
        fail(f"ENDPOINT: {exc}")
    logging.getLogger("asyncua").setLevel(logging.CRITICAL)  # its own warnings repeat what the one line says
    try:
        rows = asyncio.run(browse(endpoint, node, depth))
    except OpcUaSessionError as exc:  # connection refused, no such node, security
        shown = redact_url(endpoint)
        fail(str(exc) if shown in str(exc) else f"{shown}: {exc}")
    except Exception as exc:  # anything else asyncua raises: one line all the same
        fail(redact(f"{redact_url(endpoint)}: {type(exc).__name__}: {exc}"))
    if not rows:
        fail(f"{redact_url(endpoint)}: no variables within {depth} level(s) under {node or 'Objects'}; "
             f"try a larger --depth{' or another --node' if node else ''}")
    if fmt == "toml":
        for r in rows:
            typer.echo(f'[tags."{r["path"]}"]\nunit = ""  # fill in\nsource = "plc"\naddress = "{r["node_id"]}"\n')
        return
    t = Table(title=f"{len(rows)} variable(s) under {node or 'Objects'}", title_justify="left")
    for c in ("node id", "browse path", "data type", "value"):
        t.add_column(c)
    for r in rows:
        t.add_row(str(r["node_id"]), str(r["path"]), str(r.get("data_type", "")), str(r.get("value", "")))
    console.print(t)


@app.command("examples")
def examples_cmd(
    copy: Annotated[list[str] | None, typer.Option("--copy", metavar="NAME", help="Copy this example, and the files "
                                                   "it refers to, into --to (repeatable; 'all' copies every one).")]
    = None,
    to: Annotated[Path, typer.Option("--to", help="Folder to copy into; made if missing.")] = Path("."),
    force: Annotated[bool, typer.Option("--force", help="Replace copies that differ from the shipped file.")] = False,
    path: Annotated[str | None, typer.Option("--path", metavar="NAME", help="Print where the example NAME is "
                                             "installed, and nothing else.")] = None,
) -> None:
    """List the example line files and scenarios that ship with spanwatch; copy them out to edit them."""
    from spanwatch.monitor.examples import ExampleError, copy_example, example_path, examples_root, list_examples

    if path is not None:
        try:
            typer.echo(str(example_path(path)))
        except ExampleError as exc:
            err_console.print(str(exc), highlight=False, markup=False)
            raise typer.Exit(2) from None
        return
    if copy:
        names = [e.name for e in list_examples()] if "all" in copy else copy
        shown: set[Path] = set()
        try:
            for name in names:
                for target, status in copy_example(name, to, overwrite=force):
                    if target not in shown:  # a line file several scenarios share is reported once
                        shown.add(target)
                        console.print(f"{status}: {target}", highlight=False, markup=False)
        except ExampleError as exc:
            err_console.print(str(exc), highlight=False, markup=False)
            raise typer.Exit(2) from None
        except FileExistsError as exc:
            err_console.print(f"{exc}; --force replaces them", highlight=False, markup=False)
            raise typer.Exit(2) from None
        except OSError as exc:
            err_console.print(f"cannot copy into {to}: {exc}", highlight=False, markup=False)
            raise typer.Exit(2) from None
        return
    from rich.table import Table

    found = list_examples()
    t = Table(title=f"{len(found)} examples shipped with spanwatch {__version__}", title_justify="left")
    longest = max((len(e.name) for e in found), default=4)
    # a name is never cut: whole where the terminal has room, else folded onto the next line
    t.add_column("name", overflow="fold", min_width=longest if console.width >= longest + 60 else None)
    for col in ("kind", "description", "refers to"):
        t.add_column(col)
    for e in found:
        t.add_row(e.name, e.kind, e.description, ", ".join(e.refers_to) or "-")
    console.print(t)
    console.print(f"installed in {examples_root()}", highlight=False, markup=False)
    console.print("copy one out to edit it: spanwatch examples --copy NAME [--to FOLDER]; "
                  "run a scenario: spanwatch demo --scenario NAME", highlight=False, markup=False)


@app.command("evaluate")
def evaluate_cmd(
    set_name: Annotated[str, typer.Option("--set", help="Scenario set: full, ci, or a folder of scenario files.")]
    = "full",
    seeds: Annotated[int, typer.Option(help="Seeds per scenario (the scenario's seed + 0, 1, ...).")] = 3,
    jobs: Annotated[int, typer.Option(help="Scenarios run in parallel processes.")] = 1,
    grace: Annotated[str, typer.Option(help="After a fault's end, how long a raise still detects it.")] = "5 min",
    interval: Annotated[str, typer.Option(help="Period of the interval-floor detector (8 h: one alarm per shift).")]
    = "8 h",
    csv: Annotated[Path | None, typer.Option("--csv", help="Write the tables as CSV.")] = None,
    json_out: Annotated[Path | None, typer.Option("--json", help="Write the summary and every raise as JSON.")]
    = None,
    markdown: Annotated[Path | None, typer.Option("--markdown", help="Write a report (docs/detection.md style).")]
    = None,
    note: Annotated[str | None, typer.Option(help="A paragraph to open the markdown report with.")] = None,
    detector: Annotated[str | None, typer.Option(help="Watch every residual with this drift detector instead of "
                                                      "the config's: cusum, ewma, adwin or page_hinkley.")] = None,
    progress: Annotated[bool, typer.Option(help="Show a progress bar.")] = True,
    check_targets: Annotated[bool, typer.Option(help="Exit 1 when a target is not met (one the set cannot judge "
                                                     "is not counted).")] = False,
) -> None:
    """Measure detection against the simulator's ground truth: found on the right object, delay, false alarms."""
    from spanwatch.monitor import units as U
    from spanwatch.monitor.config import DRIFT_DETECTORS, ConfigError
    from spanwatch.monitor.evaluate import EvaluateError, Outputs, evaluate

    if detector is not None:
        _one_of(detector, DRIFT_DETECTORS, "--detector")
    times = []
    for option, text in (("--grace", grace), ("--interval", interval)):
        try:
            times.append(U.to_si(text, U.TIME))
        except (ValueError, TypeError) as exc:
            fail(f"{option}: {exc}")
    try:
        summary = evaluate(set_name, seeds=seeds, jobs=jobs, grace=times[0], interval=times[1],
                           outputs=Outputs(csv=csv, json=json_out, markdown=markdown), note=note,
                           console=Console(width=80, highlight=False) if not sys.stdout.isatty() else console,
                           progress_console=err_console, progress=progress, detector=detector,
                           command=_command_line(sys.argv[1:]))
    except ConfigError as exc:
        fail_config(exc)
    except EvaluateError as exc:
        fail(str(exc))
    if check_targets and any(t["met"] is False for t in summary["targets"]):
        raise typer.Exit(1)


def _command_line(args: Sequence[str]) -> str:
    """The command as typed, quoted for a shell, with the text of ``--note`` left out."""
    import shlex

    out, skip = [], False
    for a in args:
        if skip:
            out.append("...")
            skip = False
        elif a == "--note":
            out.append(a)
            skip = True
        else:
            out.append("--note=..." if a.startswith("--note=") else a)
    return shlex.join(["spanwatch", *out])


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        sys.exit(130)


if __name__ == "__main__":
    main()


# the commands kept in modules of their own register themselves on the app: the operator's (ack, shelve, ...),
# review (alarms, runs, kpi, report), commissioning (record, check-tags; on a recording: stats, tune, compare,
# mark, calibrate, traction-evidence)
from spanwatch.monitor import (  # noqa: E402, F401
    cli_calibrate,
    cli_commission,
    cli_operator,
    cli_report,
    cli_review,
    cli_tuning,
)
