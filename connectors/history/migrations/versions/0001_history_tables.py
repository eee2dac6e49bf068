"""The history tables: runs, alarm events, alarm episodes, alarm context, input issues.

Free text is TEXT (no length limit on either database); the closed sets (event, level, priority, run
mode) are unbounded VARCHAR with named CHECK constraints; ``alarm_events.episode_id`` links each raise
and clear to its episode. A database from before the migrations is converted to exactly this by
``migrations/legacy.py`` and stamped with this revision.

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

LEVEL = ("warning", "alarm")
PRIORITY = ("low", "medium", "high")


def _one_of(table: str, column: str, values: tuple[str, ...]) -> sa.CheckConstraint:
    return sa.CheckConstraint(f"{column} IN ({', '.join(repr(v) for v in values)})", name=op.f(f"ck_{table}_{column}"))


def upgrade() -> None:
    op.create_table(
        "runs",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("started_at", sa.Float(), nullable=False),
        sa.Column("finished_at", sa.Float(), nullable=True),
        sa.Column("mode", sa.String(), nullable=False),
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("config_file", sa.Text(), nullable=False),
        sa.Column("config_hash", sa.Text(), nullable=False),
        sa.Column("source", sa.Text(), nullable=False),
        sa.Column("data_start", sa.Float(), nullable=True),
        sa.Column("data_end", sa.Float(), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        _one_of("runs", "mode", ("replay", "demo", "daemon")),
    )
    op.create_table(
        "alarm_episodes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("alarm_key", sa.Text(), nullable=False),
        sa.Column("kind", sa.Text(), nullable=False),
        sa.Column("object_id", sa.Text(), nullable=False),
        sa.Column("level", sa.String(), nullable=False),
        sa.Column("priority", sa.String(), nullable=False),
        sa.Column("unit", sa.Text(), nullable=False),
        sa.Column("raised_t", sa.Float(), nullable=False),
        sa.Column("cleared_t", sa.Float(), nullable=True),
        sa.Column("raise_value", sa.Float(), nullable=True),
        sa.Column("peak_value", sa.Float(), nullable=True),
        sa.Column("limit", sa.Float(), nullable=False),
        sa.Column("line_state", sa.Text(), nullable=False),
        sa.Column("config_hash", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(["run_id"], ["runs.id"]),
        sa.PrimaryKeyConstraint("id"),
        _one_of("alarm_episodes", "level", LEVEL),
        _one_of("alarm_episodes", "priority", PRIORITY),
    )
    op.create_index(op.f("ix_alarm_episodes_kind"), "alarm_episodes", ["kind"])
    op.create_index(op.f("ix_alarm_episodes_object_id"), "alarm_episodes", ["object_id"])
    op.create_index(op.f("ix_alarm_episodes_raised_t"), "alarm_episodes", ["raised_t"])
    op.create_index(op.f("ix_alarm_episodes_run_id"), "alarm_episodes", ["run_id"])
    op.create_index(op.f("ix_episode_open"), "alarm_episodes", ["alarm_key", "cleared_t"])
    op.create_table(
        "alarm_events",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("episode_id", sa.Integer(), nullable=True),
        sa.Column("t", sa.Float(), nullable=False),
        sa.Column("alarm_key", sa.Text(), nullable=False),
        sa.Column("kind", sa.Text(), nullable=False),
        sa.Column("object_id", sa.Text(), nullable=False),
        sa.Column("level", sa.String(), nullable=False),
        sa.Column("event", sa.String(), nullable=False),
        sa.Column("value", sa.Float(), nullable=True),
        sa.Column("limit", sa.Float(), nullable=False),
        sa.Column("priority", sa.String(), nullable=False),
        sa.Column("line_state", sa.Text(), nullable=False),
        sa.Column("config_hash", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(["run_id"], ["runs.id"]),
        sa.ForeignKeyConstraint(["episode_id"], ["alarm_episodes.id"], name=op.f("fk_alarm_events_episode_id")),
        sa.PrimaryKeyConstraint("id"),
        _one_of("alarm_events", "level", LEVEL),
        _one_of("alarm_events", "event", ("raise", "clear")),
        _one_of("alarm_events", "priority", PRIORITY),
    )
    op.create_index(op.f("ix_alarm_events_alarm_key"), "alarm_events", ["alarm_key"])
    op.create_index(op.f("ix_alarm_events_episode_id"), "alarm_events", ["episode_id"])
    op.create_index(op.f("ix_alarm_events_run_id"), "alarm_events", ["run_id"])
    op.create_index(op.f("ix_alarm_events_t"), "alarm_events", ["t"])
    op.create_table(
        "input_issues",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("tag", sa.Text(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("count", sa.Integer(), nullable=False),
        sa.Column("refs", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(["run_id"], ["runs.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(op.f("ix_input_issues_run_id"), "input_issues", ["run_id"])
    op.create_table(
        "alarm_context",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("episode_id", sa.Integer(), nullable=False),
        sa.Column("signal", sa.Text(), nullable=False),
        sa.Column("t0", sa.Float(), nullable=False),
        sa.Column("dt", sa.Float(), nullable=False),
        sa.Column("values", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(["episode_id"], ["alarm_episodes.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index(op.f("ix_alarm_context_episode_id"), "alarm_context", ["episode_id"])


def downgrade() -> None:
    for table in ("alarm_context", "input_issues", "alarm_events", "alarm_episodes", "runs"):
        op.drop_table(table)
