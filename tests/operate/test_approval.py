"""A person's review of candidates (gate.require_approval; tasks/operate/approval.py and the `approve`,
`reject`, `status` and `versions` commands): what awaits approval, approving (it goes live) and
rejecting, both in the run ledger, and the mistakes refused in one line.

Real versions (tests/versions_kit.py: a tiny model trained with the engine), real files, the real CLI.
"""

from __future__ import annotations

import json

import pytest
from typer.testing import CliRunner

from tasks.ledger import read_ledger
from tasks.operate.approval import ApprovalError, approve, awaiting, reject
from tasks.operate.status import status
from tasks.publish.versions import live_version
from tasks.workspace import Workspace
from versions_kit import publish_night

WAITING = {"promote": False, "compared_to": "live", "awaiting_approval": True,
           "reason": "awaiting approval (gate.require_approval): held-out MAE 0.8050 vs live 0.8000: within tolerance"}


def _cli(*args: str):
    from flows.cli import app
    return CliRunner().invoke(app, list(args))


@pytest.fixture
def review(tmp_path):
    """v20261101-1 live; the nights 11-02 and 11-03 passed the gate and await approval."""
    ws = Workspace.at(tmp_path / "ws")
    publish_night(ws, "2026-11-01")
    for night in ("2026-11-02", "2026-11-03"):
        publish_night(ws, night, live=False, gate=WAITING)
    return ws


def test_status_and_versions_show_what_awaits_approval(review):
    assert [m["version_id"] for m in awaiting(review)] == ["v20261103-1", "v20261102-1"]
    s = status(review, "UTC", 3600)
    assert [a["version_id"] for a in s["awaiting"]] == ["v20261103-1", "v20261102-1"]
    out = _cli("status", "--workspace", str(review.root)).output
    assert "awaiting approval: v20261103-1 (night 2026-11-03)" in out
    assert "tarewise approve v20261103-1" in out and "tarewise reject v20261103-1 --reason" in out
    listing = _cli("versions", "--workspace", str(review.root)).output
    assert listing.count("awaiting approval") >= 2 + 2     # two states and two reasons


def test_approve_makes_the_version_live_and_the_ledger_says_who_and_why(review):
    result = _cli("approve", "v20261102-1", "--by", "ana", "--reason", "read the report",
                  "--workspace", str(review.root))
    assert result.exit_code == 0, result.output
    assert "approved: live v20261101-1 -> v20261102-1" in result.output
    assert live_version(review) == "v20261102-1"
    row = read_ledger(review).iloc[-1]
    assert (row["kind"], row["status"], row["version_id"], row["state"]) == ("approval", "done", "v20261102-1", "live")
    assert row["message"] == "live v20261101-1 -> v20261102-1: approved by ana: read the report"
    pointer = json.loads(review.live_pointer.read_text())
    assert pointer["history"][-1]["reason"] == "approved by ana: read the report"
    assert [m["version_id"] for m in awaiting(review)] == ["v20261103-1"]   # the newer one still waits
    listing = " ".join(_cli("versions", "--workspace", str(review.root)).output.split())
    assert "[approval: live v20261101-1 -> v20261102-1: approved by ana: read the report]" in listing


def test_reject_keeps_live_and_takes_the_version_off_the_list(review):
    result = _cli("reject", "v20261103-1", "--by", "ana", "--reason", "campaign night",
                  "--workspace", str(review.root))
    assert result.exit_code == 0, result.output
    assert live_version(review) == "v20261101-1"
    row = read_ledger(review).iloc[-1]
    assert (row["kind"], row["version_id"], row["state"], row["message"]) == (
        "rejection", "v20261103-1", "held", "rejected by ana: campaign night")
    assert [m["version_id"] for m in awaiting(review)] == ["v20261102-1"]
    listing = " ".join(_cli("versions", "--workspace", str(review.root)).output.split())
    assert "[rejection: rejected by ana: campaign night]" in listing


@pytest.mark.parametrize("target, why", [
    ("v20261101-1", "was not held for approval (gate: test version)"),
    ("v20991231-1", "is not a published version"),
])
def test_a_version_that_does_not_await_approval_is_refused_in_one_line(review, target, why):
    before = len(read_ledger(review))
    for command in (["approve", target], ["reject", target, "--reason", "no"]):
        result = _cli(*command, "--workspace", str(review.root))
        assert result.exit_code == 2, result.output
        line = " ".join(result.output.split())
        assert why in line and "awaiting approval: v20261103-1, v20261102-1" in line
        assert "Traceback" not in result.output
    assert len(read_ledger(review)) == before and live_version(review) == "v20261101-1"


def test_reviewed_or_overtaken_versions_no_longer_await(review):
    approve(review, "v20261103-1", "ok", "ana", "UTC", 3600)
    with pytest.raises(ApprovalError, match="was already reviewed"):
        reject(review, "v20261103-1", "too late", "ana", "UTC", 3600)
    # 11-02 waits no more: approving it would move the live version back to an older night (a rollback)
    assert awaiting(review) == []
    with pytest.raises(ApprovalError, match="older than the live version"):
        approve(review, "v20261102-1", "ok", "ana", "UTC", 3600)
    assert live_version(review) == "v20261103-1"
