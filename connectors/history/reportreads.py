"""What a shift report reads from the history besides the episodes: the runs whose data covers a window, the lines
the history holds, the configuration a run kept, and the context windows (the signals around a raise) with their
samples.

A run's data span is ``data_start .. data_end`` (a replay of last week's recording covers last week, whatever the
wall clock said when it ran); a run without them (a daemon still running, or killed) spans ``started_at`` to
``finished_at`` or, while unknown, to the end of time.
"""

from __future__ import annotations

import json
import math
from typing import Any

from spanwatch.connectors.history.models import AlarmContext, AlarmEpisode, ConfigVersion, Run
from spanwatch.rules.values import iso
from sqlalchemy import func, select
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session


def runs_in_window(engine: Engine, start: float, end: float, line_name: str | None = None) -> list[dict[str, Any]]:
    """The runs (of ``line_name`` if given) whose data span meets ``[start, end)``, oldest first, as plain dicts
    (``id``, ``line``, ``mode``, ``config_hash``, ``config_file``, ``from``/``to`` epoch s (``to`` None while
    unknown), ``end_state``)."""
    lo = func.coalesce(Run.data_start, Run.started_at)
    q = select(Run).where(lo < end).order_by(lo, Run.id)
    if line_name is not None:
        q = q.where(Run.line_name == line_name)
    out = []
    with Session(engine) as s:
        for r in s.scalars(q):
            a = r.data_start if r.data_start is not None else r.started_at
            b = r.data_end if r.data_end is not None else r.finished_at
            if b is not None and b < start:
                continue
            out.append({"id": r.id, "line": r.line_name, "mode": str(r.mode), "config_hash": r.config_hash,
                        "config_file": r.config_file, "from": a, "to": b,
                        "end_state": None if r.end_state is None else str(r.end_state)})
    return out


def line_names(engine: Engine) -> list[str]:
    """Every line that has a run in this history, sorted."""
    with Session(engine) as s:
        return sorted(set(s.scalars(select(Run.line_name).distinct())))


def kept_config(engine: Engine, line_name: str, config_hash: str) -> dict[str, Any] | None:
    """The configuration ``line_name`` ran with under ``config_hash`` as ``config_versions`` kept it (its JSON text
    parsed, in ``data``), or None when it was not kept or cannot be read."""
    with Session(engine) as s:
        v = s.scalar(select(ConfigVersion).where(ConfigVersion.line_name == line_name,
                                                 ConfigVersion.config_hash == config_hash))
    if v is None:
        return None
    try:
        data = json.loads(v.content)
    except (TypeError, ValueError):
        return None
    return {"config_hash": v.config_hash, "config_file": v.config_file, "saved": iso(v.saved_at),
            "data": data if isinstance(data, dict) else {}}


def context_series(engine: Engine, episode_ids: list[int]) -> dict[int, list[dict[str, Any]]]:
    """For each episode id: the signals kept around its raise, each ``{"signal", "t" (epoch s per sample),
    "values" (float, NaN where unusable)}`` in the order they were stored. Episodes without context are absent."""
    out: dict[int, list[dict[str, Any]]] = {}
    if not episode_ids:
        return out
    with Session(engine) as s:
        for i in range(0, len(episode_ids), 500):
            part = episode_ids[i:i + 500]
            rows = s.execute(select(AlarmContext.episode_id, AlarmContext.signal, AlarmContext.t0, AlarmContext.dt,
                                    AlarmContext.values)
                             .where(AlarmContext.episode_id.in_(part)).order_by(AlarmContext.id))
            for ep, signal, t0, dt, text in rows:
                try:
                    raw = json.loads(text)
                except (TypeError, ValueError):
                    continue
                vals = [math.nan if v is None else float(v) for v in raw] if isinstance(raw, list) else []
                out.setdefault(int(ep), []).append(
                    {"signal": signal, "t": [t0 + k * dt for k in range(len(vals))], "values": vals})
    return out


def episode_lines(engine: Engine, ids: list[int]) -> dict[int, dict[str, Any]]:
    """Value, limit, unit and line state at the raise, and peak, of the episodes ``ids`` (for every episode of a
    report, not only those shown in full); their run and its line, and the end of that run's data (``run_to``:
    ``data_end``, else ``finished_at``; None while the run goes on or was killed)."""
    out: dict[int, dict[str, Any]] = {}
    with Session(engine) as s:
        for i in range(0, len(ids), 500):
            part = ids[i:i + 500]
            for e_id, v, p, lim, unit, state, run, d_end, f_at, line in s.execute(
                    select(AlarmEpisode.id, AlarmEpisode.raise_value, AlarmEpisode.peak_value, AlarmEpisode.limit,
                           AlarmEpisode.unit, AlarmEpisode.line_state, Run.id, Run.data_end, Run.finished_at,
                           Run.line_name)
                    .join(Run, Run.id == AlarmEpisode.run_id).where(AlarmEpisode.id.in_(part))):
                out[int(e_id)] = {"value": v, "peak": p, "limit": lim, "unit": unit, "line_state": state,
                                  "run": run, "run_to": d_end if d_end is not None else f_at, "line": line}
    return out
