"""Alembic environment and revisions of the history schema, run by :func:`spanwatch.connectors.history.schema.upgrade`.

``versions/`` holds the revisions; ``legacy.py`` converts a history from before the migrations to
revision ``0001``; ``script.py.mako`` is the template ``alembic revision`` writes new ones from.
"""
