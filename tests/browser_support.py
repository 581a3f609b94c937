"""Headless-browser checks of entivec's HTML pages: the machine's chromium driven by playwright.

playwright (test-only) drives the chromium of the operating system's package manager through
``executable_path=``: playwright's own browser download is not reachable from CI. ``.ci/run`` installs the
Debian package (``apt-get install chromium``); ``ENTIVEC_CHROMIUM`` names another binary. The ``browser``
generator skips, saying why, only when no chromium binary is on this machine.

``open_page`` loads a file from disk (``file://``, no server, as a reviewer opens it) and records every console
error and uncaught page error, so a test can assert there were none.
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import pytest

CANDIDATES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


def find_chromium() -> str | None:
    """The chromium binary to drive: ``ENTIVEC_CHROMIUM`` if set, else the first candidate on PATH."""
    named = os.environ.get("ENTIVEC_CHROMIUM")
    if named:
        return named if Path(named).is_file() else None
    for name in CANDIDATES:
        found = shutil.which(name)
        if found:
            return found
    return None


@dataclass
class OpenedPage:
    page: object  # playwright.sync_api.Page
    errors: list[str] = field(default_factory=list)

    def image_widths(self) -> list[int]:
        """naturalWidth of every <img>: 0 means the browser could not decode it."""
        return self.page.eval_on_selector_all("img", "els => els.map(e => e.complete ? e.naturalWidth : 0)")

    def overflowing_tables(self) -> list[str]:
        """Tables that stick out of their container's content box (its padding does not count as room)."""
        return self.page.eval_on_selector_all(
            "table",
            """els => els.filter(t => {
                const parent = t.parentElement, box = parent.getBoundingClientRect(), own = t.getBoundingClientRect();
                const style = getComputedStyle(parent);
                return own.right > box.right - parseFloat(style.paddingRight) - parseFloat(style.borderRightWidth) + 1;
            }).map(t => Array.from(t.querySelectorAll('th')).map(h => h.textContent).join(' | ').slice(0, 80))""",
        )


def chromium():
    """A headless chromium, as the body of a test module's ``browser`` fixture (``yield from chromium()``);
    skips when the machine has none (``.ci/run`` installs it)."""
    binary = find_chromium()
    if binary is None:
        pytest.skip("no chromium on this machine: `.ci/run` installs it with `apt-get install chromium`")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        # --no-sandbox: CI containers run as root, where chromium's sandbox refuses to start
        launched = pw.chromium.launch(executable_path=binary, headless=True, args=["--no-sandbox"])
        try:
            yield launched
        finally:
            launched.close()


def open_page(browser, path: Path, *, width: int = 1280, height: int = 900) -> OpenedPage:
    """Open ``path`` as a file URL in a fresh page of ``browser``; console errors and page errors are kept."""
    page = browser.new_page(viewport={"width": width, "height": height})
    opened = OpenedPage(page)
    page.on("console", lambda msg: opened.errors.append(msg.text) if msg.type == "error" else None)
    page.on("pageerror", lambda exc: opened.errors.append(str(exc)))
    # A page that asks the network for anything fails the test: every page is meant to be self-contained.
    page.route("http*://**", lambda route: (opened.errors.append(f"network request: {route.request.url}"),
                                            route.abort()))
    page.goto(Path(path).resolve().as_uri(), wait_until="load")
    return opened
