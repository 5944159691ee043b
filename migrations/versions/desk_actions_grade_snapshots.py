"""Actions on findings and grade snapshots (grade history).

``actions``: a finding's prompt turned into work with an owner, a due date and
a status (``open``, ``done``, ``dropped``).  ``grade_snapshots``: a compound's
grade and findings, written by the grading service whenever they change.  Two
new tables; no existing table is rebuilt, so the append-only triggers stay.
The allowed values in the CHECK constraints are a frozen copy of
``tracker.domain`` at this revision.

Revision ID: 0006_desk
Revises: 0005_identity
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op


revision: str = "0006_desk"
down_revision: str | None = "0005_identity"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "actions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("compound_id", sa.Integer(), nullable=False),
        sa.Column("rule", sa.String(length=64), nullable=False),
        sa.Column("prompt", sa.Text(), nullable=True),
        sa.Column("owner", sa.String(length=100), nullable=False),
        sa.Column("due", sa.Date(), nullable=False),
        sa.Column("status", sa.String(length=16), nullable=False),
        sa.Column("note", sa.Text(), nullable=True),
        sa.Column("created_by", sa.String(length=100), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("closed_by", sa.String(length=100), nullable=True),
        sa.Column("closed_at", sa.DateTime(timezone=True), nullable=True),
        sa.CheckConstraint("status IN ('open', 'done', 'dropped')", name=op.f("ck_actions_status_valid")),
        sa.ForeignKeyConstraint(["compound_id"], ["compounds.id"], name=op.f("fk_actions_compound_id_compounds")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_actions")),
    )
    with op.batch_alter_table("actions", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_actions_compound_id"), ["compound_id"], unique=False)
    op.create_table(
        "grade_snapshots",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("compound_id", sa.Integer(), nullable=False),
        sa.Column("grade", sa.String(length=16), nullable=False),
        sa.Column("findings_json", sa.Text(), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.CheckConstraint("grade IN ('high', 'moderate', 'low', 'clear')", name=op.f("ck_grade_snapshots_grade_valid")),
        sa.ForeignKeyConstraint(["compound_id"], ["compounds.id"], name=op.f("fk_grade_snapshots_compound_id_compounds")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_grade_snapshots")),
    )
    with op.batch_alter_table("grade_snapshots", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_grade_snapshots_at"), ["at"], unique=False)
        batch_op.create_index(batch_op.f("ix_grade_snapshots_compound_id"), ["compound_id"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("grade_snapshots", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_grade_snapshots_compound_id"))
        batch_op.drop_index(batch_op.f("ix_grade_snapshots_at"))
    op.drop_table("grade_snapshots")
    with op.batch_alter_table("actions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_actions_compound_id"))
    op.drop_table("actions")
