"""The nightly HTML report and its JSON twin: built from stored metrics and alert history only,
escaped, self-contained, deterministic, and (when Chromium is installed) rendered by a real browser,
on a phone (390 px wide) and a desktop (1280 px): no sideways scroll of the page, nothing cut off (a wide
table scrolls in its own box), no number broken across lines, chart text at least 9 px. ``.ci/run``
installs Chromium best-effort; without it those tests are skipped.

The page has no scripts and its Content-Security-Policy allows none; the layout tests measure a copy of
it with ``report_layout.js`` added and scripts allowed, so the layout measured is the page's own.

Invented scenario data: library-app members rating titles 1-5 stars; every number is invented.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from handmade import model_errors
from tasks.config import GateConfig, LabelsConfig
from tasks.evaluate.anchor import AnchorComparison
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.probe_budget import probe_budget
from tasks.monitor.alert_delivery import Channels
from tasks.monitor.alert_history import AlertHistory, append_history, night_alerts, read_history
from tasks.monitor.metrics_store import MetricsStoreError, read_metrics, row_of, write_night_metrics
from tasks.monitor.night_metrics import compute_night_metrics
from tasks.monitor.night_report import alert_night
from tasks.monitor.probe_budget_view import CAUTIONS, with_probe_budget
from tasks.monitor.report import render_report, summary_markdown, summary_table
from tasks.monitor.report_charts import FONT_PT

EVIL_MEMBER = 'member-<script>alert("boo")</script>\'q'
EVIL_VERSION = 'v-"><script>alert(1)</script>'
EVIL_REASON = "<img src=x onerror=alert(2)> & 'bad'"
DATES = [f"2024-06-{d:02d}" for d in range(1, 9)]


def _night_ratings(rng: np.random.Generator, date: str, jump: float) -> pd.DataFrame:
    members = [f"member-{i:06d}" for i in range(40)] + [EVIL_MEMBER]
    rows = []
    for m in members:
        lenient = 1.5 if m == EVIL_MEMBER else 0.0  # the evil member is the most skewed one
        for _ in range(3):
            rows.append((m, f"title-{rng.integers(0, 300):06d}",
                         float(np.clip(np.rint(3.4 + jump + lenient + rng.normal(0, 0.8)), 1, 5)), "organic", date))
        if m == EVIL_MEMBER or rng.random() < 0.15:
            rows.append((m, f"title-{rng.integers(0, 300):06d}",
                         float(np.clip(np.rint(3.0 + rng.normal(0, 0.9)), 1, 5)), "probe", date))
    rows.append((EVIL_MEMBER, "title-000001", 1.0, "probe", date))  # keeps them the most skewed member
    return pd.DataFrame(rows, columns=["user_id", "item_id", "rating", "source", "dt"])


@pytest.fixture
def stored_nights(ws, cfg):
    """Eight nights computed, stored and alerted on; the last night's organic ratings jump up."""
    rng = np.random.default_rng(5)
    frames = []
    for i, date in enumerate(DATES):
        frames.append(_night_ratings(rng, date, jump=1.2 if date == DATES[-1] else 0.0))
        window = pd.concat(frames, ignore_index=True)
        live = None if i == 0 else rng.normal(3.5, 0.5, 500)
        evaluation = Evaluation(candidate=model_errors(0.8 - 0.01 * i, segments={"up": (0.9, 30), "neutral": (0.7, 40)}),
                                shadow=model_errors(0.82, rmse=1.02), live=None if i == 0 else model_errors(0.81),
                                # from the second night on, the anchor (the first version) on 110 of the 120 rows
                                anchor=None if i == 0 else AnchorComparison(
                                    "v-2024-06-01", DATES[0], n=110, mae=0.79, candidate_mae=0.801 - 0.01 * i,
                                    live_mae=0.805, is_live=i == 1, compared=i))
        row = compute_night_metrics(
            date, window, cfg.scale, cfg.evaluate.skew_margin,
            probe_errors=pd.Series(rng.gamma(4.0, 0.2, 40)), reference_shares=[0.1, 0.14],
            pred_candidate=rng.normal(3.6, 0.5, 500), pred_live=live,
            profiles_candidate=rng.random((40, 10)), profiles_live=None if i == 0 else rng.random((40, 10)),
            evaluation=evaluation,
            volumes={"rows_read": 127, "rows_ingested": 125, "rows_quarantined": 2,  # 1.6%: under the guard
                     "quarantined_by_reason": {EVIL_REASON: 1, "rating_out_of_range": 1},
                     "new_users": 2, "new_items": 7},
            versions={"candidate": EVIL_VERSION, "live": "v-2024-06-01"})
        if date == DATES[-1]:   # the last night carries a probe budget (measured before the gate)
            err = np.abs(rng.normal(0, 0.9, 400))
            budget = probe_budget(err, np.abs(err + rng.normal(0, 0.3, 400)), 120, rng.poisson(2, 30), 41, 3.0,
                                  GateConfig(), seed=0)
            row = with_probe_budget(row, budget.to_dict())
        write_night_metrics(ws, row)
        series = read_metrics(ws)
        alert_night(cfg, row_of(series, date, ws.metrics), series, AlertHistory.read(ws), "nightly", Channels(), env={})
    # an alert whose text carries markup (as if an upstream id leaked into it)
    append_history(ws, {"alert_id": "probe_coverage_low-2024-06-08", "kind": "probe_coverage_low",
                        "severity": "critical", "metric": "probe_coverage", "value": 0.001, "band": [0.005, None],
                        "explanation": f"coverage fell for {EVIL_MEMBER}", "run_date": DATES[-1],
                        "status": "new", "count": 1, "first_date": DATES[-1], "last_date": DATES[-1],
                        "phase": "final", "delivery": {"webhook": {"outcome": "not_configured"}}})
    return ws


