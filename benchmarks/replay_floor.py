"""Replay against its floor, a 150-tag line, length scaling and a tuning sweep (issue 11).

Usage::

    python benchmarks/replay_floor.py [--line q2|big] [--keep DIR]     # floor and replay, side by side
    python benchmarks/replay_floor.py --recording FILE                  # the same on another recording of line Q2
    python benchmarks/replay_floor.py --scaling 1 4 16 [--keep DIR]     # replay of 1 h, 4 h, 16 h of line Q2
    python benchmarks/replay_floor.py --sweep 20 [--keep DIR]           # 20 traction warning limits vs one replay

Recordings are simulated once and kept in ``--keep`` (default /tmp/bench; ``q2-60min.csv.gz`` there is the hour
``replay_throughput.py`` makes, the same scenario). Every measured run is a child process started the same way
(``python benchmarks/replay_floor.py --child ...``), so its peak RSS (``ru_maxrss``) is its own; a child reports
the time of its measured part and the parent the child's whole wall time, imports and set-up included.

**The floor** (``benchmarks/floor_checks.py``) is the least work that computes the quantities the pipeline
computes, on one core:

- reads the gzip CSV with pyarrow's CSV reader directly (one thread; time typed as a UTC timestamp, or float epoch
  seconds; tag and quality dictionary-encoded, their few words mapped once; value float64);
- aligns every tag to the line's frame grid in one pass (a counting sort by tag, then ``searchsorted`` per tag:
  sample-and-hold, age, quality) into (frames, tags) matrices for the whole recording;
- derives the signals (``line.signals``: SI, usable = finite, good, fresh, in range), the line state
  (``classify_line_state`` on the same smoothed derivative, the settle holds by forward-filled indices) and the
  roll changes (diameter jump, core-change edge, length reset) for the whole recording at once;
- evaluates every (kind, object) check a pipeline runs (``build_checks(line)``, the list ``Pipeline(line).checks``
  is) with the pure functions of ``spanwatch.rules``
  (``effective_cof``, ``traction_utilisation``, ``demonstrated_cof``, ``slip_ratio``, ``steady_span_tension``,
  ``draw_band``, ``mean_ratio_uncertainty``, ``diameter_from_speed``, ``local_slope``, ``rotation_frequency``,
  ``classify_line_state``, ``learn_baseline``, ``standardise``, ``design_cusum``), traction, no-drive, slip and idler
  lag over a frames x rollers matrix, tag range, quality, stale and frozen over the frames x tags matrix, the drift
  CUSUMs over a batches x detectors matrix; windows (draw, speed-diameter, length rate, runout) as differences of
  cumulative sums, Page's CUSUM as the cumulative sum less its running minimum;
- runs a threshold + on-delay pass over every alarm point (``alarm_points``, the list ``Pipeline(line).points`` is;
  taken from ``spanwatch.monitor.checkset`` so the floor does not pay the rest of a pipeline's set-up: on the
  150-tag line that is mostly resolving the suppression rules) (a raise where a run of
  valid frames beyond the limit lasts the on-delay).

What the floor does **not** do (it is a floor, not a second implementation): no history database, no context
windows, no input statistics or refused-sample accounting, no watermarks or future-time tests, no gap handling,
no streaming (the whole recording is in memory, so its RSS grows with the length), no traction start-up settle,
no deadband, off-delay, chattering, first-out, suppression or lifecycle in the alarm pass; the roll-diameter band
is the simplified one (no calibration-uncertainty term), the drift detectors keep one baseline each (no
operating-point bands, no re-learning at roll changes or under a standing alarm), the alarm pass takes the on-delay
only. The counts of checks and alarm points it covers are printed and must equal the pipeline's.

**The replay** is ``spanwatch replay`` semantics: ``replay(line, recording, "sqlite:///...")`` in a fresh
process. The figure compared is the replay's own time (``ReplaySummary.wall_seconds``: read, align, checks,
alarms, history) against the floor's read + align + checks + alarms; both whole-process wall times are shown too.

**The 150-tag line** (``--line big``): the example line with its middle section (an idler with an encoder, a
load-cell idler and a driven pull roll, with its zone) repeated until the line has about 150 tags; simulated with
the project's simulator for one hour of the same scenario.

**The sweep** (``--sweep N``): ``spanwatch.monitor.sweep`` (one pass keeping the traction results, then the alarm
engine per setting) of the traction warning limit of both pull rolls at N settings from 0.30 to 0.95 of the
capacity over the benchmark hour, against one replay in the same run.

Line Q2 has 90 checks (72 source checks, 2 ``roll_caliper``, 16 ``drift``) and 108 alarm points; the 150-tag line
(46 sections, 143 rollers) 1,125 checks (286 of them drift detectors) and 1,368 alarm points. The floor holds the
whole recording in memory: about 0.6 GB for the hour of line Q2, 4.6 GB for the hour of the 150-tag line.

The scaling recordings repeat the benchmark hour, so from the second hour on the rewind winds a whole hour per core
and overfills: its diameter leaves the tag's range (``tag_range`` raises, 3 in 4 h, 15 in 16 h), a genuine alarm.

Targets (issue 11): replay within 1.5x of the floor on line Q2 and at least 2,000x real time; within 2x on the
150-tag line; linear time and flat memory from 1 h to 16 h; a sweep of 20 limits at most 3x one replay.
Figures are printed; nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import time
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

CONFIG = ROOT / "config" / "quillmere-q2.toml"
HOUR = 3600.0


# --- recordings -----------------------------------------------------------------------------------


def scenario_data(config: Path, hours: int, seed: int = 4) -> dict:
    """The benchmark hour (the one ``replay_throughput.py`` simulates: 400 m/min, a stop at 27 min with a new
    unwind roll and a new rewind core, 300 m/min from 45 to 51 min), repeated ``hours`` times."""
    m = 60.0 * 60.0
    speed, rolls = [], []
    for h in range(hours):
        o = h * m
        speed += [{"at": f"{o:.0f} s", "to": "400 m/min"}, {"at": f"{o + 0.45 * m:.0f} s", "to": "0 m/min"},
                  {"at": f"{o + 0.45 * m + 90:.0f} s", "to": "400 m/min"},
                  {"at": f"{o + 0.75 * m:.0f} s", "to": "300 m/min"},
                  {"at": f"{o + 0.85 * m:.0f} s", "to": "400 m/min"}]
        rolls += [{"at": f"{o + 0.45 * m + 45:.0f} s", "winder": "rewind"},
                  {"at": f"{o + 0.45 * m + 50:.0f} s", "winder": "unwind"}]
    if hours == 1:
        speed = speed[:5]
    return {"scenario": {"name": "bench", "config": str(config), "duration": f"{hours * 60} min", "seed": seed},
            "speed": speed, "roll_change": rolls}


def make_recording(path: Path, config: Path, hours: int) -> None:
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine
    from spanwatch.monitor.simline.scenario import parse_scenario
    from spanwatch.monitor.simulate import simulate_to_file

    sc, cfg = parse_scenario(scenario_data(config, hours), ROOT / "config" / "scenarios" / "bench.toml")
    t = time.perf_counter()
    part = path.with_name(path.name.replace(".csv.gz", ".part.csv.gz"))
    rows, truth = simulate_to_file(SimulatedLine(load_line(cfg), sc), part, time_format="iso", progress=False)
    part.rename(path)  # a cut run leaves no recording that looks whole
    truth.unlink(missing_ok=True)
    print(f"simulated {hours} h of {config.name}: {rows:,} samples in {time.perf_counter() - t:.0f} s -> {path} "
          f"({path.stat().st_size / 1e6:.1f} MB)", flush=True)


def _toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def _key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else json.dumps(k)


def dump_toml(data: dict) -> str:
    """TOML for a line file: top-level tables, arrays of tables, one level of sub-tables (``tags."x"``)."""
    out: list[str] = []

    def table(name: str, body: dict) -> None:
        plain = {k: v for k, v in body.items() if not isinstance(v, dict) or name == "" or _inline(v)}
        subs = {k: v for k, v in body.items() if k not in plain}
        out.append(f"[{name}]")
        out.extend(f"{_key(k)} = {_toml_value(v)}" for k, v in plain.items())
        out.append("")
        for k, v in subs.items():
            table(f"{name}.{_key(k)}", v)

    for name, body in data.items():
        if isinstance(body, list):
            for item in body:
                out.append(f"[[{name}]]")
                out.extend(f"{_key(k)} = {_toml_value(v)}" for k, v in item.items())
                out.append("")
        else:
            table(_key(name), body)
    return "\n".join(out)


def _inline(v: dict) -> bool:
    return "model" in v  # a winder's taper


def big_line(path: Path, repeats: int = 46) -> Path:
    """Line Q2 with its middle section (idler_3 with its encoder, load-cell idler_4, driven pull_2 and the zone
    between pull_1 and pull_2) repeated ``repeats`` times: 12 + 3 * repeats tags, 5 + 3 * repeats rollers
    (46: 150 tags, 143 rollers). Each added zone holds the middle zone's setpoint at no added draw."""
    cfg = tomllib.loads(CONFIG.read_text(encoding="utf-8"))
    rollers = {r["id"]: r for r in cfg["rollers"]}
    spans = {s["id"]: s for s in cfg["spans"]}
    tags = cfg["tags"]
    head = [rollers[i] for i in ("idler_1", "idler_2", "pull_1")]
    tail = [rollers[i] for i in ("idler_5", "idler_6")]
    new_rollers = list(head)
    new_spans = [spans["s1"], spans["s2"], spans["s3"]]
    new_tags = {k: v for k, v in tags.items() if k not in ("q2.idler_3.speed", "q2.s5.tension", "q2.pull_2.speed")}
    prev = "pull_1"
    for k in range(repeats):
        sfx = "" if k == 0 else f"_{k + 1}"
        i3, i4, p2 = f"idler_3{sfx}", f"idler_4{sfx}", f"pull_2{sfx}" if k == 0 else f"pull_{k + 2}"
        new_rollers += [{**rollers["idler_3"], "id": i3, "speed_tag": f"q2.{i3}.speed"},
                        {**rollers["idler_4"], "id": i4},
                        {**rollers["pull_2"], "id": p2, "speed_tag": f"q2.{p2}.speed"}]
        tension = f"q2.s5{sfx}.tension"
        new_spans += [{**spans["s4"], "id": f"s4{sfx}", "from": prev, "to": i3},
                      {**spans["s5"], "id": f"s5{sfx}", "from": i3, "to": i4, "tension_tag": tension},
                      {**spans["s6"], "id": f"s6{sfx}", "from": i4, "to": p2}]
        new_tags[f"q2.{i3}.speed"] = tags["q2.idler_3.speed"]
        new_tags[tension] = tags["q2.s5.tension"]
        new_tags[f"q2.{p2}.speed"] = tags["q2.pull_2.speed"]
        prev = p2
    new_rollers += tail
    new_spans += [{**spans["s7"], "from": prev}, spans["s8"], spans["s9"]]
    cfg["line"]["name"] = f"Q2 film rewinder, middle section x{repeats} (benchmark)"
    out = {"line": cfg["line"], "material": cfg["material"], "rollers": new_rollers, "winders": cfg["winders"],
           "spans": new_spans, "tags": new_tags, "checks": {k: v for k, v in cfg["checks"].items()}}
    checks = out["checks"]
    if "traction" in checks and "overrides" in checks["traction"]:
        checks["traction"] = {k: v for k, v in checks["traction"].items() if k != "overrides"}
        checks["traction"]["overrides"] = {prev: {"warning": 0.8}}  # the last pull before the rewind, as pull_2
    path.write_text("# Generated by benchmarks/replay_floor.py: line Q2 with its middle section repeated.\n"
                    + dump_toml(out), encoding="utf-8")
    return path


