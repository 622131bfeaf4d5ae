"""Shared fixtures: a small demo warehouse built once per test session."""

from __future__ import annotations

from pathlib import Path

import pytest

from sqlmatch.demo_run import build_demo

REPO = Path(__file__).resolve().parents[1]
DEMO_SPEC = REPO / "demo_warehouse" / "annual_pass.toml"
SMALL_RIDERS = 6_000


def pytest_addoption(parser):
    parser.addoption(
        "--update-golden",
        action="store_true",
        default=False,
        help="rewrite the golden compiled SQL under tests/golden/ instead of comparing with it",
    )


@pytest.fixture(scope="session")
def update_golden(request) -> bool:
    return request.config.getoption("--update-golden")


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory) -> Path:
    """A demo warehouse (DuckDB file + spec) at a small size, shared by the tests that only read it."""
    out = tmp_path_factory.mktemp("demo_small")
    build_demo(out, riders=SMALL_RIDERS, seed=20260301)
    return out


@pytest.fixture
def demo_db(demo_dir, tmp_path) -> Path:
    """A private copy of the small demo warehouse, for a test that writes to it or runs a study."""
    import shutil

    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path
