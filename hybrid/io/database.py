"""Tables in a SQL database, read and written as the files are.

A source or target is a SQLAlchemy URL with the table or the query after a ``#``:
``sqlite:///club.db#ratings``, ``postgresql://reader@db.example/shop#catalogue.lots`` or
``sqlite:///club.db#SELECT member, lot, score FROM ratings WHERE score IS NOT NULL`` (a text
after ``#`` that starts with SELECT or WITH is a query; anything else a table name).  What is
read becomes a table of text, like a CSV file's, so ids, column names and every check are the
same as for files; errors name the database (its password hidden) and the table or query, and
rows are counted from 1.  SQLite is the embedded default (no server); another database needs
its driver installed (``pip install psycopg`` for PostgreSQL, say).

A table written (``score --out sqlite:///club.db#scores``) goes to a fresh temporary table,
which then replaces the target in one transaction: a failure part-way leaves the old table.
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass

import pandas as pd

from hybrid.common.errors import InputError, did_you_mean

_QUERY = re.compile(r"^\s*(select|with)\b", re.IGNORECASE)
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?$")


def is_database(source) -> bool:
    """Whether ``source`` names a database table or query rather than a file.

    >>> is_database("sqlite:///club.db#ratings"), is_database("ratings.csv")
    (True, False)
    """
    return "://" in str(source)


@dataclass(frozen=True)
class Source:
    """A database URL and, after its ``#``, a table or a query."""

    url: str
    table: str | None
    query: str | None

    @classmethod
    def parse(cls, text: str) -> "Source":
        """Split ``URL#table`` or ``URL#query``.

        >>> Source.parse("sqlite:///club.db#lots").table
        'lots'
        >>> Source.parse("sqlite:///club.db#select * from lots").query
        'select * from lots'
        >>> Source.parse("sqlite:///club.db")
        Traceback (most recent call last):
        ...
        hybrid.common.errors.InputError: sqlite:///club.db: name a table or a query after '#', e.g. sqlite:///club.db#ratings
        """
        url, _, after = str(text).partition("#")
        after = after.strip()
        if not after:
            raise InputError(f"name a table or a query after '#', e.g. {url}#ratings", file=_shown(url))
        if _QUERY.match(after):
            return cls(url, None, after)
        if not _NAME.match(after):
            raise InputError(f"'{after}' is not a table name (letters, digits and _, optionally schema.table) "
                             "nor a query (SELECT ... or WITH ...)", file=_shown(url))
        return cls(url, after, None)

    @property
    def shown(self) -> str:
        """How errors name it: the URL without its password, then the table or the query."""
        return f"{_shown(self.url)}#{self.table or self.query}"


def _shown(url: str) -> str:
    try:
        from sqlalchemy.engine import make_url
        return make_url(url).render_as_string(hide_password=True)
    except Exception:   # not a URL SQLAlchemy reads: say it as given, but never a password
        return re.sub(r"//([^:/@]+):[^@]*@", r"//\1:***@", url)


def _engine(source: Source):
    try:
        import sqlalchemy
    except ImportError:   # pragma: no cover - a dependency of the package
        raise InputError("reading a database needs SQLAlchemy (pip install sqlalchemy)", file=source.shown) from None
    try:
        engine = sqlalchemy.create_engine(source.url)
    except sqlalchemy.exc.NoSuchModuleError:
        raise InputError("unknown kind of database in the URL", file=source.shown) from None
    except sqlalchemy.exc.ArgumentError:
        raise InputError("not a database URL (e.g. sqlite:///club.db#ratings)", file=source.shown) from None
    except ImportError as exc:
        raise InputError(f"the database's driver is not installed ({exc.name or exc}): install it with pip",
                         file=source.shown) from None
    if engine.dialect.name == "sqlite":
        # Python's sqlite3 commits before a CREATE or DROP of its own accord; SQLAlchemy's recipe
        # for SQLite hands it no transactions and begins them itself, so a write's new table and
        # its swap with the old one commit together or not at all
        @sqlalchemy.event.listens_for(engine, "connect")
        def _no_own_transactions(dbapi_connection, _record):
            dbapi_connection.isolation_level = None

        @sqlalchemy.event.listens_for(engine, "begin")
        def _begin(conn):
            conn.exec_driver_sql("BEGIN")
    return engine


