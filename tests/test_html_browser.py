"""A real browser (headless Chromium, Debian package `chromium`) opens the demo's HTML pages with no network:
no console error, no request beyond the file itself, a screenshot that is not blank, and the same at print size
with print media (every stage's detail shown, the diagram within the page width, a PDF printed).

Set STAGEWATCH_SCREENSHOTS=DIR to keep the screenshots for a look.
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import pytest
from PIL import Image, ImageStat

from browser import Browser

PAGES = ("plan.html", "check.html", "replay.html", "replay-change.html")
SCREEN = (1280, 900)
PRINT = (794, 1123)  # A4 at 96 CSS pixels per inch
TALLEST = 6000
HIDDEN = "[...document.querySelectorAll('details table')].filter(t => !t.checkVisibility()).length"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from stagewatch.demo import run_demo

    out = tmp_path_factory.mktemp("demo")
    lines, _ = run_demo(str(out))
    for name in PAGES:
        assert any(line.startswith(f"wrote {out / name}:") for line in lines), name  # the demo says where
    return out


def _not_blank(png: bytes, width: int) -> Image.Image:
    image = Image.open(io.BytesIO(png)).convert("RGB")
    assert image.width == width
    grey = image.convert("L")
    assert ImageStat.Stat(grey).stddev[0] > 12  # a blank or single-colour page has (almost) no spread
    inked = sum(grey.histogram()[:200]) / (image.width * image.height)
    assert inked > 0.01  # some text and lines, not just a tinted background
    assert len(image.getcolors(1 << 20) or []) > 16  # verdict colours, greys, text
    return image


def _keep(image: Image.Image, name: str) -> None:
    where = os.environ.get("STAGEWATCH_SCREENSHOTS")
    if where:
        Path(where).mkdir(parents=True, exist_ok=True)
        image.save(Path(where) / name)


@pytest.mark.slow
@pytest.mark.parametrize("name", PAGES)
def test_a_real_browser_shows_the_page_on_screen_and_in_print(demo, name):
    page = demo / name
    with Browser(deadline_s=120) as browser:
        browser.open(page.as_uri(), *SCREEN)
        assert browser.problems() == []
        assert set(browser.requests()) <= {page.as_uri()}  # nothing fetched: no network, no other file
        stages = browser.evaluate("document.querySelectorAll('svg.pipeline g.stage').length")
        assert stages == 7
        assert browser.evaluate(HIDDEN) == browser.evaluate("document.querySelectorAll('details:not([open]) table')"
                                                            ".length")  # on screen, closed details stay closed
        height = min(browser.evaluate("document.documentElement.scrollHeight"), TALLEST)
        _keep(_not_blank(browser.screenshot(SCREEN[0], height), SCREEN[0]), name.replace(".html", ".png"))

        browser.send("Emulation.setEmulatedMedia", {"media": "print"})
        browser.size(*PRINT)
        assert browser.evaluate("matchMedia('print').matches") is True
        width = browser.evaluate("document.querySelector('svg.pipeline').getBoundingClientRect().right")
        assert width <= PRINT[0]  # the diagram shrinks to the page
        widest = browser.evaluate("Math.max(...[...document.querySelectorAll('main *')].map("
                                  "e => e.getBoundingClientRect().right))")
        assert widest <= PRINT[0] + 0.5  # and so does every table: nothing is cut at the paper's edge
        assert browser.evaluate(HIDDEN) == 0  # in print, every stage's detail is shown
        height = min(browser.evaluate("document.documentElement.scrollHeight"), TALLEST)
        _keep(_not_blank(browser.screenshot(PRINT[0], height), PRINT[0]), name.replace(".html", "-print.png"))
        pdf = browser.send("Page.printToPDF", {"printBackground": True})["data"]
        assert pdf.startswith("JVBERi0")  # base64 of "%PDF-"
        assert browser.problems() == []


def _over(lines: list[str], prefix: str) -> bool:
    """Whether the summary line "<prefix>: X replayed, ..., budget Y" states X above Y."""
    line = next(x for x in lines if x.startswith(prefix))
    return float(line.split(": ")[1].split(" replayed")[0]) > float(line.split("budget ")[1].split()[0])


@pytest.mark.slow
@pytest.mark.parametrize("name", ("replay.html", "replay-change.html"))
def test_the_replay_budget_badge_agrees_with_the_pages_and_tickets_it_shows(demo, name):
    # What the browser draws: the badge's computed colour is the palette's colour of the verdict the page's own
    # figures imply (pages over budget: critical; tickets over budget alone: warn, amber; else ok).
    from stagewatch.render_html import PALETTE

    page = demo / name
    with Browser(deadline_s=120) as browser:
        browser.open(page.as_uri(), *SCREEN)
        lines = browser.evaluate("[...document.querySelectorAll('main > ul:first-of-type > li')]"
                                 ".map(li => li.textContent)")
        pages, tickets = _over(lines, "pages per week"), _over(lines, "tickets per week")
        verdict = "critical" if pages else "warn" if tickets else "ok"
        colour = browser.evaluate("getComputedStyle(document.querySelector('.budget .badge')).color")
        red, green, blue = (int(PALETTE[verdict][i:i + 2], 16) for i in (1, 3, 5))
        assert colour == f"rgb({red}, {green}, {blue})", (lines, colour)
        words = browser.evaluate("document.querySelector('.budget .badge').textContent")
        assert ("tickets over budget" in words) == tickets and ("pages over budget" in words) == pages, words
