"""DuckDB helpers: load ``sql/<name>.sql``, open working connections, bind parameters."""

from __future__ import annotations

import re
from functools import lru_cache
from pathlib import Path

import duckdb

__all__ = ["SQL_DIR", "load_sql", "work_connection", "quote_ident", "sql_literal", "bind", "Identifier", "inline"]

def _sql_dir() -> Path:
    """``sql/`` of the source tree (a checkout, an editable install), or its copy ``graphkit/_sql`` in a wheel."""
    here = Path(__file__).resolve().parent
    for candidate in (here / "_sql", here.parent / "sql"):
        if (candidate / "macros.sql").is_file():
            return candidate
    raise FileNotFoundError(f"graphkit's SQL files are missing: neither {here / '_sql'} nor {here.parent / 'sql'}")


SQL_DIR = _sql_dir()


@lru_cache(maxsize=None)
def load_sql(name: str) -> str:
    """The text of ``sql/<name>.sql`` (``name`` may contain a sub-folder, e.g. ``checks/edge_counts``)."""
    return (SQL_DIR / f"{name}.sql").read_text()


_PARAM = re.compile(r"\$([A-Za-z_][A-Za-z0-9_]*)")


def bind(sql: str, params: dict) -> dict:
    """The subset of ``params`` that ``sql`` names as ``$name`` (DuckDB rejects unused named parameters)."""
    wanted = set(_PARAM.findall(sql))
    missing = wanted - set(params)
    if missing:
        raise KeyError(f"SQL needs parameters {sorted(missing)}")
    return {k: v for k, v in params.items() if k in wanted}


def quote_ident(name: str) -> str:
    """Quote a column name for DuckDB (identifiers cannot be bound as parameters)."""
    return '"' + name.replace('"', '""') + '"'


def work_connection(temp_dir: Path | None = None, *, threads: int | None = None,
                    memory_limit: str | None = None) -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB connection for one stage; it spills to ``temp_dir`` when memory runs short."""
    con = duckdb.connect(":memory:")
    if temp_dir is not None:
        Path(temp_dir).mkdir(parents=True, exist_ok=True)
        con.execute("set temp_directory = $d", {"d": str(temp_dir)})
    if threads:
        con.execute("set threads = $t", {"t": int(threads)})
    if memory_limit:
        con.execute("set memory_limit = $m", {"m": memory_limit})
    con.execute("set preserve_insertion_order = false")
    return con


def sql_literal(text: str) -> str:
    """A SQL string literal (for the few places DuckDB cannot bind a parameter: view bodies, projections)."""
    return "'" + str(text).replace("'", "''") + "'"


class Identifier(str):
    """A name for :func:`inline` to write as a quoted identifier; a dotted name is quoted part by part."""


def inline(sql: str, params: dict) -> str:
    """``sql`` with each ``$name`` written out as the SQL text of ``params[name]``.

    Only for the statements DuckDB cannot prepare: ``create view`` and ``create macro`` store their body as text,
    so it cannot refer to a bound parameter, and a type such as ``float[$dim]`` is never a parameter. Everything
    else binds its ``$name`` values (:func:`bind`). Strings become quoted literals, :class:`Identifier` values
    quoted identifiers, ints their digits, a list of strings a list of quoted literals; any other type is refused
    rather than guessed at.
    """
    def text(match):
        value = params[match.group(1)]
        if isinstance(value, Identifier):
            return ".".join(quote_ident(part) for part in value.split("."))
        if isinstance(value, (list, tuple)) and value and all(isinstance(v, str) for v in value):
            return "[" + ", ".join(sql_literal(v) for v in value) + "]"
        if isinstance(value, bool) or not isinstance(value, (int, str)):
            raise TypeError(f"${match.group(1)}: cannot write {type(value).__name__} into SQL text")
        return str(int(value)) if isinstance(value, int) else sql_literal(value)

    missing = set(_PARAM.findall(sql)) - set(params)
    if missing:
        raise KeyError(f"SQL needs parameters {sorted(missing)}")
    return _PARAM.sub(text, sql)
