"""Jinja2 rendering of SQL templates, with identifiers and literals built by sqlglot.

Templates are written in DuckDB's SQL (the source dialect) and are transpiled afterwards
(see dialects.py). A template never pastes a user string: table names, column names,
literals and dates go through the filters below, which build sqlglot nodes and print them.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
from importlib import resources
from pathlib import Path

import jinja2
from sqlglot import exp
from sqlglot.dialects import Dialect
from sqlglot.tokens import Tokenizer

from sqlmatch import columns
from sqlmatch.spec import TableRef

SOURCE_DIALECT = "duckdb"


def template_dir() -> Path:
    """sql_templates/ inside the installed package, or at the top of a source checkout."""
    try:
        packaged = resources.files("sqlmatch.sql_templates")
        path = Path(str(packaged))
        if path.is_dir() and any(path.glob("*.sql.j2")):
            return path
    except ModuleNotFoundError:
        pass
    return Path(__file__).resolve().parents[1] / "sql_templates"


@functools.lru_cache(maxsize=1)
def _reserved() -> frozenset[str]:
    words = {k.upper() for k in Tokenizer.KEYWORDS if " " not in k}
    for name in ("duckdb", "bigquery", "trino", "redshift"):
        gen = Dialect.get_or_raise(name).generator_class
        words |= {w.upper() for w in getattr(gen, "RESERVED_KEYWORDS", set())}
    return frozenset(words)


def quote_source(name: str) -> str:
    """A user's table/column name, always quoted, exactly as spelled in the spec."""
    return exp.to_identifier(name, quoted=True).sql(SOURCE_DIALECT)


def quote_name(name: str) -> str:
    """One of our own column names: bare when safe to read, quoted when it is a keyword."""
    quoted = name.upper() in _reserved() or not name.isidentifier() or name != name.lower()
    return exp.to_identifier(name, quoted=quoted).sql(SOURCE_DIALECT)


def table_sql(ref: TableRef) -> str:
    return exp.table_(ref.name, db=ref.schema, quoted=True).sql(SOURCE_DIALECT)


def work_table_sql(schema: str, name: str) -> str:
    """A table sqlmatch writes: quoted schema (user's), our own bare table name."""
    table = exp.Table(this=exp.to_identifier(name, quoted=name.upper() in _reserved()), db=exp.to_identifier(schema, quoted=True))
    return table.sql(SOURCE_DIALECT)


def comment_text(text: str) -> str:
    """Text safe inside a SQL comment: no comment markers (a `*/` would end a block comment, a `/*`
    opens a nested one on DuckDB and PostgreSQL) and no line breaks or other control characters
    (which would end a `--` line). Specs refuse control characters; this is the second line."""
    text = text.replace("*/", "* /").replace("/*", "/ *")
    return "".join(ch if ch.isprintable() or ch == " " else f"\\u{ord(ch):04x}" for ch in text)


def comment_name(value) -> str:
    """A user's name (column str or TableRef) inside a comment: the quoted identifier, made comment-safe."""
    sql = table_sql(value) if isinstance(value, TableRef) else quote_source(value)
    return comment_text(sql)


@dataclasses.dataclass(frozen=True)
class NumberSlot:
    """A number left open in a rendered template: printed as the placeholder `:name`, then filled
    with the literal (built here, by `literal`) in the parsed statement (plan.PlanContext.query_step
    with `numbers`), so a statement run again and again with new coefficients (a Newton step) is
    rendered and parsed once."""

    name: str


def literal(value) -> str:
    if isinstance(value, NumberSlot):
        return f":{value.name}"
    if value is None:
        return "NULL"
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float) and value.is_integer() and abs(value) < 1e15:
        # print 3.0 as 3.0, never 3: keeps the column a double on every engine
        return exp.Literal.number(repr(value)).sql(SOURCE_DIALECT)
    return exp.convert(value).sql(SOURCE_DIALECT)


def date_literal(day: dt.date) -> str:
    return exp.cast(exp.Literal.string(day.isoformat()), exp.DataType.build("DATE")).sql(SOURCE_DIALECT)


def expression_sql(tree: exp.Expression, alias: str | None = None) -> str:
    """A parsed user filter, its columns quoted and qualified with `alias`."""
    tree = tree.copy()
    for col in tree.find_all(exp.Column):
        col.set("this", exp.to_identifier(col.name, quoted=True))
        if alias:
            col.set("table", exp.to_identifier(alias))
    return tree.sql(SOURCE_DIALECT)


@functools.lru_cache(maxsize=16)
def environment(root: str | None = None, dialect: str | None = None) -> jinja2.Environment:
    """Templates of one dialect: a file in `<root>/<dialect>/` overrides the one of the same name
    in `<root>/`, for steps and for imported macro files alike (e.g. duckdb/_active_days.sql.j2)."""
    base = root or str(template_dir())
    search = [str(Path(base) / dialect)] if dialect and (Path(base) / dialect).is_dir() else []
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(search + [base]),
        undefined=jinja2.StrictUndefined,
        autoescape=False,
        keep_trailing_newline=False,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters.update(
        src=quote_source,
        name=quote_name,
        table=table_sql,
        lit=literal,
        date=date_literal,
        note=comment_name,
    )
    env.globals["col"] = columns  # aggregate column names (columns.py)
    return env


def template_for(step: str, dialect: str) -> tuple[jinja2.Template, str]:
    """The dialect's own template when one exists, else the default; and the dialect it is written
    in. (Macro files a template imports are looked up the same way; they are written in the source
    dialect unless the step itself is overridden.)"""
    env = environment(dialect=dialect)
    own = (template_dir() / dialect / f"{step}.sql.j2").is_file()
    return env.get_template(f"{step}.sql.j2"), dialect if own else SOURCE_DIALECT


def render(step: str, dialect: str, **context) -> tuple[str, str]:
    """Render one step's template; returns (sql text, the dialect it is written in)."""
    template, written_in = template_for(step, dialect)
    return template.render(**context), written_in
