"""``spanwatch simulate``: run a scenario to a recording file plus its ground truth."""

from __future__ import annotations

import errno
import json
from collections.abc import Iterator
from pathlib import Path

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn
from spanwatch.connectors.recording import write_recording
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.rules.samples import SampleBatch


class SimulateError(RuntimeError):
    """A live simulation that cannot start: one line for people that says what failed and what to do."""


def _listen_problem(exc: OSError, host: str, port: int) -> str:
    """Why a server could not listen on ``host:port``, in words."""
    if exc.errno == errno.EADDRINUSE:
        return (f"{host}:{port} is already in use (another server, or an earlier spanwatch simulate still "
                "running): stop it or choose another port")
    if exc.errno == errno.EADDRNOTAVAIL:
        return f"{host} is not an address of this machine: use 127.0.0.1 or one of its own addresses"
    if exc.errno == errno.EACCES:
        return f"no permission to listen on port {port} (ports below 1024 need privileges): choose one above 1024"
    return f"cannot listen on {host}:{port}: {exc.strerror or exc}"


def truth_path_for(out: Path) -> Path:
    name = out.name
    for suffix in (".csv.gz", ".csv", ".gz", ".parquet"):
        if name.endswith(suffix):
            name = name[: -len(suffix)]
            break
    return out.with_name(name + ".truth.json")


def simulate_to_file(sim: SimulatedLine, out: Path, *, time_format: str = "iso", progress: bool = True,
                     console: Console | None = None, chunk: float = 30.0) -> tuple[int, Path]:
    """Simulate the whole scenario in chunks, streaming samples to ``out``; write the truth file."""
    total = sim.sc.scenario.duration
    bar = Progress(TextColumn("simulate"), BarColumn(), TextColumn("{task.completed:.0f}/{task.total:.0f} s"),
                   TimeRemainingColumn(), console=console, disable=not progress)

    def batches() -> Iterator[SampleBatch]:
        while sim.t < total - 1e-9:
            b = sim.advance(min(chunk, total - sim.t))
            bar.update(task, completed=sim.t)
            yield b

    with bar:
        task = bar.add_task("simulate", total=total)
        rows = write_recording(out, batches(), time_format=time_format)
    truth = truth_path_for(out)
    truth.write_text(json.dumps(sim.truth(), indent=1), encoding="utf-8")
    return rows, truth


def tag_topic(prefix: str, tag: str) -> str:
    """The topic a simulated tag is published on: ``prefix/`` + the tag with dots as levels."""
    return f"{prefix.rstrip('/')}/{tag.replace('.', '/')}"


async def publish_mqtt(sim: SimulatedLine, host: str, port: int, *, prefix: str = "quillmere", speedup: float = 1.0,
                       tick: float = 0.1, qos: int = 1, duration: float | None = None, batch: float = 0.0,
                       console: Console | None = None) -> int:
    """Publish the simulated line to an MQTT broker as JSON ``{"value", "time", "quality", "seq"}``, paced.

    The simulated clock starts now, so timestamps are wall-clock times at ``speedup = 1``; at a speed-up
    they start in the past and reach the present at the end, never running ahead of the wall clock. ``seq``
    counts the messages of each topic from 1, so a subscriber can count what a broker dropped.
    With ``batch`` (seconds of the line's time) above 0, samples are held and every tag's samples of each
    ``batch`` go out together as one message, ``value`` and ``time`` as arrays, as a gateway that publishes every
    ``batch`` does (a subscriber then needs a latency allowance of at least ``batch``). Returns the number of
    messages published.
    """
    import asyncio
    import time

    import paho.mqtt.client as mqtt

    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"spanwatch-sim-{int(time.time())}",
                         protocol=mqtt.MQTTv5)
    client.max_queued_messages_set(0)
    try:
        client.connect(host, port)
    except (OSError, ValueError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc) or type(exc).__name__
        raise SimulateError(f"cannot reach the MQTT broker at {host}:{port}: {why}; is it running, and is "
                            "HOST:PORT right?") from None
    client.loop_start()
    end = min(duration, sim.sc.scenario.duration) if duration else sim.sc.scenario.duration
    # sample times never run ahead of the wall clock (a subscriber refuses times from the future): at a speed-up
    # the scenario's times start in the past and reach the present at its end
    sim.t0 = time.time() - (end - sim.t) * (1.0 - 1.0 / speedup) - sim.t if speedup > 1 else time.time() - sim.t
    topics = [tag_topic(prefix, t) for t in sim.tag_names]
    seq = [0] * len(topics)
    held: list[list[tuple[float, float]]] = [[] for _ in topics]

    def send(k: int) -> mqtt.MQTTMessageInfo:
        seq[k] += 1
        values, times = zip(*held[k], strict=True)
        held[k].clear()
        return client.publish(topics[k], json.dumps({"value": values, "time": times, "quality": "good",
                                                     "seq": seq[k]}), qos=qos)

    sent = 0
    last = None
    wall0 = time.perf_counter()
    try:
        step = min(tick * speedup, batch) if batch > 0 else tick * speedup
        batch_start = sim.t
        while sim.t < end - 1e-9:
            b = sim.advance(min(step, end - sim.t))
            for k, t, v in zip(b.tag.tolist(), b.t.tolist(), b.value.tolist(), strict=True):
                if batch <= 0:
                    seq[k] += 1
                    payload = json.dumps({"value": v, "time": round(t, 4), "quality": "good", "seq": seq[k]})
                    last = client.publish(topics[k], payload, qos=qos)
                    sent += 1
                else:
                    held[k].append((v, round(t, 4)))
            if batch > 0 and sim.t - batch_start >= batch - 1e-9:
                batch_start = sim.t
                for k in range(len(topics)):
                    if held[k]:
                        last = send(k)
                        sent += 1
            lag = wall0 + sim.t / speedup - time.perf_counter()
            if lag > 0:
                await asyncio.sleep(lag)
        for k in range(len(topics)):
            if held[k]:
                last = send(k)
                sent += 1
        if last is not None:
            last.wait_for_publish(timeout=30)
    finally:
        client.loop_stop()
        client.disconnect()
    if console is not None:
        console.print(f"published {sent} messages to {host}:{port} under {prefix}/", highlight=False)
    return sent


async def serve_forever(sim: SimulatedLine, endpoint: str, *, speedup: float = 1.0) -> None:
    """Serve the simulated line as an OPC UA server at ``endpoint`` (opc.tcp://HOST:PORT/...) until cancelled.

    Sample times start at the wall clock now, so at ``speedup = 1`` a daemon reading the server
    sees real times. Node ids are ``ns=2;s=<tag name>`` (see config/quillmere-q2-opcua.toml).
    """
    import contextlib
    import time
    from urllib.parse import urlparse

    from spanwatch.monitor.simserve import SimLineServer

    url = urlparse(endpoint)
    host, port = url.hostname or "127.0.0.1", url.port or 4840
    server = SimLineServer(sim, host=host, port=port, speedup=speedup, start_time=time.time())
    try:
        await server.start()
    except OSError as exc:
        with contextlib.suppress(Exception):
            await server.stop()
        raise SimulateError(f"cannot serve at {endpoint}: {_listen_problem(exc, host, port)}") from None
    await server.run(sim.sc.scenario.duration - sim.t)
