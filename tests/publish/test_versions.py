"""Versions (tasks/publish/versions.py): the manifest records every file of its version, damage is named
with its path, a damaged base is refused for a warm start unless asked to start cold, and a damaged
``live.json`` is named wherever it is read and replaced (kept aside) by the next switch. Real versions
published under tmp_path (tests/versions_kit.py)."""

from __future__ import annotations

import hashlib
import json

import pytest
from versions_kit import publish_night

from tasks.publish import versions
from tasks.workspace import Workspace


@pytest.fixture
def two(tmp_path) -> tuple[Workspace, str, str]:
    """A workspace with two nights published, the second live and based on the first."""
    ws = Workspace.at(tmp_path / "ws")
    first = publish_night(ws, "2026-11-01")
    second = publish_night(ws, "2026-11-02", seed=6)
    return ws, first, second


def test_manifest_records_size_and_sha256_of_every_file_of_its_version(two) -> None:
    ws, _, vid = two
    folder = ws.versions / vid
    recorded = versions.read_manifest(ws, vid)["files"]
    on_disk = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())
    assert sorted(recorded) == [p for p in on_disk if p != "manifest.json"]
    assert {"predictions.parquet", "model/model.pt", "model/meta.json", "shadow/model.pt"} <= set(recorded)
    for rel, rec in recorded.items():
        data = (folder / rel).read_bytes()
        # Reference: hashlib.sha256 over the file's bytes.
        assert rec == {"size": len(data), "sha256": hashlib.sha256(data).hexdigest()}, rel
    assert versions.version_problems(ws, vid) == []


def test_missing_changed_or_resized_files_are_named(two) -> None:
    ws, _, vid = two
    folder = ws.versions / vid
    (folder / "predictions.parquet").unlink()
    model = folder / "model" / "model.pt"
    data = bytearray(model.read_bytes())
    data[-10] ^= 0xFF
    model.write_bytes(bytes(data))
    (folder / "model" / "users.parquet").write_bytes(b"short")
    problems = versions.version_problems(ws, vid)
    assert problems == [f"{folder / 'model' / 'model.pt'} differs from the manifest's sha256 (same size, other bytes)",
                        f"{folder / 'model' / 'users.parquet'} has 5 bytes, the manifest records "
                        f"{versions.read_manifest(ws, vid)['files']['model/users.parquet']['size']}",
                        f"{folder / 'predictions.parquet'} is missing"]
    assert versions.version_problems(ws, vid, check_sha=False) == problems[1:]


@pytest.mark.parametrize("damage", ["missing model", "garbled model", "missing predictions"])
def test_a_damaged_base_is_refused_for_a_warm_start_unless_cold(two, damage: str) -> None:
    ws, _, live = two
    folder = ws.versions / live
    if damage == "missing model":
        for p in (folder / "model").iterdir():
            p.unlink()
        (folder / "model").rmdir()
    elif damage == "garbled model":
        (folder / "model" / "model.pt").write_bytes(b"\0" * (folder / "model" / "model.pt").stat().st_size)
    else:
        (folder / "predictions.parquet").unlink()
    with pytest.raises(versions.BaseDamaged) as err:
        versions.load_base(ws, "2026-11-03")
    text = str(err.value)
    assert f"night 2026-11-03 would warm-start from version {live}, which is damaged" in text
    assert str(folder) in text and "tarewise run --cold" in text and "\n" not in text
    assert versions.load_base(ws, "2026-11-03", cold=True) == (None, None, None)


def test_a_whole_base_loads_its_model_and_shadow(two) -> None:
    ws, _, live = two
    vid, model, shadow = versions.load_base(ws, "2026-11-03")
    assert vid == live and model is not None and shadow is not None
    assert len(model.users) == 30


def test_a_base_whose_model_does_not_load_is_refused_even_without_recorded_files(two) -> None:
    """Versions published before manifests recorded files: presence is checked, and the model must load."""
    ws, _, live = two
    path = ws.versions / live / "manifest.json"
    manifest = json.loads(path.read_text())
    del manifest["files"]
    path.write_text(json.dumps(manifest))
    assert versions.load_base(ws, "2026-11-03")[0] == live
    (ws.versions / live / "model" / "meta.json").write_text("{not json")
    with pytest.raises(versions.BaseDamaged, match=r"model does not load \(JSONDecodeError"):
        versions.load_base(ws, "2026-11-03")


@pytest.mark.parametrize("content", [b"", b"\x00\x01garbage", b"[1, 2]", b'{"version_id": 7}'])
def test_a_damaged_live_pointer_is_named_never_a_bare_json_error(two, content: bytes) -> None:
    ws, _, _ = two
    ws.live_pointer.write_bytes(content)
    for read in (versions.read_pointer, versions.live_version, lambda w: versions.base_for_date(w, "2026-11-03"),
                 lambda w: versions.load_base(w, "2026-11-03")):
        with pytest.raises(versions.PointerDamaged, match=rf"the live pointer {ws.live_pointer} is damaged"):
            read(ws)
    # Listing still works: the gate's promotions are known, which one is live is not.
    assert {m["state"] for m in versions.list_versions(ws)} == {"unknown"}


