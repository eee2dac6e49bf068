"""``spanwatch compare``: one recording through two line configs, alarm by alarm.

Each config runs the recording through a fresh pipeline (as ``spanwatch replay`` does, without a history). The
alarms of the two runs are matched by check, object and level and by overlap in time: an alarm of A and one of
B with the same key whose active intervals (raise to clear, or to the end of the recording) overlap form a pair,
the largest overlaps first, each alarm in at most one pair; the rest are A only or B only.

The second config is a file of its own, or the first with changes (``--set checks.traction.alarm=0.9``):
:func:`config_with` applies them to the parsed TOML before it is validated, so a wrong key or value is a
configuration error naming it, as in a file.
"""

from __future__ import annotations

import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spanwatch.connectors.recording import read_recording
from spanwatch.monitor.config import ConfigError, parse_config, read_toml
from spanwatch.monitor.line import Line, build_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.sweep import Episode


def parse_set(text: str) -> tuple[tuple[str, ...], Any]:
    """``KEY.PATH=VALUE`` -> (the key path, the value): the value is read as TOML (``0.9``, ``true``, ``"2 s"``)
    and, when that fails, taken as text (``2 s``). A quoted key part (``tags."q2.s2.tension".accuracy``) keeps its
    dots. ValueError says what was expected."""
    key, sep, raw = text.partition("=")
    if not sep or not key.strip():
        raise ValueError(f"expected KEY.PATH=VALUE such as checks.traction.alarm=0.9, got {text!r}")
    try:
        doc = tomllib.loads(f"{key.strip()} = 0")  # the key as TOML reads it (dotted, quoted parts)
    except tomllib.TOMLDecodeError:
        raise ValueError(f"expected a dotted key such as checks.traction.alarm, got {key.strip()!r}") from None
    path: tuple[str, ...] = ()
    node: Any = doc
    while isinstance(node, dict):
        (k, node), = node.items()
        path = (*path, k)
    try:
        value = tomllib.loads(f"v = {raw.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw.strip()
    return path, value


def config_with(path: Path, sets: Sequence[str]) -> Line:
    """The line of ``path`` with the ``sets`` (``KEY.PATH=VALUE``) applied; ConfigError names what is wrong."""
    from spanwatch.monitor.exposure import config_hash

    data, _files = read_toml(Path(path))
    name = f"{path} with --set {' --set '.join(sets)}" if sets else str(path)
    for text in sets:
        try:
            keys, value = parse_set(text)
        except ValueError as exc:
            raise ConfigError(name, "--set", str(exc)) from None
        node = data
        for i, k in enumerate(keys[:-1]):
            nxt = node.setdefault(k, {})
            if not isinstance(nxt, dict):
                raise ConfigError(name, ".".join(keys[: i + 1]), f"expected a table to set {keys[-1]} in, "
                                                                 f"got the value {nxt!r}")
            node = nxt
        node[keys[-1]] = value
    cfg = parse_config(data, name)
    return build_line(cfg, name, config_hash(cfg))


@dataclass
class Run:
    """The alarms of one run and the recording's span."""

    episodes: list[Episode]
    start: float
    end: float


def run_alarms(line: Line, recording: str | Path, *, chunk_rows: int = 200_000) -> Run:
    """Every alarm of the line over the recording (in raise order)."""
    pipe = Pipeline(line, None, context=False, block_seconds=60.0)
    done: list[Episode] = []
    open_: dict[str, Episode] = {}

    def take(transitions: list) -> None:
        for tr in transitions:
            if tr.event == "raise":
                open_[tr.key] = Episode(tr.point, tr.t, None, tr.value)
            elif tr.key in open_:
                ep = open_.pop(tr.key)
                done.append(Episode(ep.point, ep.raised, tr.t, ep.value, tr.peak))

    for batch in read_recording(Path(recording), pipe.names, chunk_rows=chunk_rows):
        take(pipe.feed(batch))
    take(pipe.finish_frames())
    done.extend(open_.values())
    done.sort(key=lambda e: (e.raised, e.point.key))
    start = pipe.first_t if pipe.first_t is not None else 0.0
    end = pipe.last_t if pipe.last_t is not None else start
    return Run(done, float(start), float(end))


@dataclass
class Pair:
    key: str
    a: Episode | None
    b: Episode | None

    @property
    def t(self) -> float:
        return min(e.raised for e in (self.a, self.b) if e is not None)


@dataclass
class Comparison:
    pairs: list[Pair]
    counts: dict[str, tuple[int, int]] = field(default_factory=dict)  # check -> (A, B) raises
    times: dict[str, tuple[float, float]] = field(default_factory=dict)  # check -> (A, B) seconds in alarm
    end: float = 0.0


def _overlap(a: Episode, b: Episode, end: float) -> float:
    a1 = a.cleared if a.cleared is not None else end
    b1 = b.cleared if b.cleared is not None else end
    return min(a1, b1) - max(a.raised, b.raised)


def compare(a: Run, b: Run) -> Comparison:
    """Match the alarms of two runs of one recording (module docstring) and total them per check."""
    end = max(a.end, b.end)
    pairs: list[Pair] = []
    keys = dict.fromkeys(e.point.key for e in (*a.episodes, *b.episodes))
    for key in keys:
        ea = [e for e in a.episodes if e.point.key == key]
        eb = [e for e in b.episodes if e.point.key == key]
        cand = sorted(((_overlap(x, y, end), i, j) for i, x in enumerate(ea) for j, y in enumerate(eb)
                       if _overlap(x, y, end) >= 0), key=lambda c: (-c[0], c[1], c[2]))
        used_a, used_b = set(), set()
        for _, i, j in cand:
            if i not in used_a and j not in used_b:
                used_a.add(i)
                used_b.add(j)
                pairs.append(Pair(key, ea[i], eb[j]))
        pairs += [Pair(key, x, None) for i, x in enumerate(ea) if i not in used_a]
        pairs += [Pair(key, None, y) for j, y in enumerate(eb) if j not in used_b]
    pairs.sort(key=lambda p: (p.t, p.key))
    out = Comparison(pairs, end=end)
    for kind in dict.fromkeys(e.point.kind for e in (*a.episodes, *b.episodes)):
        na = [e for e in a.episodes if e.point.kind == kind]
        nb = [e for e in b.episodes if e.point.kind == kind]
        out.counts[kind] = (len(na), len(nb))
        out.times[kind] = (sum(e.duration(a.end) for e in na), sum(e.duration(b.end) for e in nb))
    return out


def _dur(s: float) -> str:
    from spanwatch.monitor.checkstats import clock

    return clock(s)


def render(c: Comparison, fmt_time: Callable[[float], str], name_a: str, name_b: str) -> list[str]:
    """Side by side in at most 80 columns: per alarm key, its pairs (raise time and duration in A and in B)."""
    lines = [f"A: {name_a}", f"B: {name_b}", ""]
    lines.append(f"{'':4}{'A raised':<22}{'in alarm':>9}  {'B raised':<22}{'in alarm':>9}  change")
    last = None
    for p in c.pairs:
        if p.key != last:
            lines.append(p.key)
            last = p.key
        cols = []
        for e in (p.a, p.b):
            if e is None:
                cols.append(f"{'-':<22}{'':>9}")
            else:
                still = "" if e.cleared is not None else "+"
                cols.append(f"{fmt_time(e.raised):<22}{_dur(e.duration(c.end)) + still:>9}")
        if p.a is None:
            change = "B only"
        elif p.b is None:
            change = "A only"
        else:
            d = p.b.raised - p.a.raised
            change = "same" if abs(d) < 1e-6 else f"B {d:+.1f} s"
        lines.append(f"{'':4}{cols[0]}  {cols[1]}  {change}")
    lines += ["", "per check        raises A   B  diff    in alarm A        B     diff"]
    for kind, (na, nb) in c.counts.items():
        ta, tb = c.times[kind]
        diff = ("+" if tb >= ta else "-") + _dur(abs(tb - ta))
        lines.append(f"{kind[:16]:<16}{na:>10}{nb:>4}{nb - na:>+6}  {_dur(ta):>10} {_dur(tb):>8} {diff:>8}")
    if not c.counts:
        lines.append("(no alarm in either run)")
    lines.append("(+ after a duration: still active at the end of the recording)")
    return lines


def rows(c: Comparison) -> list[dict[str, object]]:
    """One plain row per pair (times as epoch seconds, durations in s)."""
    out = []
    for p in c.pairs:
        row: dict[str, object] = {"key": p.key}
        for side, e in (("a", p.a), ("b", p.b)):
            row[f"{side}_raised"] = e.raised if e else None
            row[f"{side}_cleared"] = e.cleared if e else None
            row[f"{side}_seconds"] = round(e.duration(c.end), 3) if e else None
        out.append(row)
    return out
