"""What a raise names and carries: ``alarm_episodes`` gains ``blames`` (the measured things a user can go and
look at, comma-separated: a zone, its tension tag, the rollers) and ``detail`` (a JSON object of the values the
check gave at the raise: a drift's estimated change time in epoch s, the size of the change in the residual's
unit, the baseline's mean and sigma). Both nullable: episodes written before keep NULL.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("alarm_episodes") as b:
        b.add_column(sa.Column("blames", sa.Text(), nullable=True))
        b.add_column(sa.Column("detail", sa.Text(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("alarm_episodes") as b:
        b.drop_column("detail")
        b.drop_column("blames")
