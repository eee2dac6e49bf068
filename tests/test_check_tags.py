"""``spanwatch check-tags`` against a real asyncua server (the simulated line served live, tests/servedline.py) and
a real mosquitto; the sample-period disagreement found at replay as well.

The faults are made on purpose and the test knows them from outside the checker: a node id the server does
not have, a tag the server updates every 200 ms (5 Hz) left at the 20 ms default in the checked config, and
a plausible range the line's running speed (400 m/min in the steady scenario) lies outside. The same server
with the config it was made from must pass (no false finding). No timing asserts: a 200 ms period against a
20 ms one is ten times off, the factor of two the check allows is far from both.
"""

from __future__ import annotations

import json
import uuid
from pathlib import Path

import numpy as np
from servedline import ROOT, STEADY, ServedLine
from spanwatch.monitor.cli import app
from spanwatch.monitor.line import load_line
from spanwatch.monitor.replay import replay
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simserve import opcua_line_config
from spanwatch.monitor.simulate import simulate_to_file
from typer.testing import CliRunner

EXAMPLE = ROOT / "config" / "quillmere-q2.toml"
FIVE_HZ = "q2.s5.tension"


def _five_hz_line(tmp_path: Path) -> Path:
    """The example line with one load cell that really updates at 5 Hz."""
    p = tmp_path / "served.toml"
    p.write_text(f'extends = "{EXAMPLE}"\n\n[tags."{FIVE_HZ}"]\nsample_period = "200 ms"\n', encoding="utf-8")
    return p


def _check(cfg: Path, *more: str) -> tuple[int, str]:
    r = CliRunner().invoke(app, ["check-tags", "--config", str(cfg), "--seconds", "4", *more])
    return r.exit_code, r.stdout


def test_check_tags_finds_a_missing_tag_a_wrong_sample_period_and_an_out_of_range_tag(tmp_path):
    with ServedLine(_five_hz_line(tmp_path)) as served:
        base = tmp_path / "base.toml"
        base.write_text(opcua_line_config(served.endpoint), encoding="utf-8")  # every tag at the 20 ms default
        cfg = tmp_path / "line.toml"
        cfg.write_text(f'''extends = "{base}"

[tags."q2.s8.tension"]
address = "ns=2;s=q2.s8.no_such_node"

[tags."q2.line.speed_ref"]
range = [-5, 100]
''', encoding="utf-8")
        code, out = _check(cfg, "--format", "json")
        text_code, text = _check(cfg)
    assert code == 1 and text_code == 1
    tags = {t["tag"]: t for t in json.loads(out)["tags"]}
    assert set(tags) == set(load_line(cfg).tags)
    missing = tags["q2.s8.tension"]
    assert not missing["ok"] and missing["samples"] == 0
    assert any("BadNodeIdUnknown" in p for p in missing["problems"]), missing
    slow = tags[FIVE_HZ]
    assert not slow["ok"] and slow["sample_period"] == 0.02
    assert slow["observed_period"] > 0.1, slow  # about 0.2 s; the factor of two is 0.04 s
    assert any("arrives every" in p for p in slow["problems"])
    wide = tags["q2.line.speed_ref"]
    assert not wide["ok"] and wide["out_of_range"] > 0 and wide["maximum"] > 100
    fine = [t for n, t in tags.items() if n not in ("q2.s8.tension", FIVE_HZ, "q2.line.speed_ref")]
    assert fine and all(t["ok"] for t in fine), [t for t in fine if not t["ok"]]
    assert all(len(ln) <= 80 for ln in text.splitlines()), text
    for name in ("q2.s8.tension", FIVE_HZ, "q2.line.speed_ref"):
        assert f"{name} (plc):" in text


def test_the_mapping_the_server_was_made_from_passes(tmp_path):
    with ServedLine() as served:
        cfg = tmp_path / "line.toml"
        cfg.write_text(opcua_line_config(served.endpoint), encoding="utf-8")
        code, out = _check(cfg)
    assert code == 0, out
    assert "every tag present" in out


def test_check_tags_on_mqtt_reports_a_tag_nobody_publishes(tmp_path, mqtt_broker):
    import asyncio
    import threading

    from spanwatch.monitor.simulate import publish_mqtt

    cfg = tmp_path / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2-mqtt.toml'}"

[sources.broker]
port = {mqtt_broker.port}
client_id = "spanwatch-check-{uuid.uuid4().hex[:8]}"

