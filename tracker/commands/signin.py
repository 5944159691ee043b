"""``krt login`` / ``krt logout``, and the command line's one identity resolver.

``krt login NAME [--password-stdin] [--hours H]``
    Checks the password (prompted without echo, or read from stdin) and keeps
    a session for this database in the user's private session file
    (``sessions.json`` in the platformdirs config folder, or ``$KRT_CONFIG_DIR``;
    mode 600).  The file holds a random token per database; the database holds
    only the token's SHA-256 and its expiry (default 8 h, ``--hours`` or
    ``$KRT_SESSION_HOURS``), so editing the file cannot forge a sign-in, and a
    session of one database is worthless on another.
``krt logout``
    Ends the session of this database (the row and the file entry).

Every writing command calls :func:`signed_in_user` (and nothing else) to learn
who acts: the session's user, which ``--by`` (where a command keeps it) must
match.  ``$KRT_USER`` is never consulted.  The role is then checked by the
service (``tracker.services.users.require_role``).
"""

from __future__ import annotations

import argparse
import getpass
import hashlib
import json
import os
import sys
from pathlib import Path
from typing import Any

from ..errors import InputError, KrtError, PermissionDenied

SESSION_FILE = "sessions.json"
ENV_CONFIG_DIR = "KRT_CONFIG_DIR"
ENV_SESSION_HOURS = "KRT_SESSION_HOURS"

__all__ = ["signed_in_user", "read_password", "read_passwords", "session_path", "database_key", "register"]


# ------------------------------------------------------------------ session file
def config_dir() -> Path:
    """``$KRT_CONFIG_DIR``, else the user's private config folder (platformdirs)."""
    env = os.environ.get(ENV_CONFIG_DIR, "").strip()
    if env:
        return Path(env)
    import platformdirs

    return Path(platformdirs.user_config_dir("krt", appauthor=False))


def session_path() -> Path:
    return config_dir() / SESSION_FILE


def database_key(engine) -> str:
    """Which database a session belongs to: SHA-256 of its URL (SQLite: of the resolved file path)."""
    url = engine.url
    if url.get_backend_name() == "sqlite" and url.database and url.database != ":memory:":
        db = url.database[5:].split("?", 1)[0] if url.database.startswith("file:") else url.database  # a URI names the same file
        text = "sqlite:" + str(Path(db).expanduser().resolve())
    else:
        text = url.set(password=None).render_as_string(hide_password=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _load() -> dict[str, Any]:
    path = session_path()
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return {}
    except OSError as exc:
        raise KrtError(f"cannot read the session file {path}: {exc.strerror or exc}") from None
    try:
        data = json.loads(text)
    except ValueError:
        return {}  # a damaged file holds no usable session; 'krt login' writes a new one
    return data if isinstance(data, dict) else {}


def _save(data: dict[str, Any]) -> None:
    path = session_path()
    try:
        path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        tmp = path.with_name(path.name + f".{os.getpid()}.tmp")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=1)
        os.chmod(tmp, 0o600)
        os.replace(tmp, path)
    except OSError as exc:
        raise KrtError(f"cannot write the session file {path}: {exc.strerror or exc}") from None


# ------------------------------------------------------------------ passwords
def read_passwords(from_stdin: bool, prompts: list[str]) -> list[str]:
    """One password per prompt: lines of stdin (one trailing newline stripped each) or no-echo prompts."""
    out = []
    for prompt in prompts:
        if from_stdin:
            line = sys.stdin.readline()
            if line.endswith("\n"):
                line = line[:-1]
                if line.endswith("\r"):
                    line = line[:-1]
            if not line:
                raise InputError(f"--password-stdin: no password on standard input ({prompt.rstrip(': ')})")
            out.append(line)
        else:
            try:
                pw = getpass.getpass(prompt)
            except EOFError:
                pw = ""
            if not pw:
                raise InputError("no password given")
            out.append(pw)
    return out


def read_password(from_stdin: bool, prompt: str = "Password: ") -> str:
    return read_passwords(from_stdin, [prompt])[0]


# ------------------------------------------------------------------ the identity resolver
def signed_in_user(engine, by: str | None = None) -> str:
    """The name of the user signed in to ``engine``'s database by ``krt login``.

    Refused (:class:`PermissionDenied`, one line) when nobody is signed in, the
    session ended or expired, the user is deactivated, or ``by`` names someone
    else.  The role is checked later, by the service that writes.
    """
    from ..services.users import session_user

    entry = _load().get(database_key(engine))
    token = entry.get("token") if isinstance(entry, dict) else None
    if not token:
        hint = f"run 'krt login {by}' first" if by else "run 'krt login NAME' first"
        raise PermissionDenied(f"nobody is signed in to this database: {hint}")
    user = session_user(engine, token)
    if by is not None and " ".join(str(by).split()) != user["name"]:
        raise PermissionDenied(f"--by {by!r} does not match the signed-in user {user['name']!r} "
                               f"(sign in as {by!r} with 'krt login {by}', or drop --by)")
    return str(user["name"])


# ------------------------------------------------------------------ commands
def register(sub: argparse._SubParsersAction) -> None:
    li = sub.add_parser("login", help="sign in to this database (a short-lived session in your private config folder)")
    li.add_argument("name", metavar="NAME")
    li.add_argument("--password-stdin", action="store_true", help="read the password from the first line of stdin")
    li.add_argument("--hours", metavar="H", default=None,
                    help=f"session lifetime in hours (default ${ENV_SESSION_HOURS} or 8)")
    li.set_defaults(func=_login)
    lo = sub.add_parser("logout", help="end your session on this database")
    lo.set_defaults(func=_logout)


def _login(args) -> int:
    from ..services.users import start_session
    from .grade import database

    hours = args.hours if args.hours is not None else (os.environ.get(ENV_SESSION_HOURS) or None)
    password = read_password(args.password_stdin, f"Password for {args.name}: ")
    with database() as engine:
        s = start_session(engine, args.name, password, hours=hours)
        data = _load()
        from ..db.session import mask_url

        data[database_key(engine)] = {"user": s["name"], "token": s["token"], "expires_at": s["expires_at"].isoformat(),
                                      "database": mask_url(engine.url.render_as_string(hide_password=False))}
        _save(data)
    print(f"signed in as {s['name']} ({s['role']}) until {s['expires_at']:%Y-%m-%d %H:%M} UTC")
    return 0


def _logout(args) -> int:
    from ..services.users import end_session
    from .grade import database

    data = _load()
    with database() as engine:
        key = database_key(engine)
        entry = data.pop(key, None)
        live = end_session(engine, entry.get("token")) if isinstance(entry, dict) else False
    if entry is not None:
        _save(data)
    print(f"signed out ({entry.get('user')})" if live and isinstance(entry, dict) else "no live session on this database")
    return 0
