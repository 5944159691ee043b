"""Dashboard entry: ``streamlit run app.py`` (the pages and the sidebar live in :mod:`tracker.ui`)."""

from tracker.ui.main import run

run()
