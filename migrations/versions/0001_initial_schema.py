"""Initial schema: programs, compounds, measurements, users, rule configs, decisions, audit chain.

``decisions`` and ``audit_events`` are made append-only by triggers (SQLite:
RAISE(ABORT); PostgreSQL: a plpgsql function on UPDATE/DELETE and TRUNCATE).
The allowed values in the CHECK constraints are a frozen copy of
``tracker.domain`` at this revision.

Revision ID: 0001
Revises:
Create Date: 2026-12-01 22:06:41.926955
"""
from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

from tracker.db.triggers import create_append_only, drop_append_only

APPEND_ONLY = ("decisions", "audit_events")


revision: str = '0001'
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('audit_events',
    sa.Column('id', sa.Integer(), autoincrement=True, nullable=False),
    sa.Column('at', sa.String(length=40), nullable=False),
    sa.Column('actor', sa.String(length=100), nullable=False),
    sa.Column('action', sa.String(length=64), nullable=False),
    sa.Column('entity_type', sa.String(length=64), nullable=False),
    sa.Column('entity_id', sa.String(length=200), nullable=True),
    sa.Column('before_json', sa.Text(), nullable=True),
    sa.Column('after_json', sa.Text(), nullable=True),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('prev_hash', sa.String(length=64), nullable=False),
    sa.Column('hash', sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_events')),
    sa.UniqueConstraint('hash', name=op.f('uq_audit_events_hash'))
    )
    op.create_table('programs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('target', sa.String(length=200), nullable=True),
    sa.Column('intended_profile', sa.String(length=100), nullable=True),
    sa.Column('engagement_threshold', sa.Float(), nullable=True),
    sa.Column('engagement_threshold_text', sa.String(length=64), nullable=True),
    sa.Column('onset_max_s', sa.Float(), nullable=True),
    sa.Column('onset_max_text', sa.String(length=64), nullable=True),
    sa.Column('duration_min_s', sa.Float(), nullable=True),
    sa.Column('duration_min_text', sa.String(length=64), nullable=True),
    sa.Column('offset_max_s', sa.Float(), nullable=True),
    sa.Column('offset_max_text', sa.String(length=64), nullable=True),
    sa.Column('dosing_interval_s', sa.Float(), nullable=True),
    sa.Column('dosing_interval_text', sa.String(length=64), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_programs')),
    sa.UniqueConstraint('name', name=op.f('uq_programs_name'))
    )
    op.create_table('users',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('role', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.CheckConstraint("role IN ('lead', 'scientist', 'viewer')", name=op.f('ck_users_role_valid')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_users')),
    sa.UniqueConstraint('name', name=op.f('uq_users_name'))
    )
    op.create_table('compounds',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('program_id', sa.Integer(), nullable=False),
    sa.Column('series', sa.String(length=200), nullable=True),
    sa.Column('stage', sa.String(length=32), nullable=False),
    sa.Column('smiles', sa.Text(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("stage IN ('hit', 'hit-to-lead', 'lead-optimization', 'advanced-lead', 'candidate', 'clinical')", name=op.f('ck_compounds_stage_valid')),
    sa.ForeignKeyConstraint(['program_id'], ['programs.id'], name=op.f('fk_compounds_program_id_programs')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_compounds')),
    sa.UniqueConstraint('name', name=op.f('uq_compounds_name'))
    )
    op.create_index(op.f('ix_compounds_program_id'), 'compounds', ['program_id'], unique=False)

    op.create_table('rule_configs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('program_id', sa.Integer(), nullable=True),
    sa.Column('version', sa.Integer(), nullable=False),
    sa.Column('config_json', sa.Text(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('created_by', sa.String(length=100), nullable=True),
    sa.ForeignKeyConstraint(['program_id'], ['programs.id'], name=op.f('fk_rule_configs_program_id_programs')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_rule_configs')),
    sa.UniqueConstraint('program_id', 'version', name=op.f('uq_rule_configs_program_id_version'))
    )
    op.create_index(op.f('ix_rule_configs_program_id'), 'rule_configs', ['program_id'], unique=False)

    op.create_table('decisions',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('from_stage', sa.String(length=32), nullable=True),
    sa.Column('to_stage', sa.String(length=32), nullable=False),
    sa.Column('outcome', sa.String(length=16), nullable=False),
    sa.Column('by_user', sa.String(length=100), nullable=False),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('waivers_json', sa.Text(), nullable=True),
    sa.Column('evidence_json', sa.Text(), nullable=True),
    sa.Column('ruleset_version', sa.String(length=64), nullable=True),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("outcome IN ('approved', 'refused')", name=op.f('ck_decisions_outcome_valid')),
    sa.CheckConstraint("to_stage IN ('hit', 'hit-to-lead', 'lead-optimization', 'advanced-lead', 'candidate', 'clinical')", name=op.f('ck_decisions_to_stage_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_decisions_compound_id_compounds')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_decisions'))
    )
    op.create_index(op.f('ix_decisions_compound_id'), 'decisions', ['compound_id'], unique=False)

    op.create_table('pk_profiles',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('species', sa.String(length=64), nullable=False),
    sa.Column('route', sa.String(length=8), nullable=False),
    sa.Column('half_life_s', sa.Float(), nullable=False),
    sa.Column('half_life_text', sa.String(length=64), nullable=True),
    sa.Column('free_cmax_M', sa.Float(), nullable=False),
    sa.Column('free_cmax_text', sa.String(length=64), nullable=True),
    sa.Column('tmax_s', sa.Float(), nullable=True),
    sa.Column('tmax_text', sa.String(length=64), nullable=True),
    sa.Column('dosing_interval_s', sa.Float(), nullable=True),
    sa.Column('dosing_interval_text', sa.String(length=64), nullable=True),
    sa.Column('source', sa.String(length=300), nullable=True),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("route IN ('oral', 'iv')", name=op.f('ck_pk_profiles_route_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_pk_profiles_compound_id_compounds')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_pk_profiles')),
    sa.UniqueConstraint('compound_id', 'content_hash', name=op.f('uq_pk_profiles_compound_id_content_hash'))
    )
    op.create_index(op.f('ix_pk_profiles_compound_id'), 'pk_profiles', ['compound_id'], unique=False)

    op.create_table('potency',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('assay', sa.String(length=200), nullable=False),
    sa.Column('readout', sa.String(length=16), nullable=False),
    sa.Column('value_M', sa.Float(), nullable=False),
    sa.Column('value_text', sa.String(length=64), nullable=True),
    sa.Column('incubation_s', sa.Float(), nullable=False),
    sa.Column('incubation_text', sa.String(length=64), nullable=True),
    sa.Column('format', sa.String(length=32), nullable=False),
    sa.Column('tracer_conc_M', sa.Float(), nullable=True),
    sa.Column('tracer_conc_text', sa.String(length=64), nullable=True),
    sa.Column('tracer_kd_M', sa.Float(), nullable=True),
    sa.Column('tracer_kd_text', sa.String(length=64), nullable=True),
    sa.Column('tracer_residence_time_s', sa.Float(), nullable=True),
    sa.Column('tracer_residence_time_text', sa.String(length=64), nullable=True),
    sa.Column('max_response_fraction', sa.Float(), nullable=True),
    sa.Column('max_response_fraction_text', sa.String(length=64), nullable=True),
    sa.Column('measured_on', sa.Date(), nullable=True),
    sa.Column('source', sa.String(length=300), nullable=True),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("format IN ('binding', 'competition-binding', 'functional', 'enzyme')", name=op.f('ck_potency_format_valid')),
    sa.CheckConstraint("readout IN ('IC50', 'Ki', 'KD', 'EC50', 'Kb')", name=op.f('ck_potency_readout_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_potency_compound_id_compounds')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_potency')),
    sa.UniqueConstraint('compound_id', 'content_hash', name=op.f('uq_potency_compound_id_content_hash'))
    )
    op.create_index(op.f('ix_potency_compound_id'), 'potency', ['compound_id'], unique=False)

    op.create_table('time_courses',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('method', sa.String(length=32), nullable=False),
    sa.Column('data_json', sa.Text(), nullable=False),
    sa.Column('meta_json', sa.Text(), nullable=True),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("method IN ('spr', 'competition-kinetics', 'association-dissociation', 'jump-dilution', 'washout-recovery', 'other')", name=op.f('ck_time_courses_method_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_time_courses_compound_id_compounds')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_time_courses')),
    sa.UniqueConstraint('compound_id', 'content_hash', name=op.f('uq_time_courses_compound_id_content_hash'))
    )
    op.create_index(op.f('ix_time_courses_compound_id'), 'time_courses', ['compound_id'], unique=False)

    op.create_table('kinetic_measurements',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('method', sa.String(length=32), nullable=False),
    sa.Column('kon_per_M_s', sa.Float(), nullable=True),
    sa.Column('kon_text', sa.String(length=64), nullable=True),
    sa.Column('koff_per_s', sa.Float(), nullable=False),
    sa.Column('koff_text', sa.String(length=64), nullable=True),
    sa.Column('koff_given_as', sa.String(length=16), nullable=False),
    sa.Column('kd_M', sa.Float(), nullable=True),
    sa.Column('kd_text', sa.String(length=64), nullable=True),
    sa.Column('kon_low_per_M_s', sa.Float(), nullable=True),
    sa.Column('kon_low_text', sa.String(length=64), nullable=True),
    sa.Column('kon_high_per_M_s', sa.Float(), nullable=True),
    sa.Column('kon_high_text', sa.String(length=64), nullable=True),
    sa.Column('koff_low_per_s', sa.Float(), nullable=True),
    sa.Column('koff_low_text', sa.String(length=64), nullable=True),
    sa.Column('koff_high_per_s', sa.Float(), nullable=True),
    sa.Column('koff_high_text', sa.String(length=64), nullable=True),
    sa.Column('fit_json', sa.Text(), nullable=True),
    sa.Column('time_course_id', sa.Integer(), nullable=True),
    sa.Column('measured_on', sa.Date(), nullable=True),
    sa.Column('source', sa.String(length=300), nullable=True),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("koff_given_as IN ('koff', 'residence_time')", name=op.f('ck_kinetic_measurements_koff_given_as_valid')),
    sa.CheckConstraint("method IN ('spr', 'competition-kinetics', 'association-dissociation', 'jump-dilution', 'washout-recovery', 'other')", name=op.f('ck_kinetic_measurements_method_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_kinetic_measurements_compound_id_compounds')),
    sa.ForeignKeyConstraint(['time_course_id'], ['time_courses.id'], name=op.f('fk_kinetic_measurements_time_course_id_time_courses')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_kinetic_measurements')),
    sa.UniqueConstraint('compound_id', 'content_hash', name=op.f('uq_kinetic_measurements_compound_id_content_hash'))
    )
    op.create_index(op.f('ix_kinetic_measurements_compound_id'), 'kinetic_measurements', ['compound_id'], unique=False)
    op.create_index(op.f('ix_kinetic_measurements_time_course_id'), 'kinetic_measurements', ['time_course_id'], unique=False)

    op.create_table('stage_history',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('compound_id', sa.Integer(), nullable=False),
    sa.Column('from_stage', sa.String(length=32), nullable=True),
    sa.Column('to_stage', sa.String(length=32), nullable=False),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('by_user', sa.String(length=100), nullable=False),
    sa.Column('decision_id', sa.Integer(), nullable=True),
    sa.Column('note', sa.Text(), nullable=True),
    sa.CheckConstraint("to_stage IN ('hit', 'hit-to-lead', 'lead-optimization', 'advanced-lead', 'candidate', 'clinical')", name=op.f('ck_stage_history_to_stage_valid')),
    sa.ForeignKeyConstraint(['compound_id'], ['compounds.id'], name=op.f('fk_stage_history_compound_id_compounds')),
    sa.ForeignKeyConstraint(['decision_id'], ['decisions.id'], name=op.f('fk_stage_history_decision_id_decisions')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_stage_history'))
    )
    op.create_index(op.f('ix_stage_history_compound_id'), 'stage_history', ['compound_id'], unique=False)
    create_append_only(op.execute, op.get_bind().dialect.name, APPEND_ONLY)



def downgrade() -> None:
    drop_append_only(op.execute, op.get_bind().dialect.name, APPEND_ONLY)
    op.drop_index(op.f('ix_stage_history_compound_id'), table_name='stage_history')

    op.drop_table('stage_history')
    op.drop_index(op.f('ix_kinetic_measurements_time_course_id'), table_name='kinetic_measurements')
    op.drop_index(op.f('ix_kinetic_measurements_compound_id'), table_name='kinetic_measurements')

    op.drop_table('kinetic_measurements')
    op.drop_index(op.f('ix_time_courses_compound_id'), table_name='time_courses')

    op.drop_table('time_courses')
    op.drop_index(op.f('ix_potency_compound_id'), table_name='potency')

    op.drop_table('potency')
    op.drop_index(op.f('ix_pk_profiles_compound_id'), table_name='pk_profiles')

    op.drop_table('pk_profiles')
    op.drop_index(op.f('ix_decisions_compound_id'), table_name='decisions')

    op.drop_table('decisions')
    op.drop_index(op.f('ix_rule_configs_program_id'), table_name='rule_configs')

    op.drop_table('rule_configs')
    op.drop_index(op.f('ix_compounds_program_id'), table_name='compounds')

    op.drop_table('compounds')
    op.drop_table('users')
    op.drop_table('programs')
    op.drop_table('audit_events')
