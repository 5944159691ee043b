"""Users and roles on both backends: bootstrap, lead-only changes, the last lead, audit events."""

from __future__ import annotations

import json

import pytest

from tracker.db import queries
from tracker.errors import InputError, NotFoundError, PermissionDenied
from tracker.services.users import add_user, deactivate_user, list_users, set_role


def test_the_first_user_must_be_a_lead(migrated_engine):
    with pytest.raises(PermissionDenied, match="first user must be a lead"):
        add_user(migrated_engine, "sam", "scientist")
    assert list_users(migrated_engine).empty
    user = add_user(migrated_engine, "lena", "lead")
    assert user["role"] == "lead"
    ev = queries.audit_events(migrated_engine, action="create", entity_type="user")
    assert list(ev["actor"]) == ["lena"] and "bootstrap" in ev["reason"].iloc[0]


def test_after_the_first_user_only_an_active_lead_may_add_users(migrated_engine):
    add_user(migrated_engine, "lena", "lead")
    add_user(migrated_engine, "sam", "scientist", by="lena")
    with pytest.raises(PermissionDenied, match="only a lead may add users"):
        add_user(migrated_engine, "vic", "viewer", by="sam")
    with pytest.raises(PermissionDenied, match="unknown user"):
        add_user(migrated_engine, "vic", "viewer", by="ghost")
    with pytest.raises(PermissionDenied, match="signed-in user"):
        add_user(migrated_engine, "vic", "viewer", by=None)
    assert list(list_users(migrated_engine)["name"]) == ["lena", "sam"]


def test_names_roles_and_duplicates_are_checked(migrated_engine):
    add_user(migrated_engine, "lena", "lead")
    with pytest.raises(InputError, match="already exists"):
        add_user(migrated_engine, "lena", "viewer", by="lena")
    with pytest.raises(InputError, match="unknown role"):
        add_user(migrated_engine, "max", "admin", by="lena")
    with pytest.raises(InputError, match="must not be empty"):
        add_user(migrated_engine, "   ", "viewer", by="lena")


def test_role_changes_are_audited_with_before_and_after(migrated_engine):
    add_user(migrated_engine, "lena", "lead")
    add_user(migrated_engine, "sam", "scientist", by="lena")
    set_role(migrated_engine, "sam", "lead", by="lena", reason="took over the program")
    ev = queries.audit_events(migrated_engine, action="update", entity_type="user").iloc[-1]
    assert json.loads(ev["before_json"])["role"] == "scientist" and json.loads(ev["after_json"])["role"] == "lead"
    assert ev["reason"] == "took over the program" and ev["actor"] == "lena"
    with pytest.raises(NotFoundError):
        set_role(migrated_engine, "nobody", "lead", by="lena")


def test_the_last_active_lead_can_be_neither_demoted_nor_deactivated(migrated_engine):
    add_user(migrated_engine, "lena", "lead")
    with pytest.raises(PermissionDenied, match="last active lead"):
        set_role(migrated_engine, "lena", "viewer", by="lena")
    with pytest.raises(PermissionDenied, match="last active lead"):
        deactivate_user(migrated_engine, "lena", by="lena")
    add_user(migrated_engine, "otto", "lead", by="lena")
    deactivate_user(migrated_engine, "otto", by="lena", reason="left")
    users = list_users(migrated_engine).set_index("name")
    assert bool(users.loc["otto", "active"]) is False
    with pytest.raises(PermissionDenied, match="deactivated"):
        add_user(migrated_engine, "vic", "viewer", by="otto")
