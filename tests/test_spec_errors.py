"""Bad specs get one clear line naming the key and how to fix it, a non-zero exit, no traceback,
and leave no study table behind."""

from __future__ import annotations

import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import duckdb
import pytest

from sqlmatch.cli import main
from sqlmatch.errors import SpecError
from sqlmatch.spec import parse_filter, parse_spec

from conftest import DEMO_SPEC


def base_spec() -> dict:
    return tomllib.loads(DEMO_SPEC.read_text())


def write_spec(tmp_path: Path, raw: dict, database: Path) -> Path:
    """Serialise a spec dict as TOML (only the shapes our specs use)."""
    raw = dict(raw)
    raw["study"] = {**raw["study"], "database": str(database)}
    lines = []

    def value(v):
        if isinstance(v, str):
            return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return repr(v)

    def table(prefix, d):
        subs = {k: v for k, v in d.items() if isinstance(v, dict)}
        lines.append(f"[{prefix}]")
        for k, v in d.items():
            if not isinstance(v, dict):
                lines.append(f"{k} = {value(v)}")
        for k, v in subs.items():
            table(f"{prefix}.{k}", v)

    for key, section in raw.items():
        if not isinstance(section, (dict, list)):
            lines.append(f"{key} = {value(section)}")
    for key, section in raw.items():
        if isinstance(section, dict):
            table(key, section)
        elif isinstance(section, list):
            for item in section:
                lines.append(f"[[{key}]]")
                for k, v in item.items():
                    lines.append(f"{k} = {value(v)}")
    path = tmp_path / "study.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def run_cli(args, capsys) -> tuple[int, str]:
    code = main(args)
    err = capsys.readouterr().err
    return code, err


def study_tables(database: Path) -> list[str]:
    with duckdb.connect(str(database), read_only=True) as con:
        rows = con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()
    return [r[0] for r in rows]


def mutate(raw, path, value):
    """Set raw[path...] = value; path items are keys or list indices; value None deletes."""
    target = raw
    for p in path[:-1]:
        target = target[p]
    if value is None:
        del target[path[-1]]
    else:
        target[path[-1]] = value
    return raw


CASES = [
    # (id, path, new value, key named in the message, words of the fix)
    ("unknown top-level key", ["colour"], "blue", "colour", "use one of"),
    ("unknown key in a section", ["treatment", "cohrt"], "2026-03", "treatment.cohrt", "use one of"),
    ("missing cohort", ["treatment", "cohort"], None, "treatment.cohort", "set cohort"),
    ("cohort not a month", ["treatment", "cohort"], "March", "treatment.cohort", "YYYY-MM"),
    ("window length wrong type", ["windows", "pre"], "six", "windows.pre", "whole number"),
    ("unknown control pool", ["treatment", "control_pool"], "everyone", "treatment.control_pool", "one of"),
    ("missing units table", ["units", "table"], "riderz", "units.table", "was not found"),
    ("missing events table", ["events", "table"], "tripz", "events.table", "was not found"),
    ("missing key column", ["units", "key"], "rider", "units.key", "use one of its columns"),
    ("missing measure column", ["features", 1, "measure"], "mins", "features[1] (pre_minutes).measure", "use one of its columns"),
    ("non-date enrolment column", ["units", "enrolled_on"], "age_band", "units.enrolled_on", "date or timestamp"),
    ("filter with a statement", ["eligibility", "filters"], ["1 = 1; DROP TABLE riders"], "eligibility.filters[0]", "exactly one"),
    ("filter that is a query", ["eligibility", "filters"], ["SELECT 1"], "eligibility.filters[0]", "is not allowed in a filter"),
    ("filter with a subquery", ["eligibility", "filters"], ["rider_id IN (SELECT rider_id FROM trips)"], "eligibility.filters[0]", "other than a list of values"),
    ("filter on a missing column", ["eligibility", "filters"], ["joined < DATE '2025-01-01'"], "eligibility.filters[0]", "use one of its columns"),
    ("empty cohort", ["treatment", "cohort"], "2030-01", "treatment.cohort", "cohort is empty"),
    ("no eligible controls", ["eligibility", "filters"], ["pass_bought_on < DATE '2026-04-01'"], "treatment.control_pool", "no eligible control"),
    ("cut points not increasing", ["matching", "cut_points", "pre_trips"], [5, 3], "matching.cut_points.pre_trips", "strictly increasing"),
    ("bad feature name", ["features", 0, "name"], "Pre Trips", "features[0].name", "lower-case"),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_spec_gives_clear_error(case, demo_dir, tmp_path, capsys):
    _, path, new, key, fix_words = case
    raw = mutate(base_spec(), path, new)
    database = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", database)
    spec_path = write_spec(tmp_path, raw, database)
    code, err = run_cli(["run", str(spec_path), "--out", str(tmp_path / "out"), "--quiet"], capsys)
    assert code != 0
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("sqlmatch: error:")
    assert f"'{key}'" in lines[0], lines[0]
    assert fix_words in lines[0], lines[0]
    assert "Traceback" not in err
    assert study_tables(database) == []
    assert not (tmp_path / "out" / "results.json").exists()


def test_cli_error_has_no_traceback_in_a_real_process(tmp_path):
    raw = mutate(base_spec(), ["treatment", "cohort"], "2026-13")
    spec_path = write_spec(tmp_path, raw, tmp_path / "none.duckdb")
    proc = subprocess.run(
        [sys.executable, "-m", "sqlmatch.cli", "compile", str(spec_path), "--out", str(tmp_path / "sql")],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "'treatment.cohort'" in proc.stderr


def test_unknown_dialect_suggests_the_near_one(tmp_path, capsys):
    code, err = run_cli(["compile", str(DEMO_SPEC), "--dialect", "postgress", "--out", str(tmp_path)], capsys)
    assert code == 2
    assert "Did you mean 'postgres'?" in err


@pytest.mark.parametrize(
    "text",
    [
        "1 = 1; DELETE FROM riders",
        "x = 1 /* */; DROP TABLE riders",
        "DROP TABLE riders",
        "INSERT INTO riders VALUES (1)",
        "signup_date",  # not a boolean expression
        "EXISTS (SELECT 1 FROM trips)",
        "",
    ],
)
def test_filters_other_than_one_boolean_expression_are_refused(text):
    with pytest.raises(SpecError) as info:
        parse_filter(text, "eligibility.filters[0]")
    assert info.value.key == "eligibility.filters[0]"


def test_comments_in_filters_never_reach_the_sql():
    tree = parse_filter("signup_date < DATE '2025-09-01' -- */ DROP TABLE riders", "eligibility.filters[0]")
    assert "DROP" not in tree.sql()


def test_spec_parses_from_a_dict():
    spec = parse_spec(base_spec())
    assert spec.windows.pre_start.isoformat() == "2025-09-01"
    assert spec.windows.post_end.isoformat() == "2026-07-01"
