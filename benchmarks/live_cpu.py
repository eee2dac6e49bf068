"""CPU of the live daemon on the example line fed over MQTT at a chosen rate (issue 11).

Usage: python benchmarks/live_cpu.py [--rate 5000] [--per-message 1] [--warmup 15] [--seconds 30] [--qos 1]

1. Starts its own mosquitto on a free loopback port (``tests/mqtt_broker.py``, as ``mqtt_ingest.py`` does;
   ``max_queued_messages`` raised so the broker does not cut a burst).
2. Runs ``spanwatch run`` as a child process on line Q2 (``config/quillmere-q2.toml``) with one MQTT source whose
   15 tags are each on a topic of their own (JSON payload ``{"value", "time", "quality", "seq"}``), SQLite history
   and ``/metrics`` in a temporary folder.
3. Publishes from ``--publishers`` other processes (the tags split among them): every tag at the same rate,
   ``--rate`` messages per second in all, each
   message the latest value of that tag from the project's simulator (line Q2 at 400 m/min, advanced in real time),
   stamped with the wall clock.
4. After ``--warmup`` seconds, measures the daemon process's CPU time (user + system of all its threads, from
   ``/proc/PID/stat``) and the samples it took in (``spanwatch_samples_in`` from ``/metrics``) over ``--seconds``
   of wall time. The publisher's and the broker's CPU are measured the same way and reported beside it.

Target (issue 11): the daemon at most 10 % of one core at 5,000 samples/s. Figures are printed; nothing is
asserted. Run it on a machine that is otherwise quiet: the load average is printed with the figures.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))
CONFIG = ROOT / "config" / "quillmere-q2.toml"
PREFIX = "quillmere/q2/bench-live"
TICK = os.sysconf("SC_CLK_TCK")


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process (all its threads), from /proc/PID/stat (fields 14 and 15)."""
    with open(f"/proc/{pid}/stat", encoding="ascii") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / TICK


def publisher(plan: dict) -> None:
    """Publish every tag of line Q2 at one period (rate / tags) with the simulator's latest value, until ``end``."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine
    from spanwatch.monitor.simline.scenario import parse_scenario

    data = {"scenario": {"name": "live-cpu", "config": str(CONFIG), "duration": "10 h", "seed": 5},
            "speed": [{"at": "0 s", "to": "400 m/min"}]}
    sc, cfg = parse_scenario(data, ROOT / "config" / "scenarios" / "live-cpu.toml")
    sim = SimulatedLine(load_line(cfg), sc)
    names = list(sim.tag_names)
    latest = {n: 0.0 for n in names}
    mine = names[plan["part"]::plan["parts"]]  # this publisher's share of the tags
    topics = {n: f"{PREFIX}/{n}" for n in mine}
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-live-publisher-{plan['part']}",
                         protocol=mqtt.MQTTv311)
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", plan["port"])
    client.loop_start()
    period = len(names) / plan["rate"]
    start = time.time()
    nxt = dict.fromkeys(mine, start)
    seq = dict.fromkeys(mine, 0)
    sim_wall = start
    sent = 0
    per = plan["per"]
    buf: dict[str, list[tuple[float, float]]] = {n: [] for n in mine}
    qos = plan["qos"]
    while (now := time.time()) < plan["end"]:
        if now - sim_wall >= 0.1:  # the simulated line keeps pace with the wall clock
            b = sim.advance(now - sim_wall)
            sim_wall = now
            for k, v in zip(b.tag.tolist(), b.value.tolist(), strict=True):
                latest[names[k]] = v
        for n, due in nxt.items():
            if now >= due:
                nxt[n] = due + period
                if per == 1:
                    seq[n] += 1
                    client.publish(topics[n], f'{{"value": {latest[n]!r}, "time": {now!r}, "quality": "good", '
                                              f'"seq": {seq[n]}}}', qos=qos)
                    sent += 1
                    continue
                buf[n].append((latest[n], due))
                if len(buf[n]) >= per:
                    seq[n] += 1
                    vals, times = zip(*buf[n], strict=True)
                    client.publish(topics[n], json.dumps({"value": vals, "time": times, "quality": "good",
                                                          "seq": seq[n]}), qos=qos)
                    sent += len(vals)
                    buf[n].clear()
        time.sleep(0.0005)
    client.loop_stop()
    client.disconnect()
    print(json.dumps({"sent": sent, "seconds": time.time() - start}))


def write_config(folder: Path, port: int, http_port: int, qos: int, latency: float) -> Path:
    from spanwatch.connectors.history import sqlite_url
    from spanwatch.monitor.line import load_line

    tags = load_line(CONFIG).config.tags
    addresses = "\n".join(f'[tags."{n}"]\nsource = "broker"\naddress = "{PREFIX}/{n}"\n' for n in tags)
    cfg = folder / "live.toml"
    cfg.write_text(f"""extends = "{CONFIG}"

[sources.broker]
kind = "mqtt"
port = {port}
client_id = "bench-live-daemon"
protocol = "3.1.1"
qos = {qos}
payload = "json"
value_path = "value"
time_path = "time"
quality_path = "quality"
seq_path = "seq"
time_unit = "s"

