"""Sustained MQTT ingest: messages per second with zero loss, and end-to-end latency.

Starts its own mosquitto on a free port of 127.0.0.1 (like the test fixture; the system
broker is never used), runs an :class:`~spanwatch.connectors.mqtt.MqttConnector` in this process and
a publisher in a separate process (this script with ``--publisher``), all on loopback.

1. **Throughput.** ``--count`` JSON messages across ``--tags`` topics at QoS 1, as fast
   as the publishers go: one ``mosquitto_pub -l`` process per tag (Debian
   mosquitto-clients, C; ``--tool paho`` uses one paho-mqtt process instead, which on a
   small machine measures mostly paho's publishing). The connector's sink checks off each
   message's index (its value) exactly once: zero loss and no duplicates are counted, not
   assumed. Reported: messages/s from the first to the last sample handed to the sink.
2. **Latency.** One paho-mqtt process paces ``--rate`` messages/s for ``--seconds``, each
   payload carrying its wall-clock publish time; latency is sink-call time minus that time
   (same clock, same machine), p50 / p99 / max.
3. **To the alarm row** (when ``monitor/daemon.py`` is present): the daemon runs line Q2
   with every tag over MQTT at its sample rate and a SQLite history; ten times the
   tension goes out of range for 0.5 s; latency is from the first out-of-range publish
   to the ``tag_range`` raise seen committed in ``alarm_events`` (polled every 2 ms),
   with the daemon's latency allowance (50 ms here), tick (20 ms) and on-delay (0 s).

The broker runs with ``max_queued_messages`` raised (``--broker-queue``) so that a burst
queued for the connector is not cut by mosquitto's default of 1000 per session.

Prints figures; asserts nothing. Targets: >= 20,000 messages/s with zero loss; p99 <= 100 ms.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import gc
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from spanwatch.connectors.mqtt import MqttSettings

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

TOPIC = "quillmere/q2/bench/tag{:02d}"
PROTOCOL = "5"  # the connector's MQTT version (--protocol)
FREEZE = True  # gc.freeze() once the connector runs, as monitor/daemon.py does (--no-gc-freeze to compare)


# --- the publisher process ------------------------------------------------------------------------


def publisher(port: int, count: int, tags: int, rate: float, client_id: str, inflight: int) -> None:
    """Publish ``count`` QoS 1 messages round-robin over ``tags`` topics; print a JSON summary line."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    acked = 0
    window = 10_000
    refused: dict[str, int] = {}

    def on_publish(_c, _u, _mid, rc, _p) -> None:
        nonlocal acked
        acked += 1
        if rc.is_failure:
            refused[str(rc)] = refused.get(str(rc), 0) + 1

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5)
    client.max_inflight_messages_set(inflight)
    client.on_publish = on_publish
    client.connect("127.0.0.1", port, keepalive=30)
    client.loop_start()
    while not client.is_connected():
        time.sleep(0.005)
    topics = [TOPIC.format(k) for k in range(tags)]
    t0 = time.time()
    for i in range(count):
        if rate > 0:
            due = t0 + i / rate
            ahead = due - time.time()
            if ahead > 0.0005:
                time.sleep(ahead)
        while i - acked >= window:  # paho numbers messages with 16 bits: keep far fewer than 65,535 outstanding
            time.sleep(0.0005)
        payload = f'{{"value": {i}, "time": {time.time():.6f}}}'
        info = client.publish(topics[i % tags], payload, qos=1)
        if info.rc not in (mqtt.MQTT_ERR_SUCCESS, mqtt.MQTT_ERR_NO_CONN):
            raise SystemExit(f"publish {i} refused by paho: {mqtt.error_string(info.rc)}")
    t_sent = time.time()
    while acked < count and time.time() - t_sent < 120:
        time.sleep(0.005)
    t_acked = time.time()
    client.disconnect()
    client.loop_stop()
    print(json.dumps({"count": count, "acked": acked, "t0": t0, "t_sent": t_sent, "t_acked": t_acked,
                      "refused": refused}), flush=True)


def start_publisher(port: int, count: int, tags: int, rate: float, inflight: int,
                    client_id: str = "bench-publisher") -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, __file__, "--publisher", "--port", str(port), "--count", str(count),
                             "--tags", str(tags), "--rate", str(rate), "--client-id", client_id,
                             "--inflight", str(inflight)], stdout=subprocess.PIPE, text=True)


def publisher_summary(proc: subprocess.Popen[str]) -> dict[str, float]:
    out, _ = proc.communicate(timeout=600)
    return json.loads(out.strip().splitlines()[-1])


