"""An open DB-API connection plus a dialect name runs a study like the native adapter does."""

from __future__ import annotations

import math
import shutil

import duckdb

from sqlmatch import api

from conftest import DEMO_SPEC


def test_a_dbapi_connection_gives_the_native_adapters_numbers(demo_dir, tmp_path):
    for name in ("a", "b"):
        (tmp_path / name).mkdir()
        shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / name / "bikeshare.duckdb")
    spec = api.load(DEMO_SPEC)
    native = api.run(spec, database=str(tmp_path / "a" / "bikeshare.duckdb"), keep_tables=False)
    con = duckdb.connect(str(tmp_path / "b" / "bikeshare.duckdb"))  # used only through its DB-API cursor()
    try:
        via = api.run(spec, engine=api.connect(con, "duckdb"), keep_tables=False)
    finally:
        con.close()
    assert via.rows_fetched == native.rows_fetched
    assert via.matching == native.matching
    for a, b in zip(native.effects, via.effects):
        assert math.isclose(a.estimate, b.estimate, rel_tol=1e-9) and math.isclose(a.std_error, b.std_error, rel_tol=1e-9)