{addresses}
[daemon]
history = "{sqlite_url(str(folder / 'history.db'))}"
http = "127.0.0.1:{http_port}"
latency = "{latency * 1000:.0f} ms"
""", encoding="utf-8")
    return cfg


def metric(http_port: int, *names: str) -> float:
    """The sum of the /metrics lines that start with any of ``names``."""
    with urllib.request.urlopen(f"http://127.0.0.1:{http_port}/metrics", timeout=5) as r:
        text = r.read().decode()
    return sum(float(line.rsplit(" ", 1)[1]) for line in text.splitlines() if line.startswith(names))


def samples_in(http_port: int) -> float:
    return metric(http_port, "spanwatch_samples_in_total", "spanwatch_samples_in{")


def wait_http(http_port: int, proc: subprocess.Popen, timeout: float = 30.0) -> None:
    end = time.time() + timeout
    while time.time() < end:
        if proc.poll() is not None:
            raise SystemExit(f"spanwatch run stopped: {proc.stderr.read() if proc.stderr else ''}")
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{http_port}/healthz", timeout=1):
                return
        except OSError:
            time.sleep(0.2)
    raise SystemExit("spanwatch run did not answer /healthz")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rate", type=float, default=5000.0, help="samples per second, all tags together")
    ap.add_argument("--per-message", type=int, default=1,
                    help="samples per message: 1 sends one JSON object per sample; more send a tag's samples in "
                         "arrays (value, time), as a buffering gateway would")
    ap.add_argument("--warmup", type=float, default=15.0)
    ap.add_argument("--seconds", type=float, default=30.0)
    ap.add_argument("--qos", type=int, default=1, choices=(0, 1))
    ap.add_argument("--publishers", type=int, default=2, help="publishing processes (the tags split among them)")
    ap.add_argument("--publisher", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.publisher:
        publisher(json.loads(args.publisher))
        return
    from mqtt_broker import MosquittoBroker, find_mosquitto, free_port

    if find_mosquitto() is None:
        sys.exit("mosquitto is not installed (Debian: apt-get install mosquitto)")
    with tempfile.TemporaryDirectory(prefix="spanwatch-live-cpu-") as tmp:
        folder = Path(tmp)
        broker = MosquittoBroker(folder, extra=["max_queued_messages 1000000", "max_inflight_messages 1000"]).start()
        http_port = free_port()
        # a message holds a tag's samples of per-message / (rate / tags) seconds: the daemon's latency allowance
        # covers that span (else its older samples arrive after their frames and count as late)
        span = args.per_message / (args.rate / 15.0)
        latency = 0.02 + (span if args.per_message > 1 else 0.0)
        cfg = write_config(folder, broker.port, http_port, args.qos, latency)
        exe = Path(sys.executable).with_name("spanwatch")
        daemon = subprocess.Popen([str(exe), "run", "--config", str(cfg), "--log-level", "warning"],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        pubs: list[subprocess.Popen] = []
        try:
            wait_http(http_port, daemon)
            end = time.time() + args.warmup + args.seconds + 2.0
            plans = [{"port": broker.port, "rate": args.rate, "end": end, "qos": args.qos, "part": i,
                      "parts": args.publishers, "per": args.per_message} for i in range(args.publishers)]
            pubs = [subprocess.Popen([sys.executable, __file__, "--publisher", json.dumps(plan)],
                                     stdout=subprocess.PIPE, text=True) for plan in plans]
            time.sleep(args.warmup)

            def pub_cpu() -> float:
                return sum(cpu_seconds(p.pid) for p in pubs)

            w0, c0, p0, b0, s0 = (time.perf_counter(), cpu_seconds(daemon.pid), pub_cpu(),
                                  cpu_seconds(broker.proc.pid), samples_in(http_port))
            time.sleep(args.seconds)
            w1, c1, p1, b1, s1 = (time.perf_counter(), cpu_seconds(daemon.pid), pub_cpu(),
                                  cpu_seconds(broker.proc.pid), samples_in(http_port))
            load = " ".join(f"{x:.2f}" for x in os.getloadavg())
            outs = [json.loads(p.communicate(timeout=60)[0].strip().splitlines()[-1]) for p in pubs]
            sent = {"sent": sum(o["sent"] for o in outs), "seconds": max(o["seconds"] for o in outs)}
            wall = w1 - w0
            print(f"line Q2 over MQTT (QoS {args.qos}, 15 topics), {args.publishers} publishers asked for "
                  f"{args.rate:,.0f} samples/s in all, {args.per_message} per message; sent "
                  f"{sent['sent'] / sent['seconds']:,.0f} samples/s over its run")
            print(f"steady window {wall:.1f} s after {args.warmup:g} s warm-up: daemon took in "
                  f"{(s1 - s0) / wall:,.0f} samples/s")
            late = metric(http_port, 'spanwatch_input_issues_total{reason="late"}',
                          'spanwatch_input_issues_total{reason="out of order"}')
            print(f"latency allowance {1000 * latency:.0f} ms; samples late or out of order over the whole run: "
                  f"{late:,.0f}")
            print(f"daemon CPU {c1 - c0:.2f} s in {wall:.1f} s = {100 * (c1 - c0) / wall:.1f} % of one core "
                  f"({1e6 * (c1 - c0) / max(s1 - s0, 1):.0f} us per sample); publishers "
                  f"{100 * (p1 - p0) / wall:.1f} %, "
                  f"mosquitto {100 * (b1 - b0) / wall:.1f} %; load average {load}")
        finally:
            for p in pubs:
                if p.poll() is None:
                    p.kill()
            daemon.send_signal(signal.SIGTERM)
            try:
                daemon.wait(timeout=20)
            except subprocess.TimeoutExpired:
                daemon.kill()
            broker.stop()


if __name__ == "__main__":
    main()
