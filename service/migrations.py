"""Schema creation and upgrades for the service's own tables, without Alembic.

The story, kept deliberately small:

1. ``create_all`` creates every missing table (a fresh database gets the whole schema).
2. Additive changes need no hand-written step: every column the models declare but the
   database lacks is added with ``ALTER TABLE … ADD COLUMN`` and its default, so an older
   database keeps its rows and gains the new columns. This covers new tables, new
   nullable columns and new columns with a scalar default.
3. Every index the models declare but the database lacks is created the same way.
4. Anything else (a rename, a type change, a dropped column, a data rewrite) is a step in
   ``STEPS``, keyed by the revision it produces and run once, in order, inside one
   transaction; ``gk_schema`` records the revision reached.

The trial journal's two tables (``gk_trial_journal``, ``gk_trial_beats``) belong to the
tuner, which creates them (``tuner.init_storage``); a study left in Optuna's own
``RDBStorage`` tables by an older version is copied into the journal when its job is
next led (``tuner/_journal.py``).
Every step must be safe to run by several processes at once; ``init_db`` retries on the
start-up race (docs/measured-facts.md §2).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine, Inspector

from service.tables import (
    ApiKey,
    Base,
    Job,
    KeyGeneration,
    SchemaVersion,
    job_summary_fields,
    utcnow,
)

# Revision 1: the foundation. Revision 2: gk_job_workers, gk_jobs.max_workers/joinable.
# Revision 3: gk_key_generation (seeded by _seed_key_generation on every migrate).
# Revision 4: gk_jobs' summary columns (target ... seconds_budget), filled from the spec.
SCHEMA_VERSION = 4


def _fill_job_summaries(conn: Connection) -> None:
    rows = conn.execute(sa.select(Job.id, Job.spec).where(Job.target.is_(None))).all()
    for job_id, spec in rows:
        conn.execute(sa.update(Job).where(Job.id == job_id)
                     .values(**job_summary_fields(spec or {})))


STEPS: dict[int, Callable[[Connection], None]] = {4: _fill_job_summaries}


def _default_sql(column: sa.Column[Any], conn: Connection) -> str | None:
    if column.server_default is not None:
        arg = column.server_default.arg  # type: ignore[attr-defined]
        if isinstance(arg, str):
            return arg
        return str(arg.compile(dialect=conn.dialect))
    default = column.default
    if default is not None and getattr(default, "is_scalar", False):
        literal = sa.literal(default.arg, type_=column.type)  # type: ignore[attr-defined]
        return str(literal.compile(dialect=conn.dialect, compile_kwargs={"literal_binds": True}))
    return None


def _existing_tables(conn: Connection) -> Iterator[tuple[Inspector, sa.Table]]:
    """The declared tables the database already has, with an inspector to read them."""
    inspector = sa.inspect(conn)
    for table in Base.metadata.sorted_tables:
        if inspector.has_table(table.name):
            yield inspector, table


def add_missing_columns(conn: Connection) -> list[str]:
    """ALTER TABLE … ADD COLUMN for each declared column the database lacks."""
    added = []
    for inspector, table in _existing_tables(conn):
        present = {c["name"] for c in inspector.get_columns(table.name)}
        for column in table.columns:
            if column.name in present:
                continue
            kind = column.type.compile(dialect=conn.dialect)
            default = _default_sql(column, conn)
            clause = f" DEFAULT {default}" if default is not None else ""
            # NOT NULL only with a default, so existing rows get a value.
            clause += " NOT NULL" if (not column.nullable and default is not None) else ""
            conn.execute(sa.text(f'ALTER TABLE {table.name} ADD COLUMN "{column.name}" '
                                 f"{kind}{clause}"))
            added.append(f"{table.name}.{column.name}")
    return added


def add_missing_indexes(conn: Connection) -> list[str]:
    """CREATE INDEX for each declared index the database lacks (``create_all`` makes the
    indexes of the tables it creates only)."""
    added = []
    for inspector, table in _existing_tables(conn):
        present = {i["name"] for i in inspector.get_indexes(table.name)}
        for index in table.indexes:
            if index.name not in present:
                index.create(conn)
                added.append(str(index.name))
    return added


def migrate(engine: Engine) -> int:
    """Bring the service schema to :data:`SCHEMA_VERSION`; returns the revision found."""
    Base.metadata.create_all(engine)
    with engine.begin() as conn:
        add_missing_columns(conn)
        add_missing_indexes(conn)
        row = conn.execute(sa.select(SchemaVersion.version).where(SchemaVersion.id == 1)).first()
        found = row[0] if row else (1 if _has_jobs(conn) else SCHEMA_VERSION)
        for version in sorted(v for v in STEPS if v > found):
            STEPS[version](conn)
        _seed_key_generation(conn)
        if row is None:
            conn.execute(sa.insert(SchemaVersion).values(id=1, version=SCHEMA_VERSION,
                                                         migrated_at=utcnow()))
        elif found < SCHEMA_VERSION:
            conn.execute(sa.update(SchemaVersion).where(SchemaVersion.id == 1)
                         .values(version=SCHEMA_VERSION, migrated_at=utcnow()))
    return found


def _seed_key_generation(conn: Connection) -> None:
    # A database from before the counter starts at its number of keys, so one that ever
    # had a key (revoked or not) counts as having had keys.
    if conn.execute(sa.select(KeyGeneration.id).where(KeyGeneration.id == 1)).first():
        return
    keys = conn.execute(sa.select(sa.func.count()).select_from(ApiKey)).scalar_one()
    conn.execute(sa.insert(KeyGeneration).values(id=1, generation=int(keys)))


def _has_jobs(conn: Connection) -> bool:
    # A database without gk_schema but with rows predates revision 2.
    return conn.execute(sa.text("SELECT 1 FROM gk_jobs LIMIT 1")).first() is not None
