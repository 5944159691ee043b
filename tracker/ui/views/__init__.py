"""The dashboard's pages, one file each, registered by :mod:`tracker.ui.main`.

Each file is run by Streamlit as a page script (``render()`` at the bottom
under ``if __name__ == "__main__"``) and can be imported by tests for its
helper functions.
"""
