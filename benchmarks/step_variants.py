"""Equivalent formulations of the demo study's heaviest steps, timed against the compiled SQL.

A script, not a test. scale.py profiles the demo study; this script asks which SQL shape of the
same result DuckDB runs fastest, so a change to a template in sql_templates/ can be proposed with
numbers. It needs a demo warehouse in which the coarsened_exact study has run once (it reads the
study's units, measures and weights tables), e.g. one kept by

    python3 benchmarks/scale.py --sizes 100M --keep --workdir /tmp/scale

and then

    python3 benchmarks/step_variants.py --step unit_measures --database /tmp/scale/100M/bikeshare.duckdb \\
        --spec /tmp/scale/100M/annual_pass.toml --repeats 3
    python3 benchmarks/step_variants.py --step feature_histograms --database ... --spec ... --repeats 3

--step unit_measures (all but the diagnostics produce the same table as the compiled step; each
is checked against it unit by unit, to 1e-9 relative):

  compiled        the step as sqlmatch compiles it: INNER JOIN units before the GROUP BY, conditional
                  aggregates including COUNT(DISTINCT day) for pre_active_days, then units LEFT JOIN
  aggregate_first GROUP BY over the events of the window span first, join the units afterwards
                  (events of units outside the study are aggregated and then dropped)
  semi_join       the compiled shape with the inner join replaced by `rider_id IN (SELECT unit_key ...)`
  day_preagg      two levels: GROUP BY (unit, day) with the conditional sums, then GROUP BY unit;
                  active days = number of pre-window day rows, so no COUNT(DISTINCT)
  day_preagg_first day_preagg without the join before the aggregation (units joined afterwards)
  floor           scale.py's floor query (all riders, no join; diagnostic, not the same table)
  bitmask_days    compiled shape, active days as the bit count of an OR of one bit per day (DuckDB
                  syntax; would need a dialect-specific template), no COUNT(DISTINCT)
  no_distinct     compiled with pre_active_days left out (diagnostic: the cost of COUNT DISTINCT)

--step feature_histograms (every variant returns the compiled query's rows; checked row by row,
sums of weights to 1e-9 relative):

  compiled        as sqlmatch compiles it: per numeric feature, a range scan of the measures and a
                  GROUP BY over measures LEFT JOIN weights (five features: five joins, ten scans)
  one_pass        one range scan for all features, ONE measures LEFT JOIN weights, the rows
                  repeated once per feature (CROSS JOIN a feature list) and ONE GROUP BY
                  (feature, bin, treated); the same grid and output
  grouping_sets   one range scan, one join, GROUP BY GROUPING SETS ((bin_f, treated) per feature)

--step query_joins (no variants): every query step of the compiled plan that reads the study's
tables, run --repeats times under DuckDB's JSON profiler; per step the latency and the share of
operator time spent in hash joins (most of them join the measures to the weights again).

Each variant runs as CREATE TABLE AS on one connection, alternated for --repeats rounds (order
rotated each round); time is wall time, and DuckDB's JSON profiler gives peak buffer memory.
Writes a Markdown table to stdout (and --out if given).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.dont_write_bytecode = True  # importing scale.py must not leave a __pycache__ in benchmarks/
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from scale import (  # noqa: E402
    COHORT_START,
    FLOOR_SQL,
    FLOOR_TABLE,
    LAST_MONTH_START,
    POST_END,
    POST_START,
    PRE_START,
)

UNITS = '"sqlmatch".annual_pass_units'
PRE = f"e.started_at >= TIMESTAMP '{PRE_START}' AND e.started_at < TIMESTAMP '{COHORT_START}'"
POST = f"e.started_at >= TIMESTAMP '{POST_START}' AND e.started_at < TIMESTAMP '{POST_END}'"
LAST = f"e.started_at >= TIMESTAMP '{LAST_MONTH_START}' AND e.started_at < TIMESTAMP '{POST_END}'"
SPAN = f"e.started_at >= TIMESTAMP '{PRE_START}' AND e.started_at < TIMESTAMP '{POST_END}'"

OUT_COLUMNS = [
    ("pre_trips", "0.0"),
    ("pre_minutes", "0.0"),
    ("pre_fare_per_trip", "0.0"),
    ("pre_active_days", "0.0"),
    ("pre_days_since_last", "181.0"),
    ("post_trips", "0.0"),
    ("post_minutes", "0.0"),
    ("fare_per_trip__num", "0.0"),
    ("fare_per_trip__den", "0.0"),
    ("active_last_month", "0.0"),
]


# Set from the compiled SQL: newer templates also keep each unit's first and last event date in the
# span (for a data-coverage check); the variants then compute them too.
EVENT_DATES = {"on": False}


def _final_select(agg_cte: str, columns=OUT_COLUMNS) -> str:
    cols = ",\n  ".join(f"COALESCE(CAST(t.{c} AS DOUBLE), {fill}) AS {c}" for c, fill in columns)
    if EVENT_DATES["on"]:
        cols += ",\n  t.first_event_at,\n  t.last_event_at"
    return f"""{agg_cte}
