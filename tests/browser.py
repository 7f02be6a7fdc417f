"""Open a report in real headless Chromium and say what a reader would see.

``inspect_page(html_path, screenshot_path)`` loads the file from disk (``file://``), waits
for it to finish loading, takes a full-page screenshot, and returns a :class:`PageCheck`:
console errors and uncaught page errors, the images that did not load (an ``<img>`` counts
as loaded when ``complete && naturalWidth > 0``), the number of images, the document title,
the visible text (``document.body.innerText``), the dialogs that fired and the ``<script>``
elements in the DOM.

It uses Playwright's Python package with the system Chromium (``/usr/bin/chromium``, Debian
package ``chromium``); it never downloads a browser.  :func:`missing` names what is absent so
that a test can skip with that reason.
"""

from __future__ import annotations

import importlib.util
import os
import shutil
from pathlib import Path
from typing import NamedTuple

CHROMIUM = os.environ.get("ISOSCOPE_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
VIEWPORT = {"width": 1200, "height": 900}


class PageCheck(NamedTuple):
    """What headless Chromium saw on a page."""

    console_errors: list[str]
    broken_images: list[str]
    image_count: int
    title: str
    text: str
    dialogs: list[str]
    script_count: int
    requests: list[str]


def missing() -> str | None:
    """Why the browser check cannot run here (what is missing and how to install it), or None."""
    if importlib.util.find_spec("playwright") is None:
        return "the Python package playwright is not installed: pip install playwright (no browser download needed)"
    if not (Path(CHROMIUM).is_file() or shutil.which(CHROMIUM)):
        return (
            f"Chromium is not at {CHROMIUM}: apt-get install -y chromium "
            "(or set ISOSCOPE_CHROMIUM to a Chromium binary)"
        )
    return None


_IMAGES = """() => Array.from(document.images).map((img, i) => ({
    index: i, alt: img.alt, ok: img.complete && img.naturalWidth > 0}))"""


def inspect_page(html_path: str | Path, screenshot_path: str | Path) -> PageCheck:
    """Load ``html_path`` in headless Chromium, screenshot it to ``screenshot_path``, report."""
    from playwright.sync_api import sync_playwright

    url = Path(html_path).resolve().as_uri()
    errors, dialogs, requests = [], [], []
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport=VIEWPORT)
            page.on(
                "console",
                lambda m: errors.append(f"console: {m.text}") if m.type == "error" else None,
            )
            page.on("pageerror", lambda e: errors.append(f"page error: {e}"))
            page.on("dialog", lambda d: (dialogs.append(f"{d.type}: {d.message}"), d.dismiss()))
            page.on("request", lambda r: requests.append(r.url) if r.url != url else None)
            page.goto(url, wait_until="load")
            images = page.evaluate(_IMAGES)
            page.screenshot(path=str(screenshot_path), full_page=True)
            return PageCheck(
                console_errors=errors,
                broken_images=[f"#{i['index']} {i['alt']}" for i in images if not i["ok"]],
                image_count=len(images),
                title=page.title(),
                text=page.evaluate("() => document.body.innerText"),
                dialogs=dialogs,
                script_count=page.evaluate("() => document.getElementsByTagName('script').length"),
                requests=[u for u in requests if not u.startswith("data:")],
            )
        finally:
            browser.close()
