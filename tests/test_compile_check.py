"""`sqlmatch compile --check DIR`: a team's CI keeps the reviewed SQL in step with the spec."""

from __future__ import annotations

import shutil

from sqlmatch.cli import main

from conftest import DEMO_SPEC


def test_check_passes_when_in_step_and_shows_a_diff_when_not(tmp_path, capsys):
    spec = tmp_path / "annual_pass.toml"
    shutil.copyfile(DEMO_SPEC, spec)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--dialect", "postgres", "--out", str(sql)]) == 0
    assert main(["compile", str(spec), "--dialect", "postgres", "--check", str(sql)]) == 0
    capsys.readouterr()

    spec.write_text(spec.read_text().replace("pre = 6", "pre = 5"))
    assert main(["compile", str(spec), "--dialect", "postgres", "--check", str(sql)]) == 1
    captured = capsys.readouterr()
    assert "-        e.\"started_at\" >= CAST('2025-09-01' AS DATE)" in captured.out
    assert "+        e.\"started_at\" >= CAST('2025-10-01' AS DATE)" in captured.out
    assert "differs from what" in captured.err

    (sql / "99_extra.sql").write_text("SELECT 1;\n")
    spec.write_text(spec.read_text().replace("pre = 5", "pre = 6"))
    assert main(["compile", str(spec), "--dialect", "postgres", "--check", str(sql)]) == 1
    assert "99_extra.sql" in capsys.readouterr().out
