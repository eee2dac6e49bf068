"""The live CLI paths end to end: `simulate --serve-opcua` read by `opcua-browse`, and `simulate --publish-mqtt`."""

from __future__ import annotations

import socket
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

ROOT = Path(__file__).resolve().parent.parent


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def short_scenario(tmp: Path, seconds: int) -> Path:
    p = tmp / "short.toml"
    p.write_text(f"""[scenario]
name = "short"
config = "{ROOT / 'config' / 'quillmere-q2.toml'}"
duration = "{seconds} s"

[[speed]]
at = "0 s"
to = "400 m/min"
""", encoding="utf-8")
    return p


def test_serve_opcua_and_browse_it(tmp_path):
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/spanwatch/"
    server = subprocess.Popen([sys.executable, "-m", "spanwatch", "simulate", str(short_scenario(tmp_path, 120)),
                               "--serve-opcua", endpoint], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 60
        out = ""
        while time.monotonic() < deadline:
            proc = subprocess.run([sys.executable, "-m", "spanwatch", "opcua-browse", endpoint, "--format", "toml"],
                                  cwd=ROOT, capture_output=True, text=True, timeout=60)
            if proc.returncode == 0 and "q2.s5.tension" in proc.stdout:
                out = proc.stdout
                break
            time.sleep(1.0)
        assert out, "the served line was never browsable"
        # every tag of the line is served under its own node id, ready to paste as a [tags] skeleton
        for tag in ("q2.line.speed_ref", "q2.s5.tension", "q2.rewind.diameter"):
            assert f'address = "ns=2;s={tag}"' in out
    finally:
        server.terminate()
        server.wait(timeout=30)


def test_publish_mqtt_sends_every_sample(mqtt_broker, tmp_path):
    got: list[str] = []
    lock = threading.Lock()

    def on_message(_c, _u, msg) -> None:
        with lock:
            got.append(msg.topic)

    sub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"count-{uuid.uuid4().hex[:6]}", protocol=mqtt.MQTTv311)
    sub.on_message = on_message
    sub.connect(mqtt_broker.host, mqtt_broker.port)
    sub.subscribe("quillmere/#", qos=1)
    sub.loop_start()
    time.sleep(0.5)
    try:
        proc = subprocess.run([sys.executable, "-m", "spanwatch", "simulate", str(short_scenario(tmp_path, 3)),
                               "--publish-mqtt", f"{mqtt_broker.host}:{mqtt_broker.port}", "--speedup", "3"],
                              cwd=ROOT, capture_output=True, text=True, timeout=120)
        assert proc.returncode == 0, proc.stdout + proc.stderr
        sent = int(proc.stdout.split("published ")[1].split()[0])
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and len(got) < sent:
            time.sleep(0.2)
    finally:
        sub.loop_stop()
    # 3 simulated seconds of 14 tags at 50 Hz and one at 10 Hz, all delivered at QoS 1
    assert sent >= 14 * 150 and len(got) == sent
    assert "quillmere/q2/s5/tension" in set(got)
