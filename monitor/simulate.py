"""``spanwatch simulate``: run a scenario to a recording file plus its ground truth."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

from connectors.base import SampleBatch
from connectors.recording import write_recording
from connectors.simline import SimulatedLine


def truth_path_for(out: Path) -> Path:
    name = out.name
    for suffix in (".csv.gz", ".csv", ".gz"):
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
