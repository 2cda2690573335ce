"""Alembic environment of the toposcout store.

Run by :func:`toposcout.service.store.migrate` with an open connection in ``config.attributes``;
``alembic -x url=sqlite:///x.db upgrade head`` (with ``script_location`` pointing here) works too.
"""

from alembic import context
from sqlalchemy import create_engine

from toposcout.service.store import Base


def _main() -> None:
    config = context.config
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    url = context.get_x_argument(as_dictionary=True).get("url") or config.get_main_option("sqlalchemy.url")
    engine = create_engine(url)
    with engine.begin() as conn:
        _run(conn)


target_metadata = Base.metadata


def _run(connection) -> None:
    context.configure(connection=connection, target_metadata=target_metadata,
                      render_as_batch=connection.dialect.name == "sqlite")
    with context.begin_transaction():
        context.run_migrations()


if hasattr(context, "config"):  # run by alembic (not when merely imported, e.g. by doctest collection)
    _main()
