"""``spanwatch evaluate``: how well the checks and detectors find the simulator's faults, and how often they cry wolf.

Each scenario of a set runs through the whole pipeline in memory (``SimulatedLine.advance`` ->
``Pipeline.feed``; no files, no history) with several seeds (the scenario's seed + 0, 1, ...), and
every alarm raise is scored against the simulator's ground truth by :mod:`spanwatch.monitor.evalscore`.

Besides the line as configured, two baselines are reported:

* **fixed limits**: the same runs with the drift detectors off (``[checks.drift] enabled = false``
  on the scenario's line). While no check kind ``drift`` is registered this is the same line, so the
  column equals the main one and is not run twice.
* **interval floor**: a detector that raises every ``interval`` seconds (default 8 h: one false alarm
  per shift, the target) at a random phase, naming one of the line's alarm objects at random; its
  detection share and delay follow in closed form (:func:`spanwatch.monitor.evalscore.interval_floor`).
  A score worth having beats it.

Scenario sets are folders of scenario files under ``scenarios/eval/`` of the shipped examples
(``full``: every fault class at two sizes plus 8 h of clean running; ``ci``: a few short ones).
"""

from __future__ import annotations

import csv
import io
import json
import math
import subprocess
import time
from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from spanwatch.monitor.evalscore import (
    SHIFT_S,
    FaultScore,
    FaultWindow,
    Raise,
    covered_seconds,
    interval_floor,
    median,
    outside_windows,
    per_shift,
    score_fault,
)

DRIFT_KIND = "drift"  # the drift detectors' check kind; the fixed-limit baseline turns it off
DEFAULT_GRACE = 300.0  # s after a fault's end in which a raise still counts as its detection
TARGET_SUBTLE = 0.8  # share of subtle faults to find on the right object
TARGET_FALSE_PER_SHIFT = 1.0  # false alarms per 8-h shift of clean running, all checks and detectors together
VARIANTS = ("main", "fixed")


class EvaluateError(ValueError):
    """An evaluation that cannot run (an unknown set, an empty folder): one line for people."""


# --- the scenario sets ---------------------------------------------------------------------------


def sets_root() -> Path:
    from spanwatch.monitor.examples import examples_root

    return examples_root() / "scenarios" / "eval"


def eval_sets() -> dict[str, Path]:
    """The shipped scenario sets: name -> folder."""
    root = sets_root()
    if not root.is_dir():
        return {}
    return {p.name: p for p in sorted(root.iterdir()) if p.is_dir() and any(p.glob("*.toml"))}


def scenario_files(set_name: str) -> list[Path]:
    """The scenario files of a shipped set (``full``, ``ci``) or of a folder or a single file given by path."""
    sets = eval_sets()
    if set_name in sets:
        return sorted(sets[set_name].glob("*.toml"))
    p = Path(set_name)
    if p.is_dir():
        found = sorted(p.glob("*.toml"))
        if not found:
            raise EvaluateError(f"--set: the folder {p} holds no scenario file (*.toml)")
        return found
    if p.is_file():
        return [p]
    raise EvaluateError(f"--set: expected one of {', '.join(sets) or '(none shipped)'} or a folder of scenario "
                        f"files, got {set_name!r}")


# --- one run -----------------------------------------------------------------------------------------


@dataclass
class RunResult:
    """What one scenario with one seed produced: its faults, its alarm raises, its time."""

    scenario: str
    file: str
    seed: int
    variant: str
    start: float  # epoch s
    duration: float  # s
    faults: list[FaultWindow]
    raises: list[Raise]
    n_objects: int  # distinct objects the line's alarms can name
    wall: float  # s of CPU-bound wall time

    @property
    def clean(self) -> bool:
        return not self.faults


def drift_registered() -> bool:
    from spanwatch.rules.catalog import CHECK_KINDS

    return DRIFT_KIND in CHECK_KINDS


