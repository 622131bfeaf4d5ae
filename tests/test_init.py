"""`sqlmatch init` writes a starter spec from column names and types; it loads, compiles and runs."""

from __future__ import annotations

from sqlmatch import api
from sqlmatch.cli import main


def test_init_writes_a_spec_that_runs(demo_dir, tmp_path, capsys):
    out = tmp_path / "study.toml"
    db = str(demo_dir / "bikeshare.duckdb")
    assert main(["init", "--database", db, "--units", "riders", "--events", "trips", "--name", "pass_study", "--cohort", "2026-03", "--out", str(out)]) == 0
    text = out.read_text()
    assert 'key = "rider_id"' in text and 'enrolled_on = "pass_bought_on"' in text and 'time = "started_at"' in text
    assert "GUESS" in text
    spec = api.load(out)
    assert {f.name for f in spec.features} >= {"pre_events", "pre_minutes", "pre_fare", "home_district", "age_band"}
    results = api.run(spec, database=db, keep_tables=False)
    assert results.matching.n_treated_matched > 0
    assert main(["init", "--database", db, "--units", "riders", "--events", "trips", "--out", str(out)]) == 2  # never overwrites
    assert "does not overwrite" in capsys.readouterr().err


def test_init_names_a_missing_table(demo_dir, tmp_path, capsys):
    code = main(["init", "--database", str(demo_dir / "bikeshare.duckdb"), "--units", "ridrs", "--events", "trips", "--out", str(tmp_path / "s.toml")])
    assert code == 2
    assert "'--units'" in capsys.readouterr().err


def test_init_keeps_a_name_with_a_newline_inside_its_string(tmp_path):
    # A column named across two lines must not become a line of the spec (here an [injected] table).
    import tomllib

    import duckdb

    db = tmp_path / "w.duckdb"
    hostile = 'district"\n[injected]\nmethod = "x'
    with duckdb.connect(str(db)) as con:
        con.execute(f'CREATE TABLE riders (rider_id INTEGER, pass_bought_on DATE, "{hostile.replace(chr(34), chr(34) * 2)}" VARCHAR)')
        con.execute("CREATE TABLE trips (rider_id INTEGER, started_at TIMESTAMP, minutes DOUBLE)")
    out = tmp_path / "s.toml"
    assert main(["init", "--database", str(db), "--units", "riders", "--events", "trips", "--cohort", "2026-03", "--out", str(out)]) == 0
    raw = tomllib.loads(out.read_text())  # the TOML standard's escapes, read by the standard library
    assert "injected" not in raw
    assert [f["attribute"] for f in raw["features"] if f["aggregate"] == "attribute"] == [hostile]