# --- children -----------------------------------------------------------------------------------


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def child_floor(config: str, recording: str) -> dict:
    import floor_checks as fc
    import numpy as np
    from spanwatch.monitor.checkset import alarm_points, build_checks
    from spanwatch.monitor.line import load_line

    line = load_line(config)
    # the lists a Pipeline builds (Pipeline.checks, Pipeline.points), without the rest of its set-up
    built = build_checks(line)
    points_all = alarm_points(line, built)
    names = tuple(line.tags)
    checks = [(c.kind, c.object_id) for c in built]
    t0 = time.perf_counter()
    t, tag, value, quality = fc.read_fast(recording, names)
    t1 = time.perf_counter()
    fr = fc.align(line, names, t, tag, value, quality)
    samples = int((tag >= 0).sum())
    del t, tag, value, quality
    t2 = time.perf_counter()
    ctx = fc.context(line, names, fr)
    extras: dict = {}
    results = fc.physics_checks(line, ctx, extras)
    results.update(fc.tag_checks(line, names, fr, ctx))
    results.update(fc.drift_checks(line, ctx, [o for k, o in checks if k == "drift"], extras))
    t3 = time.perf_counter()
    total, raised = fc.alarm_pass(fr.t, results, points_all)
    t4 = time.perf_counter()
    covered = [k for k in checks if k in results]
    missing = sorted({f"{k}:{o}" for k, o in checks if (k, o) not in results})
    points = [p for p in points_all if (p.kind, p.object_id) in results]
    med = {f"{k}:{o}": float(np.nanmedian(np.where(v[1], v[0], np.nan))) if v[1].any() else None
           for (k, o), v in results.items() if k in ("traction", "draw", "runout") and v[1].any()}
    return {"read": t1 - t0, "align": t2 - t1, "checks": t3 - t2, "alarms": t4 - t3, "total": t4 - t0,
            "samples": samples, "frames": int(fr.t.size), "seconds_of_data": float(fr.t[-1] - fr.t[0]),
            "checks_pipeline": len(checks), "checks_floor": len(covered), "missing": missing,
            "points_pipeline": len(points_all), "points_floor": len(points), "raised": raised, "raises": total,
            "medians": med, "peak_mb": _peak_mb()}


