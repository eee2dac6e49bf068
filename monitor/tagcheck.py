"""The tag mapping check (``spanwatch check-tags``): against the line's live sources, is every configured tag
there, updating at about its configured sample period, and inside its plausible range?

:func:`observe` runs the daemon's connectors (:func:`spanwatch.monitor.sources.build_connectors`) for a
window of ``seconds`` after they connect and keeps what arrives; :func:`judge` turns that into one
:class:`TagReport` per configured tag. What counts as wrong (each a ``problems`` entry):

* the source never connected (its last error is named), the tag's address is refused by the server
  (an OPC UA node that does not exist: the connector counts it), or no sample arrived although the
  window held at least :data:`EXPECT_PERIODS` configured sample periods;
* the samples arrive at another period than configured (:mod:`spanwatch.monitor.periods`: the
  median interval more than twice off either way; with fewer intervals than an estimate needs, the
  window divided by the samples): a 5 Hz tag left at the 20 ms default is stale between samples;
* a good sample outside the configured ``range`` (in the tag's unit), or samples of bad or uncertain
  quality (the checks cannot use them).

A tag whose window was too short to expect a sample is reported as not judged, which is not a problem.
"""

from __future__ import annotations

import asyncio
import contextlib
import textwrap
import time
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from spanwatch.monitor.periods import FACTOR, MIN_INTERVALS, disagrees, fmt_period, median_periods
from spanwatch.rules.samples import SampleBatch

if TYPE_CHECKING:
    from spanwatch.connectors.live import LiveConnector
    from spanwatch.monitor.line import Line

EXPECT_PERIODS = 3.0  # a window of this many sample periods without a sample: the tag is not arriving
WIDTH = 80


@dataclass
class Observation:
    """What the connectors delivered in the window, per source, and the connectors themselves."""

    seconds: float
    batches: dict[str, list[SampleBatch]]
    connectors: list[LiveConnector]
    connected: dict[str, bool]


@dataclass
class TagReport:
    """One configured tag as it arrived."""

    tag: str
    source: str
    unit: str
    sample_period: float  # s, configured
    range: tuple[float, float] | None  # configured, in the tag's unit
    stale_limit: float = float("inf")  # s: stale_after x sample_period
    samples: int = 0
    observed_period: float | None = None  # s, median interval
    intervals: int = 0
    minimum: float | None = None  # good samples, the tag's unit
    maximum: float | None = None
    out_of_range: int = 0
    not_good: int = 0
    judged: bool = True
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["range"] = list(self.range) if self.range is not None else None
        d["ok"] = self.ok
        return d


async def observe(line: Line, seconds: float, *, connect_timeout: float = 15.0) -> Observation:
    """Run the line's connectors: wait up to ``connect_timeout`` s for all to connect, then keep ``seconds`` s
    of what arrives."""
    from spanwatch.monitor.sources import SOURCE_KINDS

    batches: dict[str, list[SampleBatch]] = {}
    keeping = False

    def sink_of(name: str):  # type: ignore[no-untyped-def]
        def sink(b: SampleBatch) -> None:
            if keeping and len(b):
                batches.setdefault(name, []).append(b)
        return sink

    # one sink per source, as build_connectors makes them, so each batch is known by its source
    conns = [SOURCE_KINDS[spec.kind].connect(name, spec, line, sink_of(name))
             for name, spec in line.config.sources.items()]
    tasks = [asyncio.create_task(c.run(), name=f"connector {c.name}") for c in conns]
    try:
        began = time.monotonic()
        while time.monotonic() - began < connect_timeout and not all(c.state == "connected" for c in conns):
            await asyncio.sleep(0.1)
        keeping = True
        await asyncio.sleep(seconds)
        keeping = False
        connected = {c.name: c.state == "connected" or bool(batches.get(c.name)) for c in conns}
    finally:
        for c in conns:
            await c.stop()
        for t in tasks:
            t.cancel()
        with contextlib.suppress(Exception):
            await asyncio.gather(*tasks, return_exceptions=True)
    return Observation(seconds, batches, conns, connected)


def _refused(conn: LiveConnector, address: str | None) -> str | None:
    """Why the connector refused a tag's address (counted in its stats, keyed by the address), or None."""
    if not address:
        return None
    for key in conn.stats.malformed:
        where, _, reason = key.partition(": ")
        if where == address:
            return reason
    return None


def judge(line: Line, obs: Observation) -> list[TagReport]:
    """One report per configured tag, in config order (see the module docstring for what counts as wrong)."""
    by_source = {c.name: c for c in obs.connectors}
    reports: list[TagReport] = []
    for source in line.config.sources:
        mine = line.tags_of_source(source)
        conn = by_source[source]
        got = obs.batches.get(source, [])
        batch = SampleBatch.concat(got) if got else None
        names = list(batch.tags) if batch is not None else []
        for tag, spec in mine.items():
            r = TagReport(tag, source, spec.unit, spec.sample_period, tuple(spec.range) if spec.range else None,
                          stale_limit=line.tags[tag].stale_after)
            reports.append(r)
            if batch is not None and tag in names:
                sel = batch.tag == names.index(tag)
                _fill(r, batch.t[sel], batch.value[sel], batch.quality[sel], obs.seconds)
            if not obs.connected.get(source, False):
                why = conn.stats.last_error or conn.state
                r.problems.append(f"source {source} not connected ({why})")
                continue
            refused = _refused(conn, spec.address)
            if refused is not None:  # counted by the connector under the tag's address
                r.problems.append(f"{spec.address}: {refused}")
                if not r.samples:
                    continue
            if r.samples == 0:
                if obs.seconds >= EXPECT_PERIODS * spec.sample_period:
                    where = f" at {spec.address}" if spec.address else ""
                    r.problems.append(f"no sample{where} in {obs.seconds:g} s (expected one every "
                                      f"{fmt_period(spec.sample_period)})")
                else:
                    r.judged = False
    return reports


