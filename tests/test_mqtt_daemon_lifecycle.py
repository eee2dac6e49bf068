"""The daemon's alarms over MQTT with their lifecycle, and an operator's acknowledge arriving over MQTT.

Expected states: ANSI/ISA-18.2-2016 and IEC 62682:2014 alarm state diagram (from memory): a raised alarm is
unacknowledged; acknowledging it makes it acknowledged; both are shown to late subscribers through the
retained list of alarms not normal.
"""

from __future__ import annotations

import json

from storagefaults import DaemonProcess, free_port, wait_for
from test_mqtt_lifecycle import Client
from test_under_load import _daemon_config, _publisher, _scenario

STALE = "tag_stale:q2.unwind.rpm:alarm"


def test_states_published_and_an_ack_over_mqtt(mqtt_broker, tmp_path):
    prefix = "quillmere/spanwatch/q2"
    port = free_port()
    # the simulated line published to the broker, its unwind tacho silent from 15 s; the example MQTT line
    # configuration (its alarm and active topics) with an actions topic
    scenario = _scenario(tmp_path, "10 min", '[[fault]]\nkind = "tag_dropout"\ntarget = "q2.unwind.rpm"\n'
                                             'start = "15 s"\nend = "10 min"\n')
    cfg = _daemon_config(tmp_path, "lifecycle", mqtt_broker, port)
    cfg.write_text(cfg.read_text(encoding="utf-8").replace(
        "[sources.broker]\n", f'[sources.broker]\nactions_topic = "{prefix}/actions"\n'), encoding="utf-8")
    watcher = Client(mqtt_broker, [f"{prefix}/alarm", f"{prefix}/actions/result"])
    d = DaemonProcess(cfg, port, tmp_path / "daemon.log")
    pub = _publisher(scenario, mqtt_broker)
    try:
        d.wait_up()
        wait_for(lambda: [m for m in watcher.on(f"{prefix}/alarm") if m["key"] == STALE and m["event"] == "raise"],
                 90, "the stale alarm's raise on the alarm topic")
        raise_msg = next(m for m in watcher.on(f"{prefix}/alarm") if m["key"] == STALE and m["event"] == "raise")
        assert raise_msg["state"] == "unack" and raise_msg["state_before"] == "normal"
        assert raise_msg["rationalization"]["action"]  # the corrective action goes with the alarm
        # an operator's panel acknowledges it over MQTT
        watcher.send(f"{prefix}/actions", json.dumps({"action": "ack", "alarm": STALE, "user": "panel-2",
                                                      "comment": "seen", "id": "p2-1"}))
        wait_for(lambda: watcher.on(f"{prefix}/actions/result"), 30, "the result of the ack")
        result = watcher.on(f"{prefix}/actions/result")[0]
        assert result["ok"] is True, result
        wait_for(lambda: [m for m in watcher.on(f"{prefix}/alarm") if m["key"] == STALE and m["event"] == "ack"],
                 30, "the ack on the alarm topic")
        ack = next(m for m in watcher.on(f"{prefix}/alarm") if m["key"] == STALE and m["event"] == "ack")
        assert (ack["state_before"], ack["state"], ack["user"]) == ("unack", "acked", "panel-2")
        # acknowledging it again is refused, and said so
        watcher.send(f"{prefix}/actions", json.dumps({"action": "ack", "alarm": STALE, "user": "panel-2"}))
        wait_for(lambda: len(watcher.on(f"{prefix}/actions/result")) >= 2, 30, "the second result")
        again = watcher.on(f"{prefix}/actions/result")[1]
        assert again["ok"] is False and "already acknowledged" in again["text"]
        # a late subscriber sees the alarm acknowledged in the retained list
        late = Client(mqtt_broker, [f"{prefix}/active"])
        wait_for(lambda: late.on(f"{prefix}/active"), 30, "the retained list")
        rows = {r["key"]: r for r in late.on(f"{prefix}/active")[-1]["active"]}
        assert rows[STALE]["state"] == "acked"
        late.close()
        health = d.health()
        assert health is not None and health["alarm_states"][STALE] == "acked"
    finally:
        pub.kill()
        pub.wait()
        watcher.close()
        assert d.stop() == 0, d.text()[-3000:]