SELECT
  u.unit_key,
  u.treated,
  {cols},
  u.age_band,
  u.home_district
FROM {UNITS} AS u
LEFT JOIN event_totals AS t
  ON t.unit_key = u.unit_key"""


def _bitmask_days() -> str:
    """Active pre-window days without COUNT(DISTINCT): OR together one bit per day (63 days per
    BIGINT lane, so the sign bit is never used) and count the bits. DuckDB syntax (<<, bit_or,
    bit_count); PostgreSQL and Spark have the same aggregates under other spellings, so this
    would be a dialect-specific template."""
    import datetime as dt

    days = (dt.date.fromisoformat(COHORT_START) - dt.date.fromisoformat(PRE_START)).days
    lanes = (days + 62) // 63
    d = f"DATE_DIFF('DAY', CAST('{PRE_START}' AS DATE), CAST(e.started_at AS DATE))"
    parts = [
        f"bit_count(BIT_OR(CASE WHEN {PRE} AND {d} >= {63 * k} AND {d} < {63 * (k + 1)} "
        f"THEN CAST(1 AS BIGINT) << ({d} - {63 * k}) ELSE CAST(0 AS BIGINT) END))"
        for k in range(lanes)
    ]
    return "(" + " + ".join(parts) + ")"


def _flat_aggregates(with_distinct: bool = True, bitmask: bool = False) -> str:
    days_since = f"DATE_DIFF('DAY', CAST(MAX(CASE WHEN {PRE} THEN e.started_at END) AS DATE), CAST('{COHORT_START}' AS DATE))"
    parts = [
        f"COUNT(CASE WHEN {PRE} THEN 1 END) AS pre_trips",
        f"SUM(CASE WHEN {PRE} THEN CAST(e.minutes AS DOUBLE) END) AS pre_minutes",
        f"AVG(CASE WHEN {PRE} THEN CAST(e.fare AS DOUBLE) END) AS pre_fare_per_trip",
    ]
    if bitmask:
        parts.append(f"{_bitmask_days()} AS pre_active_days")
    elif with_distinct:
        parts.append(f"COUNT(DISTINCT CASE WHEN {PRE} THEN CAST(e.started_at AS DATE) END) AS pre_active_days")
    parts += [
        f"{days_since} AS pre_days_since_last",
        f"COUNT(CASE WHEN {POST} THEN 1 END) AS post_trips",
        f"SUM(CASE WHEN {POST} THEN CAST(e.minutes AS DOUBLE) END) AS post_minutes",
        f"SUM(CASE WHEN {POST} THEN CAST(e.fare AS DOUBLE) END) AS fare_per_trip__num",
        f"COUNT(CASE WHEN {POST} THEN 1 END) AS fare_per_trip__den",
        f"MAX(CASE WHEN {LAST} THEN 1 ELSE 0 END) AS active_last_month",
    ]
    if EVENT_DATES["on"]:
        parts += ["CAST(MIN(e.started_at) AS DATE) AS first_event_at", "CAST(MAX(e.started_at) AS DATE) AS last_event_at"]
    return ",\n    ".join(parts)


def flat(join: str, with_distinct: bool = True, bitmask: bool = False) -> str:
    """join: 'inner' (compiled shape), 'semi' or 'none' (aggregate first)."""
    join_sql = {"inner": f"INNER JOIN {UNITS} AS u ON e.rider_id = u.unit_key", "semi": "", "none": ""}[join]
    semi = f" AND e.rider_id IN (SELECT unit_key FROM {UNITS})" if join == "semi" else ""
    cols = OUT_COLUMNS if (with_distinct or bitmask) else [c for c in OUT_COLUMNS if c[0] != "pre_active_days"]
    cte = f"""WITH event_totals AS (
  SELECT
    e.rider_id AS unit_key,
    {_flat_aggregates(with_distinct, bitmask)}
  FROM trips AS e
  {join_sql}
  WHERE {SPAN}{semi}
  GROUP BY e.rider_id
)"""
    return _final_select(cte, cols)


def day_preagg(join: str) -> str:
    """Two-level aggregation: per (unit, day), then per unit. Windows are whole days, so a day is
    wholly inside or outside each window and the day rows carry every conditional aggregate."""
    join_sql = f"INNER JOIN {UNITS} AS u ON e.rider_id = u.unit_key" if join == "inner" else ""
    dates = ",\n    MIN(day) AS first_event_at,\n    MAX(day) AS last_event_at" if EVENT_DATES["on"] else ""
    return _final_select(f"""WITH day_totals AS (
  SELECT
    e.rider_id AS unit_key,
    CAST(e.started_at AS DATE) AS day,
    COUNT(CASE WHEN {PRE} THEN 1 END) AS pre_n,
    SUM(CASE WHEN {PRE} THEN CAST(e.minutes AS DOUBLE) END) AS pre_minutes,
    SUM(CASE WHEN {PRE} THEN CAST(e.fare AS DOUBLE) END) AS pre_fare,
    MAX(CASE WHEN {PRE} THEN e.started_at END) AS pre_last,
    COUNT(CASE WHEN {POST} THEN 1 END) AS post_n,
    SUM(CASE WHEN {POST} THEN CAST(e.minutes AS DOUBLE) END) AS post_minutes,
    SUM(CASE WHEN {POST} THEN CAST(e.fare AS DOUBLE) END) AS post_fare,
    MAX(CASE WHEN {LAST} THEN 1 ELSE 0 END) AS active_last
  FROM trips AS e
  {join_sql}
  WHERE {SPAN}
  GROUP BY e.rider_id, CAST(e.started_at AS DATE)
), event_totals AS (
  SELECT
    unit_key,
    SUM(pre_n) AS pre_trips,
    SUM(pre_minutes) AS pre_minutes,
    SUM(pre_fare) / NULLIF(SUM(pre_n), 0) AS pre_fare_per_trip,
    COUNT(CASE WHEN pre_n > 0 THEN 1 END) AS pre_active_days,
    DATE_DIFF('DAY', CAST(MAX(pre_last) AS DATE), CAST('{COHORT_START}' AS DATE)) AS pre_days_since_last,
    SUM(post_n) AS post_trips,
    SUM(post_minutes) AS post_minutes,
    SUM(post_fare) AS fare_per_trip__num,
    SUM(post_n) AS fare_per_trip__den,
    MAX(active_last) AS active_last_month{dates}
  FROM day_totals
  GROUP BY unit_key
)""")


MEASURES = '"sqlmatch".annual_pass_measures'
WEIGHTS = '"sqlmatch".annual_pass_weights'


def compiled_step(spec_path: str, name: str) -> str:
    """The step's SQL as sqlmatch compiles it: the SELECT of a table step, or a query step's query."""
    from sqlmatch import api

    spec = api.load(spec_path)
    step = next(s for s in api.compile_plan(spec).steps if s.name == name)
    if step.kind == "query":
        (query,) = step.statements
        return query
    (create,) = [s for s in step.statements if s.lstrip().upper().startswith("CREATE")]
    return create.split(" AS\n", 1)[1]


def unit_measures_variants(spec_path: str) -> dict[str, tuple[str, bool]]:
    """name -> (SELECT text, must equal the compiled result)."""
    compiled = compiled_step(spec_path, "unit_measures")
    EVENT_DATES["on"] = "first_event_at" in compiled
    return {
        "compiled": (compiled, True),
        "aggregate_first": (flat("none"), True),
        "semi_join": (flat("semi"), True),
        "day_preagg": (day_preagg("inner"), True),
        "day_preagg_first": (day_preagg("none"), True),
        "bitmask_days": (flat("inner", bitmask=True), True),
        "floor": (FLOOR_SQL.split(" AS\n", 1)[1], False),
        "no_distinct": (flat("inner", with_distinct=False), False),
    }


def _histogram_parts(spec_path: str):
    from sqlmatch import api
    from sqlmatch.plan import HISTOGRAM_BINS

    spec = api.load(spec_path)
    features = [f.name for f in spec.numeric_features]
    bins = HISTOGRAM_BINS
    grid = (
        "grid AS (\n  SELECT b.bin, g.treated\n  FROM ("
        + " UNION ALL ".join(f"SELECT {k} AS bin" for k in range(bins))
        + ") AS b\n  CROSS JOIN (SELECT 0 AS treated UNION ALL SELECT 1 AS treated) AS g\n)"
    )
    wide = "ranges_wide AS (\n  SELECT\n    " + ",\n    ".join(
        f"MIN({f}) AS {f}__low, (MAX({f}) - MIN({f})) / {float(bins)} AS {f}__width" for f in features
    ) + f"\n  FROM {MEASURES}\n)"
    return features, bins, grid, wide


def _bin(value: str, low: str, width: str, bins: int) -> str:
    # the compiled template's binning expression, unchanged
    return f"COALESCE(LEAST(CAST(FLOOR(({value} - {low}) / NULLIF({width}, 0)) AS INTEGER), {bins - 1}), 0)"


def histogram_one_pass(spec_path: str) -> str:
    features, bins, grid, wide = _histogram_parts(spec_path)
    names = "feature_list AS (\n  " + " UNION ALL ".join(f"SELECT '{f}' AS feature" for f in features) + "\n)"
    pick = lambda prefix, suffix: "CASE fl.feature " + " ".join(f"WHEN '{f}' THEN {prefix}{f}{suffix}" for f in features) + " END"  # noqa: E731
    ranges = (
        f"ranges AS (\n  SELECT fl.feature, {pick('w.', '__low')} AS low, {pick('w.', '__width')} AS width\n"
        "  FROM ranges_wide AS w CROSS JOIN feature_list AS fl\n)"
    )
    value = "CASE r.feature " + " ".join(f"WHEN '{f}' THEN m.{f}" for f in features) + " END"
    counts = f"""counts AS (
  SELECT
    r.feature,
    {_bin(value, 'r.low', 'r.width', bins)} AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM {MEASURES} AS m
  LEFT JOIN {WEIGHTS} AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN ranges AS r
  WHERE NOT {value} IS NULL
  GROUP BY r.feature, {_bin(value, 'r.low', 'r.width', bins)}, m.treated
)"""
    return f"""WITH {grid}, {names}, {wide}, {ranges}, {counts}
