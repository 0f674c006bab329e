"""Storage: SQLAlchemy models and queries, the content-addressed file store.

Modules: :mod:`app.store.models` (tables), :mod:`app.store.db` (engine and
sessions), :mod:`app.store.migrate` (Alembic upgrade on start),
:mod:`app.store.files` (files on disk), :mod:`app.store.service` (the plain
functions the web app, the worker and the demo loader call).
"""
