"""Programs get an optional target half-life (target turnover in the engagement simulation).

``programs.target_half_life_s`` (SI seconds) and ``programs.target_half_life_text``
(the text as imported), both nullable; existing programs keep NULL (no turnover).
``programs`` carries no append-only trigger, so the batch rebuild of the
downgrade on SQLite needs none re-created.

Revision ID: 0002_target_turnover
Revises: 0001
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002_target_turnover"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("programs") as batch:
        batch.add_column(sa.Column("target_half_life_s", sa.Float(), nullable=True))
        batch.add_column(sa.Column("target_half_life_text", sa.String(length=64), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("programs") as batch:
        batch.drop_column("target_half_life_text")
        batch.drop_column("target_half_life_s")