def source_notes(obs: Observation, limit: int = 10) -> list[str]:
    """What each source refused before it became a sample (an MQTT topic no tag maps, a payload that does not
    decode, an OPC UA node that does not exist), the most frequent first, at most ``limit`` per source."""
    out = []
    for c in obs.connectors:
        items = sorted(c.stats.malformed.items(), key=lambda kv: -kv[1])
        out += [f"source {c.name}: {n} x {key}" for key, n in items[:limit]]
        if len(items) > limit:
            out.append(f"source {c.name}: and {len(items) - limit} more")
    return out


def _fill(r: TagReport, t: np.ndarray, v: np.ndarray, q: np.ndarray, seconds: float) -> None:
    r.samples = len(t)
    period, n = median_periods(np.zeros(len(t), dtype=np.int64), t, 1)
    r.intervals = int(n[0])
    if np.isfinite(period[0]):
        r.observed_period = float(period[0])
    elif r.samples and seconds >= MIN_INTERVALS * FACTOR * r.sample_period:
        r.observed_period = seconds / r.samples  # too few to take a median: the mean over the window
    if r.observed_period is not None and disagrees(r.sample_period, r.observed_period):
        stale = " (stale between samples: every check reading it is off)" if (
            r.observed_period > r.stale_limit) else ""
        r.problems.append(f"sample_period {fmt_period(r.sample_period)} configured, arrives every "
                          f"{fmt_period(r.observed_period)}{stale}; set sample_period = "
                          f"\"{fmt_period(r.observed_period)}\"")
    good = (q == 0) & np.isfinite(v)
    # a server may notify a node before its first value (OPC UA status Bad_WaitingForInitialData,
    # OPC 10000-4): not-good samples before the first good one are its start, not a problem of the tag
    if good.any():
        order = np.argsort(t, kind="stable")
        leading = int(np.argmax(good[order]))
    else:
        leading = 0
    r.not_good = int(len(q) - good.sum()) - leading
    if good.any():
        r.minimum, r.maximum = float(v[good].min()), float(v[good].max())
    if r.range is not None and good.any():
        lo, hi = r.range
        outside = good & ((v < lo) | (v > hi))
        r.out_of_range = int(outside.sum())
        if r.out_of_range:
            r.problems.append(f"{r.out_of_range} of {int(good.sum())} good samples outside the range "
                              f"[{lo:g}, {hi:g}] {r.unit} (seen {r.minimum:.6g} .. {r.maximum:.6g})")
    if r.not_good:
        r.problems.append(f"{r.not_good} of {r.samples} samples of bad or uncertain quality")


def _cell(x: float | None) -> str:
    return "-" if x is None else fmt_period(x)


def render_text(line: Line, reports: list[TagReport], seconds: float, notes: list[str] | None = None) -> str:
    """The reports for an 80-column terminal: one line per tag, then each problem wrapped, then ``notes`` (what
    the sources refused, :func:`source_notes`)."""
    out = [f"{line.name}: {len(reports)} tag(s) watched for {seconds:g} s"]
    head = f"{'tag':<28} {'period':>8} {'seen':>8} {'samples':>8} status"
    out += [head, "-" * len(head)]
    for r in reports:
        status = "ok" if r.ok and r.judged else "not judged" if r.ok else "PROBLEM"
        name = r.tag if len(r.tag) <= 28 else r.tag[:27] + "~"
        out.append(f"{name:<28} {_cell(r.sample_period):>8} {_cell(r.observed_period):>8} {r.samples:>8} "
                   f"{status:<10}".rstrip())
    bad = [r for r in reports if not r.ok]
    out.append("")
    if not bad:
        out.append("every tag present, at its sample period and within its range")
    for r in bad:
        out.append(f"{r.tag} ({r.source}):")
        for p in r.problems:
            out += textwrap.wrap(p, width=WIDTH - 2, initial_indent="  ", subsequent_indent="    ",
                                 break_on_hyphens=False)
    unjudged = [r.tag for r in reports if not r.judged]
    if unjudged:
        out += textwrap.wrap(f"not judged (window shorter than {EXPECT_PERIODS:g} sample periods; give a longer "
                             f"--seconds): {', '.join(unjudged)}", width=WIDTH - 2)
    if notes:
        out += ["", "refused by the sources (not samples of any configured tag, or not decodable):"]
        for n in notes:
            out += textwrap.wrap(n, width=WIDTH - 2, initial_indent="  ", subsequent_indent="    ",
                                 break_on_hyphens=False)
    return "\n".join(out) + "\n"
