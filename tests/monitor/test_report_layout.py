"""The report on a phone (390 px wide) and a desktop (1280 px), measured in headless Chromium: no sideways
scroll of the page, nothing cut off (a wide table scrolls in its own box), no number broken across lines,
chart text at least 9 px. Skipped when Chromium is not installed (``.ci/run`` installs it best-effort).

The page has no scripts and its Content-Security-Policy allows none; the test measures a copy of it with
``report_layout.js`` added and scripts allowed, so the layout measured is the page's own.

Invented scenario data (see test_report.py); the deployment's words are the neutral defaults, which are
longer than the demo's.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from tasks.config import LabelsConfig
from tasks.monitor.report import render_report
from tasks.monitor.report_charts import FONT_PT
from test_report import CHROMIUM, DATES, _chromium, stored_nights  # noqa: F401 (stored_nights: a fixture)

#: Smallest chart text we accept, in CSS px: about the page's figure captions (12.5 px) times 0.7.
MIN_CHART_TEXT_PX = 9.0
SCRIPT = Path(__file__).with_name("report_layout.js")


def _measure(html_path: Path, width: int, tmp: Path) -> dict:
    """Load a measuring copy of the page in a frame ``width`` CSS px wide (headless Chromium keeps its own
    window at least 500 px wide, a frame can be any width) and return what ``report_layout.js`` found."""
    page = html_path.read_text(encoding="utf-8")
    page, n = re.subn(r"default-src 'none';", "default-src 'none'; script-src 'unsafe-inline';", page)
    assert n == 1
    script = SCRIPT.read_text(encoding="utf-8").replace("FONT_PT", str(FONT_PT))
    copy = tmp / f"measured-{width}.html"
    copy.write_text(page.replace("</body>", f"<script>{script}</script>\n</body>"), encoding="utf-8")
    frame = tmp / f"frame-{width}.html"
    frame.write_text(f"""<!DOCTYPE html><html><body style="margin:0"><pre id="layout"></pre>
<iframe src="{copy.name}" style="width:{width}px;height:20000px;border:0;display:block"></iframe>
<script>addEventListener("message", (e) => {{ document.getElementById("layout").textContent = e.data; }});</script>
</body></html>""", encoding="utf-8")
    res = _chromium(["--hide-scrollbars", f"--window-size={width + 100},2000", "--virtual-time-budget=10000",
                     "--dump-dom", frame.as_uri()], tmp / f"profile-{width}")
    assert res.returncode == 0, res.stderr[-2000:]
    found = re.search(r'<pre id="layout">(.+?)</pre>', res.stdout, re.S)
    assert found, res.stdout[-2000:]
    return json.loads(found.group(1).replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&"))


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed")
@pytest.mark.parametrize("width", [390, 1280])
def test_report_fits_the_screen_without_sideways_scroll_or_broken_numbers(stored_nights, cfg, tmp_path, width):
    html_path, _ = render_report(stored_nights, DATES[-1], cfg)
    got = _measure(html_path, width, tmp_path)
    assert got["innerWidth"] == width
    assert got["scrollWidth"] <= width, got["stickingOut"][:10]
    assert got["stickingOut"] == []
    assert got["wrapped"] == []
    assert len(got["charts"]) == 4
    for chart in got["charts"]:
        assert chart["narrow"] is (width < 600), chart          # the phone gets the phone-sized drawing
        assert chart["textPx"] >= MIN_CHART_TEXT_PX, chart
    if width == 390:
        assert got["scrollingTables"] >= 1     # the wide tables scroll in their own box (the check above has power)


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed")
def test_the_demos_words_fit_a_phone_too(stored_nights, cfg, tmp_path):
    words = LabelsConfig(user="member", users="members", item="title", items="titles", rating_unit="stars",
                         rating_symbol="\u2605")
    html_path, _ = render_report(stored_nights, DATES[-1], cfg.model_copy(update={"labels": words}))
    got = _measure(html_path, 390, tmp_path)
    assert (got["scrollWidth"], got["stickingOut"], got["wrapped"]) == (390, [], [])
