"""`sqlmatch init`: a commented starter spec for a user's own tables, from the engine's catalog.

Only column names and types are read (no rows). Every guess is marked in a comment so the user
reviews it before the first run.
"""

from __future__ import annotations

import re

from sqlmatch.engines.base import Engine
from sqlmatch.errors import SpecError
from sqlmatch.spec import TableRef

_NUMERIC = ("INT", "DOUBLE", "FLOAT", "DECIMAL", "NUMERIC", "REAL")
_TIME = ("DATE", "TIMESTAMP")
_TEXT = ("VARCHAR", "TEXT", "STRING", "CHAR")


def _kind(dtype: str) -> str:
    t = dtype.upper()
    if any(w in t for w in _TIME):
        return "time"
    if any(w in t for w in _NUMERIC):
        return "numeric"
    if any(w in t for w in _TEXT):
        return "text"
    return "other"


def _safe_name(column: str) -> str:
    name = re.sub(r"[^a-z0-9]+", "_", column.lower()).strip("_") or "x"
    name = re.sub(r"_+", "_", name)
    return name if name[0].isalpha() else f"f_{name}"


def _q(text: str) -> str:
    """A TOML basic string: backslash, quote and every control character escaped, so a name
    holding a newline stays inside its string instead of starting a line of its own."""
    out = []
    for ch in text:
        if ch in ('"', "\\"):
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _table(ref: str) -> TableRef:
    parts = ref.split(".")
    return TableRef(name=parts[-1], schema=parts[0] if len(parts) == 2 else None)


# Used when --cohort is not given: init reads no rows, so it cannot pick a month from the data.
PLACEHOLDER_COHORT = "2026-01"


def starter_spec(
    engine: Engine, units: str, events: str, study: str = "my_study", cohort: str | None = None, database: str | None = None
) -> str:
    """The spec's text. `database` is written as [study] database (a path relative to the spec's
    folder, as spec.py reads it); `cohort` None writes PLACEHOLDER_COHORT marked as a guess."""
    u_ref, e_ref = _table(units), _table(events)
    u_cols = engine.columns(u_ref.schema, u_ref.name)
    if u_cols is None:
        raise SpecError("--units", f"table {units!r} was not found.", "name an existing table, optionally as schema.table.")
    e_cols = engine.columns(e_ref.schema, e_ref.name)
    if e_cols is None:
        raise SpecError("--events", f"table {events!r} was not found.", "name an existing table, optionally as schema.table.")
    kinds_u = {c: _kind(t) for c, t in u_cols.items()}
    kinds_e = {c: _kind(t) for c, t in e_cols.items()}
    key = next((c for c in u_cols if c in e_cols and c.lower().endswith("id")), next((c for c in u_cols if c in e_cols), next(iter(u_cols))))
    enrol = next((c for c, k in kinds_u.items() if k == "time" and re.search(r"enrol|bought|start|join|pass|member", c, re.I)), None)
    enrol = enrol or next((c for c, k in kinds_u.items() if k == "time"), "ENROLMENT_DATE_COLUMN")
    when = next((c for c, k in kinds_e.items() if k == "time"), "EVENT_TIME_COLUMN")
    measures = [c for c, k in kinds_e.items() if k == "numeric" and c != key and not c.lower().endswith("id")]
    categorical = [c for c, k in kinds_u.items() if k == "text" and c != key]

    lines = [
        f"# Starter study spec written by `sqlmatch init` from the columns of {_q(units)} and {_q(events)}.",
        "# Every line marked GUESS was inferred from names and types: check it before the first run.",
        "",
        "[study]",
        f"name = {_q(study)}",
        *([f"database = {_q(database)}   # DuckDB file, relative to this spec's folder"] if database is not None else []),
        'work_schema = "sqlmatch"   # sqlmatch creates and writes tables only here',
        "",
        "[units]",
        f"table = {_q(units)}",
        f"key = {_q(key)}   # GUESS: the column shared with the events table",
        f"enrolled_on = {_q(enrol)}   # GUESS: date of enrolment, NULL = never enrolled",
        "",
        "[events]",
        f"table = {_q(events)}",
        f"unit_key = {_q(key)}",
        f"time = {_q(when)}   # GUESS",
        "",
        "[treatment]",
        (
            f"cohort = {_q(cohort)}   # the enrolment month to study (from --cohort)"
            if cohort is not None
            else f"cohort = {_q(PLACEHOLDER_COHORT)}   # GUESS: a placeholder, not read from the data (init reads no rows); "
            f"set the enrolment month to study, YYYY-MM"
        ),
        'control_pool = "never_by_post_end"',
        "",
        "[windows]",
        'unit = "month"',
        "pre = 6    # features from the 6 months before the cohort month",
        "post = 3   # outcomes from the 3 months after it",
        "",
        "[eligibility]",
        "filters = []   # e.g. \"signup_date < DATE '2025-01-01'\": one boolean SQL expression each",
        "",
        "[[features]]",
        'name = "pre_events"',
        'aggregate = "count"',
        "",
        "[[features]]",
        'name = "pre_active_days"',
        'aggregate = "active_days"',
    ]
    for m in measures:
        lines += ["", "[[features]]", f"name = {_q('pre_' + _safe_name(m))}", 'aggregate = "sum"', f"measure = {_q(m)}"]
    for c in categorical:
        lines += ["", "[[features]]", f"name = {_q(_safe_name(c))}", 'aggregate = "attribute"', f"attribute = {_q(c)}", 'type = "categorical"   # GUESS: text column']
    lines += ["", "[[outcomes]]", 'name = "post_events"', 'aggregate = "count"']
    for m in measures:
        lines += ["", "[[outcomes]]", f"name = {_q('post_' + _safe_name(m))}", 'aggregate = "sum"', f"measure = {_q(m)}"]
    lines += [
        "",
        "[matching]",
        'method = "coarsened_exact"',
        'coarsen = "quantiles"   # cut points computed in the warehouse; or list them under [matching.cut_points]',
        "coarsen_bins = 10",
        "",
        "[report]",
        "min_cell_size = 10   # counts below this are never shown",
        "",
    ]
    return "\n".join(lines)