def _line_for(cfg_path: Path, variant: str, detector: str | None = None) -> Any:
    """The scenario's line; for ``fixed``, with ``[checks.drift] enabled = false`` merged into its config; with
    ``detector``, every residual watched by that drift detector (``[drift] detector``, per-residual choices
    dropped)."""
    from spanwatch.monitor.config import parse_config, read_toml
    from spanwatch.monitor.exposure import config_hash
    from spanwatch.monitor.line import build_line, load_line

    fixed = variant != "main" and drift_registered()
    if not fixed and detector is None:
        return load_line(cfg_path)
    data, _ = read_toml(cfg_path)
    if fixed:
        checks = dict(data.get("checks") or {})
        checks[DRIFT_KIND] = {**(checks.get(DRIFT_KIND) or {}), "enabled": False}
        data["checks"] = checks
        name = f"{cfg_path} (fixed limits: checks.{DRIFT_KIND}.enabled = false)"
    else:
        drift = dict(data.get("drift") or {})
        drift["detector"] = detector
        drift["residuals"] = {k: {x: y for x, y in v.items() if x != "detector"}
                              for k, v in (drift.get("residuals") or {}).items()}
        data["drift"] = drift
        name = f"{cfg_path} (drift.detector = {detector})"
    cfg = parse_config(data, name)
    return build_line(cfg, name, config_hash(cfg))


def run_scenario(path: str | Path, seed_offset: int = 0, variant: str = "main", detector: str | None = None, *,
                 chunk: float = 60.0, on_advance: Callable[[float], None] | None = None) -> RunResult:
    """Run one scenario through the pipeline in memory with seed ``scenario seed + seed_offset``; collect raises."""
    from spanwatch.monitor.pipeline import Pipeline
    from spanwatch.monitor.simline import SimulatedLine, load_scenario
    from spanwatch.rules.base import blames_of

    wall0 = time.perf_counter()
    path = Path(path)
    sc, cfg_path = load_scenario(path)
    seed = sc.scenario.seed + seed_offset
    sc = sc.model_copy(update={"scenario": sc.scenario.model_copy(update={"seed": seed})})
    line = _line_for(cfg_path, variant, detector)
    sim = SimulatedLine(line, sc)
    pipe = Pipeline(line, None, context=False)
    checks = {(c.kind, c.object_id): c for c in pipe.checks}
    raises: list[Raise] = []

    def take(transitions: Iterable[Any]) -> None:
        for tr in transitions:
            if tr.event != "raise":
                continue
            p = tr.point
            c = checks.get((p.kind, p.object_id))
            blames = tuple(blames_of(c)) if c is not None else (p.object_id,)
            raises.append(Raise(float(tr.t), p.kind, p.object_id, p.level, p.priority, blames))

    total = sc.scenario.duration
    while sim.t < total - 1e-9:
        step = min(chunk, total - sim.t)
        take(pipe.feed(sim.advance(step)))
        if on_advance is not None:
            on_advance(step)
    take(pipe.finish())
    truth = sim.truth()
    return RunResult(scenario=sc.scenario.name, file=str(path), seed=seed, variant=variant, start=sim.t0,
                     duration=total, faults=[FaultWindow.from_truth(f) for f in truth["faults"]],  # type: ignore[attr-defined]
                     raises=raises, n_objects=len({p.object_id for p in pipe.points}),
                     wall=time.perf_counter() - wall0)


def _work(task: tuple[str, int, str, str | None]) -> RunResult:
    return run_scenario(*task)


