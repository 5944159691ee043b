"""Identity and signatures: password hashes and printed names for users, command-line sign-in
sessions (token hashes only), and append-only electronic signatures linked to gate decisions.

``users`` gains two nullable columns (``password_hash``, ``full_name``), added
with ``ALTER TABLE ... ADD COLUMN`` (no table rebuild, so no trigger is lost).
``signatures`` is append-only like ``decisions`` (triggers created here).  The
allowed values of the CHECK constraints are a frozen copy of ``tracker.domain``
at this revision.

Revision ID: 0005_identity
Revises: 0004_potency_conditions
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

from tracker.db.triggers import create_append_only, drop_append_only

revision: str = "0005_identity"
down_revision: str | None = "0004_potency_conditions"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column("users", sa.Column("password_hash", sa.String(length=255), nullable=True))
    op.add_column("users", sa.Column("full_name", sa.String(length=200), nullable=True))
    op.create_table(
        "login_sessions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("expires_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["user_id"], ["users.id"], name=op.f("fk_login_sessions_user_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_login_sessions")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_login_sessions_token_hash")),
    )
    op.create_index(op.f("ix_login_sessions_user_id"), "login_sessions", ["user_id"], unique=False)
    op.create_table(
        "signatures",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("decision_id", sa.Integer(), nullable=False),
        sa.Column("signer", sa.String(length=100), nullable=False),
        sa.Column("printed_name", sa.String(length=200), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("meaning", sa.String(length=16), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.CheckConstraint("meaning IN ('approved', 'refused', 'waived', 'co-signed')", name=op.f("ck_signatures_meaning_valid")),
        sa.CheckConstraint("role IN ('lead', 'scientist', 'viewer')", name=op.f("ck_signatures_role_valid")),
        sa.ForeignKeyConstraint(["decision_id"], ["decisions.id"], name=op.f("fk_signatures_decision_id_decisions")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_signatures")),
    )
    op.create_index(op.f("ix_signatures_decision_id"), "signatures", ["decision_id"], unique=False)
    create_append_only(op.execute, op.get_bind().dialect.name, ("signatures",))


def downgrade() -> None:
    drop_append_only(op.execute, op.get_bind().dialect.name, ("signatures",), drop_function=False)
    op.drop_index(op.f("ix_signatures_decision_id"), table_name="signatures")
    op.drop_table("signatures")
    op.drop_index(op.f("ix_login_sessions_user_id"), table_name="login_sessions")
    op.drop_table("login_sessions")
    with op.batch_alter_table("users") as batch:
        batch.drop_column("full_name")
        batch.drop_column("password_hash")