def test_report_escapes_ids_and_carries_the_numbers(stored_nights, cfg):
    html_path, json_path = render_report(stored_nights, DATES[-1], cfg)
    assert html_path == stored_nights.reports / f"{DATES[-1]}.html" and json_path.suffix == ".json"
    html = html_path.read_text(encoding="utf-8")
    # ids rendered as text: the escaped forms are present, the raw markup is not
    assert "member-&lt;script&gt;alert(&#34;boo&#34;)&lt;/script&gt;&#39;q" in html
    assert "v-&#34;&gt;&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt; &amp; &#39;bad&#39;" in html
    assert "<script>alert" not in html and "<img src=x" not in html
    assert "<script" not in html.lower()  # the page has no scripts at all
    # the night's numbers and the alert are there
    row = row_of(read_metrics(stored_nights), DATES[-1], stored_nights.metrics)
    assert f"{row['skew_mean_shift']:+.3f}" in html
    assert "skew_shift" in html and "probe_coverage_low" in html
    # histograms, skew trend, predictions, MAE, MAE against the anchor, probe budget
    assert html.count('src="data:image/svg+xml;base64,') == 6


def test_report_shows_the_candidate_against_the_anchor_in_one_line_and_a_chart(stored_nights, cfg):
    html = render_report(stored_nights, DATES[-1], cfg)[0].read_text(encoding="utf-8")
    line = re.sub(r"<[^>]+>", "", re.search(r'<p class="anchor-line">(.*?)</p>', html, re.S).group(1))
    assert line == ("Tonight the candidate's held-out MAE is 0.7310 against 0.7900 for the anchor v-2024-06-01 "
                    "(the strongest of the last 7 versions, from 2024-06-01) on the same 110 ratings: "
                    "-0.0590 ★; the gate holds beyond +0.010 (gate.anchor_budget).".replace("★", cfg.labels.unit_short))
    assert 'alt="Line chart: held-out probe MAE per night of the anchor' in html
    twin = json.loads(render_report(stored_nights, DATES[-1], cfg)[1].read_text(encoding="utf-8"))
    assert [t["anchor_margin"] for t in twin["trend"]][:2] == [None, pytest.approx(0.801 - 0.01 - 0.79)]
    first = render_report(stored_nights, DATES[0], cfg)[0].read_text(encoding="utf-8")
    assert "No anchor tonight" in first and "No anchor comparisons recorded." in first