SELECT r.feature, r.low, r.width, g.bin, g.treated, COALESCE(c.n_units, 0) AS n_units, COALESCE(c.sum_w, 0) AS sum_w
FROM ranges AS r
CROSS JOIN grid AS g
LEFT JOIN counts AS c
  ON c.feature = r.feature AND c.bin = g.bin AND c.treated = g.treated
ORDER BY feature, bin, treated"""


def histogram_grouping_sets(spec_path: str) -> str:
    features, bins, grid, wide = _histogram_parts(spec_path)
    binned = "binned AS (\n  SELECT m.treated, COALESCE(w.weight, 0) AS w,\n    " + ",\n    ".join(
        f"CASE WHEN m.{f} IS NULL THEN NULL ELSE {_bin('m.' + f, 'r.' + f + '__low', 'r.' + f + '__width', bins)} END AS {f}__bin" for f in features
    ) + f"\n  FROM {MEASURES} AS m\n  LEFT JOIN {WEIGHTS} AS w\n    ON w.unit_key = m.unit_key\n  CROSS JOIN ranges_wide AS r\n)"
    counts = (
        "counts AS (\n  SELECT " + ", ".join(f"{f}__bin" for f in features) + ", treated, COUNT(*) AS n_units, SUM(w) AS sum_w\n"
        "  FROM binned\n  GROUP BY GROUPING SETS (" + ", ".join(f"({f}__bin, treated)" for f in features) + ")\n)"
    )
    selects = "\nUNION ALL\n".join(
        f"SELECT '{f}' AS feature, r.{f}__low AS low, r.{f}__width AS width, g.bin, g.treated, "
        f"COALESCE(c.n_units, 0) AS n_units, COALESCE(c.sum_w, 0) AS sum_w\n"
        f"FROM grid AS g CROSS JOIN ranges_wide AS r\n"
        f"LEFT JOIN counts AS c ON c.{f}__bin = g.bin AND c.treated = g.treated"
        for f in features
    )
    return f"WITH {grid}, {wide}, {binned}, {counts}\n{selects}\nORDER BY feature, bin, treated"


def histogram_variants(spec_path: str) -> dict[str, tuple[str, bool]]:
    return {
        "compiled": (compiled_step(spec_path, "feature_histograms"), True),
        "one_pass": (histogram_one_pass(spec_path), True),
        "grouping_sets": (histogram_grouping_sets(spec_path), True),
    }


def compare_tables(con, a: str, b: str) -> int:
    """Units whose values differ by more than 1e-9 relative (or that are missing on one side)."""
    checks = " OR ".join(
        f"abs(coalesce(x.{c}, -1e300) - coalesce(y.{c}, -1e300)) > 1e-9 * (1 + abs(coalesce(x.{c}, 0)))" for c, _ in OUT_COLUMNS
    )
    if EVENT_DATES["on"]:
        checks += " OR x.first_event_at IS DISTINCT FROM y.first_event_at OR x.last_event_at IS DISTINCT FROM y.last_event_at"
    return con.execute(
        f"SELECT COUNT(*) FROM {a} AS x FULL JOIN {b} AS y ON x.unit_key = y.unit_key "
        f"WHERE x.unit_key IS NULL OR y.unit_key IS NULL OR x.treated <> y.treated OR {checks}"
    ).fetchone()[0]


def compare_rows(a: list[tuple], b: list[tuple]) -> int:
    """Rows (in order) that differ; floats to 1e-9 relative."""
    if len(a) != len(b):
        return abs(len(a) - len(b)) + sum(1 for x, y in zip(a, b) if not _same_row(x, y))
    return sum(1 for x, y in zip(a, b) if not _same_row(x, y))


def _same_row(x: tuple, y: tuple) -> bool:
    if len(x) != len(y):
        return False
    for u, v in zip(x, y):
        if isinstance(u, float) or isinstance(v, float):
            if u is None or v is None or abs(float(u) - float(v)) > 1e-9 * (1 + abs(float(u))):
                return False
        elif u != v:
            return False
    return True


def query_joins(args, duckdb) -> int:
    from sqlmatch import api

    sys.path.insert(0, str(HERE))
    from scale import _profile_summary

    spec = api.load(args.spec)
    steps = [s for s in api.compile_plan(spec).steps if s.kind == "query"]
    con = duckdb.connect(args.database, read_only=True)
    prof = Path(tempfile.mkdtemp(prefix="step_variants_")) / "profile.json"
    rows = {}
    for rep in range(args.repeats):
        for step in steps:
            (sql,) = step.statements
            con.execute("SET enable_profiling = 'json'")
            con.execute(f"SET profiling_output = '{prof}'")
            t0 = time.perf_counter()
            con.execute(sql).fetchall()
            wall = time.perf_counter() - t0
            con.execute("PRAGMA disable_profiling")
            summ = _profile_summary(prof)
            total = sum(o["seconds"] for o in summ["operators"]) or 1e-12
            joins = sum(o["seconds"] for o in summ["operators"] if o["operator"].startswith("HASH_JOIN"))
            rows.setdefault(step.name, []).append((wall, joins / total))
    con.close()
    shutil.rmtree(prof.parent, ignore_errors=True)
    lines = [
        f"query steps on {args.database} ({args.repeats} rounds; DuckDB {duckdb.__version__}, {os.cpu_count()} CPUs)",
        "",
        "| step | time, median | share of operator time in hash joins |",
        "|---|---|---|",
    ]
    for name, vals in sorted(rows.items(), key=lambda kv: -statistics.median(v[0] for v in kv[1])):
        lines.append(f"| {name} | {statistics.median(v[0] for v in vals):.2f} s | {100 * statistics.median(v[1] for v in vals):.0f}% |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
    return 0


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--step", choices=("unit_measures", "feature_histograms", "query_joins"), default="unit_measures")
    p.add_argument("--database", required=True)
    p.add_argument("--spec", required=True, help="the demo spec the study ran with (a copy beside the database)")
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--only", help="comma-separated variant names")
    p.add_argument("--code", help="import sqlmatch from this directory (e.g. the code snapshot scale.py ran)")
    p.add_argument("--show-sql", action="store_true", help="print each variant's SQL and exit")
    p.add_argument("--memory-limit", help="DuckDB memory_limit for the connection (e.g. 1GB); a variant that runs out is reported")
    p.add_argument("--out")
    args = p.parse_args()
    if args.code:
        sys.path.insert(0, args.code)
    import duckdb

    if args.step == "query_joins":
        return query_joins(args, duckdb)
    vs = unit_measures_variants(args.spec) if args.step == "unit_measures" else histogram_variants(args.spec)
    if args.only:
        vs = {k: v for k, v in vs.items() if k == "compiled" or k in args.only.split(",")}
    if args.show_sql:
        for n, (sql, _) in vs.items():
            print(f"-- {n}\n{sql}\n")
        return 0
    config = {"memory_limit": args.memory_limit, "temp_directory": tempfile.mkdtemp(prefix="step_variants_spill_")} if args.memory_limit else {}
    con = duckdb.connect(args.database, config=config)
    needed = ["annual_pass_units"] + (["annual_pass_measures", "annual_pass_weights"] if args.step == "feature_histograms" else [])
    for t in needed:
        if con.execute(f"SELECT COUNT(*) FROM information_schema.tables WHERE table_schema = 'sqlmatch' AND table_name = '{t}'").fetchone()[0] == 0:
            raise SystemExit(f"sqlmatch.{t} is missing: run the demo study (coarsened_exact) on this database first")
    names = list(vs)
    times: dict[str, list[float]] = {n: [] for n in names}
    peaks: dict[str, list[int]] = {n: [] for n in names}
    prof = Path(tempfile.mkdtemp(prefix="step_variants_")) / "profile.json"
    mismatches: dict[str, int] = {}
    failures: dict[str, str] = {}
    reference_rows = None
    for rep in range(args.repeats):
        order = names[rep % len(names):] + names[: rep % len(names)]
        for n in order:
            sql, same = vs[n]
            table = f"bench_step_{n}"
            con.execute(f"DROP TABLE IF EXISTS {table}")
            con.execute("SET enable_profiling = 'json'")
            con.execute(f"SET profiling_output = '{prof}'")
            t0 = time.perf_counter()
            try:
                if args.step == "unit_measures":
                    con.execute(f"CREATE TABLE {table} AS\n{sql}")
                    rows = None
                else:
                    rows = con.execute(sql).fetchall()
            except duckdb.Error as err:
                con.execute("PRAGMA disable_profiling")
                failures[n] = f"{type(err).__name__}: {str(err).splitlines()[0]}"
                print(f"round {rep + 1} {n}: FAILED {failures[n]}", file=sys.stderr, flush=True)
                continue
            times[n].append(time.perf_counter() - t0)
            con.execute("PRAGMA disable_profiling")
            d = json.loads(prof.read_text())
            peaks[n].append(int(d.get("system", {}).get("peak_buffer_memory") or 0))
            print(f"round {rep + 1} {n}: {times[n][-1]:.2f}s", file=sys.stderr, flush=True)
            if rep == 0 and same and n != "compiled" and "compiled" not in failures:
                if args.step == "unit_measures":
                    if "bench_step_reference" not in mismatches:
                        con.execute("DROP TABLE IF EXISTS bench_step_reference")
                        con.execute(f"CREATE TABLE bench_step_reference AS\n{vs['compiled'][0]}")
                        mismatches["bench_step_reference"] = 0
                    mismatches[n] = compare_tables(con, table, "bench_step_reference")
                else:
                    if reference_rows is None:
                        reference_rows = con.execute(vs["compiled"][0]).fetchall()
                        if not reference_rows:
                            raise SystemExit("the compiled query returned no rows: nothing to compare against")
                    mismatches[n] = compare_rows(rows, reference_rows)
            con.execute(f"DROP TABLE IF EXISTS {table}")
    con.execute("DROP TABLE IF EXISTS bench_step_reference")
    con.execute(f"DROP TABLE IF EXISTS {FLOOR_TABLE}")
    con.close()
    shutil.rmtree(prof.parent, ignore_errors=True)
    if config:
        shutil.rmtree(config["temp_directory"], ignore_errors=True)
    base = statistics.median(times["compiled"]) if times.get("compiled") else None
    what = "units" if args.step == "unit_measures" else "rows"
    lines = [
        f"{args.step} variants on {args.database} ({args.repeats} rounds, alternated; DuckDB {duckdb.__version__}, {os.cpu_count()} CPUs"
        + (f", memory_limit {args.memory_limit}" if args.memory_limit else "") + ")",
        "",
        f"| variant | time, median [min–max] | vs compiled | peak buffer memory (median) | {what} differing from compiled |",
        "|---|---|---|---|---|",
    ]
    for n in names:
        t = times[n]
        if not t:
            lines.append(f"| {n} | failed: {failures.get(n)} | | | |")
            continue
        rel = f"{statistics.median(t) / base:.2f}×" if base else ""
        diff = "(reference)" if n == "compiled" else mismatches.get(n, "n/a (diagnostic)" if not vs[n][1] else "")
        lines.append(
            f"| {n} | {statistics.median(t):.2f} s [{min(t):.2f}–{max(t):.2f}] | {rel} | "
            f"{statistics.median(peaks[n]) / 1024**3:.2f} GiB | {diff} |"
        )
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