def _database_error(exc, source: Source) -> InputError:
    """One line from a driver's error (its first line, without SQLAlchemy's background link;
    pandas wraps the error of a query in its own)."""
    cause = exc.__cause__ if isinstance(exc, pd.errors.DatabaseError) and exc.__cause__ else exc
    text = str(getattr(cause, "orig", None) or cause).splitlines()[0]
    return InputError(f"the database refused: {text}", file=source.shown)


def _check_table(engine, source: Source) -> None:
    """Refuse a table (or view) the database does not have, naming the nearest it has."""
    import sqlalchemy

    schema, _, name = source.table.rpartition(".")
    seen = sqlalchemy.inspect(engine)
    names = seen.get_table_names(schema=schema or None) + seen.get_view_names(schema=schema or None)   # views too
    if name not in names:
        raise InputError(f"no table '{source.table}' in the database{did_you_mean(name, names)}"
                         f" (tables: {', '.join(sorted(names)[:8]) or 'none'})", file=_shown(source.url))


def read_database_table(text: str) -> tuple[pd.DataFrame, str]:
    """The rows of a database table or query, as the driver gives them, and how errors name
    the source (:func:`hybrid.io.tables.read_table` turns them into text as a file's cells)."""
    import sqlalchemy

    source = Source.parse(text)
    if source.url.startswith("sqlite:///") and not _sqlite_file_exists(source.url):
        raise InputError("database file not found", file=source.shown)
    engine = _engine(source)
    sql = source.query or f"SELECT * FROM {_quoted(engine, source.table)}"
    try:
        if source.table:
            _check_table(engine, source)
        with engine.connect() as conn:
            return pd.read_sql_query(sqlalchemy.text(sql), conn), source.shown
    except (sqlalchemy.exc.SQLAlchemyError, pd.errors.DatabaseError) as exc:
        raise _database_error(exc, source) from None
    finally:
        engine.dispose()


def _sqlite_file_exists(url: str) -> bool:
    path = url[len("sqlite:///"):].split("?", 1)[0]
    return path in ("", ":memory:") or os.path.isfile(path)


def _quoted(engine, name: str) -> str:
    prep = engine.dialect.identifier_preparer
    return ".".join(prep.quote(part) for part in name.split("."))


def check_database_target(text: str) -> Source:
    """A target for ``score --out``: a table name (not a query) in a database that opens."""
    source = Source.parse(text)
    if source.table is None:
        raise InputError("write to a table, not a query", file=source.shown)
    if source.url.startswith("sqlite:///"):
        folder = os.path.dirname(source.url[len("sqlite:///"):].split("?", 1)[0]) or "."
        if not os.path.isdir(folder):
            raise InputError(f"cannot write here: folder '{folder}' does not exist", file=source.shown)
    _engine(source).dispose()
    return source


def write_database_table(frames, text: str) -> int:
    """Write the frames (one chunk at a time) to a table, replacing it at the end in one
    transaction; return the rows written.  The chunks must share their columns."""
    import sqlalchemy

    source = check_database_target(text)
    engine = _engine(source)
    schema, _, name = source.table.rpartition(".")
    temporary = f"{name}__hybrid_{os.getpid()}"
    n = 0
    try:
        with engine.begin() as conn:   # one transaction: the new rows, then the swap
            for df in frames:
                df.to_sql(temporary, conn, schema=schema or None, if_exists="append" if n else "replace",
                          index=False)
                n += len(df)
            prep = engine.dialect.identifier_preparer
            target = _quoted(engine, source.table)
            conn.execute(sqlalchemy.text(f"DROP TABLE IF EXISTS {target}"))
            conn.execute(sqlalchemy.text(f"ALTER TABLE {_quoted(engine, (schema + '.' if schema else '') + temporary)} "
                                         f"RENAME TO {prep.quote(name)}"))
    except (sqlalchemy.exc.SQLAlchemyError, pd.errors.DatabaseError) as exc:
        raise _database_error(exc, source) from None
    finally:
        engine.dispose()
    return n
