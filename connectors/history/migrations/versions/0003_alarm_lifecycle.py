"""The alarm lifecycle: rationalization on episodes, five priorities, the lifecycle journal, current states,
operators' requests and the configuration texts.

* ``alarm_episodes`` gains the alarm's rationalization at the raise (``cause``, ``consequence``,
  ``corrective_action``, ``response_time`` in s) and the raise's flags (``first_out``, ``chattering``), all
  nullable: the episodes written before keep NULL there.
* The priorities widen to ``advisory``, ``low``, ``medium``, ``high``, ``urgent`` (the CHECK constraints of
  ``alarm_events`` and ``alarm_episodes`` are dropped and re-created; SQLite re-creates the tables in batch mode,
  rows kept).
* ``alarm_actions``: every lifecycle change and operator action, append-only.
* ``alarm_states``: the current lifecycle record of each alarm of a line.
* ``action_requests``: the inbox a running daemon polls, with its answers.
* ``config_versions``: the text of each configuration a line ran with, once per hash.

The closed sets are written out here (not imported from the code), so this revision creates the same schema
whatever later versions of the enums hold. Downgrading fails on a history holding an ``advisory`` or ``urgent``
alarm (the former CHECK refuses it): such a history cannot go back without losing what it says.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

PRIORITY_BEFORE = ("low", "medium", "high")
PRIORITY = ("advisory", "low", "medium", "high", "urgent")
ACTION = ("raise", "clear", "ack", "reset", "shelve", "unshelve", "comment", "out_of_service", "return_to_service",
          "suppress", "unsuppress", "shelve_expired")
STATE = ("normal", "unack", "acked", "rtn_unack", "latched_unack", "latched", "shelved", "suppressed",
         "out_of_service")
ORIGIN = ("operator", "system")
STATUS = ("pending", "applied", "refused")


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


def _one_of(table: str, column: str, values: tuple[str, ...]) -> sa.CheckConstraint:
    return sa.CheckConstraint(_in(column, values), name=op.f(f"ck_{table}_{column}"))


def _priorities(values: tuple[str, ...]) -> None:
    for table in ("alarm_events", "alarm_episodes"):
        with op.batch_alter_table(table) as b:
            b.drop_constraint(op.f(f"ck_{table}_priority"), type_="check")
            b.create_check_constraint(op.f(f"ck_{table}_priority"), _in("priority", values))


def upgrade() -> None:
    with op.batch_alter_table("alarm_episodes") as b:
        b.add_column(sa.Column("cause", sa.Text(), nullable=True))
        b.add_column(sa.Column("consequence", sa.Text(), nullable=True))
        b.add_column(sa.Column("corrective_action", sa.Text(), nullable=True))
        b.add_column(sa.Column("response_time", sa.Float(), nullable=True))
        b.add_column(sa.Column("first_out", sa.Boolean(), nullable=True))
        b.add_column(sa.Column("chattering", sa.Boolean(), nullable=True))
    _priorities(PRIORITY)
    op.create_table(
        "action_requests",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("requested_at", sa.Float(), nullable=False),
        sa.Column("user", sa.Text(), nullable=False),
        sa.Column("action", sa.String(), nullable=False),
        sa.Column("episode_id", sa.Integer(), nullable=True),
        sa.Column("alarm_key", sa.Text(), nullable=True),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("until", sa.Float(), nullable=True),
        sa.Column("one_shot", sa.Boolean(), nullable=False),
        sa.Column("status", sa.String(), nullable=False),
        sa.Column("answer", sa.Text(), nullable=False),
        sa.Column("answered_at", sa.Float(), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        _one_of("action_requests", "action", ACTION),
        _one_of("action_requests", "status", STATUS),
    )
    op.create_index("ix_action_requests_line_status", "action_requests", ["line_name", "status"])
    op.create_table(
        "alarm_actions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=True),
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("episode_id", sa.Integer(), nullable=True),
        sa.Column("alarm_key", sa.Text(), nullable=False),
        sa.Column("t", sa.Float(), nullable=False),
        sa.Column("action", sa.String(), nullable=False),
        sa.Column("origin", sa.String(), nullable=False),
        sa.Column("user", sa.Text(), nullable=False),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("state_before", sa.String(), nullable=False),
        sa.Column("state_after", sa.String(), nullable=False),
        sa.Column("until", sa.Float(), nullable=True),
        sa.Column("one_shot", sa.Boolean(), nullable=False),
        sa.Column("request_id", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["run_id"], ["runs.id"]),
        sa.ForeignKeyConstraint(["episode_id"], ["alarm_episodes.id"]),
        sa.ForeignKeyConstraint(["request_id"], ["action_requests.id"]),
        sa.PrimaryKeyConstraint("id"),
        _one_of("alarm_actions", "action", ACTION),
        _one_of("alarm_actions", "origin", ORIGIN),
        _one_of("alarm_actions", "state_before", STATE),
        _one_of("alarm_actions", "state_after", STATE),
    )
    op.create_index(op.f("ix_alarm_actions_run_id"), "alarm_actions", ["run_id"])
    op.create_index(op.f("ix_alarm_actions_episode_id"), "alarm_actions", ["episode_id"])
    op.create_index(op.f("ix_alarm_actions_t"), "alarm_actions", ["t"])
    op.create_index("ix_alarm_actions_line_key", "alarm_actions", ["line_name", "alarm_key"])
    op.create_table(
        "alarm_states",
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("alarm_key", sa.Text(), nullable=False),
        sa.Column("state", sa.String(), nullable=False),
        sa.Column("active", sa.Boolean(), nullable=False),
        sa.Column("acked", sa.Boolean(), nullable=False),
        sa.Column("held", sa.Boolean(), nullable=False),
        sa.Column("shelved_until", sa.Float(), nullable=True),
        sa.Column("shelved_one_shot", sa.Boolean(), nullable=False),
        sa.Column("shelved_by", sa.Text(), nullable=False),
        sa.Column("shelve_reason", sa.Text(), nullable=False),
        sa.Column("out_of_service", sa.Boolean(), nullable=False),
        sa.Column("oos_by", sa.Text(), nullable=False),
        sa.Column("oos_reason", sa.Text(), nullable=False),
        sa.Column("suppressed_by", sa.Text(), nullable=False),
        sa.Column("updated_at", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("line_name", "alarm_key"),
        _one_of("alarm_states", "state", STATE),
    )
    op.create_table(
        "config_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("config_hash", sa.Text(), nullable=False),
        sa.Column("config_file", sa.Text(), nullable=False),
        sa.Column("content", sa.Text(), nullable=False),
        sa.Column("saved_at", sa.Float(), nullable=False),
        sa.Column("saved_by", sa.Text(), nullable=False),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("line_name", "config_hash", name="uq_config_versions_line_hash"),
    )


def downgrade() -> None:
    for table in ("config_versions", "alarm_states", "alarm_actions", "action_requests"):
        op.drop_table(table)
    _priorities(PRIORITY_BEFORE)
    with op.batch_alter_table("alarm_episodes") as b:
        for column in ("chattering", "first_out", "response_time", "corrective_action", "consequence", "cause"):
            b.drop_column(column)
