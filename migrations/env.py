"""Alembic environment for loopledger.

Configured in code by ``ledger.store.migrate``; an open connection may be passed in
``config.attributes["connection"]``.  Self-contained: revisions never import live models, but
autogenerate/compare uses the models' metadata.
"""

from alembic import context
from sqlalchemy import engine_from_config, pool

config = context.config


def _target_metadata():
    try:
        from ledger.store.models import Base
    except ImportError:  # pragma: no cover - migrations used without the package
        return None
    return Base.metadata


def _configure(connection):
    context.configure(
        connection=connection,
        target_metadata=_target_metadata(),
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
        compare_server_default=True,
    )


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _configure(connection)
        with context.begin_transaction():
            context.run_migrations()
        return
    connectable = engine_from_config(
        config.get_section(config.config_ini_section, {}),
        prefix="sqlalchemy.",
        poolclass=pool.NullPool,
    )
    with connectable.connect() as conn:
        _configure(conn)
        with context.begin_transaction():
            context.run_migrations()


if context.is_offline_mode():  # pragma: no cover
    context.configure(url=config.get_main_option("sqlalchemy.url"), literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations_online()
