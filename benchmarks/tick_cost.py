"""The pipeline's cost per daemon tick, without a network: a recorded stretch of line Q2 fed tick by tick.

Usage: python benchmarks/tick_cost.py [--recording FILE] [--seconds 120] [--tick 0.05] [--rate-factor 1]

Feeds ``--seconds`` of a recording of line Q2 (default: the benchmark hour ``/tmp/bench/q2-60min.parquet`` or
``.csv.gz``, as ``replay_throughput.py`` makes it) into a pipeline as a daemon does: every ``--tick`` seconds of
data the samples of that tick are ingested and the frames up to the tick computed (10 s blocks, the daemon's),
and prints the CPU time per tick and as a share of one core at real time, with the kinds that cost most. The
network (MQTT decoding, OPC UA notifications), the history writer and the HTTP endpoint are not included:
``live_cpu.py`` measures the whole daemon. Figures are printed; nothing is asserted.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from spanwatch.connectors.recording import read_recording  # noqa: E402
from spanwatch.monitor.line import load_line  # noqa: E402
from spanwatch.monitor.pipeline import Pipeline  # noqa: E402
from spanwatch.rules.samples import SampleBatch  # noqa: E402

CONFIG = ROOT / "config" / "quillmere-q2.toml"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--recording", type=Path, default=None)
    ap.add_argument("--seconds", type=float, default=120.0)
    ap.add_argument("--tick", type=float, default=0.05)
    args = ap.parse_args()
    rec = args.recording
    if rec is None:
        rec = next((p for p in (Path("/tmp/bench/q2-60min.parquet"), Path("/tmp/bench/q2-60min.csv.gz"))
                    if p.exists()), None)
        if rec is None:
            sys.exit("no recording: run benchmarks/replay_throughput.py --keep /tmp/bench first, or give --recording")
    line = load_line(CONFIG)
    pipe = Pipeline(line, None, block_seconds=10.0)
    need = int(args.seconds * 800) + 200_000
    batches = []
    for b in read_recording(rec, pipe.names, chunk_rows=200_000):
        batches.append(b)
        if sum(len(x) for x in batches) >= need:
            break
    b = SampleBatch.concat(batches).sorted_by_time()
    cost: dict[str, float] = defaultdict(float)
    for batch in pipe.batches:
        orig = batch.update

        def timed(block, orig=orig, kind=batch.checks[0].kind):
            c = time.process_time()
            out = orig(block)
            cost[kind] += time.process_time() - c
            return out

        batch.update = timed  # type: ignore[method-assign]
    start = float(b.t[0]) + 60.0  # after the first minute: windows filled, line running
    warm = np.searchsorted(b.t, start)
    pipe.ingest(SampleBatch(b.tags, b.tag[:warm], b.t[:warm], b.value[:warm], b.quality[:warm], b.ref[:warm]))
    pipe.advance(start - 0.1)
    cost.clear()
    edges = start + np.arange(0.0, args.seconds + args.tick / 2, args.tick)
    idx = np.searchsorted(b.t, edges)
    c0 = time.process_time()
    for k in range(len(idx) - 1):
        sl = slice(int(idx[k]), int(idx[k + 1]))
        pipe.ingest(SampleBatch(b.tags, b.tag[sl], b.t[sl], b.value[sl], b.quality[sl], b.ref[sl]))
        pipe.advance(float(edges[k + 1]) - 0.1)
    cpu = time.process_time() - c0
    ticks = len(idx) - 1
    samples = int(idx[-1] - idx[0])
    print(f"{samples:,} samples over {args.seconds:g} s of data, {ticks} ticks of {args.tick * 1e3:g} ms: "
          f"{cpu:.2f} s CPU = {1e3 * cpu / ticks:.2f} ms per tick, {100 * cpu / args.seconds:.1f} % of one core "
          f"at {samples / args.seconds:,.0f} samples/s")
    top = sorted(cost.items(), key=lambda kv: -kv[1])[:8]
    print("checks, ms per tick: " + ", ".join(f"{k} {1e3 * v / ticks:.2f}" for k, v in top)
          + f"; all checks {1e3 * sum(cost.values()) / ticks:.2f}")


if __name__ == "__main__":
    main()
