"""Test helper: open a page in Debian's headless Chromium through selenium and list what is wrong
with it as people would see it (images not loaded, script or console errors, layout overflow).

Selenium drives Debian's own chromedriver, named by path, so Selenium Manager never runs and
nothing is downloaded; the driver and the browser come from the same Debian build.
"""

from __future__ import annotations

import base64
import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

from retriever import atomicfile

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
REQUIRE = "HUNCHWISE_REQUIRE_BROWSER"


def browser_required() -> bool:
    """A missing browser fails the test on CI (CI=true) or when HUNCHWISE_REQUIRE_BROWSER=1."""
    return os.environ.get(REQUIRE) == "1" or os.environ.get("CI", "").lower() == "true"


def require_browser() -> None:
    """Skip the calling test when Chromium, chromedriver or selenium is missing; fail instead
    where the browser is required (see `browser_required`)."""
    missing = [str(p) for p in (CHROMIUM, CHROMEDRIVER) if not p.exists()]
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("the selenium package (pip install -e '.[dev]')")
    if not missing:
        return
    reason = f"{', '.join(missing)} not found (apt-get install chromium chromium-driver)"
    if browser_required():
        pytest.fail(f"the browser is required here (CI=true or {REQUIRE}=1) but {reason}")
    pytest.skip(reason)


@contextmanager
def chromium(profile: Path, width: int, height: int = 900) -> Iterator[Any]:
    """A headless Chromium window of `width` x `height` CSS pixels, its console logged."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for arg in (
        "--headless=new",
        "--no-sandbox",  # root in a container has no user namespace for the sandbox
        "--disable-dev-shm-usage",
        "--disable-gpu",
        "--hide-scrollbars",  # the screenshot shows the page, not the window's scrollbars
        "--force-device-scale-factor=1",
        f"--window-size={width},{height}",
        f"--user-data-dir={profile}",
    ):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    try:
        driver.set_page_load_timeout(120)
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


# Runs in the page; returns one line per problem. An element is "overflowing" when it reaches
# past the page's width and no ancestor clips or scrolls it horizontally (a table in a
# scrolling box may be wider than the page: that box scrolls, the page does not).
LAYOUT_JS = """
const problems = [];
const root = document.documentElement;
const width = root.clientWidth;
const name = el => el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') +
  (el.className ? '.' + String(el.className).split(' ').join('.') : '') +
  ' "' + (el.innerText || el.getAttribute('alt') || '').trim().slice(0, 40) + '"';
const clipped = el => {
  for (let a = el.parentElement; a && a !== document.body; a = a.parentElement) {
    if (getComputedStyle(a).overflowX !== 'visible') return true;
  }
  return false;
};
if (root.scrollWidth > width) {
  problems.push(`the page scrolls sideways: ${root.scrollWidth}px wide in a ${width}px window`);
}
for (const el of document.body.querySelectorAll('*')) {
  const r = el.getBoundingClientRect();
  if (r.width === 0 || clipped(el)) continue;
  if (r.right > width + 1 || r.left < -1) {
    const span = `${Math.round(r.left)}..${Math.round(r.right)}px`;
    problems.push(`${name(el)} overflows the page: ${span}`);
  }
}
for (const t of document.querySelectorAll('table')) {
  const box = t.parentElement;
  const scrolls = ['auto', 'scroll'].includes(getComputedStyle(box).overflowX);
  if (t.offsetWidth > box.clientWidth + 1 && !scrolls) {
    const wide = `${t.offsetWidth}px wide in a ${box.clientWidth}px box`;
    problems.push(`${name(t)} is ${wide} that does not scroll`);
  }
}
for (const img of document.images) {
  if (!img.complete || img.naturalWidth === 0) {
    problems.push(`image not loaded: ${name(img)} ${img.src.slice(0, 60)}`);
  } else if (img.getBoundingClientRect().width < 100) {
    problems.push(`image shown too small to read: ${name(img)}`);
  }
}
return problems;
"""


def page_problems(driver: Any) -> list[str]:
    """Layout and image problems of the open page, then every console message of level SEVERE
    (script errors, console.error, failed loads), as readable lines; [] when all is well."""
    problems = list(driver.execute_script(LAYOUT_JS))
    for entry in driver.get_log("browser"):
        if entry.get("level") == "SEVERE":
            problems.append(f"console {entry.get('source')}: {entry.get('message')}")
    return problems


def table_cells(driver: Any) -> list[str]:
    """The text of every table cell as rendered."""
    return list(
        driver.execute_script("return [...document.querySelectorAll('td')].map(td => td.innerText)")
    )


def full_page_screenshot(driver: Any, path: Path) -> Path:
    """The whole page (not just the window) as a PNG at `path`, written atomically.

    Through the DevTools protocol, as Selenium's full-page screenshot exists only for Firefox.
    """
    size = driver.execute_cdp_cmd("Page.getLayoutMetrics", {})["cssContentSize"]
    shot = driver.execute_cdp_cmd(
        "Page.captureScreenshot",
        {
            "format": "png",
            "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1},
        },
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    atomicfile.write_bytes(path, base64.b64decode(shot["data"]))
    return path
