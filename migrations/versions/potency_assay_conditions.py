"""Potency assay conditions: pre-incubation, practical maximum incubation, target concentration in the well.

Three optional quantity columns (SI value and the original text) on
``potency``.  Plain ``ADD COLUMN`` on both engines: no table is rebuilt, so
the append-only triggers (on other tables) are untouched.

Revision ID: 0004_potency_conditions
Revises: 0003_fit_supersede
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004_potency_conditions"
down_revision: str | None = "0003_fit_supersede"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_COLUMNS = (
    ("preincubation_s", sa.Float()),
    ("preincubation_text", sa.String(length=64)),
    ("max_incubation_s", sa.Float()),
    ("max_incubation_text", sa.String(length=64)),
    ("target_conc_M", sa.Float()),
    ("target_conc_text", sa.String(length=64)),
)


def upgrade() -> None:
    for name, type_ in _COLUMNS:
        op.add_column("potency", sa.Column(name, type_, nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("potency") as batch:
        for name, _ in reversed(_COLUMNS):
            batch.drop_column(name)
