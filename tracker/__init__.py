"""Kinetic-risk tracker for drug-discovery portfolios.

Layers (more an agreement than a rule; imports only point downwards):

``tracker.units`` / ``tracker.errors``
    Parse quantities once at the boundary into SI floats; one error hierarchy.
``tracker.kinetics``
    Pure numpy/scipy: the published equations, fits of raw time courses, the
    simulation of apparent affinity after finite incubation and of target
    engagement under PK.  No database, no Streamlit, no unit strings.
``tracker.rules``
    One small pure ``check_*`` function per rule, thresholds in one versioned
    configuration, and a vectorised grader that combines them.
``tracker.db``
    SQLAlchemy models, engine/session set-up, unit of work, read-only queries
    that return DataFrames.  Migrations live in ``migrations/`` (Alembic).
``tracker.io``
    The open CSV/XLSX import and export format, validated before any write.
``tracker.services``
    Use cases taking plain arguments and a unit of work: import, save fit,
    gate, waive, user admin, audit.  Roles are enforced here.
``tracker.cli`` and ``app.py`` / ``tracker.ui``
    Thin translators from command lines and widgets to services.
"""

__version__ = "0.1.0"
