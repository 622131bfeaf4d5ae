"""`sqlmatch demo`: build the bike-share demo warehouse and run the demo study end to end.

The generator and the demo spec ship inside the package (sqlmatch.demo_warehouse), so this
works after a plain `pip install .` from any directory.
"""

from __future__ import annotations

import shutil
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


def build_demo(out: Path, riders: int, seed: int) -> Path:
    """A fresh demo database in out/, with the demo spec copied beside it; returns the spec path."""
    out.mkdir(parents=True, exist_ok=True)
    database = out / DEMO_DATABASE
    for stale in (database, database.with_suffix(".duckdb.wal")):
        stale.unlink(missing_ok=True)
    with DuckDBEngine(str(database)) as engine:
        build_demo_warehouse(engine.execute, riders=riders, seed=seed)
    spec_path = out / DEMO_SPEC
    shutil.copyfile(demo_spec_path(), spec_path)
    return spec_path


def read_truth(engine) -> dict[str, float]:
    query = exp.select("outcome", "true_att").from_(DEMO_TRUTH_TABLE).order_by("outcome")
    return {row[0]: float(row[1]) for row in engine.fetch(query.sql(engine.dialect)).rows}


def run_demo(out: Path, riders: int = 20_000, seed: int = 20260301, progress: Progress | None = None):
    spec_path = build_demo(out, riders, seed)
    spec = load_spec(spec_path)
    plan = build_plan(spec, "duckdb")
    api.write_plan(plan, out / "sql")
    with DuckDBEngine(str(out / DEMO_DATABASE)) as engine:
        output = run_plan(plan, spec, engine, progress=progress)
        results = study_results(spec, output.plan, output)
        results.demo_truth = read_truth(engine)
    return results, api.write_results(results, out)
