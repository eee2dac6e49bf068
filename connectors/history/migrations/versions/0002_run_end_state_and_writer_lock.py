"""How a run ended, the last write its writer applied, and one writer per line.

* ``runs.end_state``: finished, failed or interrupted (NULL while a run is running, or when it was killed
  and no later run of its line has found it so yet); the runs that have a finish time are ``finished``.
* ``runs.written_seq``: the number of the last write of the run's writer that reached the database, in
  the same transaction as that write; a write buffered in the daemon's spool and replayed later is
  skipped when the database already has it, so a write is applied once even when a commit's outcome
  was lost with the connection.
* ``writer_locks``: one row per line whose daemon is writing into this history, with its heartbeat.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

END_STATES = ("finished", "failed", "interrupted")


def upgrade() -> None:
    with op.batch_alter_table("runs") as b:
        b.add_column(sa.Column("end_state", sa.String(), nullable=True))
        b.add_column(sa.Column("written_seq", sa.Integer(), nullable=False, server_default="0"))
        b.create_check_constraint(op.f("ck_runs_end_state"),
                                  f"end_state IN ({', '.join(repr(v) for v in END_STATES)})")
    op.execute("UPDATE runs SET end_state = 'finished' WHERE finished_at IS NOT NULL")
    op.create_table(
        "writer_locks",
        sa.Column("line_name", sa.Text(), nullable=False),
        sa.Column("token", sa.Text(), nullable=False),
        sa.Column("owner", sa.Text(), nullable=False),
        sa.Column("process", sa.Text(), nullable=False),
        sa.Column("acquired_at", sa.Float(), nullable=False),
        sa.Column("heartbeat_at", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("line_name"),
    )


def downgrade() -> None:
    op.drop_table("writer_locks")
    with op.batch_alter_table("runs") as b:
        b.drop_constraint(op.f("ck_runs_end_state"), type_="check")
        b.drop_column("written_seq")
        b.drop_column("end_state")
