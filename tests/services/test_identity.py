"""Authenticated identity and signed decisions, on SQLite and PostgreSQL, through the real command line.

Covers: passwords stored as argon2 hashes; ``krt login`` sessions (file mode 600,
bound to the database, expiring, unforgeable by editing the file); ``--by``
and ``$KRT_USER`` never authorising a write on their own; roles checked in the
services for import, fit save, gate, waiver, rules and users; signatures with
printed name, UTC time and meaning (21 CFR Part 11 §11.50, §11.70, §11.200);
the two-person rule for waivers.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import stat

import pytest
from sqlalchemy import select, text, update

from tracker.db.models import LoginSession, Signature, User
from tracker.errors import GateRefused, PermissionDenied
from tracker.services import gates, users

PW = "test-password-42"  # tests/conftest.py TEST_PASSWORD: every kestrel user's


def _session_file() -> dict:
    from tracker.commands.signin import session_path

    return json.loads(session_path().read_text(encoding="utf-8"))


# ------------------------------------------------------------------ credentials
def test_the_password_is_stored_only_as_an_argon2id_hash(kestrel):
    with kestrel.connect() as conn:
        stored = dict(conn.execute(select(User.name, User.password_hash)).all())
    assert set(stored) == {"lena", "sam", "vic", "otto"}
    for h in stored.values():
        assert h.startswith("$argon2id$") and PW not in h
    assert len(set(stored.values())) == 4  # each with its own salt


def test_the_shipped_hash_parameters_are_argon2s_rfc_9106_low_memory_profile(_cheap_password_hashing):
    # argon2-cffi's default PasswordHasher follows RFC 9106 (Biryukov et al., 2021) §4 "second recommended
    # option": argon2id, t=3, m=64 MiB, p=4 (argon2-cffi documentation, "Choosing parameters")
    hasher = _cheap_password_hashing()  # the original, un-patched factory
    assert (hasher.time_cost, hasher.memory_cost, hasher.parallelism) == (3, 65536, 4)


def test_a_wrong_password_or_unknown_name_is_refused_with_one_message(kestrel):
    with pytest.raises(PermissionDenied) as wrong:
        users.authenticate(kestrel, "lena", "not-her-password")
    with pytest.raises(PermissionDenied) as unknown:
        users.authenticate(kestrel, "nobody", PW)
    assert str(wrong.value) == str(unknown.value) == "user name or password is wrong"
    assert users.authenticate(kestrel, "lena", PW)["role"] == "lead"


def test_a_short_password_is_refused(migrated_engine):
    from tracker.errors import InputError

    with pytest.raises(InputError, match="at least 8"):
        users.add_user(migrated_engine, "ana", "lead", password="short")


def test_a_deactivated_user_cannot_sign_in(kestrel):
    users.deactivate_user(kestrel, "otto", by="lena")
    with pytest.raises(PermissionDenied, match="deactivated"):
        users.authenticate(kestrel, "otto", PW)


# ------------------------------------------------------------------ krt login / logout
def test_login_with_a_wrong_password_is_refused_and_writes_no_session(cli, kestrel):
    code, out, err = cli("login", "lena", "--password-stdin", stdin="wrong-password\n")
    assert code == 2 and err.strip() == "krt: error: user name or password is wrong"
    with kestrel.connect() as conn:
        assert conn.execute(select(LoginSession.id)).all() == []


def test_login_keeps_a_private_session_file_with_a_token_whose_hash_only_is_stored(cli, kestrel):
    from tracker.commands.signin import session_path

    code, out, err = cli("login", "lena", "--password-stdin", stdin=PW + "\n")
    assert code == 0 and out.startswith("signed in as lena (lead) until"), err
    mode = stat.S_IMODE(os.stat(session_path()).st_mode)
    assert mode == 0o600
    (entry,) = _session_file().values()
    assert entry["user"] == "lena" and len(entry["token"]) >= 40
    with kestrel.connect() as conn:
        (stored,) = conn.execute(select(LoginSession.token_hash, LoginSession.expires_at)).all()
    assert entry["token"] not in stored.token_hash and len(stored.token_hash) == 64
    hours = (stored.expires_at - dt.datetime.now(dt.timezone.utc)).total_seconds() / 3600
    assert 7.9 < hours <= 8.0  # default lifetime 8 h


def test_the_session_lifetime_is_configurable(cli, kestrel, monkeypatch):
    monkeypatch.setenv("KRT_SESSION_HOURS", "0.5")
    assert cli("login", "lena", "--password-stdin", stdin=PW + "\n")[0] == 0
    with kestrel.connect() as conn:
        expires = conn.execute(select(LoginSession.expires_at)).scalar_one()
    assert 0.4 < (expires - dt.datetime.now(dt.timezone.utc)).total_seconds() / 3600 <= 0.5


def test_an_expired_session_is_refused(cli, kestrel):
    cli("login", "lena", "--password-stdin", stdin=PW + "\n")
    with kestrel.begin() as conn:
        conn.execute(update(LoginSession).values(expires_at=dt.datetime.now(dt.timezone.utc) - dt.timedelta(seconds=1)))
    code, out, err = cli("rules", "set", "ki_shift_threshold=8", "--reason", "noise")
    assert code == 2 and "expired" in err and "krt login lena" in err and err.count("\n") == 1


def test_editing_the_session_file_cannot_forge_a_sign_in(cli, kestrel):
    from tracker.commands.signin import _save

    cli("login", "sam", "--password-stdin", stdin=PW + "\n")
    data = _session_file()
    (key,) = data
    data[key] = dict(data[key], user="lena", token="A" * 43)  # claim to be the lead with a made-up token
    _save(data)
    code, out, err = cli("user", "add", "zed", "--role", "lead", "--password-stdin", stdin="zed-password\n")
    assert code == 2 and "sign-in is not valid" in err
    assert "zed" not in set(users.list_users(kestrel)["name"])


def test_a_session_is_bound_to_its_database(cli, kestrel, second_migrated_engine, capsys):
    from tracker.cli import main

    cli("login", "lena", "--password-stdin", stdin=PW + "\n")
    users.add_user(second_migrated_engine, "lena", "lead", password=PW)
    other = second_migrated_engine.url.render_as_string(hide_password=False)
    capsys.readouterr()
    assert main(["--database", other, "rules", "set", "ki_shift_threshold=8", "--reason", "x"]) == 2
    assert "nobody is signed in to this database" in capsys.readouterr().err


def test_logout_ends_the_session_in_the_database_too(cli, kestrel):
    cli("login", "lena", "--password-stdin", stdin=PW + "\n")
    token = next(iter(_session_file().values()))["token"]
    code, out, _ = cli("logout")
    assert code == 0 and "signed out (lena)" in out
    with pytest.raises(PermissionDenied):
        users.session_user(kestrel, token)
    code, out, err = cli("rules", "set", "ki_shift_threshold=8", "--reason", "x")
    assert code == 2 and "nobody is signed in" in err


# ------------------------------------------------------------------ who may write
def test_krt_user_alone_never_authorises_a_write(cli, monkeypatch, portfolio_dir):
    monkeypatch.setenv("KRT_USER", "lena")
    for argv in (("rules", "set", "ki_shift_threshold=8", "--reason", "x"),
                 ("import", str(portfolio_dir)),
                 ("user", "add", "zed", "--role", "lead", "--password-stdin")):
        code, out, err = cli(*argv, stdin="zed-password\n")
        assert code == 2 and "nobody is signed in" in err, argv
    code, out, err = cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--reason", "x", signed=1)
    assert code == 2 and "nobody is signed in" in err


def test_by_must_match_the_signed_in_user(cli, kestrel):
    cli("login", "sam", "--password-stdin", stdin=PW + "\n")
    for argv in (("rules", "set", "ki_shift_threshold=8", "--by", "lena", "--reason", "x"),
                 ("gate", "K-HIT-1", "--to", "hit-to-lead", "--by", "lena", "--reason", "x", "--password-stdin"),
                 ("user", "role", "vic", "--role", "lead", "--by", "lena")):
        code, out, err = cli(*argv, stdin=PW + "\n")
        assert code == 2 and "--by 'lena' does not match the signed-in user 'sam'" in err, argv
    with kestrel.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM decisions")).scalar() == 0


def test_a_viewer_cannot_gate_import_save_fits_or_add_users(cli, kestrel, portfolio_dir, tmp_path):
    cli("login", "vic", "--password-stdin", stdin=PW + "\n")
    code, _, err = cli("import", str(portfolio_dir))
    assert code == 2 and "may not import" in err
    code, _, err = cli("user", "add", "zed", "--role", "lead", "--password-stdin", stdin="zed-password\n")
    assert code == 2 and "only a lead may add users" in err
    code, _, err = cli("rules", "set", "ki_shift_threshold=8", "--reason", "x")
    assert code == 2 and "only a lead may change rule settings" in err
    code, _, err = cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--reason", "x", signed=1)
    assert code == 2 and "is a viewer; only a lead may decide gates" in err
    curve = tmp_path / "off.csv"
    curve.write_text("time (s),signal\n" + "".join(f"{t},{2.718281828 ** (-t / 100):.6f}\n" for t in range(0, 600, 20)))
    code, _, err = cli("fit", "dissociation", str(curve), "--save", "K-HIT-1")
    assert code == 2 and "only a scientist or lead may save fits" in err
    with kestrel.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM time_courses")).scalar() == 0
        assert conn.execute(text("SELECT count(*) FROM users")).scalar() == 4


def test_a_scientist_saves_a_fit_as_the_signed_in_user(cli, kestrel, tmp_path):
    from tracker.db import queries

    cli("login", "sam", "--password-stdin", stdin=PW + "\n")
    curve = tmp_path / "off.csv"
    curve.write_text("time (s),signal\n" + "".join(f"{t},{2.718281828 ** (-t / 100):.6f}\n" for t in range(0, 600, 20)))
    code, out, err = cli("fit", "dissociation", str(curve), "--save", "K-HIT-1")
    assert code == 0, err
    saved = queries.audit_events(kestrel, action="save-fit")
    assert list(saved["actor"]) == ["sam"]


def test_the_first_user_is_the_bootstrap_lead_then_only_a_signed_in_lead_adds_users(migrated_engine, capsys, monkeypatch, login):
    import io

    from tracker.cli import main

    url = migrated_engine.url.render_as_string(hide_password=False)

    def run(argv, stdin):
        monkeypatch.setattr("sys.stdin", io.StringIO(stdin))
        code = main(["--database", url, *argv])
        return code, capsys.readouterr()

    code, res = run(["user", "add", "ana", "--role", "lead", "--password-stdin", "--full-name", "Ana Ruiz"], PW + "\n")
    assert code == 0 and "first user: the bootstrap lead" in res.out
    code, res = run(["user", "add", "ben", "--role", "viewer", "--password-stdin"], PW + "\n")
    assert code == 2 and "nobody is signed in" in res.err
    login(url, "ana")
    code, res = run(["user", "add", "ben", "--role", "viewer", "--password-stdin"], PW + "\n")
    assert code == 0
    assert list(users.list_users(migrated_engine)["name"]) == ["ana", "ben"]


def test_a_database_from_before_passwords_bootstraps_its_first_leads_password(migrated_engine, capsys, monkeypatch, login):
    import io

    from tracker.cli import main

    users.add_user(migrated_engine, "ana", "lead")
    users.add_user(migrated_engine, "ben", "scientist", by="ana")
    url = migrated_engine.url.render_as_string(hide_password=False)
    monkeypatch.setattr("sys.stdin", io.StringIO(PW + "\n"))
    assert main(["--database", url, "user", "password", "ben", "--password-stdin"]) == 2
    assert "set an active lead's password first" in capsys.readouterr().err
    monkeypatch.setattr("sys.stdin", io.StringIO(PW + "\n"))
    assert main(["--database", url, "user", "password", "ana", "--password-stdin"]) == 0
    monkeypatch.setattr("sys.stdin", io.StringIO(PW + "\n"))
    assert main(["--database", url, "user", "password", "ben", "--password-stdin"]) == 2  # now it takes a lead
    login(url, "ana")
    monkeypatch.setattr("sys.stdin", io.StringIO(PW + "\n"))
    assert main(["--database", url, "user", "password", "ben", "--password-stdin"]) == 0
    assert users.authenticate(migrated_engine, "ben", PW)["name"] == "ben"


# ------------------------------------------------------------------ signatures and the two-person rule
def _signatures(engine) -> list[dict]:
    with engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(select(Signature).order_by(Signature.id))]


def test_a_gate_decision_is_signed_with_printed_name_utc_time_and_meaning(cli, kestrel):
    code, out, err = cli("gate", "K-ADV-1", "--to", "candidate", "--reason", "kinetics booked",
                         "--waive", "residence-time-unmeasured:slot in March", as_user="lena", signed=1)
    assert code == 0, err
    sigs = _signatures(kestrel)
    assert [(s["signer"], s["printed_name"], s["role"], s["meaning"], s["decision_id"]) for s in sigs] == [
        ("lena", "lena", "lead", "approved", 1), ("lena", "lena", "lead", "waived", 1)]
    assert sigs[0]["at"].tzinfo is not None and sigs[0]["at"].utcoffset() == dt.timedelta(0)
    assert "signed: lena, " in out and "UTC: approved, as lead" in out and "UTC: waived, as lead" in out


def test_signatures_are_append_only(cli, kestrel):
    from sqlalchemy.exc import DBAPIError

    cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--reason", "clean", as_user="lena", signed=1)
    for sql in ("UPDATE signatures SET meaning = 'refused'", "DELETE FROM signatures"):
        with pytest.raises(DBAPIError, match="append-only"):
            with kestrel.begin() as conn:
                conn.exec_driver_sql(sql)


def test_the_signature_shows_in_the_audit_output(cli, kestrel):
    cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--reason", "clean", as_user="lena", signed=1)
    code, out, _ = cli("audit", "show", "--json")
    signs = [e for e in json.loads(out) if e["action"] == "sign"]
    assert len(signs) == 1
    after = signs[0]["after"]
    assert (after["signer"], after["printed_name"], after["meaning"], after["role"], after["decision_id"]) == (
        "lena", "lena", "approved", "lead", 1)
    assert after["at"].endswith("+00:00")
    code, out, _ = cli("audit", "show")
    assert code == 0 and "sign" in out and "approved, as lead" in out
    code, out, _ = cli("audit", "verify")
    assert code == 0, out


def test_a_wrong_signing_password_records_nothing(cli, kestrel, db_snapshot):
    cli("login", "lena", "--password-stdin", stdin=PW + "\n")
    before = db_snapshot(kestrel)
    code, out, err = cli("gate", "K-HIT-1", "--to", "hit-to-lead", "--reason", "clean", "--password-stdin", stdin="oops-wrong\n")
    assert code == 2 and "user name or password is wrong" in err
    assert db_snapshot(kestrel) == before


def test_a_waiver_into_clinical_needs_a_second_leads_signature(cli, kestrel):
    code, out, err = cli("gate", "K-CAN-1", "--to", "clinical", "--reason", "offset acceptable", "--waive", "duration-mismatch",
                         as_user="lena", signed=1)
    assert code == 2 and "need a second lead's signature (two-person rule)" in err and "recorded as decision 1" in err
    # the second lead must be a lead, and must sign with their own password
    code, out, err = cli("gate", "K-CAN-1", "--to", "clinical", "--reason", "offset acceptable", "--waive", "duration-mismatch",
                         "--second-lead", "sam", signed=2)
    assert code == 2 and "only a lead may co-sign a waiver" in err
    code, out, err = cli("gate", "K-CAN-1", "--to", "clinical", "--reason", "offset acceptable", "--waive", "duration-mismatch",
                         "--second-lead", "otto", "--password-stdin", stdin=f"{PW}\nnot-ottos-password\n")
    assert code == 2 and "user name or password is wrong" in err
    code, out, err = cli("gate", "K-CAN-1", "--to", "clinical", "--reason", "offset acceptable", "--waive", "duration-mismatch",
                         "--second-lead", "otto", signed=2)
    assert code == 0, err
    sigs = _signatures(kestrel)
    approved = [(s["signer"], s["meaning"]) for s in sigs if s["decision_id"] == 2]
    assert approved == [("lena", "approved"), ("lena", "waived"), ("otto", "co-signed")]
    assert "otto" in out and "co-signed, as lead" in out


def test_the_two_person_stage_is_a_rule_setting(kestrel):
    from tracker.services.grading import set_rule_override

    set_rule_override(kestrel, None, {"two_person_waiver_stage": "clinical"}, by="lena", reason="default made explicit")
    set_rule_override(kestrel, "Kestrel", {"two_person_waiver_stage": "candidate"}, by="lena", reason="stricter program")
    with pytest.raises(GateRefused, match="two-person rule"):
        gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="x", waivers=["residence-time-unmeasured"],
                           password=PW)
    d = gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="x", waivers=["residence-time-unmeasured"],
                           password=PW, second_lead="otto", second_password=PW)
    assert d["outcome"] == "approved"


def test_nobody_waives_their_own_refused_request_alone(kestrel):
    with pytest.raises(GateRefused, match="unwaived high finding"):
        gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="best compound", password=PW)
    with pytest.raises(GateRefused, match="nobody waives their own refused request alone"):
        gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="waiving it myself",
                           waivers=["residence-time-unmeasured"], password=PW)
    with pytest.raises(PermissionDenied, match="another lead"):
        gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="x", waivers=["residence-time-unmeasured"],
                           password=PW, second_lead="lena", second_password=PW)
    d = gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="agreed with otto",
                           waivers=["residence-time-unmeasured"], password=PW, second_lead="otto", second_password=PW)
    assert d["outcome"] == "approved" and [s["meaning"] for s in d["signatures"]] == ["approved", "waived", "co-signed"]
    # another lead who was not refused may waive alone below the two-person stage
    with pytest.raises(GateRefused):
        gates.request_gate(kestrel, "E-LO-1", "candidate", by="otto", reason="x", password=PW)  # skips a stage: refused


def test_a_lead_not_refused_before_waives_alone_below_the_two_person_stage(kestrel):
    with pytest.raises(GateRefused):
        gates.request_gate(kestrel, "K-ADV-1", "candidate", by="lena", reason="first try", password=PW)
    d = gates.request_gate(kestrel, "K-ADV-1", "candidate", by="otto", reason="otto's own call",
                           waivers=["residence-time-unmeasured"], password=PW)
    assert d["outcome"] == "approved" and [s["signer"] for s in d["signatures"]] == ["otto", "otto"]