def test_report_is_self_contained(stored_nights, cfg):
    html = render_report(stored_nights, DATES[-1], cfg)[0].read_text(encoding="utf-8")
    # nothing fetched from elsewhere: no remote src/href, no CSS url()/@import, no <link>, no fonts
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", html, re.I)
    assert not re.search(r"""url\(\s*["']?\s*(https?:)?//""", html, re.I)
    assert "@import" not in html and "<link" not in html.lower() and "@font-face" not in html
    assert not re.search(r"https?://", html.split("<body>")[1].replace("http://www.w3.org", ""))


def test_json_twin_and_determinism(stored_nights, cfg):
    html_path, json_path = render_report(stored_nights, DATES[-1], cfg)
    first_html, first_json = html_path.read_bytes(), json_path.read_bytes()
    twin = json.loads(first_json)  # strict JSON: NaN would not parse back as a number
    assert twin["run_date"] == DATES[-1] and twin["format"] == "tarewise-night-report/1"
    assert twin["metrics"]["candidate_version"] == EVIL_VERSION
    assert {a["kind"] for a in twin["alerts"]} == {"skew_shift", "probe_coverage_low"}
    assert [t["run_date"] for t in twin["trend"]] == DATES
    assert twin["trend"][-1]["skew_alert"] is True and twin["trend"][-1]["band_hi"] is not None
    assert "charts" not in twin
    # rebuilt from stored metrics + history only: deleting the reports changes nothing
    shutil.rmtree(stored_nights.reports)
    html_path, json_path = render_report(stored_nights, DATES[-1], cfg)
    assert html_path.read_bytes() == first_html and json_path.read_bytes() == first_json


def test_quiet_first_night_renders(stored_nights, cfg):
    html = render_report(stored_nights, DATES[0], cfg)[0].read_text(encoding="utf-8")
    assert "quiet night: no alerts" in html
    assert 'id="probe-budget"' not in html   # no budget stored for that night: no section
    assert "Not enough nights yet." not in html  # the single night is still drawn


def test_missing_night_is_named(ws, cfg):
    with pytest.raises(MetricsStoreError, match="no metrics stored for 2024-01-01"):
        render_report(ws, "2024-01-01", cfg)


def test_summary_helpers_escape_and_summarise(stored_nights):
    row = row_of(read_metrics(stored_nights), DATES[-1], stored_nights.metrics)
    alerts = night_alerts(read_history(stored_nights), DATES[-1])
    md = summary_markdown(row, alerts)
    assert "<script>" not in md and "\\<script\\>" in md
    assert md.startswith(f"# tarewise night {DATES[-1].replace('-', chr(92) + '-')}")
    table = summary_table(row, alerts)
    assert all(set(r) == {"metric", "value"} for r in table)
    values = {r["metric"]: r["value"] for r in table}
    assert values["alerts"].startswith("2 (")
    assert values["rows ingested / quarantined"] == "125 / 2"


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser") or (
    "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


