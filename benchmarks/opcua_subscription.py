"""Memory and throughput of the OPC UA connector on a long subscription: 200 tags at 100 ms.

Usage: python benchmarks/opcua_subscription.py [--minutes 10] [--tags 200] [--warmup 30]

An in-process asyncua server (https://github.com/FreeOpcUa/opcua-asyncio) serves ``--tags``
Double variables and writes a new value with a fresh SourceTimestamp into every one of them every
100 ms; an :class:`spanwatch.connectors.opcua.OpcUaConnector` subscribes to all of them (sampling 100 ms,
publishing 100 ms) and hands its batches to a sink that only counts them. After ``--warmup``
seconds the process's resident memory (RSS, from /proc/self/statm) is sampled every 10 s for
``--minutes`` minutes. Printed: RSS at the start (after warm-up) and at the end, the slope of a
least-squares line through the samples in MB per hour, notifications per second received,
samples per sink call, CPU time of the whole process per notification (server and client share
one process and one core), and the connector's counters. Target: no growth in memory. Nothing is
asserted.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import math
import os
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from asyncua import Server, ua  # noqa: E402
from spanwatch.connectors.opcua import OpcUaConnector  # noqa: E402
from spanwatch.connectors.opcua_server import free_port  # noqa: E402
from spanwatch.monitor.config import OpcUaSource, TagSection  # noqa: E402
from spanwatch.monitor.sources import opcua_settings, opcua_tags  # noqa: E402
from spanwatch.rules.samples import SampleBatch  # noqa: E402

PAGE = os.sysconf("SC_PAGE_SIZE")
RSS_EVERY = 10.0  # seconds
UPDATE_EVERY = 0.1  # seconds


def rss_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * PAGE / 1e6


async def serve(n_tags: int, port: int) -> tuple[Server, list[ua.NodeId]]:
    srv = Server()
    await srv.init()
    srv.set_endpoint(f"opc.tcp://127.0.0.1:{port}/bench/")
    srv.set_security_policy([ua.SecurityPolicyType.NoSecurity])
    idx = await srv.register_namespace("urn:spanwatch:bench")
    obj = await srv.nodes.objects.add_object(ua.NodeId("bench", idx), "bench")
    nodes = []
    for i in range(n_tags):
        var = await obj.add_variable(ua.NodeId(f"bench.tag{i:03d}", idx), f"bench.tag{i:03d}", 0.0,
                                     varianttype=ua.VariantType.Double)
        nodes.append(var.nodeid)
    await srv.start()
    return srv, nodes


async def update(srv: Server, nodes: list[ua.NodeId], stats: dict[str, int]) -> None:
    """Write every variable every 100 ms (paced on the loop clock; late ticks are counted)."""
    loop = asyncio.get_running_loop()
    next_tick = loop.time()
    k = 0
    while True:
        now = datetime.now(UTC)
        for i, node in enumerate(nodes):
            value = 500.0 + 100.0 * math.sin(0.05 * k + i)
            await srv.write_attribute_value(node, ua.DataValue(ua.Variant(value, ua.VariantType.Double),
                                                               SourceTimestamp=now, ServerTimestamp=now))
        stats["writes"] += len(nodes)
        k += 1
        next_tick += UPDATE_EVERY
        delay = next_tick - loop.time()
        if delay < 0:
            stats["late_ticks"] += 1
            next_tick = loop.time()
        await asyncio.sleep(max(delay, 0.0))


async def main(minutes: float, n_tags: int, warmup: float) -> None:
    port = free_port()
    srv, nodes = await serve(n_tags, port)
    server_stats = {"writes": 0, "late_ticks": 0}
    updater = asyncio.create_task(update(srv, nodes, server_stats))
    spec = OpcUaSource(kind="opcua", endpoint=f"opc.tcp://127.0.0.1:{port}/bench/", publishing_interval="100 ms",
                       sampling_interval="100 ms", queue_size=10)
    tags = {f"bench.tag{i:03d}": TagSection(unit="N", sample_period="100 ms", source="bench",
                                            address=f"ns=2;s=bench.tag{i:03d}") for i in range(n_tags)}
    counts = {"samples": 0, "batches": 0}

    def sink(batch: SampleBatch) -> None:
        counts["samples"] += len(batch)
        counts["batches"] += 1

    conn = OpcUaConnector("bench", opcua_settings(spec), opcua_tags(tags), sink)
    runner = asyncio.create_task(conn.run())
    t_connect = time.monotonic()
    while conn.state != "connected":
        if time.monotonic() - t_connect > 30:
            raise SystemExit(f"not connected after 30 s: {conn.stats.last_error}")
        await asyncio.sleep(0.05)
    print(f"connected in {conn.connect_seconds:.3f} s (connect + subscribe {n_tags} items); warming up {warmup:g} s",
          flush=True)
    await asyncio.sleep(warmup)

    t0, n0, cpu0 = time.monotonic(), counts["samples"], time.process_time()
    w0 = server_stats["writes"]
    b0 = counts["batches"]
    times, rss = [0.0], [rss_mb()]
    duration = minutes * 60.0
    print(f"{'elapsed s':>9} {'RSS MB':>8} {'notif/s':>8}", flush=True)
    print(f"{0.0:9.0f} {rss[0]:8.1f} {'':>8}", flush=True)
    last_n, last_t = n0, t0
    while time.monotonic() - t0 < duration - 1e-6:
        await asyncio.sleep(min(RSS_EVERY, duration - (time.monotonic() - t0)))
        now = time.monotonic()
        times.append(now - t0)
        rss.append(rss_mb())
        rate = (counts["samples"] - last_n) / (now - last_t)
        last_n, last_t = counts["samples"], now
        print(f"{times[-1]:9.0f} {rss[-1]:8.1f} {rate:8.0f}", flush=True)
    elapsed = time.monotonic() - t0
    cpu = time.process_time() - cpu0
    received = counts["samples"] - n0
    wrote = server_stats["writes"] - w0
    batches = counts["batches"] - b0
    slope = float(np.polyfit(np.asarray(times) / 3600.0, np.asarray(rss), 1)[0]) if len(times) >= 3 else math.nan

    await conn.stop()
    await runner
    updater.cancel()
    with contextlib.suppress(asyncio.CancelledError):
        await updater
    await srv.stop()

    print()
    print(f"OPC UA subscription, {n_tags} tags, sampling and publishing 100 ms, {elapsed / 60:.1f} min measured "
          f"after {warmup:g} s warm-up")
    print(f"  RSS at start            {rss[0]:8.1f} MB")
    print(f"  RSS at end              {rss[-1]:8.1f} MB")
    print(f"  RSS slope (linear fit)  {slope:8.2f} MB/h   over {len(rss)} samples, 10 s apart")
    print(f"  notifications/s         {received / elapsed:8.0f}   (server wrote {wrote / elapsed:.0f}/s, "
          f"nominal {n_tags / UPDATE_EVERY:.0f}/s)")
    print(f"  samples per sink call   {received / max(batches, 1):8.1f}")
    print(f"  CPU per notification    {1e6 * cpu / max(received, 1):8.1f} us   (server + client, one process; "
          f"{100 * cpu / elapsed:.0f} % of a core)")
    print(f"  server late ticks       {server_stats['late_ticks']:8d}")
    print(f"  connector               reconnects {conn.stats.reconnects}, malformed {conn.stats.malformed_total}, "
          f"overflow {conn.stats.overflow}, repeats skipped {conn.repeats_skipped}")


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0, help="measured duration (default 10)")
    ap.add_argument("--tags", type=int, default=200, help="number of tags (default 200)")
    ap.add_argument("--warmup", type=float, default=30.0, help="seconds before the first RSS sample (default 30)")
    args = ap.parse_args()
    logging.basicConfig(level=logging.ERROR)
    asyncio.run(main(args.minutes, args.tags, args.warmup))
