"""Versions: publish a candidate crash-safely, switch the live pointer atomically, list, roll back, prune.

A version is ``versions/<version_id>/`` holding ``predictions.parquet``, ``model/`` (candidate checkpoint),
``shadow/`` (the plain shadow checkpoint, when trained) and ``manifest.json``. It is written under
``versions/.staging-<id>`` and renamed into place in one step, so a reader sees a whole version or none.
``live.json`` names the live version and keeps the switch history; it is replaced atomically.

A version's state is derived, never edited in place: ``live`` (the pointer names it), ``held`` (the
promotion gate refused it; the manifest keeps the reason), ``retired`` (was live once, no longer), or
``candidate`` (promoted by the gate but never switched live, e.g. a crash between rename and switch, or
a backfill that publishes only its last night as live).

The manifest records the size and sha256 of every file of its version (``files``), so damage found later
(a file deleted, truncated or overwritten) is named: :func:`version_problems`. A night refuses to
warm-start from a damaged base (:func:`load_base`) unless told to start cold. A ``live.json`` that is not
a readable pointer raises :class:`PointerDamaged` naming its path wherever it is read; replacing it
(:func:`set_live`, e.g. by a rollback) keeps the damaged file beside it.
"""

from __future__ import annotations

import json
import os
import shutil
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tasks import failpoints
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate.anchor import PriorVersion
from tasks.publish.manifest import MANIFEST, file_problems, version_files
from tasks.schemas import PREDICTIONS
from tasks.files import atomic_write_json, fsync_dir
from tasks.workspace import Workspace


class VersionError(ValueError):
    pass


class PointerDamaged(VersionError):
    """``live.json`` exists but is not a readable pointer (garbage, empty, torn by a full disk)."""

    def __init__(self, path: Path, detail: str) -> None:
        self.path, self.detail = path, detail
        super().__init__(f"the live pointer {path} is damaged ({detail}), so which version is live is unknown; "
                         "`tarewise status` names a whole version and `tarewise rollback --to <version>` writes "
                         "a new pointer (the damaged file is kept beside it)")


class BaseDamaged(VersionError):
    """The version a night would warm-start from is missing files or does not load."""


def _utcnow() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def new_version_id(ws: Workspace, run_date: str) -> str:
    """``v<YYYYMMDD>-<n>``: n counts the versions already published for that run date."""
    stem = "v" + run_date.replace("-", "")
    existing = [p.name for p in ws.versions.glob(f"{stem}-*")] if ws.versions.exists() else []
    nums = [int(n.rsplit("-", 1)[1]) for n in existing if n.rsplit("-", 1)[1].isdigit()]
    return f"{stem}-{max(nums, default=0) + 1}"


def clean_staging(ws: Workspace) -> list[str]:
    """Remove half-written versions left by a crashed run; return their names."""
    if not ws.versions.exists():
        return []
    gone = []
    for p in ws.versions.glob(".staging-*"):
        shutil.rmtree(p, ignore_errors=True)
        gone.append(p.name)
    return gone


