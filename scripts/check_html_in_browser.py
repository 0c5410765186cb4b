#!/usr/bin/env python3
"""Open a page written by ``triage report --html`` in a real headless browser and check it.

    python3 scripts/check_html_in_browser.py PAGE.html [--expect SERIAL ...] [--screenshot OUT.png]

Needs a Chromium-family browser (Debian: ``apt-get install chromium``); set $TRIAGE_BROWSER to
its path if it is not on PATH as chromium / chromium-browser. Checks that the browser renders the
page (exit 0, a non-empty DOM and screenshot), that every --expect string is in the rendered DOM
(e.g. the top drives' serials), that no <script> element exists after parsing (hostile strings
stayed text) and that every <img> is an inline data: URI (no network). Prints one line per
problem; exit 0 when there is none, 1 otherwise, 77 when no browser is installed.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
from html.parser import HTMLParser
from pathlib import Path

NO_BROWSER = 77


def find_browser() -> str | None:
    chosen = os.environ.get("TRIAGE_BROWSER")
    if chosen:
        return chosen
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


class _Elements(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.scripts = 0
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "script":
            self.scripts += 1
        if tag == "img":
            self.images.append(dict(attrs).get("src") or "")


def check(page: Path, expect: list[str], screenshot: Path | None = None, browser: str | None = None) -> list[str]:
    """Problems found (empty: the page rendered and shows what was expected)."""
    browser = browser or find_browser()
    if browser is None:
        raise FileNotFoundError("no headless browser found (apt-get install chromium, or set TRIAGE_BROWSER)")
    url = page.resolve().as_uri()
    with tempfile.TemporaryDirectory() as profile:
        common = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                  f"--user-data-dir={profile}"]
        dom = subprocess.run(common + ["--dump-dom", url], capture_output=True, text=True, timeout=120)
        shot = Path(screenshot) if screenshot else Path(profile) / "page.png"
        picture = subprocess.run(common + [f"--screenshot={shot}", "--window-size=1280,2400", url],
                                 capture_output=True, text=True, timeout=120)
        shot_size = shot.stat().st_size if shot.exists() else 0
    problems = []
    if dom.returncode != 0 or not dom.stdout.strip():
        problems.append(f"{page}: the browser could not render the page (exit {dom.returncode})")
    if picture.returncode != 0 or shot_size == 0:
        problems.append(f"{page}: the browser made no screenshot (exit {picture.returncode})")
    for text in expect:
        if text not in dom.stdout:
            problems.append(f"{page}: {text!r} is not on the rendered page")
    elements = _Elements()
    elements.feed(dom.stdout)
    if elements.scripts:
        problems.append(f"{page}: the rendered page holds {elements.scripts} <script> element(s)")
    for src in elements.images:
        if not src.startswith("data:image/"):
            problems.append(f"{page}: an image is fetched from {src[:60]!r}, not inline")
    return problems


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("page", type=Path)
    parser.add_argument("--expect", action="append", default=[], help="Text the rendered page must show.")
    parser.add_argument("--screenshot", type=Path, help="Keep the screenshot here.")
    args = parser.parse_args(argv)
    try:
        problems = check(args.page, args.expect, args.screenshot)
    except FileNotFoundError as exc:
        print(f"check_html_in_browser: {exc}", file=sys.stderr)
        return NO_BROWSER
    for line in problems:
        print(line, file=sys.stderr)
    if not problems:
        print(f"{args.page}: rendered, {len(args.expect)} expected text(s) shown, no script, images inline")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
