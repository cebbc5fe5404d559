"""report.html as people see it: the demo model's report opened in Debian's headless Chromium.

Every image must load, no script or console error may be logged, nothing may reach past the
page's width (a wide table scrolls in its own box), and every number in a table is shown with at
most three significant digits. A full-page screenshot is kept in tests/artifacts/report.png.
A second test breaks a copy of the page on purpose and checks that each check catches it.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

from reranker.training.evaluate import Evaluation

from .browserpage import (
    chromium,
    full_page_screenshot,
    page_problems,
    require_browser,
    table_cells,
)

SCREENSHOT = Path(__file__).resolve().parents[1] / "artifacts" / "report.png"
# A wide desktop window (the screenshot) and a small laptop's; the page must fit both.
WIDTHS = (1280, 800)
DECIMAL = re.compile(r"-?\d+\.\d+%?")


def significant_digits(token: str) -> int:
    """Significant digits of a decimal written as text ('0.0500' -> 3, '12.3%' -> 3)."""
    return len(token.lstrip("-").rstrip("%").replace(".", "").lstrip("0"))


def over_precise(cells: list[str]) -> list[str]:
    """Cells holding a decimal number with more than three significant digits.

    A cell is split into words (and number ranges such as 0.12-0.34 into their ends); only
    words that are wholly a decimal count, so a timestamp or a version hash is not a number.
    """
    bad = []
    for cell in cells:
        for word in re.split(r"[\s,;:()]+|(?<=\d)-(?=\d)", cell):
            if DECIMAL.fullmatch(word) and significant_digits(word) > 3:
                bad.append(cell)
    return bad


def test_significant_digits_counts_as_people_read() -> None:
    assert [significant_digits(t) for t in ("0.0500", "12.3%", "-0.953", "0.95324")] == [3, 3, 3, 5]
    assert over_precise(["0.953", "0.12-0.3456", "2026-12-04T10:00:00.123456+00:00"]) == [
        "0.12-0.3456"
    ]


def test_demo_report_in_headless_chromium(demo_evaluation: Evaluation, tmp_path: Path) -> None:
    require_browser()
    report = demo_evaluation.paths["report"]
    for width in WIDTHS:
        with chromium(tmp_path / f"profile-{width}", width) as driver:
            driver.get(report.as_uri())
            images = driver.execute_script(
                "return [...document.images].map(i => [i.complete, i.naturalWidth, i.alt])"
            )
            assert len(images) >= 6  # two reliability diagrams, prefix, ablation, in-links, payoff
            assert all(done and natural > 0 for done, natural, _ in images), images
            assert page_problems(driver) == [], f"at {width}px"
            cells = table_cells(driver)
            assert len(cells) > 50
            assert over_precise(cells) == [], "numbers for people have three significant digits"
            if width == WIDTHS[0]:
                full_page_screenshot(driver, SCREENSHOT)
    assert SCREENSHOT.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # RFC 2083


BREAKAGE = {
    # what is added to the page: the problem page_problems must report
    '<img src="missing-chart.png" alt="gone">': "image not loaded",
    "<script>throw new Error('deliberate script error')</script>": "deliberate script error",
    "<script>console.error('deliberate console error')</script>": "deliberate console error",
    '<table id="wide"><tr><td style="white-space:nowrap">' + "x" * 800 + "</td></tr></table>": (
        "table#wide"
    ),
    '<div id="too-wide" style="width:3000px">wide</div>': "div#too-wide",
}


def test_the_checks_catch_a_page_broken_on_purpose(
    demo_evaluation: Evaluation, tmp_path: Path
) -> None:
    require_browser()
    broken = tmp_path / "broken"
    shutil.copytree(demo_evaluation.paths["report"].parent, broken)
    page = broken / "report.html"
    page.write_text(
        page.read_text(encoding="utf-8").replace("</body>", "".join(BREAKAGE) + "</body>"),
        encoding="utf-8",
    )
    with chromium(tmp_path / "profile", WIDTHS[1]) as driver:
        driver.get(page.as_uri())
        problems = "\n".join(page_problems(driver))
    for expected in [*BREAKAGE.values(), "the page scrolls sideways"]:
        assert expected in problems, f"{expected!r} not reported in:\n{problems}"
