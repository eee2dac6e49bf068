"""Convert a history written before the migrations into revision ``0001``, in place.

spanwatch used to create its tables with ``create_all``: no ``alembic_version`` table, ``VARCHAR(n)``
free text, no CHECK constraints, no link from a journal row to its episode. :func:`upgrade` (run by
``schema.upgrade`` when it finds those tables, inside the same locked transaction, before stamping
``0001``) turns them into exactly the tables revision ``0001`` creates:

* free text (tags, alarm keys, object ids, file names, hashes) becomes TEXT: the ``VARCHAR(n)`` limits
  held on PostgreSQL only (SQLite does not enforce them) and refused a long tag there;
* the closed sets (event raise/clear, level, priority, run mode) become unbounded VARCHAR with named
  CHECK constraints; rows outside a set stop the conversion, naming their values;
* ``alarm_events.episode_id`` is added and filled by alarm key and time (a raise: the episode of its run
  raised at that time; a clear: the episode cleared at that time, possibly raised by an earlier run).

SQLite cannot alter a column or add a constraint in place: batch mode re-creates each table. Names
are given whole (``op.f``), independent of the models' naming convention. This is not a revision of
the chain (a new database never needs it), which keeps creating a new history to one cheap step.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

# table -> {column: its former VARCHAR length}
TEXT = {
    "runs": {"line_name": 200, "config_file": 500, "config_hash": 64, "source": 500},
    "alarm_episodes": {"alarm_key": 200, "kind": 40, "object_id": 200, "unit": 40, "line_state": 16,
                       "config_hash": 64},
    "alarm_events": {"alarm_key": 200, "kind": 40, "object_id": 200, "line_state": 16, "config_hash": 64},
    "alarm_context": {"signal": 200},
    "input_issues": {"tag": 200, "reason": 60},
}
LEVEL = ("warning", "alarm")
PRIORITY = ("low", "medium", "high")
# table -> {column: its values}; each was VARCHAR(16), and gets CHECK constraint ck_<table>_<column>
CLOSED = {
    "runs": {"mode": ("replay", "demo", "daemon")},
    "alarm_episodes": {"level": LEVEL, "priority": PRIORITY},
    "alarm_events": {"level": LEVEL, "event": ("raise", "clear"), "priority": PRIORITY},
}

LINK_EVENTS = """
UPDATE alarm_events SET episode_id = (
    SELECT e.id FROM alarm_episodes e
    WHERE e.alarm_key = alarm_events.alarm_key
      AND ((alarm_events.event = 'raise' AND e.run_id = alarm_events.run_id AND e.raised_t = alarm_events.t)
           OR (alarm_events.event = 'clear' AND e.cleared_t = alarm_events.t AND e.raised_t <= alarm_events.t))
    ORDER BY e.id
    LIMIT 1)
"""


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


def _refuse_unknown(table: str, column: str, values: tuple[str, ...]) -> None:
    bad = op.get_bind().execute(sa.text(f"SELECT DISTINCT {column} FROM {table} WHERE NOT ({_in(column, values)})"))
    found = sorted(str(r[0]) for r in bad)
    if found:
        raise RuntimeError(f"converting the history to revision 0001: {table}.{column} holds {found}, outside "
                           f"{list(values)}; correct or delete those rows, then open the history again")


def upgrade() -> None:
    for table, closed in CLOSED.items():
        for column, values in closed.items():
            _refuse_unknown(table, column, values)
    for table in ("runs", "alarm_episodes", "alarm_events", "alarm_context", "input_issues"):
        with op.batch_alter_table(table) as b:
            for column, length in TEXT[table].items():
                b.alter_column(column, type_=sa.Text(), existing_type=sa.String(length), existing_nullable=False)
            for column, values in CLOSED.get(table, {}).items():
                b.alter_column(column, type_=sa.String(), existing_type=sa.String(16), existing_nullable=False)
                b.create_check_constraint(op.f(f"ck_{table}_{column}"), _in(column, values))
            if table == "alarm_events":
                b.add_column(sa.Column("episode_id", sa.Integer(), nullable=True))
                b.create_foreign_key(op.f("fk_alarm_events_episode_id"), "alarm_episodes", ["episode_id"], ["id"])
                b.create_index(op.f("ix_alarm_events_episode_id"), ["episode_id"])
    op.execute(LINK_EVENTS)