def mosquitto_pub_burst(port: int, count: int, tags: int) -> dict[str, float]:
    """One ``mosquitto_pub -l -q 1`` process per tag topic (a device per tag), fed its lines through stdin.

    mosquitto_pub (Debian mosquitto-clients, C) publishes each stdin line as one QoS 1
    message and, at the end of its input, waits for the outstanding acknowledgements.
    """
    tool = shutil.which("mosquitto_pub")
    assert tool is not None
    procs = []
    t0 = time.time()
    for k in range(tags):
        procs.append(subprocess.Popen([tool, "-h", "127.0.0.1", "-p", str(port), "-V", "5", "-q", "1",
                                       "-i", f"bench-pub-{k:02d}", "-t", TOPIC.format(k), "-l"],
                                      stdin=subprocess.PIPE, stderr=subprocess.PIPE, text=True))

    def feed(k: int) -> None:
        stdin = procs[k].stdin
        assert stdin is not None
        step = 5000 * tags
        for start in range(k, count, step):
            now = time.time()
            stdin.write("".join(f'{{"value": {i}, "time": {now:.6f}}}\n' for i in range(start, min(count, start + step),
                                                                                   tags)))
        stdin.close()

    threads = [threading.Thread(target=feed, args=(k,)) for k in range(tags)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    t_sent = time.time()
    errors = []
    for p in procs:
        p.wait(600)
        err = p.stderr.read() if p.stderr else ""
        if p.returncode:
            errors.append(err.strip())
    return {"count": count, "acked": count if not errors else float("nan"), "t0": t0, "t_sent": t_sent,
            "t_acked": time.time(), "errors": errors}  # type: ignore[dict-item]


def line_publisher(plan: dict) -> None:
    """Publish every tag of the line at one period with mid-range values; from ``start`` the target tension
    goes out of range for 0.5 s every 2 s, ``cycles`` times. Prints the publish times of each first bad sample."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-line-publisher", protocol=mqtt.MQTTv311)
    client.max_inflight_messages_set(1000)
    client.connect("127.0.0.1", plan["port"])
    client.loop_start()
    start, cycles, period, target = plan["start"], plan["cycles"], plan["period"], plan["target"]
    nxt = dict.fromkeys(plan["mids"], time.time())
    bad_starts: list[float] = []
    end = start + 2.0 * cycles + 1.0
    while time.time() < end:
        now = time.time()
        k, phase = divmod(now - start, 2.0)
        bad = now >= start and k < cycles and phase < 0.5
        for n, due in nxt.items():
            if now >= due:
                v = plan["mids"][n]
                if n == target and bad:
                    v = plan["bad"]
                    if len(bad_starts) <= k:
                        bad_starts.append(now)
                client.publish(f"quillmere/q2/bench-line/{n}", json.dumps({"value": v, "time": now}), qos=1)
                nxt[n] = due + period
        time.sleep(0.0005)
    client.loop_stop()
    print(json.dumps(bad_starts))


# --- the measuring side ---------------------------------------------------------------------------


def spec_for(port: int, queue_size: int, overflow: str) -> MqttSettings:
    from spanwatch.connectors.mqtt import MqttSettings, TopicRule

    return MqttSettings(port=port, client_id="bench-connector", payload="json", value_path="value",
                        time_path="time", quality_path=None, subscribe=("quillmere/q2/bench/#",),
                        topic_map=(TopicRule("quillmere/q2/bench/+", "bench.{1}"),), queue_size=queue_size,
                        overflow=overflow, reconnect_min=0.2, reconnect_max=2.0, protocol=PROTOCOL)


async def _wait(pred, timeout: float) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return True
        await asyncio.sleep(0.01)
    return bool(pred())


async def throughput(port: int, count: int, tags: int, queue_size: int, overflow: str, inflight: int,
                     tool: str) -> dict:
    from spanwatch.connectors.mqtt import MqttConnector
    from spanwatch.rules.samples import SampleBatch

    names: dict[str, str | None] = {f"bench.tag{k:02d}": None for k in range(tags)}  # matched by the topic rule
    seen = np.zeros(count, dtype=np.int32)
    marks: dict[str, float] = {}
    batches: list[int] = []

    def sink(batch: SampleBatch) -> None:
        now = time.time()
        marks.setdefault("first", now)
        marks["last"] = now
        idx = batch.value.astype(np.int64)
        ok = (idx >= 0) & (idx < count)
        np.add.at(seen, idx[ok], 1)
        batches.append(len(batch))

    conn = MqttConnector("bench", spec_for(port, queue_size, overflow), names, sink)
    task = asyncio.create_task(conn.run())
    if FREEZE:
        gc.freeze()  # as the daemon does once its connectors run
    await _wait(lambda: conn.state == "connected", 15)
    if tool == "mosquitto_pub":
        pub_task = asyncio.ensure_future(asyncio.to_thread(mosquitto_pub_burst, port, count, tags))
    else:
        proc = start_publisher(port, count, tags, 0.0, inflight)
        pub_task = asyncio.ensure_future(asyncio.to_thread(publisher_summary, proc))
    received = await _wait(lambda: conn.stats.samples_in + conn.stats.malformed_total + conn.stats.overflow
                           >= count and conn.stats.queue_depth == 0, 300)
    pub = await pub_task
    await asyncio.sleep(0.5)  # anything late (duplicates) would show up now
    await conn.stop()
    await task
    span = marks.get("last", 0.0) - marks.get("first", 0.0)
    return {
        "count": count, "received": int(seen.sum()), "distinct": int((seen > 0).sum()),
        "lost": int((seen == 0).sum()), "duplicates": int((seen[seen > 1] - 1).sum()), "complete": received,
        "msg_per_s": count / span if span > 0 else float("nan"),
        "publisher_msg_per_s": pub["count"] / (pub["t_sent"] - pub["t0"]),
        "publisher_acked_msg_per_s": pub["acked"] / (pub["t_acked"] - pub["t0"]),
        "first_publish_to_last_sample_msg_per_s": count / (marks.get("last", 0.0) - pub["t0"]),
        "batches": len(batches), "mean_batch": float(np.mean(batches)) if batches else 0.0,
        "overflow": conn.stats.overflow, "malformed": conn.stats.malformed_total, "publisher_errors": pub.get("errors"),
    }


async def latency(port: int, rate: float, seconds: float, tags: int, queue_size: int, overflow: str,
                  inflight: int) -> dict:
    from spanwatch.connectors.mqtt import MqttConnector
    from spanwatch.rules.samples import SampleBatch

    count = int(rate * seconds)
    names: dict[str, str | None] = {f"bench.tag{k:02d}": None for k in range(tags)}  # matched by the topic rule
    lat: list[np.ndarray] = []

    def sink(batch: SampleBatch) -> None:
        lat.append(time.time() - batch.t)

    spec = spec_for(port, queue_size, overflow)
    conn = MqttConnector("bench-latency", dataclasses.replace(spec, client_id="bench-latency"), names, sink)
    task = asyncio.create_task(conn.run())
    if FREEZE:
        gc.freeze()
    await _wait(lambda: conn.state == "connected", 15)
    proc = start_publisher(port, count, tags, rate, inflight, client_id="bench-paced")
    await _wait(lambda: conn.stats.samples_in + conn.stats.malformed_total + conn.stats.overflow >= count,
                120 + seconds)
    pub = await asyncio.to_thread(publisher_summary, proc)
    await conn.stop()
    await task
    all_lat = np.concatenate(lat) if lat else np.zeros(0)
    ms = all_lat * 1000.0
    return {"count": count, "received": int(all_lat.size), "achieved_rate": pub["count"] / (pub["t_sent"] - pub["t0"]),
            "p50_ms": float(np.percentile(ms, 50)) if ms.size else float("nan"),
            "p99_ms": float(np.percentile(ms, 99)) if ms.size else float("nan"),
            "max_ms": float(ms.max()) if ms.size else float("nan")}


# --- to the alarm row, through the daemon -------------------------------------------------------


async def to_alarm_row(port: int, seconds: float, rate: float) -> dict | None:
    """Line Q2 over MQTT through the daemon; publish -> committed tag_range raise. None without the daemon."""
    try:
        import spanwatch.monitor.daemon  # noqa: F401
    except ImportError:
        return None
    folder = Path(tempfile.mkdtemp(prefix="spanwatch-bench-"))
    try:
        return await _to_alarm_row(port, seconds, folder, rate)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


async def _to_alarm_row(port: int, seconds: float, folder: Path, rate: float) -> dict:
    import sqlite3

    from spanwatch.connectors.history import sqlite_url
    from spanwatch.monitor.daemon import Daemon
    from spanwatch.monitor.line import load_line

    base = load_line(ROOT / "config" / "quillmere-q2.toml")
    tags = base.config.tags
    db = folder / "history.db"
    addresses = "\n".join(f'[tags."{n}"]\nsource = "broker"\naddress = "quillmere/q2/bench-line/{n}"\n'
                          for n in tags)
    cfg = folder / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2.toml'}"

[sources.broker]
kind = "mqtt"
port = {port}
client_id = "bench-daemon"
payload = "json"
quality_path = "quality"
time_unit = "s"

{addresses}
[daemon]
history = "{sqlite_url(str(db))}"
http = ""
tick = "20 ms"
startup_grace = "1 s"

[checks.tag_range]
on_delay = "0 s"
off_delay = "0 s"
""", encoding="utf-8")
    line = load_line(cfg)
    target = "q2.s5.tension"
    lo, hi = line.config.tags[target].range or (0.0, 1.0)
    daemon = Daemon(line)
    run = asyncio.create_task(daemon.run())
    conn = daemon.connectors[0]
    await _wait(lambda: conn.state == "connected", 15)

    # every tag at the same rate, so the line as a whole brings `rate` messages per second, from another process
    plan = {"port": port, "period": len(line.config.tags) / rate, "target": target, "bad": hi + (hi - lo),
            "mids": {n: (t.range[0] + t.range[1]) / 2 if t.range else 1.0 for n, t in line.config.tags.items()}}

    def raises() -> int:
        con = sqlite3.connect(db)
        try:
            return con.execute("select count(*) from alarm_events where alarm_key like ? and event = 'raise'",
                               (f"tag_range:{target}:%",)).fetchone()[0]
        finally:
            con.close()

    def poll(deadline: float) -> list[float]:
        """Wall-clock times at which each new raise is first seen committed (polled every 2 ms, another thread)."""
        seen: list[float] = []
        n0 = raises()
        while time.time() < deadline and len(seen) < cycles:
            n = raises() - n0
            while len(seen) < n:
                seen.append(time.time())
            time.sleep(0.002)
        return seen

    cycles = 30
    start_bad = time.time() + seconds
    plan.update(start=start_bad, cycles=cycles)
    pub = await asyncio.create_subprocess_exec(sys.executable, __file__, "--line-publisher", json.dumps(plan),
                                               stdout=asyncio.subprocess.PIPE)
    lat_probe: list[tuple[float, float]] = []

    async def probe() -> None:
        while not daemon.stopping.is_set():
            mean_tick = daemon.stats.eval_seconds / max(1, daemon.stats.ticks)
            lat_probe.append((daemon.frame_latency, mean_tick))
            await asyncio.sleep(0.5)

    probing = asyncio.ensure_future(probe())
    seen = await asyncio.to_thread(poll, start_bad + 2.0 * cycles + 10.0)
    out, _ = await pub.communicate()
    probing.cancel()
    print("frame latency behind the wall clock / mean tick eval (s):",
          [tuple(round(x, 3) for x in p) for p in lat_probe[::4]])
    bad_starts = json.loads(out.decode().strip().splitlines()[-1])
    daemon.request_stop()
    await run
    lat = [(a - b) * 1000.0 for a, b in zip(seen, bad_starts, strict=False)]
    return {"raises": len(seen), "cycles": cycles, "latency_ms": lat,
            "daemon_latency_allowance_ms": daemon.pipe.clocks.hold * 1000.0, "tick_ms": daemon.tick * 1000.0,
            "on_delay_s": 0.0, "poll_ms": 2.0}


