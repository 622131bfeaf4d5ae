"""The HTML report: self-contained, drawn from aggregates, and it renders in a real browser."""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import numpy as np
import pytest

from sqlmatch.demo_run import run_demo
from sqlmatch.report.html import render_html
from sqlmatch.report.markdown import render_markdown


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    out = tmp_path_factory.mktemp("html")
    run_demo(out, riders=4000, seed=11)
    return out / "report.html"


def test_report_is_self_contained(report):
    text = report.read_text()
    assert "<svg" in text
    # nothing is fetched when the file is opened: no scripts, stylesheets or images from elsewhere
    assert not re.search(r"<(script|link|img|iframe)\b", text)
    assert not re.search(r"(src|href)\s*=\s*[\"']?(https?:)?//", text)
    for words in ("No unmeasured confounding", "Overlap", "No interference", "inform, and do not replace, judgement"):
        assert words in text


def _browser() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


def test_report_renders_in_a_headless_browser(report, tmp_path):
    browser = _browser()
    if browser is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is missing in CI: .ci/run must install it")
        pytest.skip("no chromium on this machine (CI installs it)")
    shot = tmp_path / "report.png"
    subprocess.run(
        [
            browser,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            f"--user-data-dir={tmp_path / 'profile'}",
            "--window-size=1000,7000",
            f"--screenshot={shot}",
            report.as_uri(),
        ],
        check=True,
        capture_output=True,
        timeout=120,
    )
    import matplotlib.image

    pixels = matplotlib.image.imread(str(shot))[..., :3]
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 900
    ink = (pixels.mean(axis=2) < 0.85).mean()  # share of pixels clearly darker than the page
    r, b = pixels[..., 0], pixels[..., 2]
    vermillion = ((r > 0.7) & (b < 0.3)).mean()  # the enrolled's outlines and bars
    blue = ((b > 0.55) & (r < 0.45)).mean()  # the comparison's fills and bars
    assert ink > 0.01, f"the screenshot is (almost) blank: {ink:.4f} of pixels carry ink"
    assert vermillion > 0.0005 and blue > 0.0005, f"plot marks of a group are missing: vermillion {vermillion:.5f}, blue {blue:.5f}"


def test_markdown_report_links_the_balance_plot_beside_it(report):
    folder = report.parent
    md = (folder / "report.md").read_text()
    assert "](balance.svg)" in md
    assert (folder / "balance.svg").read_text().startswith("<svg")


def test_results_object_gives_text_and_html_summaries(tmp_path):
    results, _ = run_demo(tmp_path / "api", riders=2000, seed=3)
    assert render_markdown(results).startswith("# sqlmatch study")
    assert render_html(results).startswith("<!DOCTYPE html>")
