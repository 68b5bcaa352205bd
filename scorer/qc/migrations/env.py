"""Alembic environment of the nightly QC database (run by scorer.databases.prepare, or by `alembic -n nightly`)."""

from alembic import context

from scorer.databases import NIGHTLY, run_migrations
from scorer.qc.tables import Base

run_migrations(context, NIGHTLY, Base.metadata)