def run_all(files: Sequence[Path], seeds: int, *, jobs: int = 1, fixed: bool | None = None,
            progress: Callable[[float, float], None] | None = None, detector: str | None = None) -> list[RunResult]:
    """Every scenario with every seed (and the fixed-limit variant when drift detectors exist), ``jobs`` at a time.

    ``progress(done, total)`` in simulated seconds. Scenarios run longest first, so that parallel
    workers finish together.
    """
    from spanwatch.monitor.simline import load_scenario

    fixed = drift_registered() if fixed is None else fixed
    durations = {str(f): load_scenario(f)[0].scenario.duration for f in files}
    variants = VARIANTS if fixed else ("main",)
    tasks = [(str(f), i, v, detector if v == "main" else None) for f in files for i in range(seeds) for v in variants]
    tasks.sort(key=lambda t: -durations[t[0]])
    total = sum(durations[t[0]] for t in tasks)
    done = 0.0
    out: list[RunResult] = []
    if jobs <= 1:
        for task in tasks:
            def tick(dt: float) -> None:
                nonlocal done
                done += dt
                if progress is not None:
                    progress(done, total)

            out.append(run_scenario(*task, on_advance=tick))
    else:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed

        with ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("spawn")) as pool:
            futures = {pool.submit(_work, t): t for t in tasks}
            for fut in as_completed(futures):
                out.append(fut.result())
                done += durations[futures[fut][0]]
                if progress is not None:
                    progress(done, total)
    out.sort(key=lambda r: (r.file, r.seed, r.variant))
    if not fixed:  # no drift detectors: the fixed-limit line is the line
        out += [RunResult(**{**r.__dict__, "variant": "fixed"}) for r in list(out)]
    return out


# --- the summary -------------------------------------------------------------------------------------


def _stats(values: Sequence[float]) -> dict[str, float | None]:
    if not values:
        return {"min": None, "median": None, "max": None}
    return {"min": min(values), "median": median(values), "max": max(values)}


def summarise(runs: Sequence[RunResult], *, grace: float = DEFAULT_GRACE, interval: float = SHIFT_S) -> dict[str, Any]:
    """Score every run and aggregate: per fault class and size, per detector, false alarms, targets (each target's
    ``met`` is None when the set has nothing to judge it on)."""
    scores: dict[str, list[tuple[RunResult, FaultScore]]] = {v: [] for v in VARIANTS}
    for r in runs:
        for f in r.faults:
            scores.setdefault(r.variant, []).append((r, score_fault(f, r.raises, grace)))
    classes = list(dict.fromkeys((s.fault.label, s.fault.severity or "-") for _, s in scores["main"]))
    faults = []
    for label, sev in classes:
        row: dict[str, Any] = {"fault": label, "severity": sev}
        for v in VARIANTS:
            mine = [(r, s) for r, s in scores.get(v, []) if (s.fault.label, s.fault.severity or "-") == (label, sev)]
            n = len(mine)
            right = [s for _, s in mine if s.right]
            firsts = Counter(k for s in right for k in s.first_kinds)
            prefix = "" if v == "main" else f"{v}_"
            row.update({
                f"{prefix}runs": n,
                f"{prefix}detected": sum(s.detected for _, s in mine),
                f"{prefix}right": len(right),
                f"{prefix}right_share": len(right) / n if n else math.nan,
                **{f"{prefix}delay_{k}": val for k, val in _stats([s.delay for s in right]).items()},  # type: ignore[misc]
            })
            if v == "main":
                row["first_by"] = [k for k, _ in firsts.most_common()]
                row["kinds_right"] = sorted({k for s in right for k in s.by_kind})
                row["kinds_seen"] = sorted({k for _, s in mine for k in s.kinds_seen})
                row["seeds"] = sorted({r.seed for r, _ in mine})
                floors = [interval_floor(s.fault.end + grace - s.fault.start, interval, r.n_objects) for r, s in mine]
                row["floor_right_share"] = sum(f[1] for f in floors) / n if n else math.nan
                row["floor_detect_share"] = sum(f[0] for f in floors) / n if n else math.nan
                row["floor_delay_mean"] = sum(f[2] for f in floors) / n if n else math.nan
        faults.append(row)
    by_kind = []
    for label, sev in classes:
        mine = [s for _, s in scores["main"] if (s.fault.label, s.fault.severity or "-") == (label, sev)]
        for kind in sorted({k for s in mine for k in s.kinds_seen}):
            delays = [s.by_kind[kind] for s in mine if kind in s.by_kind]
            by_kind.append({"fault": label, "severity": sev, "detector": kind, "runs": len(mine),
                            "raised": sum(kind in s.kinds_seen for s in mine), "right": len(delays),
                            **{f"delay_{k}": v for k, v in _stats(delays).items()}})
    false = {v: _false_alarms([r for r in runs if r.variant == v], grace) for v in VARIANTS}
    obvious = [s for _, s in scores["main"] if s.fault.severity == "obvious"]
    subtle = [s for _, s in scores["main"] if s.fault.severity == "subtle"]
    clean_rate = false["main"]["clean"]["per_shift_all"]
    targets = [
        {"target": "every obvious fault detected on the right object",
         "value": f"{sum(s.right for s in obvious)}/{len(obvious)}",
         "met": all(s.right for s in obvious) if obvious else None},
        {"target": f"subtle faults detected on the right object >= {TARGET_SUBTLE:.0%}",
         "value": f"{sum(s.right for s in subtle) / len(subtle):.0%}" if subtle else "-",
         "met": sum(s.right for s in subtle) / len(subtle) >= TARGET_SUBTLE if subtle else None},
        {"target": f"<= {TARGET_FALSE_PER_SHIFT:g} false alarm per 8-h shift of clean running (all checks "
                   "and detectors, advisory included)",
         "value": "-" if math.isnan(clean_rate) else f"{clean_rate:.2f}",
         "met": None if math.isnan(clean_rate) else clean_rate <= TARGET_FALSE_PER_SHIFT},
    ]
    return {"faults": faults, "by_detector": by_kind, "false_alarms": false, "targets": targets,
            "grace_s": grace, "interval_s": interval}


