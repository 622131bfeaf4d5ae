"""The command line and Python API an analyst acts on: `init` output that runs, `compile --check`
in the folder's own mode, a clear refusal where a plan would be partial, and StudyResults helpers."""

from __future__ import annotations

import html
import json
import math
import shutil
from pathlib import Path

import pytest

from sqlmatch import api
from sqlmatch.cli import main
from sqlmatch.results import BalanceRow, Effect, Interval, MatchingSummary, StudyResults

from conftest import DEMO_SPEC


# ------------------------------------------------------------------------------------------ init


def test_init_writes_the_database_relative_to_the_spec(demo_dir, tmp_path, capsys):
    db = demo_dir / "bikeshare.duckdb"
    out = tmp_path / "studies" / "pass.toml"
    out.parent.mkdir()
    assert main(["init", "--database", str(db), "--units", "riders", "--events", "trips", "--cohort", "2026-03", "--out", str(out)]) == 0
    spec = api.load(out)
    assert spec.database is not None and not Path(spec.database).is_absolute()
    # The first run needs no --database: the spec's own line, read from the spec's folder, opens the file.
    assert (out.parent / spec.database).resolve() == db.resolve()
    api.open_engine(spec).close()
    assert 'cohort = "2026-03"' in out.read_text() and "GUESS: a placeholder" not in out.read_text()
    assert "placeholder" not in capsys.readouterr().out


def test_init_says_the_cohort_is_a_placeholder_when_not_given(demo_dir, tmp_path, capsys):
    out = tmp_path / "s.toml"
    assert main(["init", "--database", str(demo_dir / "bikeshare.duckdb"), "--units", "riders", "--events", "trips", "--out", str(out)]) == 0
    (cohort_line,) = [line for line in out.read_text().splitlines() if line.startswith("cohort =")]
    assert "GUESS" in cohort_line and "not read from the data" in cohort_line
    printed = capsys.readouterr().out
    assert "treatment.cohort is a placeholder" in printed and "--cohort" in printed
    api.load(out)  # the placeholder is a valid month: the spec loads


# ------------------------------------------------------------------------------ compile --check


def _spec_copy(tmp_path, method: str | None = None) -> Path:
    spec = tmp_path / "annual_pass.toml"
    text = DEMO_SPEC.read_text()
    if method is not None:
        assert 'method = "coarsened_exact"' in text
        text = text.replace('method = "coarsened_exact"', f'method = "{method}"')
    spec.write_text(text)
    return spec


def test_check_reads_the_scheduler_mode_from_the_manifest(tmp_path, capsys):
    spec = _spec_copy(tmp_path)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--dialect", "postgres", "--for-scheduler", "--out", str(sql)]) == 0
    capsys.readouterr()
    # Neither --for-scheduler nor --dialect: both come from the folder's manifest.json.
    assert main(["compile", str(spec), "--check", str(sql)]) == 0
    assert "matches" in capsys.readouterr().out

    spec.write_text(spec.read_text().replace("pre = 6", "pre = 5"))
    assert main(["compile", str(spec), "--check", str(sql)]) == 1
    captured = capsys.readouterr()
    changed = [line for line in captured.out.splitlines() if line[:1] in "+-" and line[:3] not in ("+++", "---")]
    # only the window dates, and each aggregate table's spec fingerprint, not every file
    assert len([line for line in changed if "plan__fingerprint" not in line]) < 60
    assert "--for-scheduler" in captured.err and "--dialect postgres" in captured.err  # advice keeps the folder's mode


def test_check_refuses_a_mode_or_dialect_other_than_the_folders(tmp_path, capsys):
    spec = _spec_copy(tmp_path)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--dialect", "postgres", "--out", str(sql)]) == 0
    capsys.readouterr()
    assert main(["compile", str(spec), "--for-scheduler", "--check", str(sql)]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and len(captured.err.splitlines()) == 1 and "direct plan" in captured.err
    assert main(["compile", str(spec), "--dialect", "duckdb", "--check", str(sql)]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and "compiled for postgres" in captured.err


@pytest.mark.parametrize("method", ["score_bins", "nearest_neighbour"])
def test_compile_of_a_score_method_without_its_model_is_an_error(tmp_path, capsys, method):
    from sqlmatch.matching import method_for

    assert method_for(method).uses_score
    spec = _spec_copy(tmp_path, method)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql)]) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "sqlmatch run" in err and "annual_pass.model.json" in err
    assert not sql.exists()  # nothing half written


