"""The floor of scale.py against the same hand-written GROUP BY with active days counted by the
per-day bitmask sqlmatch uses on DuckDB (instead of COUNT(DISTINCT day)), alternated in one
process: how much of sqlmatch's margin over the floor comes from that one expression.

    python3 benchmarks/floor_variants.py /tmp/sqlmatch_scale_run/100M/bikeshare.duckdb 3

Prints each run and the per-pair ratio bitmask / floor. A script, not a test: nothing asserts on time.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import duckdb

sys.path.insert(0, str(Path(__file__).resolve().parent))
import scale  # noqa: E402  (the floor query lives there)


def bitmask_floor(floor: str) -> str:
    d = "DATE_DIFF('day', DATE '2025-09-01', CAST(started_at AS DATE))"
    bits = " + ".join(
        f"BIT_COUNT(BIT_OR(CASE WHEN started_at < TIMESTAMP '2026-03-01' AND {d} >= {63 * k} AND {d} < {63 * (k + 1)} "
        f"THEN CAST(1 AS BIGINT) << ({d} - {63 * k}) ELSE CAST(0 AS BIGINT) END))"
        for k in range(3)
    )
    old = "COUNT(DISTINCT CASE WHEN started_at < TIMESTAMP '2026-03-01' THEN CAST(started_at AS DATE) END)"
    assert old in floor, "scale.FLOOR_SQL changed: update this script"
    return floor.replace(old, f"({bits})")


def main(db: str, repeats: int) -> None:
    floor = scale.FLOOR_SQL.split(" AS\n", 1)[1]
    variants = {"floor": floor, "floor_bitmask": bitmask_floor(floor)}
    con = duckdb.connect(db)
    con.execute("SET memory_limit='12GB'")
    seconds: dict[str, list[float]] = {k: [] for k in variants}
    checks = {}
    for _ in range(repeats):
        for name, sql in variants.items():
            con.execute("DROP TABLE IF EXISTS tmp_floor_variant")
            t0 = time.perf_counter()
            con.execute("CREATE TEMP TABLE tmp_floor_variant AS " + sql)
            seconds[name].append(time.perf_counter() - t0)
            checks[name] = con.execute("SELECT COUNT(*), SUM(pre_active_days) FROM tmp_floor_variant").fetchone()
            print(name, round(seconds[name][-1], 2), flush=True)
    assert checks["floor"] == checks["floor_bitmask"], checks  # the same active days either way
    ratios = [b / f for f, b in zip(seconds["floor"], seconds["floor_bitmask"])]
    print({k: [round(x, 2) for x in v] for k, v in seconds.items()})
    print("floor_bitmask / floor per pair", [round(r, 2) for r in ratios], "median", round(statistics.median(ratios), 2))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]) if len(sys.argv) > 2 else 3)