def _false_alarms(runs: Sequence[RunResult], grace: float) -> dict[str, Any]:
    """Raises in clean runs, and raises outside every fault window in fault runs, per 8-h shift."""
    out: dict[str, Any] = {}
    for part, sel in (("clean", [r for r in runs if r.clean]), ("outside", [r for r in runs if not r.clean])):
        seconds = 0.0
        false: list[tuple[RunResult, Raise]] = []
        for r in sel:
            seconds += r.duration - covered_seconds(r.faults, grace, r.start, r.start + r.duration)
            false += [(r, x) for x in outside_windows(r.raises, r.faults, grace)]
        n_all = len(false)
        n_ann = sum(x.annunciated for _, x in false)
        out[part] = {
            "runs": len(sel), "hours": seconds / 3600.0, "raises_all": n_all, "raises_annunciated": n_ann,
            "per_shift_all": per_shift(n_all, seconds), "per_shift_annunciated": per_shift(n_ann, seconds),
            "by_detector": dict(Counter(x.kind for _, x in false).most_common()),
            "by_point": dict(Counter(f"{x.kind}:{x.object_id}:{x.level}" for _, x in false).most_common()),
            "by_run": [{"scenario": r.scenario, "seed": r.seed, "raises": sum(1 for q, _ in false if q is r)}
                       for r in sel],
        }
    return out


# --- output ------------------------------------------------------------------------------------------


SHORT = {"caliper_change_within_roll": "caliper within roll", "caliper_change_between_rolls": "caliper betw. rolls",
         "length_undercount": "length undercount"}


def _short(label: str) -> str:
    return SHORT.get(label, label.replace("_", " "))


def _delays(row: dict[str, Any], prefix: str = "") -> str:
    lo, mid, hi = (row.get(f"{prefix}delay_{k}") for k in ("min", "median", "max"))
    if mid is None:
        return "-"
    if lo == hi:
        return f"{mid:.0f}"
    return f"{lo:.0f}/{mid:.0f}/{hi:.0f}"