def child_replay(config: str, recording: str, db: str) -> dict:
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.replay import replay

    line = load_line(config)
    Path(db).unlink(missing_ok=True)
    s = replay(line, recording, f"sqlite:///{db}")
    return {"samples": s.samples, "frames": s.frames, "seconds_of_data": s.seconds_of_data, "wall": s.wall_seconds,
            "raised": s.raised, "peak_mb": _peak_mb()}


def child_sweep(config: str, recording: str, count: str) -> dict:
    import numpy as np
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.sweep import evaluate_setting, keep_results

    line = load_line(config)
    t0 = time.perf_counter()
    kept = keep_results(line, recording, "traction")
    t1 = time.perf_counter()
    settings = np.linspace(0.30, 0.95, int(count))  # warning limit, share of the capacity, on both pull rolls
    res = [evaluate_setting(kept, line, float(x), level="warning") for x in settings]
    t2 = time.perf_counter()
    return {"keep": t1 - t0, "settings": t2 - t1, "wall": t2 - t0, "frames": kept.frames,
            "table": [(r.setting, r.raises, r.time_in_alarm) for r in res], "peak_mb": _peak_mb()}


def run_child(*args: str) -> tuple[dict, float]:
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, __file__, "--child", *args], capture_output=True, text=True)
    wall = time.perf_counter() - t
    if proc.returncode != 0:
        raise SystemExit(f"child {args[0]} failed:\n{proc.stderr[-4000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1]), wall


def load() -> str:
    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


# --- modes ------------------------------------------------------------------------------------------


def floor_vs_replay(config: Path, rec: Path, work: Path, label: str) -> None:
    print(f"[{label}] {load()}", flush=True)
    f, f_wall = run_child("floor", str(config), str(rec))
    print(f"[{label}] {load()}", flush=True)
    r, r_wall = run_child("replay", str(config), str(rec), str(work / f"floor-{label}.db"))
    print(f"[{label}] {load()}")
    print(f"checks: pipeline {f['checks_pipeline']}, floor {f['checks_floor']}"
          + (f" (not covered: {', '.join(f['missing'])})" if f["missing"] else "")
          + f"; alarm points: pipeline {f['points_pipeline']}, floor {f['points_floor']}")
    print(f"floor:  read {f['read']:.2f} s + align {f['align']:.2f} s + checks {f['checks']:.2f} s + alarms "
          f"{f['alarms']:.2f} s = {f['total']:.2f} s ({f['seconds_of_data'] / f['total']:,.0f}x real time); "
          f"whole process {f_wall:.2f} s; peak RSS {f['peak_mb']:.0f} MB; on-delay raises {f['raised'] or 'none'}")
    print(f"replay: {r['samples']:,} samples, {r['frames']:,} frames in {r['wall']:.2f} s "
          f"({r['seconds_of_data'] / r['wall']:,.0f}x real time, {r['samples'] / r['wall']:,.0f} samples/s); "
          f"whole process {r_wall:.2f} s; peak RSS {r['peak_mb']:.0f} MB; raised {r['raised'] or 'none'}")
    print(f"ratio replay / floor: {r['wall'] / f['total']:.2f}x (whole processes {r_wall / f_wall:.2f}x)")
    med = list(f["medians"].items())
    shown = med if len(med) <= 8 else [*med[:3], *med[-5:]]
    print("floor medians (valid frames): " + ", ".join(f"{k} {v:.4g}" for k, v in shown)
          + (f" ({len(med) - len(shown)} more not shown)" if len(med) > len(shown) else ""))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--line", choices=("q2", "big"), default="q2")
    ap.add_argument("--keep", type=Path, default=Path("/tmp/bench"), help="recordings (reused when present)")
    ap.add_argument("--scaling", type=int, nargs="*", help="hours of line Q2 to replay, e.g. 1 4 16")
    ap.add_argument("--sweep", type=int, default=0, help="number of traction warning limits to sweep")
    ap.add_argument("--repeats", type=int, default=46, help="--line big: middle sections (46: 150 tags)")
    ap.add_argument("--recording", type=Path, default=None,
                    help="--line q2: another recording of line Q2 (a Parquet one, once replay reads it)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        fn = {"floor": child_floor, "replay": child_replay, "sweep": child_sweep}[args.child[0]]
        print(json.dumps(fn(*args.child[1:])))
        return
    work = args.keep
    work.mkdir(parents=True, exist_ok=True)

    def q2(hours: int) -> Path:
        rec = work / f"q2-{hours * 60}min.csv.gz"
        if not rec.exists():
            make_recording(rec, CONFIG, hours)
        return rec

    if args.scaling:
        for h in args.scaling:
            rec = q2(h)
            print(f"[{h} h] {load()}", flush=True)
            r, wall = run_child("replay", str(CONFIG), str(rec), str(work / f"scaling-{h}h.db"))
            print(f"[{h} h] replay {r['samples']:,} samples in {r['wall']:.2f} s = {r['wall'] / h:.2f} s per hour "
                  f"({r['seconds_of_data'] / r['wall']:,.0f}x real time); whole process {wall:.2f} s; "
                  f"peak RSS {r['peak_mb']:.0f} MB; raised {r['raised'] or 'none'}; {load()}", flush=True)
        return
    if args.sweep:
        rec = q2(1)
        print(load(), flush=True)
        r, r_wall = run_child("replay", str(CONFIG), str(rec), str(work / "sweep-replay.db"))
        s, s_wall = run_child("sweep", str(CONFIG), str(rec), str(args.sweep))
        print(f"one replay: {r['wall']:.2f} s (whole process {r_wall:.2f} s, peak RSS {r['peak_mb']:.0f} MB)")
        print(f"sweep of {args.sweep} traction warning limits: one pass keeping the results {s['keep']:.2f} s + "
              f"{args.sweep} alarm-engine runs {s['settings']:.2f} s = {s['wall']:.2f} s (whole process "
              f"{s_wall:.2f} s, peak RSS {s['peak_mb']:.0f} MB) = {s['wall'] / r['wall']:.2f}x one replay; {load()}")
        for setting, raises, t_alarm in s["table"]:
            print(f"  traction warning at {setting:.3f} of capacity: {raises} raises, {t_alarm:.0f} s in alarm")
        return
    if args.line == "q2":
        floor_vs_replay(CONFIG, args.recording or q2(1), work, "q2")
        return
    config = big_line(work / f"big-x{args.repeats}.toml", args.repeats)
    rec = work / f"big-x{args.repeats}-60min.csv.gz"
    if not rec.exists():
        make_recording(rec, config, 1)
    floor_vs_replay(config, rec, work, "big")


if __name__ == "__main__":
    main()
