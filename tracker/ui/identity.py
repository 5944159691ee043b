"""Who is using the dashboard, and with which role.

Two modes:

* **Sign-in (OIDC).** When Streamlit secrets hold an ``[auth]`` section, the
  dashboard asks people to sign in with ``st.login`` and takes the identity
  from ``st.user``: the first of its e-mail, preferred username, name and
  subject claims that is a registered user name (else the e-mail, as an
  unregistered viewer).
* **Local mode.** Without ``[auth]``, people sign in in the sidebar with their
  tracker user name and password (checked against the stored argon2 hash by
  ``tracker.services.users.authenticate``).  The sign-in lasts for the browser
  session and is bound to the database it was made on.  Nobody signed in
  means read-only viewing.  ``$KRT_USER`` is never consulted.  ``krt demo
  open`` passes the demo lead's name and the documented demo password, with
  which the dashboard signs in through the same check.

In both modes the *role* comes from the ``users`` table: a name that is not
registered (or is deactivated) reads as a viewer.  While the table is empty
the first person may register as lead (the bootstrap of the users service;
in local mode with a password).  The role only decides which controls a page
shows; the services check it again on every write, so a viewer's call is
refused even if a control leaked, and gate decisions are signed by
re-entering the tracker password on the gate page (in team mode too: set it
with ``krt user password``).
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import streamlit as st
from sqlalchemy import Engine

from .data import read_user_role

LOCAL = "local"
OIDC = "oidc"
SIGNED_IN_KEY = "krt_signed_in"  # session state: (database url, user name)
DEMO_TRIED_KEY = "krt_demo_signin_tried"


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
        return self.effective_role in ("lead", "scientist")

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


def _url_of(engine: Engine) -> str:
    return engine.url.render_as_string(hide_password=True)


def local_name(engine: Engine) -> str | None:
    """The user signed in locally on this database in this browser session, else ``None``."""
    state = st.session_state.get(SIGNED_IN_KEY)
    if isinstance(state, tuple) and len(state) == 2 and state[0] == _url_of(engine):
        return state[1]
    return None


def sign_in(engine: Engine, name: str, password: str) -> str:
    """Check ``name``/``password`` (services) and keep the sign-in for this session; raises ``PermissionDenied``."""
    from ..services.users import authenticate

    user = authenticate(engine, name, password)
    st.session_state[SIGNED_IN_KEY] = (_url_of(engine), user["name"])
    return str(user["name"])


def sign_out() -> None:
    st.session_state.pop(SIGNED_IN_KEY, None)


def _demo_sign_in(engine: Engine) -> None:
    """``krt demo open``: sign in once per session as the demo lead, with the demo password, through the usual check."""
    from ..errors import KrtError
    from ..services.demo import ENV_DEMO_SIGNIN_PASSWORD, ENV_DEMO_SIGNIN_USER

    name, password = os.environ.get(ENV_DEMO_SIGNIN_USER), os.environ.get(ENV_DEMO_SIGNIN_PASSWORD)
    if not (name and password) or st.session_state.get(DEMO_TRIED_KEY):
        return
    st.session_state[DEMO_TRIED_KEY] = True
    try:
        sign_in(engine, name, password)
    except KrtError:
        pass  # wrong demo password or a database without the demo users: stay signed out


def resolve(engine: Engine) -> Identity | None:
    """The current identity; ``None`` when nobody has signed in (read-only viewing)."""
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
    _demo_sign_in(engine)
    name = local_name(engine)
    if name is None:
        return None
    role, active, n = read_user_role(engine, name)
    return Identity(name=name, mode=LOCAL, role=role, active=active, n_users=n, display=name)


def user_count(engine: Engine) -> int:
    return read_user_role(engine, "")[2]


def bootstrap_first_lead(engine: Engine, name: str, password: str | None = None) -> str:
    """Register ``name`` as the first user, a lead (the users service refuses once users exist).  In local mode
    with ``password``, and signed in with it; in team mode (OIDC) the password can be set later
    (``krt user password``) for signing."""
    from ..services.users import add_user

    add_user(engine, name, "lead", by=None, password=password)
    return sign_in(engine, name, password) if password is not None else name


__all__ = ["Identity", "resolve", "auth_configured", "local_name", "signed_in_name", "signed_in_names", "sign_in", "sign_out",
           "bootstrap_first_lead", "user_count", "LOCAL", "OIDC", "SIGNED_IN_KEY"]