def _share(k: int, n: int) -> str:
    return f"{k}/{n}" if n else "-"


def fault_table(summary: dict[str, Any]) -> Any:
    """The fault table for the terminal (rich; fits 80 columns)."""
    from rich import box
    from rich.table import Table

    t = Table(title="Detection on the right object, per fault class and size", title_justify="left",
              box=box.SIMPLE_HEAD, padding=(0, 1), pad_edge=False, show_edge=False, collapse_padding=True)
    for col, just, width in (("fault", "left", 19), ("size", "left", 4), ("found", "right", 5),
                             ("delay s", "right", 14), ("first by", "left", 14), ("fixed", "right", 5),
                             ("floor", "right", 5)):
        t.add_column(col, justify=just, no_wrap=True, overflow="ellipsis", max_width=width)  # type: ignore[arg-type]
    for row in summary["faults"]:
        t.add_row(_short(row["fault"]), row["severity"][:3], _share(row["right"], row["runs"]), _delays(row),
                  (row["first_by"] or ["-"])[0], _share(row["fixed_right"], row["fixed_runs"]),
                  f"{row['floor_right_share']:.3f}")
    return t


def false_table(summary: dict[str, Any]) -> Any:
    from rich import box
    from rich.table import Table

    t = Table(title="False alarms per 8-h shift (raises outside every fault window)", title_justify="left",
              box=box.SIMPLE_HEAD, padding=(0, 1), pad_edge=False, show_edge=False, collapse_padding=True)
    for col in ("running", "hours", "all", "per shift", "annunc.", "per shift", "fixed/shift"):
        t.add_column(col, justify="left" if col == "running" else "right", no_wrap=True)
    for part, name in (("clean", "clean runs"), ("outside", "fault runs")):
        m, f = summary["false_alarms"]["main"][part], summary["false_alarms"]["fixed"][part]
        t.add_row(name, f"{m['hours']:.1f}", str(m["raises_all"]), _num(m["per_shift_all"]),
                  str(m["raises_annunciated"]), _num(m["per_shift_annunciated"]), _num(f["per_shift_all"]))
    return t


def _num(x: float) -> str:
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.2f}"


def print_summary(summary: dict[str, Any], console: Any) -> None:
    """Tables and targets for the terminal (80 columns)."""
    console.print(fault_table(summary))
    console.print("found: runs detected on the right object; delay: first right-object raise after the fault "
                  "starts, min/median/max over runs; fixed: without drift detectors; floor: an alarm every "
                  f"{summary['interval_s'] / 3600:g} h at random, on a random object", style="dim",
                  highlight=False)
    console.print(false_table(summary))
    clean = summary["false_alarms"]["main"]["clean"]["by_detector"]
    if clean:
        console.print("clean-run raises by detector: " + ", ".join(f"{k} {n}" for k, n in clean.items()),
                      highlight=False)
    for tg in summary["targets"]:
        mark = {True: "[green]met[/]", False: "[red]not met[/]", None: "[dim]n/a (nothing in this set)[/]"}[tg["met"]]
        console.print(f"{mark}  {tg['target']}: {tg['value']}", highlight=False)


def write_json(summary: dict[str, Any], runs: Sequence[RunResult], meta: dict[str, Any], path: Path) -> None:
    def clean(x: Any) -> Any:
        if isinstance(x, float) and math.isnan(x):
            return None
        if isinstance(x, dict):
            return {k: clean(v) for k, v in x.items()}
        if isinstance(x, list | tuple):
            return [clean(v) for v in x]
        return x

    doc = {"meta": meta, "summary": summary,
           "runs": [{"scenario": r.scenario, "file": r.file, "seed": r.seed, "variant": r.variant,
                     "duration_s": r.duration, "wall_s": round(r.wall, 2), "faults": [asdict(f) for f in r.faults],
                     "raises": [asdict(x) for x in r.raises]} for r in runs]}
    path.write_text(json.dumps(clean(doc), indent=1), encoding="utf-8")