def publish(ws: Workspace, version_id: str, candidate: Checkpoint, predictions: pd.DataFrame,
            manifest: dict, shadow: Checkpoint | None = None) -> Path:
    """Write the version under a staging name and rename it into place. Does not switch live."""
    ws.versions.mkdir(parents=True, exist_ok=True)
    final = ws.versions / version_id
    if final.exists():
        raise VersionError(f"version {version_id} already exists at {final}")
    staging = ws.versions / f".staging-{version_id}"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    pq.write_table(pa.Table.from_pandas(predictions, schema=PREDICTIONS, preserve_index=False),
                   staging / "predictions.parquet")
    candidate.save(staging / "model")
    if shadow is not None:
        shadow.save(staging / "shadow")
    manifest = dict(manifest, version_id=version_id, published_at=_utcnow(), files=version_files(staging))
    (staging / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n")
    fsync_dir(staging)
    failpoints.hit("publish:staged")
    os.rename(staging, final)
    fsync_dir(ws.versions)
    failpoints.hit("publish:renamed")
    return final


def read_pointer(ws: Workspace) -> dict:
    """``{"version_id": <live id or None>, "history": [...]}``; none yet when ``live.json`` is absent.
    Raises :class:`PointerDamaged` (naming the path) when the file is not such a pointer."""
    path = ws.live_pointer
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return {"version_id": None, "history": []}
    except (OSError, UnicodeDecodeError) as exc:
        raise PointerDamaged(path, f"unreadable: {exc}") from None
    if not text.strip():
        raise PointerDamaged(path, "empty file")
    try:
        pointer = json.loads(text)
    except json.JSONDecodeError as exc:
        raise PointerDamaged(path, f"not JSON: {exc}") from None
    if (not isinstance(pointer, dict) or not isinstance(pointer.get("version_id"), (str, type(None)))
            or not isinstance(pointer.get("history", []), list)):
        raise PointerDamaged(path, "JSON, but not a pointer: expected {\"version_id\": ..., \"history\": [...]}")
    return pointer


def live_version(ws: Workspace) -> str | None:
    return read_pointer(ws).get("version_id")


def set_live(ws: Workspace, version_id: str, reason: str) -> str | None:
    """Atomically make ``version_id`` live (it must exist). A damaged ``live.json`` is replaced, its bytes
    kept as ``live.json.damaged-<UTC time>`` (returned; None when the pointer was fine) and named in the
    new pointer's history."""
    if not (ws.versions / version_id / MANIFEST).exists():
        raise VersionError(f"no version {version_id} under {ws.versions}")
    entry = {"version_id": version_id, "at": _utcnow(), "reason": reason}
    kept = None
    try:
        history = read_pointer(ws).get("history", [])
    except PointerDamaged:
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
        kept = ws.live_pointer.with_name(f"{ws.live_pointer.name}.damaged-{stamp}")
        os.replace(ws.live_pointer, kept)
        history, entry["replaced_damaged_pointer"] = [], str(kept)
    failpoints.hit("live:before-switch")
    atomic_write_json(ws.live_pointer, {"version_id": version_id, "history": history + [entry]})
    return str(kept) if kept else None


def read_manifest(ws: Workspace, version_id: str) -> dict:
    path = ws.versions / version_id / MANIFEST
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise VersionError(f"no version {version_id} (missing {path})") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise VersionError(f"version {version_id}: its manifest {path} is damaged ({exc})") from None
    if not isinstance(manifest, dict):
        raise VersionError(f"version {version_id}: its manifest {path} is damaged (not a JSON object)")
    return manifest


def load_checkpoint(ws: Workspace, version_id: str, which: str = "model") -> Checkpoint | None:
    path = ws.versions / version_id / which
    return Checkpoint.load(path) if path.exists() else None


def list_versions(ws: Workspace) -> list[dict]:
    """Manifests of every published version, oldest first, each with its derived ``state``.

    A version whose manifest cannot be read is listed as ``{"version_id", "state": "damaged", "damage"}``.
    With a damaged ``live.json`` nobody knows which version is live: versions the gate promoted get the
    state ``unknown`` (held ones stay ``held``).
    """
    if not ws.versions.exists():
        return []
    try:
        pointer = read_pointer(ws)
        live = pointer.get("version_id")
        ever_live = {h.get("version_id") for h in pointer.get("history", []) if isinstance(h, dict)}
    except PointerDamaged:
        pointer, live, ever_live = None, None, set()
    out = []
    for p in ws.versions.iterdir():
        if p.name.startswith(".") or not (p / MANIFEST).exists():
            continue
        try:
            m = read_manifest(ws, p.name)
        except VersionError as exc:
            out.append({"version_id": p.name, "state": "damaged", "damage": str(exc)})
            continue
        promoted = (m.get("gate") or {}).get("promote", False)
        if pointer is None:
            m["state"] = "unknown" if promoted else "held"
        else:
            m["state"] = ("live" if p.name == live else "retired" if p.name in ever_live
                          else "candidate" if promoted else "held")
        m["version_id"] = p.name
        out.append(m)
    return sorted(out, key=lambda m: (m.get("run_date", ""), m.get("published_at", ""), m["version_id"]))


def version_problems(ws: Workspace, version_id: str, check_sha: bool = True) -> list[str]:
    """What is wrong with a version's own files, one line each; empty when it is whole.

    Checks every file the manifest records (size, and with ``check_sha`` the sha256 of its bytes).
    Versions published before manifests recorded files are checked for their predictions and model only.
    Whether the model loads is :func:`load_checkpoint_checked`'s question.
    """
    try:
        m = read_manifest(ws, version_id)
    except VersionError as exc:
        return [str(exc)]
    folder = ws.versions / version_id
    recorded = m.get("files")
    if isinstance(recorded, dict):
        return file_problems(folder, recorded, check_sha)
    return [f"{folder / rel} is missing" for rel in ("predictions.parquet", "model/meta.json")
            if not (folder / rel).is_file()]


def load_checkpoint_checked(ws: Workspace, version_id: str, which: str = "model"
                            ) -> tuple[Checkpoint | None, str | None]:
    """``(checkpoint, None)``, ``(None, None)`` when the version has no ``which`` folder, or
    ``(None, problem)`` when it is there but does not load (the problem is one line)."""
    path = ws.versions / version_id / which
    if not path.exists():
        return None, None
    try:
        return Checkpoint.load(path), None
    except Exception as exc:  # noqa: BLE001 - any failure to load is damage to report, whatever raised it
        return None, f"{path} does not load ({type(exc).__name__}: {exc})"


def base_for_date(ws: Workspace, run_date: str, head: str | None = None) -> str | None:
    """The version a run for ``run_date`` warm-starts from and is gated against.

    The live version if it is from an earlier date; otherwise walk back along each version's own base
    until one from an earlier date. So re-running a date starts from exactly what its first run started
    from (identical predictions), and a rollback is respected.

    ``head`` starts the walk from that version instead of the live one: a backfill that publishes only
    its last night as live passes the previous backfilled night's version, so the chain carries forward
    through versions that were never live.
    """
    vid = head if head is not None else live_version(ws)
    seen = set()
    while vid is not None and vid not in seen:
        seen.add(vid)
        if not (ws.versions / vid / MANIFEST).exists():
            raise VersionError(f"cannot choose the base for {run_date}: version {vid} is gone from "
                               f"{ws.versions} (deleted by retention?); pin it in retention.pinned, or "
                               "re-run from an earlier date")
        m = read_manifest(ws, vid)
        if m.get("run_date", "") < run_date:
            return vid
        vid = m.get("base_version")
    return None


def load_base(ws: Workspace, run_date: str, head: str | None = None, cold: bool = False
              ) -> tuple[str | None, Checkpoint | None, Checkpoint | None]:
    """``(base version id, its model, its shadow model)`` for a night of ``run_date`` (see
    :func:`base_for_date`); all None for a first night or when ``cold`` (start from scratch on purpose).

    Raises :class:`BaseDamaged` when the base is missing files, differs from its manifest or its model
    does not load: warm-starting from it would silently start (partly) cold and gate against nothing.
    """
    if cold:
        return None, None, None
    vid = base_for_date(ws, run_date, head=head)
    if vid is None:
        return None, None, None
    problems = version_problems(ws, vid)
    model, shadow = None, None
    if not problems:
        model, bad_model = load_checkpoint_checked(ws, vid, "model")
        shadow, bad_shadow = load_checkpoint_checked(ws, vid, "shadow")
        problems = [p for p in (bad_model, bad_shadow) if p]
    if problems:
        raise BaseDamaged(f"night {run_date} would warm-start from version {vid}, which is damaged: "
                          f"{'; '.join(problems)}. Roll back to a whole version (`tarewise status` names one), "
                          "or start from scratch with `tarewise run --cold`")
    return vid, model, shadow


def anchor_versions(ws: Workspace, run_date: str, count: int, loaded: dict[str, Checkpoint] | None = None
                    ) -> tuple[list[PriorVersion], list[str]]:
    """The versions a night of ``run_date`` may take its anchor from (``gate.anchor_nights`` = ``count``):
    the ``count`` most recent versions from earlier run dates that were live (now or once) or promoted
    by the gate, newest first, each with its model loaded; and one line per such version that cannot
    serve (its files are gone, e.g. deleted by retention, or its model does not load), which is then
    skipped. Held versions never serve: the gate turned them down. ``loaded``: checkpoints already in
    memory by version id (the night's base), not loaded twice. Presence and sizes of files are checked,
    not their sha256 (that is ``tarewise status``'s job; a night must not read every old model twice)."""
    if count <= 0:
        return [], []
    eligible = [m for m in list_versions(ws)
                if m.get("state") in ("live", "retired", "candidate") and m.get("run_date", "") < run_date]
    recent = sorted(eligible, key=lambda m: (m.get("run_date", ""), m.get("published_at", ""), m["version_id"]),
                    reverse=True)[:count]
    loaded = loaded or {}
    priors, skipped = [], []
    for m in recent:
        vid = m["version_id"]
        ckpt = loaded.get(vid)
        if ckpt is None:
            problems = version_problems(ws, vid, check_sha=False)
            if not problems:
                ckpt, bad = load_checkpoint_checked(ws, vid, "model")
                problems = [bad or f"{ws.versions / vid / 'model'} is missing"] if ckpt is None else []
            if problems:
                skipped.append(f"{vid}: {'; '.join(problems)}")
                continue
        priors.append(PriorVersion(vid, str(m.get("run_date", "")), ckpt))
    return priors, skipped


def _newest_first(manifests: list[dict]) -> list[dict]:
    return sorted(manifests, key=lambda m: (m.get("published_at", ""), m["version_id"]), reverse=True)


def prune(ws: Workspace, keep: int, pinned: tuple[str, ...] = ()) -> list[str]:
    """Delete all but the ``keep`` most recently published versions; never the live one, a pinned one,
    the live version's base (needed to re-run the live version's date identically), or the anchor the
    most recently published version was judged against (``metrics.anchor``: a run of held nights must
    not delete the anchor that holds them). Returns the deleted ids, oldest first.

    "Most recently published", not "latest run date": a re-run or backfill of old dates publishes
    versions that are new work, and the next night of a backfill warm-starts from the one just
    published. A version is first renamed to ``.trash-<id>`` (one atomic step, after which no reader
    lists it), then removed; a crash in between leaves only a hidden folder that the next prune clears.
    """
    if keep < 1:
        raise VersionError(f"retention.keep_versions must be >= 1, got {keep}")
    clear_trash(ws)
    manifests = list_versions(ws)
    live = live_version(ws)
    protect = set(pinned) | ({live} if live else set())
    if live:
        base = read_manifest(ws, live).get("base_version")
        if base:
            protect.add(base)
    readable = [m for m in manifests if m.get("state") != "damaged"]
    if readable:   # the anchor the newest night was judged against: the next night needs it too
        anchor = ((_newest_first(readable)[0].get("metrics") or {}).get("anchor") or {}).get("version_id")
        if anchor:
            protect.add(anchor)
    newest = {m["version_id"] for m in _newest_first(manifests)[:keep]}
    deleted = []
    for m in manifests:
        vid = m["version_id"]
        if vid in protect or vid in newest:
            continue
        trash = ws.versions / f".trash-{vid}"
        os.rename(ws.versions / vid, trash)
        shutil.rmtree(trash, ignore_errors=True)
        deleted.append(vid)
    return deleted


def clear_trash(ws: Workspace) -> list[str]:
    """Remove ``.trash-*`` folders left by a prune that was interrupted; return their names."""
    if not ws.versions.exists():
        return []
    gone = []
    for p in ws.versions.glob(".trash-*"):
        shutil.rmtree(p, ignore_errors=True)
        gone.append(p.name)
    return gone
