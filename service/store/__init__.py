"""The store: studies, their rows and the result cache (SQLAlchemy: SQLite or PostgreSQL) and its
alembic migrations (``migrations/``)."""

from toposcout.service.store.database import *  # noqa: F401,F403
from toposcout.service.store.database import __all__  # noqa: F401