CSV_COLUMNS = ("section", "fault", "severity", "detector", "variant", "runs", "detected", "right", "share",
               "delay_min_s", "delay_median_s", "delay_max_s", "raises", "hours", "per_shift")


def csv_text(summary: dict[str, Any]) -> str:
    """One long table: per fault class and size (each variant and the floor), per detector, false alarms."""
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, lineterminator="\n")
    w.writeheader()
    for row in summary["faults"]:
        for v, p in (("main", ""), ("fixed", "fixed_")):
            w.writerow({"section": "fault", "fault": row["fault"], "severity": row["severity"], "detector": "*",
                        "variant": v, "runs": row[f"{p}runs"], "detected": row[f"{p}detected"],
                        "right": row[f"{p}right"], "share": _r(row[f"{p}right_share"]),
                        "delay_min_s": _r(row[f"{p}delay_min"]), "delay_median_s": _r(row[f"{p}delay_median"]),
                        "delay_max_s": _r(row[f"{p}delay_max"])})
        w.writerow({"section": "fault", "fault": row["fault"], "severity": row["severity"], "detector": "*",
                    "variant": "interval_floor", "runs": row["runs"], "share": _r(row["floor_right_share"]),
                    "delay_median_s": _r(row["floor_delay_mean"])})
    for row in summary["by_detector"]:
        w.writerow({"section": "detector", "fault": row["fault"], "severity": row["severity"],
                    "detector": row["detector"], "variant": "main", "runs": row["runs"], "detected": row["raised"],
                    "right": row["right"], "share": _r(row["right"] / row["runs"] if row["runs"] else None),
                    "delay_min_s": _r(row["delay_min"]), "delay_median_s": _r(row["delay_median"]),
                    "delay_max_s": _r(row["delay_max"])})
    for v in VARIANTS:
        for part, d in summary["false_alarms"][v].items():
            for det, n in (("*", d["raises_all"]), *d["by_detector"].items()):
                w.writerow({"section": f"false_{part}", "detector": det, "variant": v, "runs": d["runs"],
                            "raises": n, "hours": _r(d["hours"]), "per_shift": _r(per_shift(n, d["hours"] * 3600))})
            w.writerow({"section": f"false_{part}", "detector": "* annunciated", "variant": v, "runs": d["runs"],
                        "raises": d["raises_annunciated"], "hours": _r(d["hours"]),
                        "per_shift": _r(d["per_shift_annunciated"])})
    return buf.getvalue()


def _r(x: float | None) -> str:
    return "" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.4g}"


