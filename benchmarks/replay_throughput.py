"""Replay throughput and peak memory on a one-hour recording of the example line.

Usage: python benchmarks/replay_throughput.py [--minutes 60] [--keep DIR]

The replay runs twice, with the drift detectors (the default) and without (``[drift] enabled = false``), so
the cost of drift detection is measured in the same run.

1. Simulates ``--minutes`` of line Q2 (steady production with a speed change) to a
   gzip CSV recording (every configured tag at its sample period, 50 Hz for most).
2. Replays it with ``spanwatch replay`` semantics (read CSV -> align -> checks ->
   alarms -> SQLite history) in a child process, and reports samples per second,
   the factor over real time and the child's peak resident memory (ru_maxrss).
3. As the reference, in the same run, computes the same traction, slip and draw
   checks as plain vectorised numpy over the whole hour at once (one alignment by
   searchsorted, the same pure functions from ``rules/``), timing it and checking it
   agrees with the streaming results.

Targets (issue 3): at least 200x real time on one core; peak memory under 500 MB.
Figures are printed; nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from spanwatch.connectors.recording import read_recording  # noqa: E402
from spanwatch.monitor.line import load_line  # noqa: E402
from spanwatch.monitor.simline import SimulatedLine  # noqa: E402
from spanwatch.monitor.simline.scenario import parse_scenario  # noqa: E402
from spanwatch.monitor.simulate import simulate_to_file  # noqa: E402
from spanwatch.rules.airfilm import combined_roughness, effective_cof  # noqa: E402
from spanwatch.rules.traction import traction_utilisation  # noqa: E402

CONFIG = ROOT / "config" / "quillmere-q2.toml"


def make_recording(path: Path, minutes: float) -> tuple[int, float]:
    # Production at 400 m/min, a stop at mid-run for a new unwind roll and a new rewind core, then a
    # speed change: a clean hour of the example line (the rolls would overfill or run out otherwise).
    m = minutes * 60.0
    data = {"scenario": {"name": "bench", "config": str(CONFIG), "duration": f"{minutes} min", "seed": 4},
            "speed": [{"at": "0 s", "to": "400 m/min"}, {"at": f"{0.45 * m:.0f} s", "to": "0 m/min"},
                      {"at": f"{0.45 * m + 90:.0f} s", "to": "400 m/min"},
                      {"at": f"{0.75 * m:.0f} s", "to": "300 m/min"}, {"at": f"{0.85 * m:.0f} s", "to": "400 m/min"}],
            "roll_change": [{"at": f"{0.45 * m + 45:.0f} s", "winder": "rewind"},
                            {"at": f"{0.45 * m + 50:.0f} s", "winder": "unwind"}]}
    sc, cfg = parse_scenario(data, ROOT / "config" / "scenarios" / "bench.toml")
    sim = SimulatedLine(load_line(cfg), sc)
    t = time.perf_counter()
    rows, _ = simulate_to_file(sim, path, time_format="iso", progress=False)
    return rows, time.perf_counter() - t


def child_replay(recording: str, db: str, drift: str) -> None:
    """Run in a fresh process so ru_maxrss is the replay's own peak; ``drift`` "on" or "off"."""
    from spanwatch.monitor.line import build_line
    from spanwatch.monitor.replay import replay

    line = load_line(CONFIG)
    if drift == "off":
        cfg = line.config.model_copy(update={"drift": line.config.drift.model_copy(update={"enabled": False})})
        line = build_line(cfg, line.file, line.config_hash)
    s = replay(line, recording, f"sqlite:///{db}")
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"samples": s.samples, "frames": s.frames, "seconds_of_data": s.seconds_of_data,
                      "wall": s.wall_seconds, "peak_mb": peak_kb / 1024, "raised": s.raised}))