# --- main -----------------------------------------------------------------------------------------


def machine() -> str:
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mosq = ""
    from mqtt_broker import find_mosquitto

    binary = find_mosquitto()
    if binary:
        out = subprocess.run([binary, "-h"], capture_output=True, text=True)
        mosq = (out.stdout or out.stderr).splitlines()[0]
    return f"{os.cpu_count()} CPU(s) {cpu}; Python {platform.python_version()}; {mosq}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count", type=int, default=200_000, help="messages in the throughput run")
    ap.add_argument("--tags", type=int, default=20)
    ap.add_argument("--rate", type=float, default=5000.0, help="paced messages/s in the latency run")
    ap.add_argument("--seconds", type=float, default=10.0, help="length of the latency run")
    ap.add_argument("--queue-size", type=int, default=100_000)
    ap.add_argument("--overflow", choices=["block", "drop_oldest"], default="block")
    ap.add_argument("--inflight", type=int, default=100, help="publisher's QoS 1 in-flight window")
    ap.add_argument("--broker-queue", type=int, default=1_000_000,
                    help="mosquitto max_queued_messages (default of mosquitto itself: 1000)")
    ap.add_argument("--broker-inflight", type=int, default=20, help="mosquitto max_inflight_messages (its default: 20)")
    ap.add_argument("--tool", choices=["mosquitto_pub", "paho"], default=None,
                    help="burst publisher: one mosquitto_pub per tag (default when installed) or one paho process")
    ap.add_argument("--skip-daemon", action="store_true")
    ap.add_argument("--protocol", choices=["5", "3.1.1"], default="3.1.1", help="the connector's MQTT version")
    ap.add_argument("--no-gc-freeze", action="store_true", help="leave the garbage collector as it is")
    # publisher mode (internal)
    ap.add_argument("--publisher", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--line-publisher", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--port", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--client-id", default="bench-publisher", help=argparse.SUPPRESS)
    args = ap.parse_args()
    global PROTOCOL
    PROTOCOL = args.protocol
    if args.line_publisher:
        line_publisher(json.loads(args.line_publisher))
        return
    if args.publisher:
        publisher(args.port, args.count, args.tags, args.rate, args.client_id, args.inflight)
        return

    from mqtt_broker import MosquittoBroker, find_mosquitto

    global FREEZE
    FREEZE = not args.no_gc_freeze
    if find_mosquitto() is None:
        sys.exit("mosquitto is not installed (Debian: apt-get install mosquitto)")
    tmp = tempfile.TemporaryDirectory(prefix="spanwatch-mqtt-bench-")
    folder = Path(tmp.name)
    broker = MosquittoBroker(folder, extra=[f"max_queued_messages {args.broker_queue}",
                                            f"max_inflight_messages {args.broker_inflight}"]).start()
    print(f"machine: {machine()}")
    print(f"broker: mosquitto on 127.0.0.1:{broker.port}, max_queued_messages {args.broker_queue}, "
          f"max_inflight_messages {args.broker_inflight}; connector queue {args.queue_size} ({args.overflow}); "
          f"gc.freeze() {'on' if FREEZE else 'off'}")
    try:
        tool = args.tool or ("mosquitto_pub" if shutil.which("mosquitto_pub") else "paho")
        r = asyncio.run(throughput(broker.port, args.count, args.tags, args.queue_size, args.overflow, args.inflight,
                                   tool))
        who = (f"{args.tags} mosquitto_pub processes (one per tag)" if tool == "mosquitto_pub"
               else "one paho-mqtt process")
        print(f"\nthroughput: {r['count']:,} QoS 1 messages over {args.tags} tags, published by {who}")
        print(f"  received {r['received']:,} samples, {r['distinct']:,} distinct, lost {r['lost']:,}, "
              f"duplicates {r['duplicates']:,}, malformed {r['malformed']}, overflow {r['overflow']}")
        print(f"  ingest rate (first to last sample): {r['msg_per_s']:,.0f} messages/s")
        print(f"  first publish to last sample: {r['first_publish_to_last_sample_msg_per_s']:,.0f} messages/s; "
              f"publisher sent {r['publisher_msg_per_s']:,.0f}/s, acked {r['publisher_acked_msg_per_s']:,.0f}/s")
        print(f"  sink calls {r['batches']:,}, mean batch {r['mean_batch']:,.0f} samples")
        r = asyncio.run(latency(broker.port, args.rate, args.seconds, args.tags, args.queue_size, args.overflow,
                                args.inflight))
        print(f"\nlatency, publish -> sink: {r['count']:,} messages paced at {args.rate:,.0f}/s "
              f"(achieved {r['achieved_rate']:,.0f}/s), received {r['received']:,}")
        print(f"  p50 {r['p50_ms']:.1f} ms, p99 {r['p99_ms']:.1f} ms, max {r['max_ms']:.1f} ms")
        if args.skip_daemon:
            return
        d = asyncio.run(to_alarm_row(broker.port, 5.0, args.rate))
        if d is None:
            print("\nlatency to the committed alarm row: monitor/daemon.py is not available; "
                  "reported to the sink only")
        elif not d["latency_ms"]:
            print("\nlatency to the committed alarm row: no tag_range raise was committed")
        else:
            lat = np.array(d["latency_ms"])
            print(f"\nlatency, publish of an out-of-range tension -> tag_range raise committed in SQLite (daemon, line "
                  f"Q2, its 15 tags over MQTT at {args.rate:,.0f} messages/s in all, from another process): "
                  f"{d['raises']} of {d['cycles']} raises seen")
            print(f"  p50 {np.percentile(lat, 50):.0f} ms, p99 {np.percentile(lat, 99):.0f} ms, "
                  f"max {lat.max():.0f} ms (all: "
                  f"{', '.join(f'{x:.0f}' for x in lat)} ms)")
            print(f"  includes the daemon latency allowance {d['daemon_latency_allowance_ms']:.0f} ms, ticks of "
                  f"{d['tick_ms']:.0f} ms, on-delay {d['on_delay_s']:g} s and a {d['poll_ms']:g} ms database poll")
    finally:
        broker.stop()
        tmp.cleanup()


if __name__ == "__main__":
    main()