def markdown_text(summary: dict[str, Any], meta: dict[str, Any]) -> str:
    """A report: targets, the fault table, the detectors, false alarms, and how it was produced."""
    L: list[str] = ["# Detection against the simulator's ground truth", ""]
    if meta.get("note"):
        L += [meta["note"], ""]
    L += ["## Targets", "", "| target | value | met |", "|---|---|---|"]
    L += [f"| {t['target']} | {t['value']} | {({True: 'yes', False: 'no'}).get(t['met'], 'n/a')} |"
          for t in summary["targets"]]
    L += ["", "## Per fault class and size", "",
          f"Found: runs (scenario x seed) with a raise on the right object between the fault's start and "
          f"{summary['grace_s'] / 60:g} min after its end. Delay: from the fault's start to that raise, "
          "min/median/max over the runs, s. Fixed limits: the same without the drift detectors. Interval floor: "
          f"the share an alarm every {summary['interval_s'] / 3600:g} h (one false alarm per shift) at a random phase, "
          "naming one of the line's alarm objects at random, gets on the right object; its mean delay in s.", "",
          "| fault | size | found | delay s | first by | detectors on the right object | raised in the window "
          "| fixed limits | fixed delay s | floor | floor delay s |",
          "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in summary["faults"]:
        L.append(f"| {r['fault']} | {r['severity']} | {_share(r['right'], r['runs'])} | {_delays(r)} | "
                 f"{', '.join(r['first_by']) or '-'} | {', '.join(r['kinds_right']) or '-'} | "
                 f"{', '.join(r['kinds_seen']) or '-'} | {_share(r['fixed_right'], r['fixed_runs'])} | "
                 f"{_delays(r, 'fixed_')} | {r['floor_right_share']:.4f} | {r['floor_delay_mean']:.0f} |")
    L += ["", "## Per detector", "", "Runs in which the detector raised inside the fault's window, and on the right "
          "object; delay of its first right-object raise (s, min/median/max).", "",
          "| fault | size | detector | raised | right object | delay s |", "|---|---|---|---|---|---|"]
    for r in summary["by_detector"]:
        L.append(f"| {r['fault']} | {r['severity']} | {r['detector']} | {_share(r['raised'], r['runs'])} | "
                 f"{_share(r['right'], r['runs'])} | {_delays(r)} |")
    L += ["", "## False alarms", "", "Raises outside the window of every fault: all of a clean run's, and a fault "
          "run's before its fault and after the grace. Warning and alarm levels count separately; advisory "
          "(journal-only) alarms count in *all*.", "",
          "| running | variant | hours | all | per 8-h shift | annunciated | per 8-h shift |",
          "|---|---|---|---|---|---|---|"]
    for part, name in (("clean", "clean runs"), ("outside", "fault runs, outside the windows")):
        for v in VARIANTS:
            d = summary["false_alarms"][v][part]
            L.append(f"| {name} | {'as configured' if v == 'main' else 'fixed limits'} | {d['hours']:.1f} | "
                     f"{d['raises_all']} | {_num(d['per_shift_all'])} | {d['raises_annunciated']} | "
                     f"{_num(d['per_shift_annunciated'])} |")
    for part, name in (("clean", "Clean runs"), ("outside", "Fault runs, outside the windows")):
        pts = summary["false_alarms"]["main"][part]["by_point"]
        if pts:
            L += ["", f"{name}, by alarm point: " + ", ".join(f"`{k}` {n}" for k, n in pts.items()) + "."]
    L += ["", "## How it was produced", "", f"- command: `{meta['command']}`",
          f"- spanwatch {meta['version']}" + (f", commit {meta['commit']}" if meta.get("commit") else "")
          + f", {meta['date']}", f"- seeds: {meta['seeds']} per scenario (the scenario's seed + 0 ... "
          f"{meta['seeds'] - 1}); grace {summary['grace_s']:g} s; {meta['runs']} runs, "
          f"{meta['simulated_hours']:.1f} simulated hours, {meta['wall_s']:.0f} s wall time with {meta['jobs']} job(s)",
          f"- drift detectors (check kind `{DRIFT_KIND}`): "
          + (f"registered; detector: {meta.get('detector', 'as configured')}" if meta["drift"] else
             "not registered in this build, so the fixed-limit column is the configured line itself"),
          f"- scenario set `{meta['set']}`:", ""]
    L += [f"  - `{s['file']}`: {s['duration_min']:g} min, " + "; ".join([*(s["faults"] or ["clean"]),
                                                                         *s.get("extra", [])])
          for s in meta["scenarios"]]
    return "\n".join(L) + "\n"


def _commit() -> str | None:
    try:
        out = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, timeout=5,
                             cwd=Path(__file__).resolve().parent)
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def scenario_list(files: Sequence[Path]) -> list[dict[str, Any]]:
    """Each scenario file: its name (relative to the shipped sets), duration and faults in words."""
    from spanwatch.monitor.simline import load_scenario

    root = sets_root()
    out = []
    for f in files:
        sc = load_scenario(f)[0]
        name = f.relative_to(root).as_posix() if f.is_relative_to(root) else str(f)
        faults = []
        for x in sc.fault:
            what = ", ".join(str(v) for v in (x.target, x.size) if v not in ("", None, 0.0))
            faults.append(f"{x.label or x.kind} ({x.severity or '-'}: {what + ', ' if what else ''}"
                          f"{x.start / 60:g}-{x.end / 60:.4g} min)")
        extra = []
        for n, what in ((len(sc.roll_change), "roll change"), (len(sc.grade_change), "grade change")):
            if n:
                extra.append(f"{n} {what}{'s' * (n != 1)}")
        out.append({"file": name, "duration_min": sc.scenario.duration / 60, "faults": faults, "extra": extra})
    return out


