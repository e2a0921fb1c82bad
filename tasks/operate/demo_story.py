"""The demo's story: invented nights of the reading app with the events tarewise exists to catch, and
the summary that finds them again in a workspace.

Everything here is invented (see ``sample_parquet/README.md``). On top of the ordinary nights that
:func:`tasks.operate.demo_data.generate` draws from :data:`START`, the story puts three events on fixed
dates:

- **a night the probe card was off** (:data:`TRIAL_DATE`): a trial night weeks before the "rate a random
  title" card went live, so the night has organic ratings and not one probe rating. With nothing to
  judge it on, the promotion gate holds the candidate (rule: at least ``gate.min_heldout`` held-out probe
  ratings), and the probe-coverage guard raises a critical alert. The night lies outside the
  ``window.days`` (30) window of every later night, so it does not change what they train on.
- **a bad batch** (:data:`BAD_BATCH_DATE`): for an hour, a new release of the app sent ratings as a
  percentage (20 to 100) instead of stars. The batch arrives as a second file of the day's partition;
  every row of it is off the 1 to 5 scale, so ingest puts it in the quarantine with that reason. It is
  about 3% of the day's rows: above ``drift.max_quarantine_share`` (2%, an alert), below
  ``input.max_rejected_share`` (5%, which would stop the night).
- **a campaign** (:data:`CAMPAIGN`): the app ran "tell us your favourite title" cards, so members who
  rate what they love were far more active and rated almost only their favourites. The organic ratings
  of those nights sit much further above the probe ratings than on the nights before: a critical
  skew-shift alert. Probe cards kept running, so the held-out probe ratings still judge every
  candidate; ``configs/demo.toml`` sets ``gate.hold_on_alert = "critical"``, so a candidate they would
  promote is held for its alert and the version of the night before the campaign stays live. That is
  the demo's configuration, not part of the data.

Ordinary nights may be held too, on their held-out probe evidence alone: the probe is small (15 to 174
held-out ratings), and with the default model the first night's nearly flat model wins on the first
nights' held-out ratings, which happen to be mostly 3s; the gate holds the next nine candidates though
the demo's ground truth says they were as good (README, "What the demo shows").

:func:`summary` reads a workspace after the nights ran and lists what a reader should look at: held
versions with their reason and manifest, quarantined rows with their reasons and file, alerts with the
night's report. It reads what the nights wrote, not the plan above, so it tells the truth about any
workspace.

Regenerate the committed sample (byte-identical with the same package versions)::

    python -m tasks.operate.demo_story --out sample_parquet
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from tasks import schemas
from tasks.operate.demo_data import GroundTruth, SkewChange, generate

START = "2026-11-01"
NIGHTS = 12
#: The world's size and the nightly volumes (invented; small enough for a demo of about a minute).
MEMBERS, TITLES, ORGANIC_PER_DAY, PROBE_SHARE, SEED = 1500, 800, 2500, 0.06, 7

TRIAL_DATE = "2026-10-01"
BAD_BATCH_DATE = "2026-11-05"
BAD_BATCH_ROWS = 80
#: The file the bad batch arrives in, inside ``dt=<BAD_BATCH_DATE>/``.
BAD_BATCH_FILE = "part-1.parquet"
#: First and last night of the campaign (inclusive).
CAMPAIGN = ("2026-11-08", "2026-11-09")
#: During the campaign, members who rate what they love are this many times as active, and this many
#: times as choosy (they rate almost only titles they would give 5 stars).
CAMPAIGN_ACTIVITY, CAMPAIGN_STRENGTH = 6.0, 3.0
#: Day index of the trial night's random draws, far from the story's own (0 .. NIGHTS - 1).
_TRIAL_DAY_INDEX = 1000

EVENTS = {
    TRIAL_DATE: "trial night before the 'rate a random title' card went live: no probe ratings",
    BAD_BATCH_DATE: f"app release 4.2 sent {BAD_BATCH_ROWS} ratings as percentages (20-100) for an hour",
    CAMPAIGN[0]: f"'tell us your favourite title' cards until {CAMPAIGN[1]}: members who rate what they love "
                 "rated almost only their favourites",
}


def write_story(out: str | Path, seed: int = SEED) -> GroundTruth:
    """Write the trial night and the story's :data:`NIGHTS` partitions into ``out`` (plus ``_truth/``)."""
    out = Path(out)
    generate(out, TRIAL_DATE, 1, MEMBERS, TITLES, ORGANIC_PER_DAY, seed, probe_share=0.0,
             first_day_index=_TRIAL_DAY_INDEX)
    campaign = SkewChange(CAMPAIGN[0], activity={"lover": CAMPAIGN_ACTIVITY}, strength={"lover": CAMPAIGN_STRENGTH},
                          until_date=CAMPAIGN[1])
    truth = generate(out, START, NIGHTS, MEMBERS, TITLES, ORGANIC_PER_DAY, seed, probe_share=PROBE_SHARE,
                     skew_change=campaign)
    write_bad_batch(out, truth, BAD_BATCH_DATE, BAD_BATCH_ROWS, seed)
    truth.params["story"] = dict(sorted(EVENTS.items()))
    truth.save(out)
    return truth


