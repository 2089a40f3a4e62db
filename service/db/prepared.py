"""Statements compiled once and run on the DBAPI cursor under a SQLAlchemy connection.

The ingest request runs about eight statements; through SQLAlchemy's execution layer each
cost 0.3-0.8 ms on this project's machine (execution context, cache-key lookup, per-value
conversion through the type system, result wrapping), which was most of a request's cost
and twenty times what the statement itself takes in SQLite (bench/ingest.py). `Prepared`
keeps what makes SQLAlchemy portable and drops the per-execution machinery:

* the SQL is still written by SQLAlchemy's compiler for the engine's own dialect (the
  same text the Core statement would send: placeholders, casts, FOR UPDATE or not), once;
* values still go through the column types' own bind and result processors (JSON,
  timezone-aware datetimes), so rows read back through the ORM exactly as before;
* it runs on the same DBAPI connection as the session, inside the session's transaction;
* driver errors are re-raised as SQLAlchemy's (IntegrityError, OperationalError, ...), so
  callers catch one family of exceptions whichever way a statement ran.

Use it only where the statement count per request matters; everything else stays on the
ORM and Core.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

from sqlalchemy import Connection
from sqlalchemy.engine import Dialect
from sqlalchemy.exc import DBAPIError
from sqlalchemy.sql import ClauseElement

Processor = Callable[[Any], Any]


class Prepared:
    """One statement compiled for one dialect; `execute`/`executemany`/`rows` take dicts
    keyed by the statement's bindparam names (every name must be given)."""

    def __init__(self, statement: ClauseElement, dialect: Dialect) -> None:
        compiled = statement.compile(dialect=dialect)
        if compiled.positional:
            assert compiled.positiontup is not None
            self._names: list[str] = list(compiled.positiontup)
        else:
            self._names = list(compiled.bind_names.values())
        # Bind names as they appear in the SQL; map them back to the bindparam keys callers use.
        by_name = {compiled.bind_names[b]: b for b in compiled.bind_names}
        self._keys = [by_name[n].key for n in self._names]
        # Literal values the statement carries itself (e.g. LIMIT 1) bind as their own value.
        self._fixed = {by_name[n].key: by_name[n].effective_value for n in self._names if not by_name[n].required}
        self._positional = compiled.positional
        self.sql = compiled.string
        procs: list[Processor | None] = []
        for n in self._names:
            t = by_name[n].type
            procs.append(t.dialect_impl(dialect).bind_processor(dialect))
        self._convert = [(i, p) for i, p in enumerate(procs) if p is not None]  # the places needing conversion
        self._dbapi = dialect.loaded_dbapi
        self._dialect = dialect
        selected = getattr(statement, "selected_columns", None)
        returning = getattr(statement, "_returning", ())
        self._result_types = [col.type for col in (list(selected) if selected is not None else list(returning))]
        # Result processors need the driver's type codes (PostgreSQL's numeric OIDs), known
        # from the first execution's cursor description.
        self._result_convert: list[tuple[int, Processor]] | None = None

    def _args(self, params: Mapping[str, Any]) -> Any:
        return self._many_args((params,))[0]

    def _many_args(self, rows: Iterable[Mapping[str, Any]]) -> list[Any]:
        """The driver's arguments for each row of bindparam values; a value that is the same
        object as the previous row's in that place (a batch's received_at) is converted once."""
        last_in: list[Any] = [object()] * len(self._keys)
        last_out: list[Any] = [None] * len(self._keys)
        out = []
        for r in rows:
            if self._fixed:
                r = {**self._fixed, **r}
            values = [r[k] for k in self._keys]
            for i, p in self._convert:
                v = values[i]
                if v is not last_in[i]:
                    last_in[i], last_out[i] = v, p(v)
                values[i] = last_out[i]
            out.append(tuple(values) if self._positional else dict(zip(self._names, values)))
        return out

    def _fail(self, e: Exception, params: Any) -> DBAPIError:
        return DBAPIError.instance(self.sql, params, e, self._dbapi.Error)

    def execute(self, conn: Connection, params: Mapping[str, Any]) -> int:
        """Run once; the number of rows it changed."""
        args = self._args(params)
        cur = conn.connection.cursor()
        try:
            cur.execute(self.sql, args)
            return int(cur.rowcount)
        except self._dbapi.Error as e:
            raise self._fail(e, args) from e
        finally:
            cur.close()

    def executemany(self, conn: Connection, rows: Iterable[Mapping[str, Any]]) -> None:
        args = self._many_args(rows)
        if not args:
            return
        cur = conn.connection.cursor()
        try:
            cur.executemany(self.sql, args)
        except self._dbapi.Error as e:
            raise self._fail(e, args[:3]) from e
        finally:
            cur.close()

    def rows(self, conn: Connection, params: Mapping[str, Any]) -> list[tuple[Any, ...]]:
        """Run a SELECT (or an INSERT ... RETURNING) and return its rows, values converted
        by the result columns' types."""
        args = self._args(params)
        cur = conn.connection.cursor()
        try:
            cur.execute(self.sql, args)
            fetched: Sequence[Sequence[Any]] = cur.fetchall()
            if self._result_convert is None:
                codes = [d[1] for d in cur.description] if cur.description else [None] * len(self._result_types)
                procs = [t.dialect_impl(self._dialect).result_processor(self._dialect, code) for t, code in zip(self._result_types, codes)]
                self._result_convert = [(i, p) for i, p in enumerate(procs) if p is not None]
        except self._dbapi.Error as e:
            raise self._fail(e, args) from e
        finally:
            cur.close()
        if not self._result_convert:
            return [tuple(r) for r in fetched]
        out = []
        for r in fetched:
            row = list(r)
            for i, p in self._result_convert:
                row[i] = p(row[i])
            out.append(tuple(row))
        return out


_BY_DIALECT: weakref.WeakKeyDictionary[Dialect, dict[str, Prepared]] = weakref.WeakKeyDictionary()


def prepared(dialect: Dialect, name: str, build: Callable[[], ClauseElement]) -> Prepared:
    """The statement `build()` compiled for `dialect`, once per dialect and `name`."""
    cache = _BY_DIALECT.setdefault(dialect, {})
    found = cache.get(name)
    if found is None:
        found = cache[name] = Prepared(build(), dialect)
    return found
