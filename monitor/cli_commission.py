"""Commissioning commands: ``record`` (the live sources into recordings) and ``check-tags`` (the tag mapping
against the live sources). See :mod:`spanwatch.monitor.recorder` and :mod:`spanwatch.monitor.tagcheck`.

Exit codes: 0 done (``check-tags``: every tag fine); 1 ``check-tags`` found a tag that is missing, at
another sample period or out of range, or ``record`` recorded no sample at all (the sources' states and last
errors are printed); 2 a usage or configuration problem.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
from spanwatch.monitor.cli import _one_of, app, console, err_console, fail, open_line

if TYPE_CHECKING:
    from spanwatch.monitor.line import Line
    from spanwatch.monitor.recorder import Recorder

_SIZE_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "kib": 2**10, "mib": 2**20, "gib": 2**30}
MIN_ROTATE_BYTES = 1024  # a smaller segment would hold a few dozen rows
MIN_ROTATE_SECONDS = 1.0


def parse_rotate(text: str) -> tuple[float | None, int | None]:
    """``--rotate``: a duration (``1h``, ``15 min``) -> (seconds, None) or a size (``100MB``, ``512 KiB``) ->
    (None, bytes); ValueError saying what was expected.

    >>> parse_rotate("1h"), parse_rotate("100MB"), parse_rotate("2 KiB")
    ((3600.0, None), (None, 100000000), (None, 2048))
    """
    import re

    from spanwatch.monitor import units as U

    m = re.fullmatch(r"\s*([0-9]+(?:\.[0-9]+)?)\s*([KMG]i?B|B)\s*", text, flags=re.IGNORECASE)
    if m:
        n = int(float(m.group(1)) * _SIZE_UNITS[m.group(2).lower()])
        if n < MIN_ROTATE_BYTES:
            raise ValueError(f"expected a size of at least {MIN_ROTATE_BYTES} B, got {text!r}")
        return None, n
    try:
        seconds = U.to_si(text, U.TIME)
    except (ValueError, TypeError):
        raise ValueError(f"expected a time such as 1h or 15 min, or a size such as 100MB, got {text!r}") from None
    if not seconds >= MIN_ROTATE_SECONDS or seconds == float("inf"):
        raise ValueError(f"expected a time of at least {MIN_ROTATE_SECONDS:g} s, got {text!r}")
    return seconds, None


def _duration(text: str, option: str) -> float:
    from spanwatch.monitor import units as U

    try:
        seconds = U.to_si(text, U.TIME)
    except (ValueError, TypeError):
        fail(f"{option}: expected a time such as 10 s, 30 min or 8 h, got {text!r}")
    if not 0 < seconds < float("inf"):
        fail(f"{option}: expected a positive time, got {text!r}")
    return seconds


def _size(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} GB"


def _needs_sources(line: Line, config: Path) -> None:
    if not line.config.sources:
        fail(f"{config}: sources: expected at least one [sources.NAME] table (OPC UA or MQTT): nothing live to "
             f"read")


class _Progress:
    """One progress line on stderr: rewritten in place on a terminal, a line every 30 s when piped."""

    def __init__(self) -> None:
        self.tty = sys.stderr.isatty()
        self.last = 0.0
        self.last_samples = 0
        self.last_t = time.monotonic()

    def __call__(self, rec: Recorder, conns: list) -> None:  # type: ignore[type-arg]
        now = time.monotonic()
        if not self.tty and now - self.last < 30.0:
            return
        rate = (rec.stats.samples - self.last_samples) / max(now - self.last_t, 1e-9)
        self.last, self.last_samples, self.last_t = now, rec.stats.samples, now
        seg = rec.segment
        where = f"{seg.path.name} {_size(seg.size)}" if seg is not None else "-"
        down = [c.name for c in conns if c.state != "connected"]
        text = f"{rec.stats.samples:,} samples {rate:,.0f}/s {where}" + (f" ({', '.join(down)} down)" if down else "")
        if self.tty:
            sys.stderr.write("\r" + text[:79].ljust(79))
        else:
            sys.stderr.write(text + "\n")
        sys.stderr.flush()

    def done(self) -> None:
        if self.tty:
            sys.stderr.write("\n")
            sys.stderr.flush()


@app.command("record")
def record_cmd(
    config: Annotated[Path, typer.Option("--config", "-c", help="Line configuration (TOML) with its live "
                                                                "sources.")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Recording to write: .csv.gz (recommended) or .csv; "
                                                          "with --rotate, the name segments are made from.")],
    rotate: Annotated[str | None, typer.Option(help="Start a new segment after this time (1h, 15 min) or size "
                                                    "on disk (100MB).")] = None,
    duration: Annotated[str | None, typer.Option(help="Stop after this time (default: until SIGTERM or "
                                                      "Ctrl-C).")] = None,
    parquet: Annotated[bool, typer.Option("--parquet", help="Convert each closed segment to Parquet (the open "
                                                            "one stays CSV, readable after a kill).")] = False,
    flush_every: Annotated[float, typer.Option(help="Seconds between two syncs to disk: at most this much is "
                                                    "lost when the recorder is killed.", min=0.05, max=60.0)] = 1.0,
    progress: Annotated[bool, typer.Option(help="Show the progress line on stderr.")] = True,
) -> None:
    """Record the configured tags from the line's live sources (OPC UA, MQTT) into a recording, bad samples
    with their quality; rotation by time or size; every file readable even after a kill."""
    import asyncio

    from spanwatch.monitor.recorder import Recorder, record, split_name

    line = open_line(config)
    _needs_sources(line, config)
    try:
        split_name(out)
    except ValueError as exc:
        fail(f"--out: {exc}")
    if not out.parent.is_dir():
        fail(f"--out: the folder {out.parent} does not exist: create it, or record elsewhere")
    rotate_s = rotate_b = None
    if rotate is not None:
        try:
            rotate_s, rotate_b = parse_rotate(rotate)
        except ValueError as exc:
            fail(f"--rotate: {exc}")
    elif out.exists():
        fail(f"--out: {out} exists: the recorder never overwrites a recording; name another")
    if parquet and rotate is None:
        fail("--parquet: converts closed segments; give --rotate too (the recording is one open file otherwise)")
    seconds = _duration(duration, "--duration") if duration is not None else None
    rec = Recorder(out, tuple(line.tags), rotate_seconds=rotate_s, rotate_bytes=rotate_b, parquet=parquet,
                   flush_every=flush_every)
    import logging

    logging.getLogger("asyncua").setLevel(logging.CRITICAL)  # the connector says in one line what went wrong
    shown = _Progress() if progress else None
    err_console.print(f"recording {len(line.tags)} tag(s) of {line.name} from "
                      f"{', '.join(line.config.sources)} into {out}"
                      + (f", a new segment every {rotate}" if rotate else "") + "; SIGTERM or Ctrl-C stops",
                      highlight=False, markup=False, soft_wrap=True)
    try:
        conns = asyncio.run(record(line, rec, duration=seconds, progress=shown))
    except OSError as exc:
        fail(f"--out: cannot write {exc.filename or out}: {exc.strerror or exc}")
    finally:
        if shown is not None:
            shown.done()
    s = rec.stats
    files = s.segments
    console.print(f"recorded {s.samples} samples ({s.by_quality[0]} good, {s.by_quality[1]} uncertain, "
                  f"{s.by_quality[2]} bad) in {len(files)} file(s)", highlight=False, markup=False)
    for f in files:
        console.print(f"  {f}", highlight=False, markup=False, soft_wrap=True)
    for c in conns:
        st = c.stats
        if st.malformed_total or st.lost:
            lost = ", ".join(f"{n} by {how}" for how, n in st.lost.items())
            console.print(f"source {c.name}: {st.malformed_total} message(s) refused before they became samples"
                          + (f", lost {lost}" if lost else ""), highlight=False, markup=False, soft_wrap=True)
            for key, n in list(st.malformed.items())[:10]:
                console.print(f"  {n} x {key}", highlight=False, markup=False, soft_wrap=True)
    for e in s.conversion_errors:
        console.print(f"WARNING: Parquet conversion failed, the CSV kept: {e}", style="bold yellow",
                      highlight=False, markup=False, soft_wrap=True)
    if not s.samples:  # the files hold only their header
        for c in conns:
            console.print(f"source {c.name}: {c.state}" + (f" ({c.stats.last_error})" if c.stats.last_error else ""),
                          highlight=False, markup=False, soft_wrap=True)
        raise typer.Exit(1)


@app.command("check-tags")
def check_tags_cmd(
    config: Annotated[Path, typer.Option("--config", "-c", help="Line configuration (TOML) with its live "
                                                                "sources.")],
    seconds: Annotated[float, typer.Option(help="How long to watch the tags once connected.", min=1.0,
                                           max=3600.0)] = 10.0,
    fmt: Annotated[str, typer.Option("--format", help="text or json.")] = "text",
    connect_timeout: Annotated[float, typer.Option(help="Seconds to wait for the sources to connect.", min=1.0,
                                                   max=600.0)] = 15.0,
) -> None:
    """Check the tag mapping against the live sources: every configured tag present, updating at about its
    sample period, inside its range. Exit 1 when a tag is not."""
    import asyncio
    import json
    import logging

    from spanwatch.monitor.tagcheck import judge, observe, render_text, source_notes

    _one_of(fmt, ("text", "json"), "--format")
    line = open_line(config)
    _needs_sources(line, config)
    logging.getLogger("asyncua").setLevel(logging.CRITICAL)
    if fmt == "text":
        err_console.print(f"watching {len(line.tags)} tag(s) of {line.name} for {seconds:g} s ...", highlight=False,
                          markup=False)
    obs = asyncio.run(observe(line, seconds, connect_timeout=connect_timeout))
    reports = judge(line, obs)
    notes = source_notes(obs)
    bad = [r for r in reports if not r.ok]
    if fmt == "json":
        typer.echo(json.dumps({"line": line.name, "seconds": seconds, "ok": not bad,
                               "tags": [r.as_dict() for r in reports], "refused": notes}, indent=1))
    else:
        typer.echo(render_text(line, reports, seconds, notes), nl=False)
    if bad:
        raise typer.Exit(1)