# ---------------------------------------------------------------------------------- StudyResults


def _effect(outcome: str, estimate: float, n_treated: int, n_control: int) -> Effect:
    return Effect(
        outcome=outcome, kind="continuous", estimator="stratified ATT", estimate=estimate, std_error=0.5,
        ci_low=estimate - 0.98, ci_high=estimate + 0.98, n_treated=n_treated, n_control=n_control,
        mean_treated=3.0, mean_control=1.0, naive=Interval(2.5, 0.4, 1.7, 3.3), sensitivity={"e_value": 2.0},
    )


@pytest.fixture()
def results() -> StudyResults:
    # Invented figures: only their rendering is under test. One outcome has a small count (7 < 10).
    return StudyResults(
        study="pass <study>", cohort="2026-03", dialect="duckdb", windows={},
        matching=MatchingSummary(method="coarsened_exact", n_treated=120, n_treated_matched=110, n_control=900,
                                 n_control_matched=7, strata=12, strata_dropped=3),
        balance=[
            BalanceRow("pre_trips", "numeric", 4.0, 2.0, 0.8, 1.2, 4.0, 3.9, 0.02, 1.0),
            BalanceRow("age_band=18-24", "level", 0.3, 0.2, 0.23, None, 0.3, 0.3, float("nan"), None),
        ],
        effects=[_effect("post_trips", 1.75, 110, 500), _effect("post_<b>&minutes", -0.25, 110, 7)],
        rows_fetched=40, min_cell_size=10,
    )


def test_effect_of_an_unknown_outcome_names_the_known_ones(results):
    assert results.effect("post_trips").estimate == 1.75
    with pytest.raises(KeyError, match="post_trips"):
        results.effect("nope")


def test_frames_are_tidy_and_suppress_small_counts_as_results_json_does(results):
    effects = results.effects_frame()
    assert list(effects["outcome"]) == ["post_trips", "post_<b>&minutes"]
    assert "sensitivity" not in effects.columns
    as_json = json.loads(results.to_json())["effects"]
    assert effects.loc[0, "naive.ci_low"] == 1.7  # nested figures become dotted columns
    for (_, row), record in zip(effects.iterrows(), as_json):
        for column in effects.columns:
            value = row[column]
            part, _, sub = column.partition(".")
            expected = (record[part] or {}).get(sub) if sub else record[column]
            if expected is None:
                assert value is None or (isinstance(value, float) and math.isnan(value)), column
            else:
                assert value == expected, column
    assert math.isnan(effects.loc[1, "n_control"]) or effects.loc[1, "n_control"] is None  # 7 < min_cell_size
    assert effects.loc[0, "n_control"] == 500

    balance = results.balance_frame()
    assert list(balance["covariate"]) == ["pre_trips", "age_band=18-24"]
    assert balance.loc[0, "smd_after"] == 0.02
    assert math.isnan(balance.loc[1, "smd_after"])


def test_repr_is_short_and_hides_small_counts(results):
    text = repr(results)
    assert len(text.splitlines()) <= 6
    assert "pass <study>" in text and "2026-03" in text and "coarsened_exact" in text
    assert "110 of 120 enrolled" in text and "<10 of 900" in text and " 7 " not in text
    assert "post_trips: 1.75 (95% interval 0.77 to 2.73)" in text


def test_html_repr_escapes_every_string(results):
    page = results._repr_html_()
    assert "<table>" in page and page.count("<tr>") == 3
    assert "post_<b>" not in page and html.escape("post_<b>&minutes") in page
    assert html.escape("pass <study>") in page and "<study>" not in page
    assert "<td>&lt;10</td>" in page  # the small comparison count of the second outcome
