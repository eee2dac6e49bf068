"""Each check's value over time: ``check_minutes``, one row per run, check, object and minute, with the frames the
check computed in the minute (``n``), those with a valid value (``valid``) and the least, mean and greatest valid
value (NULL when none), in the check's unit. Indexed by run and time (a run's minutes, retention) and by check,
object and time (a trend over a shift).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "check_minutes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("run_id", sa.Integer(), nullable=False),
        sa.Column("check", sa.Text(), nullable=False),
        sa.Column("object", sa.Text(), nullable=False),
        sa.Column("t", sa.Float(), nullable=False),
        sa.Column("n", sa.Integer(), nullable=False),
        sa.Column("valid", sa.Integer(), nullable=False),
        sa.Column("min", sa.Float(), nullable=True),
        sa.Column("mean", sa.Float(), nullable=True),
        sa.Column("max", sa.Float(), nullable=True),
        sa.Column("unit", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(["run_id"], ["runs.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index("ix_check_minutes_run_t", "check_minutes", ["run_id", "t"])
    op.create_index("ix_check_minutes_check_object_t", "check_minutes", ["check", "object", "t"])


def downgrade() -> None:
    op.drop_index("ix_check_minutes_check_object_t", table_name="check_minutes")
    op.drop_index("ix_check_minutes_run_t", table_name="check_minutes")
    op.drop_table("check_minutes")
