"""A kinetic measurement can be superseded: by which newer one, why and when.

A saved fit whose residence time differs more than 3x from one already stored
for the compound is refused unless the user gives a reason; the older value
then stays on record, marked with ``superseded_by_id``, ``superseded_reason``
and ``superseded_at`` (the grader reads only measurements that are not
superseded).  Nothing is deleted.  ``kinetic_measurements`` carries no
append-only trigger, so the SQLite batch rebuild needs none re-created.

Revision ID: 0003_fit_supersede
Revises: 0002_target_turnover
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003_fit_supersede"
down_revision: str | None = "0002_target_turnover"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("kinetic_measurements", schema=None) as batch_op:
        batch_op.add_column(sa.Column("superseded_by_id", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("superseded_reason", sa.Text(), nullable=True))
        batch_op.add_column(sa.Column("superseded_at", sa.DateTime(timezone=True), nullable=True))
        batch_op.create_foreign_key(
            batch_op.f("fk_kinetic_measurements_superseded_by_id_kinetic_measurements"),
            "kinetic_measurements", ["superseded_by_id"], ["id"],
        )


def downgrade() -> None:
    with op.batch_alter_table("kinetic_measurements", schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f("fk_kinetic_measurements_superseded_by_id_kinetic_measurements"), type_="foreignkey")
        batch_op.drop_column("superseded_at")
        batch_op.drop_column("superseded_reason")
        batch_op.drop_column("superseded_by_id")