def meta_of(set_name: str, files: Sequence[Path], runs: Sequence[RunResult], *, seeds: int, jobs: int,
            wall: float, command: str, note: str | None = None, detector: str | None = None) -> dict[str, Any]:
    from spanwatch import __version__

    scen = scenario_list(files)
    main = [r for r in runs if r.variant == "main"]
    return {"command": command, "version": __version__, "commit": _commit(),
            "date": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"), "seeds": seeds, "jobs": jobs, "set": set_name,
            "runs": len(main), "simulated_hours": sum(r.duration for r in main) / 3600, "wall_s": wall,
            "drift": drift_registered(), "detector": detector or "as configured", "scenarios": scen, "note": note}


@dataclass
class Outputs:
    csv: Path | None = None
    json: Path | None = None
    markdown: Path | None = None
    extra: dict[str, Any] = field(default_factory=dict)


def evaluate(set_name: str, *, seeds: int = 3, jobs: int = 1, grace: float = DEFAULT_GRACE,
             interval: float = SHIFT_S, outputs: Outputs | None = None, console: Any = None,
             progress_console: Any = None, progress: bool = True, command: str = "spanwatch evaluate",
             detector: str | None = None,
             note: str | None = None) -> dict[str, Any]:
    """Run a set, print the tables, write the files asked for; return the summary (with ``meta``)."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

    if seeds < 1:
        raise EvaluateError(f"--seeds: expected at least 1, got {seeds}")
    if jobs < 1:
        raise EvaluateError(f"--jobs: expected at least 1, got {jobs}")
    if not grace >= 0 or not interval > 0:
        raise EvaluateError(f"expected --grace >= 0 and --interval > 0, got {grace} and {interval}")
    outputs = outputs or Outputs()
    for p in (outputs.csv, outputs.json, outputs.markdown):
        if p is not None and not p.parent.is_dir():
            raise EvaluateError(f"the folder {p.parent} does not exist: create it, or write {p.name} elsewhere")
    files = scenario_files(set_name)
    bar = Progress(TextColumn("evaluate"), BarColumn(), TextColumn("{task.percentage:>3.0f} % of simulated time"),
                   TimeElapsedColumn(), TimeRemainingColumn(), console=progress_console, disable=not progress,
                   transient=True)
    wall0 = time.perf_counter()
    with bar:
        task = bar.add_task("evaluate", total=1.0)
        runs = run_all(files, seeds, jobs=jobs, detector=detector,
                       progress=lambda done, total: bar.update(task, completed=done / total if total else 1.0))
    wall = time.perf_counter() - wall0
    summary = summarise(runs, grace=grace, interval=interval)
    meta = meta_of(set_name, files, runs, seeds=seeds, jobs=jobs, wall=wall, command=command, note=note,
                   detector=detector)
    if console is not None:
        print_summary(summary, console)
    if outputs.csv is not None:
        outputs.csv.write_text(csv_text(summary), encoding="utf-8")
    if outputs.json is not None:
        write_json(summary, runs, meta, outputs.json)
    if outputs.markdown is not None:
        outputs.markdown.write_text(markdown_text(summary, meta), encoding="utf-8")
    return {**summary, "meta": meta}
