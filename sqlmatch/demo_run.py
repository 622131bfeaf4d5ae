"""`sqlmatch demo`: build the bike-share demo warehouse and run the demo study end to end.

The generator and the demo spec ship inside the package (sqlmatch.demo_warehouse), so this
works after a plain `pip install .` from any directory.
"""

from __future__ import annotations

import re
import shutil
import time
from importlib import resources
from pathlib import Path

from sqlglot import exp

from sqlmatch.effects import study_results
from sqlmatch import api
from sqlmatch.demo import DEMO_TRUTH_TABLE, build_demo_warehouse
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.plan import build_plan
from sqlmatch.runner import Progress, run_plan
from sqlmatch.spec import load_spec

DEMO_SPEC = "annual_pass.toml"
DEMO_DATABASE = "bikeshare.duckdb"


def demo_spec_path() -> Path:
    try:
        path = Path(str(resources.files("sqlmatch.demo_warehouse") / DEMO_SPEC))
        if path.is_file():
            return path
    except ModuleNotFoundError:
        pass
    return Path(__file__).resolve().parents[1] / "demo_warehouse" / DEMO_SPEC


_CREATED = re.compile(r"^\s*(CREATE\s+TABLE|INSERT\s+INTO)\s+([A-Za-z_][A-Za-z0-9_]*)(\s*\()?", re.IGNORECASE | re.MULTILINE)


def build_demo(out: Path, riders: int, seed: int, progress: Progress | None = None) -> Path:
    """A fresh demo database in out/, with the demo spec copied beside it; returns the spec path.
    With `progress`, one line per table the generator writes (its rows and seconds)."""
    out.mkdir(parents=True, exist_ok=True)
    database = out / DEMO_DATABASE
    for stale in (database, database.with_suffix(".duckdb.wal")):
        stale.unlink(missing_ok=True)
    progress = progress or Progress(quiet=True)
    start = time.perf_counter()
    with DuckDBEngine(str(database)) as engine:
        pending: dict = {}  # the table being written (trips takes one INSERT per month) and its seconds so far

        def flush():
            if pending:
                name = pending.pop("name")
                rows = engine.fetch(exp.select("COUNT(*)").from_(exp.to_identifier(name, quoted=True)).sql("duckdb")).rows[0][0]
                progress.note(f"demo warehouse: {name:<22} {pending.pop('seconds'):8.2f}s {rows:>12,} rows written")

        def execute(statement: str):
            t0 = time.perf_counter()
            engine.execute(statement)
            created = _CREATED.search("\n".join(line for line in statement.splitlines() if not line.lstrip().startswith("--")))
            # a CREATE TABLE with a column list is filled by later INSERTs: reported once, after the last
            if created and not progress.quiet and not (created.group(1).upper().startswith("CREATE") and created.group(3)):
                name = created.group(2)
                if pending.get("name") != name:
                    flush()
                    pending.update(name=name, seconds=0.0)
                pending["seconds"] += time.perf_counter() - t0

        progress.note(f"building the demo warehouse: {riders:,} riders (seed {seed})")
        build_demo_warehouse(execute, riders=riders, seed=seed)
        flush()
    size = database.stat().st_size / 2**20
    progress.note(f"demo warehouse built in {time.perf_counter() - start:.1f}s: {database} ({size:,.0f} MiB)")
    spec_path = out / DEMO_SPEC
    shutil.copyfile(demo_spec_path(), spec_path)
    return spec_path


def read_truth(engine) -> dict[str, float]:
    query = exp.select("outcome", "true_att").from_(DEMO_TRUTH_TABLE).order_by("outcome")
    return {row[0]: float(row[1]) for row in engine.fetch(query.sql(engine.dialect)).rows}


def run_demo(out: Path, riders: int = 20_000, seed: int = 20260301, progress: Progress | None = None):
    spec_path = build_demo(out, riders, seed, progress)
    spec = load_spec(spec_path)
    plan = build_plan(spec, "duckdb")
    api.write_plan(plan, out / "sql")
    with DuckDBEngine(str(out / DEMO_DATABASE)) as engine:
        output = run_plan(plan, spec, engine, progress=progress)
        results = study_results(spec, output.plan, output)
        results.demo_truth = read_truth(engine)
    return results, api.write_results(results, out, progress=progress)