def write_bad_batch(out: Path, truth: GroundTruth, day: str, rows: int, seed: int) -> Path:
    """``<out>/dt=<day>/part-1.parquet``: ``rows`` organic ratings within one hour of ``day``, each a
    member's true rating of a random title given as a percentage (stars x 20), so off the 1-5 scale."""
    rng = np.random.default_rng([seed, 2, dt.date.fromisoformat(day).toordinal()])
    members = rng.integers(0, truth.n_members, rows)
    titles = rng.integers(0, truth.n_titles, rows)
    percent = truth.true_rating_idx(members, titles) * 20.0
    start = dt.datetime.fromisoformat(day).replace(hour=14, tzinfo=dt.timezone.utc)
    times = [start + dt.timedelta(seconds=int(s)) for s in np.sort(rng.integers(0, 3600, rows))]
    table = pa.table({
        "user_id": truth.member_ids.take(pa.array(members)),
        "item_id": truth.title_ids.take(pa.array(titles)),
        "rating": pa.array(percent, pa.float64()),
        "event_time": pa.array(times, pa.timestamp("us", tz="UTC")),
        "source": pa.array([schemas.ORGANIC] * rows, pa.string()),
    })
    path = out / f"dt={day}" / BAD_BATCH_FILE
    pq.write_table(table, path, compression="zstd")
    return path


@dataclass(frozen=True)
class Finding:
    """One thing the summary points at: the night, what kind (``held``, ``quarantine``, ``alert``), one
    line saying what happened, and the file that shows it."""
    run_date: str
    kind: str
    text: str
    path: Path


def summary(ws, dates: list[str]) -> list[Finding]:
    """What the nights ``dates`` left in the workspace ``ws`` (a :class:`tasks.workspace.Workspace`) that
    a reader should look at, by night: held versions (reason; manifest), quarantined rows (count by
    reason; quarantine file) and alerts (severity, kind; the night's HTML report)."""
    from tasks.ingest.logs import rejected_by_reason
    from tasks.operate.status import recent_alerts
    from tasks.publish.versions import list_versions

    wanted = set(dates)
    found: list[Finding] = []
    for m in list_versions(ws):
        if m.get("run_date") in wanted and m.get("state") == "held":
            found.append(Finding(m["run_date"], "held", f"version {m['version_id']} held: "
                                 f"{(m.get('gate') or {}).get('reason', '')}",
                                 ws.versions / m["version_id"] / "manifest.json"))
    for d in sorted(wanted):
        path = ws.partition(ws.quarantine, d) / "part-0.parquet"
        if path.exists():
            rejected = pq.read_table(path).to_pandas()
            if len(rejected):
                files = ", ".join(sorted({Path(f).name for f in rejected["input_file"]}))
                reasons = "; ".join(f"{n} {r}" for r, n in rejected_by_reason(rejected).items())
                found.append(Finding(d, "quarantine", f"{len(rejected)} rows quarantined from {files}: {reasons}",
                                     path))
    if dates:
        last = max(dates)
        span = (dt.date.fromisoformat(last) - dt.date.fromisoformat(min(dates))).days + 1
        for a in recent_alerts(ws, last, span):
            if str(a.get("run_date")) in wanted:
                more = f" (same episode as {a.get('first_date')})" if a.get("status") == "ongoing" else ""
                found.append(Finding(str(a["run_date"]), "alert", f"{a.get('severity')} alert {a.get('kind')}{more}",
                                     ws.reports / f"{a['run_date']}.html"))
    order = {"held": 0, "quarantine": 1, "alert": 2}
    return sorted(found, key=lambda f: (f.run_date, order.get(f.kind, 3)))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tasks.operate.demo_story",
                                 description="Write the demo's invented nights (the committed sample_parquet/).")
    ap.add_argument("--out", required=True, help="folder to write dt=YYYY-MM-DD/*.parquet into")
    ap.add_argument("--seed", type=int, default=SEED)
    args = ap.parse_args(argv)
    write_story(args.out, args.seed)
    print(f"wrote {NIGHTS + 1} nights of invented ratings to {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
