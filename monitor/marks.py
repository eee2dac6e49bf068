"""Labelled events of a recording: the simulator's ground truth and the marks an engineer adds.

A tuning sweep scores each setting against the events a recording is known to hold. Two sources, both files
beside the recording ``X.csv.gz`` (or ``X.csv``, ``X.parquet``):

* ``X.truth.json``, written by ``spanwatch simulate``: every injected fault's window and what an alarm may
  name to be on the right object (:meth:`spanwatch.monitor.simline.SimulatedLine.truth`).
* ``X.marks.json``, written by ``spanwatch mark``: events an engineer labels by hand (a web break seen on the
  floor, a roll that slipped). The file is plain JSON, meant to be read and edited::

      {"format": "spanwatch-marks", "version": 1, "recording": "X.csv.gz",
       "marks": [{"label": "pull 2 slipped", "start": "2026-03-02T05:01:00+00:00",
                  "end": "2026-03-02T05:03:20+00:00", "objects": ["pull_2"]}]}

  ``start`` and ``end`` are ISO 8601 with an offset; ``objects`` (may be empty: any object) are the rollers,
  zones, winders or tags an alarm must name to be on the right object.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from spanwatch.monitor.evalscore import FaultWindow
from spanwatch.monitor.simulate import truth_path_for
from spanwatch.rules.values import iso as iso_utc
from spanwatch.rules.values import parse_iso

MARKS_FORMAT = "spanwatch-marks"
MARKS_VERSION = 1


class MarksError(ValueError):
    """A marks or truth file that cannot be read: one line naming the file and what was expected."""


@dataclass(frozen=True)
class Label:
    """One labelled event: a name, its window (epoch s), the objects an alarm may name (empty: any) and where it
    came from (``truth`` or ``mark``)."""

    label: str
    start: float
    end: float
    objects: tuple[str, ...] = ()
    origin: str = "mark"

    def window(self, objects: tuple[str, ...]) -> FaultWindow:
        """As the evaluation's fault window; a label for any object takes ``objects`` (those being tuned)."""
        return FaultWindow(label=self.label, kind=self.origin, start=self.start, end=self.end,
                           blame=self.objects or objects)


def marks_path_for(recording: Path) -> Path:
    """``X.marks.json`` beside the recording ``X.csv.gz`` (the name the truth file takes, ``marks`` for ``truth``)."""
    truth = truth_path_for(Path(recording))
    return truth.with_name(truth.name[: -len(".truth.json")] + ".marks.json")


def _iso_time(value: object, where: str) -> float:
    if not isinstance(value, str):
        raise MarksError(f"{where}: expected an ISO 8601 time with an offset, got {value!r}")
    try:
        return parse_iso(value)
    except ValueError as exc:
        raise MarksError(f"{where}: expected an ISO 8601 time with an offset, got {value!r} ({exc})") from None


def _load_json(path: Path) -> object:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise MarksError(f"{path}: cannot read it ({exc.strerror or exc})") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise MarksError(f"{path}: expected a JSON file, got {exc}") from None


def read_marks(path: Path) -> list[Label]:
    """The marks of a marks file (none when it does not exist); MarksError names the entry that is wrong."""
    if not path.exists():
        return []
    data = _load_json(path)
    if not isinstance(data, dict) or data.get("format") != MARKS_FORMAT or not isinstance(data.get("marks"), list):
        raise MarksError(f"{path}: expected a marks file ({{\"format\": \"{MARKS_FORMAT}\", \"marks\": [...]}})")
    out = []
    for i, m in enumerate(data["marks"]):
        where = f"{path}: marks[{i}]"
        if not isinstance(m, dict):
            raise MarksError(f"{where}: expected a table with label, start, end, objects")
        start, end = _iso_time(m.get("start"), f"{where}.start"), _iso_time(m.get("end"), f"{where}.end")
        if not end > start:
            raise MarksError(f"{where}: expected end after start, got {m.get('start')} .. {m.get('end')}")
        objects = m.get("objects") or []
        if not isinstance(objects, list) or not all(isinstance(o, str) for o in objects):
            raise MarksError(f"{where}.objects: expected a list of object names, got {objects!r}")
        out.append(Label(str(m.get("label") or f"mark {i + 1}"), start, end, tuple(objects), "mark"))
    return out


def add_mark(path: Path, recording: Path, label: Label, *, iso: Callable[[float], str] | None = None) -> int:
    """Append ``label`` to the marks file (created when missing); return how many marks it holds now.

    ``iso`` writes the times (default: UTC ISO 8601); the plant's clock gives them the plant's offset."""
    write = iso or iso_utc
    data: dict = {"format": MARKS_FORMAT, "version": MARKS_VERSION, "recording": recording.name, "marks": []}
    if path.exists():
        read_marks(path)  # refuse to append to a file that is not a marks file
        data = _load_json(path)  # type: ignore[assignment]
    data["marks"].append({"label": label.label, "start": write(label.start), "end": write(label.end),
                          "objects": list(label.objects)})
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(data, indent=1) + "\n", encoding="utf-8")
    tmp.replace(path)
    return len(data["marks"])


def read_truth(path: Path) -> list[Label]:
    """The fault windows of a simulator's truth file (none when it does not exist)."""
    if not path.exists():
        return []
    data = _load_json(path)
    faults = data.get("faults") if isinstance(data, dict) else None
    if not isinstance(faults, list):
        raise MarksError(f"{path}: expected a ground-truth file of spanwatch simulate (with \"faults\": [...])")
    out = []
    for i, f in enumerate(faults):
        try:
            w = FaultWindow.from_truth(f)
        except (KeyError, TypeError, ValueError):
            raise MarksError(f"{path}: faults[{i}]: expected kind, start_epoch and end_epoch") from None
        out.append(Label(w.label, w.start, w.end, w.blame, "truth"))
    return out


def labels_for(recording: Path) -> list[Label]:
    """Every labelled event of a recording: its truth file's faults, then its marks, in time order."""
    rec = Path(recording)
    return sorted(read_truth(truth_path_for(rec)) + read_marks(marks_path_for(rec)), key=lambda x: x.start)
