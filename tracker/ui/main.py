"""The dashboard's entry: page routing and the shared sidebar.

``app.py`` at the repository root only calls :func:`run`; ``streamlit run``
can also be pointed at this file directly (an installed package has no
``app.py``).  Pages are files in :mod:`tracker.ui.views`, registered with
``st.navigation`` by absolute path, so they work from a source checkout and
from an installed wheel alike.

The sidebar holds what every page shares: the program filter, who is signed
in (with the role from the ``users`` table) and which database is in use.
:func:`context` hands the same values to the pages.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import streamlit as st
from sqlalchemy import Engine

VIEWS = Path(__file__).resolve().parent / "views"
ALL_PROGRAMS = "All programs"
PROGRAM_KEY = "krt_program"
COMPOUND_KEY = "krt_compound"  # the compound opened on the evidence / gate / what-if pages
CTX_KEY = "_krt_ctx"


@dataclass(frozen=True)
class PageSpec:
    file: str
    title: str
    url_path: str
    icon: str
    group: str
    default: bool = False


PAGES: tuple[PageSpec, ...] = (
    PageSpec("overview.py", "Risk overview", "overview", ":material/space_dashboard:", "Portfolio", default=True),
    PageSpec("compound.py", "Compound evidence", "compound", ":material/biotech:", "Portfolio"),
    PageSpec("kinetic_map.py", "Kinetic map", "kinetic-map", ":material/scatter_plot:", "Portfolio"),
    PageSpec("queue.py", "Measure next", "measure-next", ":material/format_list_numbered:", "Portfolio"),
    PageSpec("changes.py", "What changed", "what-changed", ":material/update:", "Portfolio"),
    PageSpec("gate.py", "Stage gate", "stage-gate", ":material/how_to_reg:", "Decide"),
    PageSpec("what_if.py", "What-if", "what-if", ":material/tune:", "Decide"),
    PageSpec("review_pack.py", "Review pack", "review-pack", ":material/description:", "Decide"),
    PageSpec("fit.py", "Fit a time course", "fit-time-course", ":material/show_chart:", "Records"),
    PageSpec("load.py", "Load data", "load-data", ":material/upload_file:", "Records"),
    PageSpec("audit.py", "Audit trail", "audit-trail", ":material/fact_check:", "Records"),
)


#: The default page is served at ``/``; Streamlit keys pages by their url path, so it is registered under this
#: internal path and a hidden twin answers its public path (``/overview``), which deep links and bookmarks use.
DEFAULT_INTERNAL_PATH = "home"


def page(url_path: str):
    """The ``st.Page`` of a view (same object identity rules as the navigation: by url path)."""
    spec = next(p for p in PAGES if p.url_path == url_path)
    path = DEFAULT_INTERNAL_PATH if spec.default else spec.url_path
    return st.Page(VIEWS / spec.file, title=spec.title, url_path=path, icon=spec.icon, default=spec.default)


def deep_link_twins() -> list:
    """Hidden pages that make every page reachable by its own path, the default one included."""
    return [st.Page(VIEWS / spec.file, title=spec.title, url_path=spec.url_path, icon=spec.icon, visibility="hidden")
            for spec in PAGES if spec.default]


def open_compound(name: str) -> None:
    """Make ``name`` the current compound and go to its evidence page."""
    st.session_state[COMPOUND_KEY] = name
    st.switch_page(page("compound"))


@dataclass(frozen=True)
class Context:
    """What every page needs: the database, its version, the identity and the program filter."""

    url: str
    engine: Engine
    version: tuple[int, int]
    identity: object  # tracker.ui.identity.Identity | None
    program: str | None  # None = all programs

    @property
    def role(self) -> str:
        return self.identity.effective_role if self.identity else "viewer"


def context() -> Context:
    """The context built by the sidebar in this run (built here if a page runs on its own)."""
    ctx = st.session_state.get(CTX_KEY)
    if ctx is None:
        ctx = _build_context()
    return ctx


def _build_context() -> Context:
    from . import data, identity

    url = data.current_url()
    engine = data.get_engine(url)
    ver = data.version(url)
    ident = identity.resolve(engine)
    program = st.session_state.get(PROGRAM_KEY)
    program = None if program in (None, ALL_PROGRAMS) else program
    ctx = Context(url=url, engine=engine, version=ver, identity=ident, program=program)
    st.session_state[CTX_KEY] = ctx
    return ctx


@st.cache_data(ttl=15, show_spinner=False)
def _schema_problem(url: str) -> str | None:
    """Why the database cannot be used (empty, old schema, unreachable), or ``None``; re-checked every 15 s."""
    from ..db import migrate
    from ..db.session import DatabaseError
    from .data import get_engine

    engine = get_engine(url)
    try:
        rev, head = migrate.current(engine), migrate.head()
    except DatabaseError as exc:
        return exc.one_line()
    except Exception as exc:  # unreachable server and the like: one line, no traceback
        return f"cannot open the database: {' '.join(str(exc).split())[:300]}"
    if rev is None:
        return "the database is empty: run `krt db upgrade` (or `krt demo load` for the demo)"
    if rev != head:
        return f"the database schema is at {rev}, this version needs {head}: run `krt db upgrade`"
    return None


def _program_names(url: str) -> list[str]:
    from . import data

    progs = data.programs(url, data.version(url))
    names = [ALL_PROGRAMS] + list(progs["name"])
    if st.session_state.get(PROGRAM_KEY) not in names:
        st.session_state[PROGRAM_KEY] = ALL_PROGRAMS
    return names


def _sidebar(ctx: Context, names: list[str]) -> None:
    from ..db.session import mask_url
    from ..errors import KrtError
    from . import data, identity
    from .widgets import md

    engine, ctx_url, ver, ident = ctx.engine, ctx.url, ctx.version, ctx.identity
    with st.sidebar:
        st.selectbox("Program", names, key=PROGRAM_KEY, help="Filters every page to one program.")
        st.divider()
        if ident is None and identity.auth_configured():
            st.markdown("**Not signed in**")
            st.button("Sign in", on_click=st.login, type="primary")
        elif ident is None:
            _local_sign_in(engine)
        else:
            role = ident.effective_role
            st.markdown(f"**{md(ident.display)}** · {role}")
            if ident.mode == identity.LOCAL:
                st.caption(f"Signed in as {md(ident.name)} (local mode, this browser session).")
                if st.button("Sign out", key="krt_signout"):
                    identity.sign_out()
                    st.rerun()
            else:
                st.caption(f"Signed in as {md(ident.name)}")
                st.button("Sign out", on_click=st.logout)
            if not ident.registered and ident.n_users:
                st.caption("Not in the users table: read-only. Ask a lead to add you (`krt user add`).")
            elif ident.registered and not ident.active:
                st.caption("Your user is deactivated: read-only.")
            if ident.may_bootstrap:  # team mode (OIDC) on an empty users table
                st.info("No users are registered yet. The first user becomes the lead.")
                if st.button(f"Register {md(ident.name)} as lead", key="krt_bootstrap"):
                    try:
                        identity.bootstrap_first_lead(engine, ident.name)
                    except KrtError as exc:  # e.g. someone else registered first: one line
                        st.error(md(exc.one_line()))
                    else:
                        data.clear_caches()
                        st.rerun()
        st.divider()
        st.caption(f"Database: `{mask_url(ctx_url)}`")
        st.caption(f"Audit events: {ver[1]:,}")


def _local_sign_in(engine) -> None:
    """Local mode, nobody signed in: the sign-in form, or the first lead's registration on an empty users table."""
    from ..errors import KrtError
    from . import data, identity
    from .widgets import md

    if identity.user_count(engine) == 0:
        st.info("No users are registered yet. The first user becomes the lead.")
        with st.form("krt_bootstrap_form"):
            name = st.text_input("Your user name", key="krt_bootstrap_name")
            pw = st.text_input("Password", type="password", key="krt_bootstrap_password")
            pw2 = st.text_input("Repeat the password", type="password", key="krt_bootstrap_password2")
            go = st.form_submit_button("Register as lead", type="primary")
        if go:
            if pw != pw2:
                st.error("The two passwords differ.")
                return
            try:
                identity.bootstrap_first_lead(engine, name, pw)
            except KrtError as exc:  # e.g. someone else registered first, or a short password: one line
                st.error(md(exc.one_line()))
            else:
                data.clear_caches()
                st.rerun()
        return
    st.markdown("**Not signed in** · read-only")
    with st.form("krt_signin_form"):
        name = st.text_input("User name", key="krt_signin_name")
        pw = st.text_input("Password", type="password", key="krt_signin_password")
        go = st.form_submit_button("Sign in", type="primary")
    if go:
        try:
            identity.sign_in(engine, name, pw)
        except KrtError as exc:
            st.error(md(exc.one_line()))
        else:
            st.rerun()


