"""Anchoring the audit chain: keyed checkpoints, and the time check of new events.

**Keyed checkpoints.**  The SHA-256 chain shows an edited or removed event,
but someone who can write the database can also re-compute every hash after
a rewrite.  A checkpoint is an HMAC-SHA256 (RFC 2104) over the id and hash
of the event just before it, made with a key that is kept **outside** the
database.  When a key is configured, every write transaction ends its batch
of events with one ``checkpoint`` event (``entity_type`` ``audit-chain``)
whose ``after`` holds ``{"covers": id, "covers_hash": hash, "key_id": ...,
"hmac": ...}``; the checkpoint event is itself part of the chain.
:func:`verify_checkpoints` then requires, with the key at hand, that every
checkpoint's HMAC is right, that it covers the event just before it, and that
the chain **ends** with a checkpoint.  So without the key nobody can

* rewrite and re-hash the chain (the checkpoints' HMACs name the old hashes),
* drop the checkpoints (the chain no longer ends with one),
* append a forged event with a valid hash (it is not followed by a checkpoint).

What a checkpoint cannot show: the last write transactions cut off the end
(tail truncation back to an earlier checkpoint), or a chain replaced by an
older copy of itself.  For that keep the head elsewhere (``krt audit head
--json`` into a report or ticket, backup manifests, review packs) and check
it with ``krt audit verify --expect-head HASH``.

Where the key lives: ``$KRT_AUDIT_KEY_FILE`` names a file holding it (at least
32 characters; the file must not be readable by group or others, mode 600),
or ``$KRT_AUDIT_KEY`` holds it directly.  ``krt audit keygen FILE`` writes a
random one.  Every process that writes (the dashboard, each ``krt``) must see
the same key, or its events end up after the last checkpoint and verify says
so.  Without a key no checkpoints are written and verify says the chain is
unanchored.

**Trusted time.**  On PostgreSQL event times come from the server clock
(``clock_timestamp()``), not from each client.  On every engine an event
dated earlier than the last one by more than :data:`CLOCK_TOLERANCE_S`
(``$KRT_AUDIT_CLOCK_TOLERANCE_S``) is refused with :class:`ClockError`.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import os
import secrets
import stat
from pathlib import Path
from typing import Any

from ..errors import KrtError

__all__ = ["ENV_KEY", "ENV_KEY_FILE", "CHECKPOINT_ACTION", "CHECKPOINT_ENTITY", "AuditKeyError", "ClockError", "load_key",
           "key_id", "checkpoint_mac", "checkpoint_event", "write_key_file", "clock_tolerance_s", "parse_at", "CLOCK_TOLERANCE_S"]

ENV_KEY = "KRT_AUDIT_KEY"
ENV_KEY_FILE = "KRT_AUDIT_KEY_FILE"
ENV_TOLERANCE = "KRT_AUDIT_CLOCK_TOLERANCE_S"
CHECKPOINT_ACTION = "checkpoint"
CHECKPOINT_ENTITY = "audit-chain"
MIN_KEY_CHARS = 32
CLOCK_TOLERANCE_S = 5.0


class AuditKeyError(KrtError, ValueError):
    """The checkpoint key is configured but cannot be used (missing file, too short, readable by others)."""


class ClockError(KrtError, RuntimeError):
    """An audit event would be dated before the last one (a clock set back)."""


def load_key(environ: dict[str, str] | None = None) -> bytes | None:
    """The checkpoint key from ``$KRT_AUDIT_KEY_FILE`` or ``$KRT_AUDIT_KEY``; ``None`` when neither is set."""
    env = os.environ if environ is None else environ
    path = (env.get(ENV_KEY_FILE) or "").strip()
    if path:
        p = Path(path).expanduser()
        try:
            st = p.stat()
            if os.name == "posix" and st.st_mode & 0o077:
                raise AuditKeyError(f"{p}: the audit key file is readable by others (mode {stat.S_IMODE(st.st_mode):03o}); "
                                    f"run 'chmod 600 {p}'")
            key = p.read_bytes().strip()
        except OSError as exc:
            raise AuditKeyError(f"{p}: cannot read the audit key file named by ${ENV_KEY_FILE} ({exc.strerror or exc})") from None
        source = str(p)
    else:
        text = env.get(ENV_KEY) or ""
        if not text.strip():
            return None
        key, source = text.strip().encode("utf-8"), f"${ENV_KEY}"
    if len(key) < MIN_KEY_CHARS:
        raise AuditKeyError(f"{source}: the audit key must be at least {MIN_KEY_CHARS} characters (got {len(key)}); "
                            "'krt audit keygen FILE' writes a random one")
    return key


def key_id(key: bytes) -> str:
    """A short fingerprint naming the key (not enough to recover it): 16 hex digits."""
    return hashlib.sha256(b"krt-audit-key-id\n" + key).hexdigest()[:16]


def checkpoint_mac(key: bytes, covers: int, covers_hash: str) -> str:
    """HMAC-SHA256 hex over ``krt-audit-checkpoint-1\\n<id>\\n<hash>``."""
    return hmac.new(key, f"krt-audit-checkpoint-1\n{int(covers)}\n{covers_hash}".encode("ascii"), hashlib.sha256).hexdigest()


def checkpoint_event(key: bytes, actor: str, covers: int, covers_hash: str) -> dict[str, Any]:
    """The event (as :func:`tracker.db.audit.append_events` takes it) that anchors event ``covers``."""
    return {"actor": actor, "action": CHECKPOINT_ACTION, "entity_type": CHECKPOINT_ENTITY, "entity_id": str(covers), "before": None,
            "after": {"covers": int(covers), "covers_hash": covers_hash, "key_id": key_id(key),
                      "hmac": checkpoint_mac(key, covers, covers_hash)},
            "reason": "keyed checkpoint"}


def write_key_file(path: str | Path) -> Path:
    """Write a new random key (64 hex digits) to ``path`` with mode 600; refuses to overwrite."""
    p = Path(path).expanduser()
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(p, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        raise AuditKeyError(f"{p} exists; the audit key is never overwritten (checkpoints made with it would no longer verify)") from None
    except OSError as exc:
        raise AuditKeyError(f"{p}: cannot write the audit key ({exc.strerror or exc})") from None
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write(secrets.token_hex(32) + "\n")
    return p


def clock_tolerance_s() -> float:
    text = os.environ.get(ENV_TOLERANCE, "").strip()
    try:
        return max(0.0, float(text)) if text else CLOCK_TOLERANCE_S
    except ValueError:
        return CLOCK_TOLERANCE_S


def parse_at(text: str | None) -> dt.datetime | None:
    """An event's stored ``at`` as an aware datetime (``None`` when unreadable)."""
    if not text:
        return None
    try:
        value = dt.datetime.fromisoformat(str(text))
    except ValueError:
        return None
    return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)
