"""Record the configured tags from the line's live sources into recordings (``spanwatch record``).

The connectors are the daemon's (:func:`spanwatch.monitor.sources.build_connectors`); every sample
they deliver is written, bad and uncertain ones with their quality (a bad OPC UA value arrives as
NaN, quality bad, and is written so): nothing is dropped on the way. What a connector refuses
before it becomes a sample (a payload that does not parse) is counted in its stats and shown at
the end.

**A file that survives a kill.** Parquet keeps its index in a footer written at close: a recorder
killed with SIGKILL leaves a Parquet file nobody can read. So the recorder writes the long-form CSV
of :mod:`spanwatch.connectors.recording`, by default gzip-compressed (``.csv.gz``), and every
``flush_every`` seconds ends what it has written on a whole line, flushes the deflate stream
(``Z_SYNC_FLUSH``: every byte so far decodes without the rest, RFC 1951 section 3.2.3 non-compressed
block as the sync marker; zlib manual) and calls ``fsync``. A killed gzip file lacks its trailer:
the reader uses every whole line up to the cut and counts the cut once as ``damaged file: gzip data
truncated``. A plain ``.csv`` segment works the same way, with one weakness: a kill in the middle of
a ``write`` can tear the last line, and a torn line that still has three fields (the quality column
is optional) reads as a row with a shortened value. Prefer ``.csv.gz``.

**Segments.** Without rotation the recording is the one file ``--out``. With ``rotate_seconds`` or
``rotate_bytes`` the recording is cut into segments ``STEM-NNNN-YYYYMMDDTHHMMSSZ.SUFFIX`` (number
from 0001, the UTC time the segment was opened: UTC so the names sort and never repeat across a
daylight-saving change) next to ``--out``; a segment is closed (gzip trailer, fsync) when it is older
than ``rotate_seconds`` or larger than ``rotate_bytes`` on disk. With ``parquet``, each closed segment is
converted to ``.parquet`` (written under a temporary name, renamed when complete, the CSV removed only
then): only closed segments are ever Parquet, the open one is always CSV.

SIGTERM or SIGINT (Ctrl-C): the connectors stop, what is buffered is written, the open segment is
closed cleanly (and converted).
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import os
import signal
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import IO

import numpy as np
from spanwatch.connectors.recording import HEADER, ReadProblems, read_recording
from spanwatch.rules.samples import SampleBatch

QUALITY_NAMES = np.array(["good", "uncertain", "bad"])
SUFFIXES = (".csv", ".csv.gz")


def split_name(out: Path) -> tuple[str, str]:
    """(stem, suffix) of a recording name: ``q2.csv.gz`` -> ``('q2', '.csv.gz')``; ValueError if not CSV."""
    name = out.name
    for suffix in sorted(SUFFIXES, key=len, reverse=True):
        if name.lower().endswith(suffix) and len(name) > len(suffix):
            return name[: -len(suffix)], name[-len(suffix):]
    raise ValueError(f"expected a recording name ending in .csv.gz or .csv (the recorder writes CSV; closed "
                     f"segments become Parquet with --parquet), got {name!r}")


def segment_path(out: Path, number: int, opened: float) -> Path:
    """The ``number``-th segment of ``out`` opened at ``opened`` (epoch s).

    >>> segment_path(Path("/r/q2.csv.gz"), 3, 1772427600.0).name
    'q2-0003-20260302T050000Z.csv.gz'
    """
    stem, suffix = split_name(out)
    stamp = datetime.fromtimestamp(opened, UTC).strftime("%Y%m%dT%H%M%SZ")
    return out.with_name(f"{stem}-{number:04d}-{stamp}{suffix}")


def csv_rows(b: SampleBatch) -> bytes:
    """A batch as long-form CSV lines (time ISO 8601 UTC to the microsecond, value to 17 significant digits so a
    float64 reads back exactly, quality as a word), sorted by time."""
    if not len(b):
        return b""
    b = b.sorted_by_time()
    us = np.round(b.t * 1e6).astype("int64").astype("datetime64[us]")
    ts = np.datetime_as_string(us, unit="us", timezone="UTC")
    names = np.array(b.tags, dtype=object)[b.tag]
    vals = [repr(float(v)) for v in b.value]  # repr: the shortest text that reads back as the same float
    qs = QUALITY_NAMES[np.clip(b.quality, 0, 2)]
    return "".join(f"{t},{n},{v},{q}\n" for t, n, v, q in zip(ts, names, vals, qs, strict=True)).encode()


class Segment:
    """One open CSV file of the recording: write whole lines, :meth:`sync` makes them durable."""

    def __init__(self, path: Path, number: int, opened: float) -> None:
        self.path, self.number, self.opened = path, number, opened
        self.rows = 0
        self._raw = open(path, "xb")  # noqa: SIM115  never overwrite a recording
        self._gz: IO[bytes] | None = (gzip.GzipFile(fileobj=self._raw, mode="wb", compresslevel=6)
                                      if path.name.lower().endswith(".gz") else None)
        self._out: IO[bytes] = self._gz if self._gz is not None else self._raw
        self._out.write((",".join(HEADER) + "\n").encode())
        self.sync()

    def write(self, data: bytes, rows: int) -> None:
        if data:
            self._out.write(data)
            self.rows += rows

    def sync(self) -> None:
        """Every line written so far decodes and is on disk (gzip: a sync flush; then fsync)."""
        if self._gz is not None:
            self._gz.flush(zlib.Z_SYNC_FLUSH)
        self._raw.flush()
        os.fsync(self._raw.fileno())

    @property
    def size(self) -> int:
        return self._raw.tell()

    def close(self) -> None:
        if self._gz is not None:
            self._gz.close()  # the gzip trailer (CRC-32, length)
        self._raw.flush()
        os.fsync(self._raw.fileno())
        self._raw.close()


def to_parquet(csv_path: Path, tags: tuple[str, ...]) -> tuple[Path, ReadProblems]:
    """Convert a closed CSV segment to ``.parquet`` beside it (temporary name, then rename; the CSV removed after).

    Returns the Parquet path and what reading the CSV counted (a segment closed cleanly has nothing to count).
    """
    from spanwatch.connectors.parquetrec import write_parquet

    stem, _suffix = split_name(csv_path)
    target = csv_path.with_name(stem + ".parquet")
    tmp = csv_path.with_name(stem + ".parquet.part")
    problems = ReadProblems()
    write_parquet(tmp, read_recording(csv_path, tags, problems=problems))  # type: ignore[arg-type]
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, target)
    csv_path.unlink()
    return target, problems


@dataclass
class RecorderStats:
    samples: int = 0
    by_quality: list[int] = field(default_factory=lambda: [0, 0, 0])
    segments: list[Path] = field(default_factory=list)  # closed ones, final names (Parquet after conversion)
    started: float = field(default_factory=time.monotonic)
    conversion_errors: list[str] = field(default_factory=list)


class Recorder:
    """Write every delivered batch to the recording, with rotation; run with :meth:`run` on an event loop.

    ``out``: the recording (``.csv.gz`` or ``.csv``); ``rotate_seconds`` / ``rotate_bytes``: cut into
    segments (None: one file); ``parquet``: convert closed segments; ``flush_every``: seconds between two
    syncs (what a kill can lose at most); ``clock``: epoch seconds for segment names.
    """

    def __init__(self, out: Path, tags: tuple[str, ...], *, rotate_seconds: float | None = None,
                 rotate_bytes: int | None = None, parquet: bool = False, flush_every: float = 1.0,
                 clock: Callable[[], float] = time.time) -> None:
        split_name(out)
        self.out, self.tags = out, tags
        self.rotate_seconds, self.rotate_bytes = rotate_seconds, rotate_bytes
        self.rotating = rotate_seconds is not None or rotate_bytes is not None
        self.parquet = parquet
        self.flush_every = flush_every
        self.clock = clock
        self.stats = RecorderStats()
        self.segment: Segment | None = None
        self._pending: list[SampleBatch] = []
        self._number = 0
        self._converting: set[asyncio.Task[None]] = set()

    # --- the connectors' sink (event loop) ----------------------------------------------------------------------

    def receive(self, batch: SampleBatch) -> None:
        if len(batch):
            self._pending.append(batch)

    # --- files -----------------------------------------------------------------------------------------------------

    def _open(self) -> Segment:
        now = self.clock()
        if not self.rotating:
            return Segment(self.out, 0, now)
        self._number += 1
        return Segment(segment_path(self.out, self._number, now), self._number, now)

    def _write_pending(self) -> None:
        """Write what arrived (off the event loop; only this object touches the file)."""
        batches, self._pending = self._pending, []
        if self.segment is None:
            self.segment = self._open()
        for b in batches:
            # a batch's tag list is the connector's; written by name, so every connector's batches mix freely
            self.segment.write(csv_rows(b), len(b))
            self.stats.samples += len(b)
            counts = np.bincount(np.clip(b.quality, 0, 2).astype(np.int64), minlength=3)
            for q in range(3):
                self.stats.by_quality[q] += int(counts[q])
        self.segment.sync()

    def _due(self) -> bool:
        s = self.segment
        if s is None or not self.rotating:
            return False
        if self.rotate_bytes is not None and s.size >= self.rotate_bytes:
            return True
        return self.rotate_seconds is not None and self.clock() - s.opened >= self.rotate_seconds

    def _close_segment(self) -> Segment | None:
        s, self.segment = self.segment, None
        if s is not None:
            s.close()
        return s

    async def _closed(self, s: Segment) -> None:
        if not self.parquet:
            self.stats.segments.append(s.path)
            return
        try:
            target, _ = await asyncio.to_thread(to_parquet, s.path, self.tags)
            self.stats.segments.append(target)
        except Exception as exc:  # the CSV stays: nothing is lost
            self.stats.segments.append(s.path)
            self.stats.conversion_errors.append(f"{s.path.name}: {type(exc).__name__}: {exc}")

    # --- the loop ------------------------------------------------------------------------------------------------

    async def flush(self) -> None:
        """Write and sync what arrived; rotate when due (the closed segment is converted in the background)."""
        await asyncio.to_thread(self._write_pending)
        if self._due():
            s = await asyncio.to_thread(self._close_segment)
            if s is not None:
                task = asyncio.create_task(self._closed(s))
                self._converting.add(task)
                task.add_done_callback(self._converting.discard)
            await asyncio.to_thread(self._write_pending)  # opens the next segment at once

    async def finish(self) -> None:
        """Write the rest, close the open segment cleanly, wait for the conversions."""
        await asyncio.to_thread(self._write_pending)
        s = await asyncio.to_thread(self._close_segment)
        if s is not None:
            await self._closed(s)
        if self._converting:
            await asyncio.gather(*self._converting)

    @property
    def current(self) -> Path | None:
        return self.segment.path if self.segment is not None else None


async def record(line: object, recorder: Recorder, *, duration: float | None = None,
                 progress: Callable[[Recorder, list], None] | None = None, progress_every: float = 1.0,
                 connectors: list | None = None) -> list:  # type: ignore[type-arg]
    """Run the line's connectors into ``recorder`` until SIGTERM / SIGINT or ``duration`` seconds; returns the
    connectors (their stats say what they refused)."""
    from spanwatch.monitor.sources import build_connectors

    conns = connectors if connectors is not None else build_connectors(line, recorder.receive)  # type: ignore[arg-type]
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        with contextlib.suppress(NotImplementedError, RuntimeError):
            loop.add_signal_handler(sig, stop.set)
    tasks = [asyncio.create_task(c.run(), name=f"connector {c.name}") for c in conns]
    began = time.monotonic()
    last_progress = 0.0
    try:
        await recorder.flush()  # the first segment exists (header only) from the start
        while not stop.is_set():
            wait = recorder.flush_every
            if duration is not None:
                wait = min(wait, max(0.0, duration - (time.monotonic() - began)))
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(stop.wait(), timeout=wait)
            await recorder.flush()
            if progress is not None and time.monotonic() - last_progress >= progress_every:
                progress(recorder, conns)
                last_progress = time.monotonic()
            if duration is not None and time.monotonic() - began >= duration:
                break
    finally:
        for c in conns:
            await c.stop()
        for t in tasks:
            t.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
        await recorder.finish()
        for sig in (signal.SIGTERM, signal.SIGINT):
            with contextlib.suppress(NotImplementedError, RuntimeError):
                loop.remove_signal_handler(sig)
    return conns