def run() -> None:
    """Build the sidebar and run the selected page."""
    from ..errors import KrtError
    from . import data

    st.set_page_config(page_title="Kinetic-risk tracker", page_icon=":material/timelapse:", layout="wide")
    st.session_state.pop(CTX_KEY, None)
    url = data.current_url()
    try:
        data.get_engine(url)
    except KrtError as exc:  # a URL the session layer refuses (wrong driver, unsupported database)
        st.title("Kinetic-risk tracker")
        st.error(exc.one_line())
        st.stop()
    problem = _schema_problem(url)
    if problem:
        st.title("Kinetic-risk tracker")
        st.error(problem)
        st.stop()
    groups: dict[str, list] = {}
    for spec in PAGES:
        groups.setdefault(spec.group, []).append(page(spec.url_path))
    groups[PAGES[0].group].extend(deep_link_twins())
    nav = st.navigation(groups, position="sidebar")
    names = _program_names(url)
    ctx = _build_context()
    _sidebar(ctx, names)
    try:
        nav.run()
    except KrtError as exc:  # a user-facing error from a service: one line, no traceback
        from .widgets import md

        st.error(md(exc.one_line()))


if __name__ == "__main__":  # `streamlit run tracker/ui/main.py` (installed package, no app.py)
    from tracker.ui.main import run as _run

    _run()
