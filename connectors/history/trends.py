"""Each check's value over time: the per-minute rows of ``check_minutes`` (revision 0005), what they hold, the
reader a trend plot uses and their retention.

A row summarises one check on one object over one minute of a run: the frames the check computed in the minute
(``n``), those with a valid value (``valid``: reason OK) and the least, mean and greatest valid value (None when
no frame was valid). ``t`` is the minute's start in epoch s (a multiple of :data:`MINUTE`, so minutes line up
across runs and lines); the values are as the check gives them, in the ``unit`` its alarm points state (as
``alarm_episodes`` keeps them: a ``%`` unit is over a fraction, 0.008 for 0.8 %). The application fills them
(``spanwatch.monitor.minutes``) and writes them through the store (:meth:`.store.History.record_minutes`) or the
daemon's writer, which spools them while the database is unavailable.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from spanwatch.connectors.history.models import CheckMinuteRow, Run
from sqlalchemy import delete, or_, select
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session

MINUTE = 60.0  # s: the length of a row's interval


@dataclass(frozen=True)
class CheckMinute:
    """One check on one object over the minute starting at ``t`` (epoch s): frames computed, frames valid, and the
    least, mean and greatest valid value (None when none was valid), in ``unit``."""

    check: str
    object: str
    t: float
    n: int
    valid: int
    min: float | None
    mean: float | None
    max: float | None
    unit: str


COLUMNS = ("run_id", "check", "object", "t", "n", "valid", "min", "mean", "max", "unit")
_MARK = {"qmark": "?", "format": "%s", "pyformat": "%s"}


def insert_statement(paramstyle: str) -> str:
    """The INSERT of one row for the driver's executemany, in its ``paramstyle`` (DB-API 2.0, PEP 249: ``qmark``
    for sqlite3, ``format``/``pyformat`` for psycopg).

    >>> insert_statement("qmark")[:64]
    'INSERT INTO check_minutes ("run_id", "check", "object", "t", "n"'
    """
    mark = _MARK.get(paramstyle)
    if mark is None:
        raise ValueError(f"paramstyle: expected one of {', '.join(_MARK)}, got {paramstyle!r}")
    names = ", ".join(f'"{c}"' for c in COLUMNS)
    return f"INSERT INTO check_minutes ({names}) VALUES ({', '.join([mark] * len(COLUMNS))})"


def minute_tuples(run_id: int, rows: Iterable[CheckMinute]) -> list[tuple[Any, ...]]:
    """The rows as :func:`insert_statement` takes them, in the order of :data:`COLUMNS`."""
    return [(run_id, r.check, r.object, r.t, r.n, r.valid, r.min, r.mean, r.max, r.unit) for r in rows]


def query_check_minutes(engine: Engine, *, start: float, end: float, line: str | None = None,
                        run_id: int | None = None, check: str | None = None, obj: str | None = None
                        ) -> list[dict[str, Any]]:
    """The minutes of every check overlapping ``[start, end)`` (epoch s): those that begin before ``end`` and end
    after ``start``; of the runs of ``line``, of run ``run_id``, of check kind ``check`` and of object ``obj``, each
    when given. Ordered by check, object and time (then run).

    Each row: ``{"run", "line", "check", "object", "t", "n", "valid", "min", "mean", "max", "unit"}``; ``t`` the
    minute's start (epoch s), ``min``/``mean``/``max`` None when no frame of the minute had a valid value.
    """
    m = CheckMinuteRow
    q = (select(m.run_id, Run.line_name, m.check, m.object, m.t, m.n, m.valid, m.min, m.mean, m.max, m.unit)
         .join(Run, Run.id == m.run_id)
         .where(m.t < end, m.t > start - MINUTE)
         .order_by(m.check, m.object, m.t, m.run_id))
    if line is not None:
        q = q.where(Run.line_name == line)
    if run_id is not None:
        q = q.where(m.run_id == run_id)
    if check is not None:
        q = q.where(m.check == check)
    if obj is not None:
        q = q.where(m.object == obj)
    with Session(engine) as s:
        return [{"run": r, "line": ln, "check": c, "object": o, "t": t, "n": n, "valid": v, "min": lo, "mean": mu,
                 "max": hi, "unit": u} for r, ln, c, o, t, n, v, lo, mu, hi, u in s.execute(q).all()]


def prune_check_minutes(engine: Engine, *, older_than: float) -> int:
    """Delete the minutes that begin before ``older_than`` (epoch s) and return how many. One transaction.

    Through the (run, time) index: the runs whose data may begin before ``older_than`` (a finished run's data
    start tells; a run still running, or killed, has none yet), then their minutes before it.
    """
    with Session(engine) as s, s.begin():
        runs = list(s.scalars(select(Run.id).where(or_(Run.data_start.is_(None),
                                                       Run.data_start - MINUTE < older_than))))
        gone = 0
        for i in range(0, len(runs), 500):
            res = s.execute(delete(CheckMinuteRow).where(CheckMinuteRow.run_id.in_(runs[i:i + 500]),
                                                         CheckMinuteRow.t < older_than)
                            .execution_options(synchronize_session=False))
            gone += res.rowcount  # type: ignore[attr-defined]
        return gone