def _chromium(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}",
         # any attempt to reach the network fails, so a page that needs it would show it
         "--host-resolver-rules=MAP * ~NOTFOUND", "--enable-logging=stderr", "--v=0", *args],
        capture_output=True, text=True, timeout=120)


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed")
def test_report_renders_in_headless_chromium(stored_nights, cfg, tmp_path):
    html_path, _ = render_report(stored_nights, DATES[-1], cfg)
    dom = _chromium(["--dump-dom", html_path.as_uri()], tmp_path / "profile-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert "drift report for the night of" in dom.stdout
    # the browser saw the ids as text, not as elements
    assert "member-&lt;script&gt;alert" in dom.stdout and "<script" not in dom.stdout.lower()
    problems = [ln for ln in dom.stderr.splitlines()
                if "CONSOLE" in ln or "Uncaught" in ln or "Refused to" in ln or "ERR_NAME_NOT_RESOLVED" in ln]
    assert problems == []
    shot = tmp_path / "report.png"
    res = _chromium(["--hide-scrollbars", "--window-size=1100,3000", f"--screenshot={shot}", html_path.as_uri()],
                    tmp_path / "profile-shot")
    assert res.returncode == 0 and shot.exists()
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 50_000


def _page(ws, cfg, date=DATES[-1], **detail_changes) -> str:
    """The page for a stored night, optionally with parts of its detail replaced."""
    from tasks.monitor.report import build_report, render_html
    series = read_metrics(ws)
    report = build_report(date, cfg, row_of(series, date, ws.metrics), series, read_history(ws))
    report["detail"].update(detail_changes)
    return render_html(report)


def test_words_come_from_labels_not_from_the_demo(stored_nights, cfg):
    plain = _page(stored_nights, cfg)
    text = re.sub(r"<[^>]+>", " ", plain.split("<body>")[1])                # what a reader sees
    for demo_word in (r"\bmembers?\b(?!-)", r"\btitles?\b", "\u2605", r"\bstars\b"):  # ids of the data aside
        assert not re.search(demo_word, text), demo_word
    assert "Skew per user" in plain and "active users" in plain and "new items" in plain
    assert "mean shift (rating points)" in plain
    words = LabelsConfig(user="member", users="members", item="title", items="titles", rating_unit="stars",
                         rating_symbol="\u2605")
    demo = _page(stored_nights, cfg.model_copy(update={"labels": words}))
    assert "Skew per member" in demo and "new titles" in demo and "mean shift (stars)" in demo
    assert '<span class="unit">\u2605</span>' in demo


def test_alert_cards_say_what_to_check_where_to_look_and_when_it_clears(stored_nights, cfg):
    page = _page(stored_nights, cfg)
    card = page[page.index('<div class="alert critical">'):page.index('<section id="skew">')]
    for part in ("<dt>Check</dt>", "<dt>See more</dt>", "<dt>Clears</dt>", "the day&#39;s sources", "campaign",
                 "probe card", f"<code>tarewise report --date {DATES[-1]}</code>"):
        assert part in card, part
    # the card of a record written before alerts carried advice gets it from its kind
    assert card.count("<dt>Check</dt>") == 2      # the skew alert and the hand-written coverage alert


def test_tables_of_missing_values_are_left_out_and_tiny_p_values_say_so(stored_nights, cfg):
    row = row_of(read_metrics(stored_nights), DATES[-1], stored_nights.metrics)
    assert row["skew_pvalue"] < 1e-4
    page = _page(stored_nights, cfg)
    assert "&lt; 1e-4" in page and "0.0000" not in page
    assert "p-value, chi-square test" in page and "chi-square test of homogeneity" in page
    assert "reference share" in page                    # the fixture's method drew reference users
    # the default method (per_user) draws none: every share is missing, and the table goes
    per_user = _page(stored_nights, cfg, reference_shares=[None] * 5)
    assert "reference share" not in per_user and "Probe errors</h2>" in per_user
    # the segment column no model has a number for ("unknown": users without probe ratings) goes too
    segs = per_user[per_user.index("By skew segment (MAE)"):per_user.index("<h3>Trend</h3>", per_user.index("By skew"))]
    assert ">up</th>" in segs and ">unknown</th>" not in segs and "\u2014" not in segs


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
    assert len(got["charts"]) == 6   # the anchor trend and the probe budget curve among them
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


def test_probe_budget_section_says_what_to_do_and_its_cautions(stored_nights, cfg):
    """The curve's section: the product owner's sentence, the table with today's count and the modelled
    counts marked, and the cautions."""
    html = render_report(stored_nights, DATES[-1], cfg)[0].read_text(encoding="utf-8")
    section = html[html.index('<section id="probe-budget">'):html.index('<section id="volumes">')]
    assert "probes a night the gate detects a 0.02 regression 80% of the time" in section
    assert ">today<" in section and ">modelled<" in section
    assert 'alt="Line chart: probe ratings a night' in section
    for caution in CAUTIONS:
        assert caution.replace("'", "&#39;") in section
    twin = json.loads((stored_nights.reports / f"{DATES[-1]}.json").read_text())
    assert twin["detail"]["probe_budget"]["today"] == 120
