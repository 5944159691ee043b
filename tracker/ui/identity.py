"""Who is using the dashboard, and with which role.

Two modes:

* **Sign-in (OIDC).** When Streamlit secrets hold an ``[auth]`` section, the
  dashboard asks people to sign in with ``st.login`` and takes the identity
  from ``st.user``: the first of its e-mail, preferred username, name and
  subject claims that is a registered user name (else the e-mail, as an
  unregistered viewer).
* **Local mode.** Without ``[auth]``, the identity is ``$KRT_USER`` or the
  operating-system login (the same default the command line uses), and the
  sidebar says plainly that nobody signed in.

In both modes the *role* comes from the ``users`` table: a name that is not
registered (or is deactivated) reads as a viewer.  While the table is empty
the first person may register as lead (the bootstrap of the users service).
The role only decides which controls a page shows; the services check it
again on every write, so a viewer's call is refused even if a control leaked.
"""

from __future__ import annotations

import getpass
import os
from dataclasses import dataclass

import streamlit as st
from sqlalchemy import Engine

from .data import read_user_role

LOCAL = "local"
OIDC = "oidc"


@dataclass(frozen=True)
class Identity:
    name: str
    mode: str  # "local" | "oidc"
    role: str | None  # registered role, None when not registered
    active: bool
    n_users: int
    display: str = ""

    @property
    def effective_role(self) -> str:
        """The role the pages act on: an unregistered or inactive user is a viewer."""
        return self.role if self.role and self.active else "viewer"

    @property
    def is_lead(self) -> bool:
        return self.effective_role == "lead"

    @property
    def can_write(self) -> bool:
        """Leads and scientists record data; only leads decide gates and waive."""
        return self.effective_role in ("lead", "scientist") or self.n_users == 0

    @property
    def registered(self) -> bool:
        return self.role is not None

    @property
    def may_bootstrap(self) -> bool:
        return self.n_users == 0


def auth_configured() -> bool:
    """True when Streamlit secrets carry an ``[auth]`` section (OIDC sign-in)."""
    try:
        return "auth" in st.secrets
    except Exception:  # no secrets file at all: Streamlit raises FileNotFoundError or its own error
        return False


def local_name() -> str:
    return (os.environ.get("KRT_USER") or "").strip() or getpass.getuser()


CLAIMS = ("email", "preferred_username", "name", "sub")  # the OIDC claims matched against user names, in order


def signed_in_names() -> list[str]:
    """The names ``st.user`` reports (e-mail, username, name, subject), or ``[]`` when nobody is signed in."""
    if not st.user.get("is_logged_in", False):
        return []
    names = [str(st.user.get(key)).strip() for key in CLAIMS if st.user.get(key)]
    return list(dict.fromkeys(n for n in names if n))


def signed_in_name() -> str | None:
    """Identity from ``st.user`` when signed in (its first claim), else ``None``."""
    names = signed_in_names()
    return names[0] if names else None


def resolve(engine: Engine) -> Identity | None:
    """The current identity; ``None`` when sign-in is configured and nobody has signed in."""
    if auth_configured():
        names = signed_in_names()
        if not names:
            return None
        # the signed-in person is the first registered user whose name equals one of the claims (e-mail first);
        # someone no claim of whom is registered is an unregistered viewer under their first claim
        for name in names:
            role, active, n = read_user_role(engine, name)
            if role is not None:
                break
        else:
            name = names[0]
            role, active, n = read_user_role(engine, name)
        return Identity(name=name, mode=OIDC, role=role, active=active, n_users=n, display=str(st.user.get("name") or name))
    name = local_name()
    role, active, n = read_user_role(engine, name)
    return Identity(name=name, mode=LOCAL, role=role, active=active, n_users=n, display=name)


def bootstrap_first_lead(engine: Engine, identity: Identity) -> None:
    """Register ``identity`` as the first user, a lead (the users service refuses once users exist)."""
    from ..services.users import add_user

    add_user(engine, identity.name, "lead", by=None)


__all__ = ["Identity", "resolve", "auth_configured", "local_name", "signed_in_name", "signed_in_names", "bootstrap_first_lead", "LOCAL", "OIDC"]