def test_switching_live_replaces_a_damaged_pointer_and_keeps_its_bytes(two) -> None:
    ws, first, _ = two
    ws.live_pointer.write_bytes(b"\x00torn")
    kept = versions.set_live(ws, first, reason="repair")
    assert kept is not None and open(kept, "rb").read() == b"\x00torn"
    pointer = versions.read_pointer(ws)
    assert pointer["version_id"] == first
    assert pointer["history"] == [{"version_id": first, "at": pointer["history"][0]["at"], "reason": "repair",
                                   "replaced_damaged_pointer": kept}]
    assert versions.set_live(ws, first, reason="again") is None


def test_a_damaged_manifest_is_named_and_listed_as_damaged(two) -> None:
    ws, first, live = two
    (ws.versions / first / "manifest.json").write_text("{")
    with pytest.raises(versions.VersionError, match=rf"version {first}: its manifest .*manifest.json is damaged"):
        versions.read_manifest(ws, first)
    states = {m["version_id"]: m["state"] for m in versions.list_versions(ws)}
    assert states == {first: "damaged", live: "live"}
    with pytest.raises(versions.VersionError, match="is damaged"):
        versions.base_for_date(ws, "2026-11-02")     # the walk from live reaches the damaged one


def test_anchor_versions_are_recent_live_or_promoted_ones_from_earlier_dates_whose_models_load(tmp_path) -> None:
    ws = Workspace.at(tmp_path / "ws")
    v1 = publish_night(ws, "2026-11-01")
    v2 = publish_night(ws, "2026-11-02", seed=6)
    held = publish_night(ws, "2026-11-03", live=False, seed=7, gate={"promote": False, "reason": "held"})
    promoted = publish_night(ws, "2026-11-04", live=False, seed=8,     # promoted, never switched live
                             gate={"promote": True, "reason": "within tolerance"})
    later = publish_night(ws, "2026-11-06", seed=9)
    priors, skipped = versions.anchor_versions(ws, "2026-11-05", 14)
    # newest first; the held one never serves (the gate turned it down), nor one from tonight or later
    assert [p.version_id for p in priors] == [promoted, v2, v1] and skipped == []
    assert held not in {p.version_id for p in priors} and later not in {p.version_id for p in priors}
    assert [p.version_id for p in versions.anchor_versions(ws, "2026-11-05", 2)[0]] == [promoted, v2]
    assert versions.anchor_versions(ws, "2026-11-05", 0) == ([], [])
    assert versions.anchor_versions(ws, "2026-11-01", 14) == ([], [])    # first night: nothing earlier
    # a checkpoint already in memory (the night's base) is used, not loaded again
    base = versions.load_checkpoint(ws, v2)
    assert next(p for p in versions.anchor_versions(ws, "2026-11-05", 14, loaded={v2: base})[0]
                if p.version_id == v2).checkpoint is base


def test_an_anchor_version_whose_files_are_gone_is_skipped_with_the_path(tmp_path) -> None:
    ws = Workspace.at(tmp_path / "ws")
    v1 = publish_night(ws, "2026-11-01")
    v2 = publish_night(ws, "2026-11-02", seed=6)
    (ws.versions / v1 / "model" / "model.pt").unlink()
    priors, skipped = versions.anchor_versions(ws, "2026-11-03", 14)
    assert [p.version_id for p in priors] == [v2]
    assert len(skipped) == 1 and skipped[0].startswith(f"{v1}: ") and "model.pt is missing" in skipped[0]


def test_retention_keeps_the_anchor_the_newest_night_was_judged_against(tmp_path) -> None:
    ws = Workspace.at(tmp_path / "ws")
    v1 = publish_night(ws, "2026-11-01")
    v2 = publish_night(ws, "2026-11-02", seed=6)
    v3 = publish_night(ws, "2026-11-03", seed=7)              # live; its base v2 is kept anyway
    v4 = publish_night(ws, "2026-11-04", live=False, seed=8, gate={"promote": False, "reason": "anchor"})
    path = ws.versions / v4 / "manifest.json"
    manifest = json.loads(path.read_text())
    manifest["metrics"] = {"anchor": {"version_id": v1, "margin": 0.02}}
    path.write_text(json.dumps(manifest))
    assert versions.prune(ws, keep=1) == []                   # v1: the anchor that held v4
    assert {v1, v2, v3, v4} <= {p.name for p in ws.versions.iterdir()}
    manifest["metrics"] = {}
    path.write_text(json.dumps(manifest))
    assert versions.prune(ws, keep=1) == [v1]