def numpy_reference(recording: Path) -> dict[str, float]:
    """Traction share of pull_1 and pull_2 over the whole recording in one vectorised pass."""
    line = load_line(CONFIG)
    names = tuple(line.tags)
    t0 = time.perf_counter()
    batches = list(read_recording(recording, names))
    t_read = time.perf_counter() - t0
    t1 = time.perf_counter()
    tag = np.concatenate([b.tag for b in batches])
    tt = np.concatenate([b.t for b in batches])
    vv = np.concatenate([b.value for b in batches])
    rate = line.config.line.frame_rate
    frames = np.arange(np.ceil(tt.min() * rate), np.floor(tt.max() * rate) + 1) / rate

    def aligned(name: str) -> np.ndarray:
        info = line.tags[name]
        sel = tag == names.index(name)
        ts, vs = tt[sel], vv[sel] * info.scale + info.offset
        order = np.argsort(ts, kind="stable")
        ts, vs = ts[order], vs[order]
        j = np.searchsorted(ts, frames, side="right") - 1
        return np.where(j >= 0, vs[np.maximum(j, 0)], np.nan)

    width = line.config.material.width
    t_zone = {z.id: aligned(z.tension_tag) / width for z in line.zones if z.tension_tag}
    v_web = aligned(line.config.line.speed_tag)
    out = {}
    mat, lw = line.config.material, line.config.line
    for el in line.driven_rollers:
        sec = el.section
        zb, za = line.zone_before(el.id), line.zone_after(el.id)
        v_r = aligned(sec.speed_tag)
        mu_eff, _ = effective_cof(sec.cof, sec.diameter / 2, np.fmin(t_zone[zb.id], t_zone[za.id]), v_web, v_r,
                                  float(combined_roughness(mat.roughness, sec.roughness)), viscosity=line.viscosity,
                                  film_factor=sec.air_film_factor * mat.air_film_factor, model=lw.air_film_model,
                                  convention=lw.air_speed_convention, floor=lw.air_traction_floor)
        share = traction_utilisation(t_zone[zb.id], t_zone[za.id], mu_eff, sec.wrap)
        out[f"traction {el.id} median"] = float(np.nanmedian(share))
    t_compute = time.perf_counter() - t1
    out["read_s"] = t_read
    out["compute_s"] = t_compute
    out["frames"] = float(frames.size)
    out["samples"] = float(tt.size)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=60.0)
    ap.add_argument("--keep", type=Path, default=None, help="keep the recording and database here")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child_replay(*args.child)
        return
    work = args.keep or Path(tempfile.mkdtemp(prefix="spanwatch-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    rec = work / f"q2-{args.minutes:g}min.csv.gz"
    if not rec.exists():
        rows, sim_s = make_recording(rec, args.minutes)
        print(f"simulated {args.minutes:g} min: {rows} samples in {sim_s:.1f} s -> {rec} "
              f"({rec.stat().st_size / 1e6:.1f} MB)")
    speeds, results = {}, {}
    for drift in ("on", "off"):
        db = work / f"bench-drift-{drift}.db"
        db.unlink(missing_ok=True)
        proc = subprocess.run([sys.executable, __file__, "--child", str(rec), str(db), drift], capture_output=True,
                              text=True, check=True)
        r = results[drift] = json.loads(proc.stdout.strip().splitlines()[-1])
        speed = speeds[drift] = r["seconds_of_data"] / r["wall"]
        print(f"streaming replay, drift detectors {drift}: {r['samples']} samples, {r['frames']} frames, "
              f"{r['seconds_of_data'] / 60:.1f} min of data in {r['wall']:.2f} s = {r['samples'] / r['wall']:,.0f} "
              f"samples/s, {speed:,.0f}x real time; peak RSS {r['peak_mb']:.0f} MB; alarms raised "
              f"{r['raised'] or 'none'}")
    print(f"drift detection costs {100 * (speeds['off'] / speeds['on'] - 1):.1f} % of the replay time")
    speed, r = speeds["on"], results["on"]
    ref = numpy_reference(rec)
    ref_total = ref["read_s"] + ref["compute_s"]
    print(f"numpy reference (whole hour at once, traction only): read {ref['read_s']:.2f} s + compute "
          f"{ref['compute_s']:.2f} s = {ref['samples'] / ref_total:,.0f} samples/s; "
          + ", ".join(f"{k} {v:.3f}" for k, v in ref.items() if k.startswith("traction")))
    print(f"targets: >= 200x real time ({'met' if speed >= 200 else 'NOT met'}), peak < 500 MB "
          f"({'met' if r['peak_mb'] < 500 else 'NOT met'})")


if __name__ == "__main__":
    main()
