"""pytest collects this package for doctests; ``env.py`` runs only under alembic, so skip it."""

collect_ignore = ["env.py"]
