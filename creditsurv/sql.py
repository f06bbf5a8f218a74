"""SQL text helpers shared by every stage that writes SQL: the one way to quote.

Column and table names read from a config or a file reach SQL only through
:func:`quote_ident`; text values only through parameters or, where a dialect
needs them inline, :func:`quote_literal`.
"""

from __future__ import annotations

from .errors import DataError

__all__ = ["SQL_MONTH_INDEX", "month_index_sql", "quote_ident", "quote_literal"]

SQL_MONTH_INDEX = "(year({col}) * 12 + month({col}) - 1)"
"""Expression template (DuckDB and Spark SQL alike) for the month index of a DATE column."""


def month_index_sql(column: str) -> str:
    """SQL for the month index ``year * 12 + month - 1`` of the DATE expression ``column``."""
    return SQL_MONTH_INDEX.format(col=column)


def quote_ident(name: str) -> str:
    """Quote ``name`` as a SQL identifier: in double quotes, inner quotes doubled.

    Raises
    ------
    DataError
        ``name`` holds a NUL character, which no SQL engine accepts in a name.
    """
    text = str(name)
    if "\x00" in text:
        raise DataError(f"identifier {text!r} contains a NUL character")
    return '"' + text.replace('"', '""') + '"'


def quote_literal(value: str) -> str:
    """Quote ``value`` as a SQL text literal: in single quotes, inner quotes doubled.

    Raises
    ------
    DataError
        ``value`` holds a NUL character.
    """
    text = str(value)
    if "\x00" in text:
        raise DataError(f"text {text!r} contains a NUL character")
    return "'" + text.replace("'", "''") + "'"