[tags."q2.spare.tension"]
unit = "N"
range = [0, 1500]
""", encoding="utf-8")
    sc, base = load_scenario(STEADY)
    sc.scenario.__dict__["duration"] = 3600.0
    sim = SimulatedLine(load_line(base), sc)
    stop = threading.Event()

    async def publish() -> None:
        feed = asyncio.create_task(publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=1.0))
        import json as js
        import time

        import paho.mqtt.publish as single

        while not stop.is_set():  # a cell on the line nobody mapped to a tag
            await asyncio.to_thread(single.single, "quillmere/q2/s9/tension", js.dumps(
                {"value": 250.0, "time": time.time(), "quality": "good"}), hostname=mqtt_broker.host,
                port=mqtt_broker.port)
            await asyncio.sleep(0.5)
        feed.cancel()
        await asyncio.gather(feed, return_exceptions=True)

    thread = threading.Thread(target=lambda: asyncio.run(publish()), daemon=True)
    thread.start()
    try:
        code, out = _check(cfg, "--format", "json")
    finally:
        stop.set()
        thread.join(10)
    assert code == 1
    tags = {t["tag"]: t for t in json.loads(out)["tags"]}
    assert tags["q2.spare.tension"]["samples"] == 0  # configured, mapped by the topic map, published by nobody
    assert any("no sample in 4 s" in p for p in tags["q2.spare.tension"]["problems"])
    assert tags["q2.s5.tension"]["ok"], tags["q2.s5.tension"]
    assert any("quillmere/q2/s9/tension" in n for n in json.loads(out)["refused"]), json.loads(out)["refused"]


def test_replay_names_the_tag_whose_recording_disagrees_with_its_sample_period(tmp_path):
    sc, _cfg = load_scenario(STEADY)
    sc.scenario.__dict__["duration"] = 20.0
    rec = tmp_path / "five_hz.csv.gz"
    simulate_to_file(SimulatedLine(load_line(_five_hz_line(tmp_path)), sc), rec, progress=False)
    summary = replay(load_line(EXAMPLE), rec, None)  # the example config: every tag at 20 ms
    assert [m.tag for m in summary.period_mismatches] == [FIVE_HZ]  # and no other tag
    m = summary.period_mismatches[0]
    assert m.configured == 0.02 and np.isclose(m.observed, 0.2, rtol=0.1) and m.goes_stale
    r = CliRunner().invoke(app, ["replay", str(rec), "--config", str(EXAMPLE), "--db", str(tmp_path / "h.db"),
                                 "--no-progress"])
    assert r.exit_code == 0, r.output
    assert f"WARNING: sample period: {FIVE_HZ}: sample_period 20 ms configured, samples arrive every 200 ms" in \
        " ".join(r.stdout.split())


def test_check_config_warns_where_an_opcua_source_cannot_deliver_the_sample_period(tmp_path):
    base = tmp_path / "base.toml"
    base.write_text(opcua_line_config("opc.tcp://127.0.0.1:4840/"), encoding="utf-8")
    slow = tmp_path / "slow.toml"
    slow.write_text(f'extends = "{base}"\n\n[sources.plc]\nsampling_interval = "200 ms"\n', encoding="utf-8")
    r = CliRunner().invoke(app, ["check-config", str(slow)])
    assert r.exit_code == 0, r.output
    said = " ".join(r.stdout.split())
    assert "q2.s5.tension: sample_period 20 ms, but source plc samples every 200 ms" in said
    assert "q2.s5.tension: stale limit 100 ms" in said  # 5 x 20 ms, shorter than a 200 ms sampling interval
    late = tmp_path / "late.toml"
    late.write_text(f'extends = "{base}"\n\n[sources.plc]\npublishing_interval = "500 ms"\n', encoding="utf-8")
    said = " ".join(CliRunner().invoke(app, ["check-config", str(late)]).stdout.split())
    assert "shorter than the publishing interval 500 ms of source plc" in said
    said = " ".join(CliRunner().invoke(app, ["check-config", str(base)]).stdout.split())
    assert "WARNING: sample period" not in said  # 100 ms publishing, 100 ms stale limit: it holds


def test_bad_samples_before_the_first_good_one_are_the_start_not_a_problem():
    # An OPC UA server may notify a node before its first value (status Bad_WaitingForInitialData, OPC 10000-4):
    # not-good samples before the first good one are excused; a bad sample after it is a problem of the tag.
    from spanwatch.monitor.tagcheck import TagReport, _fill

    t = np.arange(10) * 0.02
    v = np.full(10, 1.0)
    q = np.zeros(10, dtype=np.int8)
    q[:2] = 2
    r = TagReport("q2.s2.tension", "plc", "N", 0.02, (0.0, 10.0))
    _fill(r, t, v, q, 0.2)
    assert r.not_good == 0 and r.ok, r.problems
    q[6] = 1
    r = TagReport("q2.s2.tension", "plc", "N", 0.02, (0.0, 10.0))
    _fill(r, t, v, q, 0.2)
    assert r.not_good == 1 and any("bad or uncertain" in p for p in r.problems)
    r = TagReport("q2.s2.tension", "plc", "N", 0.02, (0.0, 10.0))
    _fill(r, t, v, np.full(10, 2, dtype=np.int8), 0.2)
    assert r.not_good == 10, "with no good sample at all every one counts"
