"""Alembic environment of the reader-study database (run by scorer.databases.prepare, or by `alembic -n webapp`)."""

from alembic import context

from scorer.databases import WEB_APP, run_migrations
from webapp.models import Base

run_migrations(context, WEB_APP, Base.metadata)
