"""``triage report --html``: a self-contained page, hostile strings inert, checked in a real browser."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest
from typer.testing import CliRunner

from tests.views.conftest import QUIET_HOST
from triage.cli import app
from triage.exitcodes import Exit

ROOT = Path(__file__).resolve().parents[2]
runner = CliRunner()


@pytest.fixture(scope="module")
def page(fleet, tmp_path_factory):
    path = tmp_path_factory.mktemp("html") / "tonight.html"
    result = runner.invoke(app, ["report", "--html", str(path), "--top", "10", "--store", str(fleet["root"])])
    assert result.exit_code == Exit.OK, result.output
    return path


def _top_serials(fleet, n=3):
    ranked = json.loads(runner.invoke(app, ["rank", "--top", str(n), "--format", "json",
                                            "--store", str(fleet["root"])]).stdout)["drives"]
    return [row["serial"] for row in ranked]


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.sources = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        attrs = dict(attrs)
        for name in ("src", "href"):
            if name in attrs:
                self.sources.append(attrs[name])


def test_the_page_is_self_contained(page):
    tags = _Tags()
    tags.feed(page.read_text(encoding="utf-8"))
    assert "script" not in tags.tags and "link" not in tags.tags
    assert tags.sources and all(s.startswith("data:image/png;base64,") for s in tags.sources)
    assert "default-src 'none'" in page.read_text(encoding="utf-8")  # the page may fetch nothing


def test_hostile_strings_are_escaped_text(page):
    text = page.read_text(encoding="utf-8")
    assert "<script>" not in text and "&lt;script&gt;" in text
    assert "\x1b" not in text and "\u202e" not in text and "\\x1b[31m[b]" in text


def test_the_page_shows_the_top_drives_the_host_not_reporting_and_the_cohorts(page, fleet):
    text = page.read_text(encoding="utf-8")
    for serial in _top_serials(fleet):
        assert serial in text
    assert f'alt="counter history of {_top_serials(fleet, 1)[0]}"' in text
    assert QUIET_HOST in text
    assert re.search(r"QH-HD8T-A</td>", text) and "Tallow 14T" in text
    assert "As of the newest capture" in text
    assert "captures may have stopped arriving" in text
    degraded = text[text.index("Degraded redundancy groups"):text.index("Not reporting")]
    assert fleet["degraded_group"] in degraded and fleet["lost_serial"] in degraded
    assert "change procedure" in degraded  # the simulated fleet ends in February 2026


def test_the_page_renders_in_a_headless_browser(page, fleet, tmp_path):
    sys.path.insert(0, str(ROOT / "scripts"))
    try:
        import check_html_in_browser as checker
    finally:
        sys.path.pop(0)
    if checker.find_browser() is None:
        pytest.skip("no headless browser installed (apt-get install chromium)")
    try:
        problems = checker.check(page, _top_serials(fleet), tmp_path / "page.png")
    except subprocess.TimeoutExpired:
        pytest.skip("the browser did not answer in time")
    assert problems == []
    assert (tmp_path / "page.png").read_bytes()[:4] == b"\x89PNG"


def test_html_into_a_missing_folder_is_an_error(fleet, tmp_path):
    result = runner.invoke(app, ["report", "--html", str(tmp_path / "no" / "p.html"), "--store", str(fleet["root"])])
    assert result.exit_code == Exit.USAGE
