"""The dashboard (Streamlit + Altair): a thin translator from widgets to the read layer and the services.

``main``      routing (``st.navigation``) and the shared sidebar: program filter, identity, database in use.
``views/``    one page script per page; helper functions there are importable and tested.
``data``      cached reads: ``read_*`` functions of an engine, wrapped in ``st.cache_data`` keyed on the
              database version (the audit head), so nothing is re-read or re-graded until something is written.
``identity``  OIDC sign-in via ``st.login``/``st.user`` when configured, else a labelled local mode.
``evidence``  one compound's tables and charts (shared by the evidence page, what-if and the review pack).
``charts``    small typed Altair builders: explicit encodings, tooltips, units in every axis title.
``theme``     the one grade palette and the safety text.
``review_pack`` the offline HTML pack.  ``bench`` the page benchmark.

Writes go through :mod:`tracker.services` only (imports, gates, users), which check roles themselves.
"""
