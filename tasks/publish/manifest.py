"""What a version's manifest records, so anyone can tell where its predictions came from, and whether
its own files are still the ones published (sizes and sha256 of every file in the version folder)."""

from __future__ import annotations

import hashlib
import subprocess
from functools import lru_cache
from importlib import metadata
from pathlib import Path

from tasks.config import Config
from tasks.dates import window_start
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.gate import GateDecision


@lru_cache(maxsize=1)
def code_version() -> str:
    """Package version plus the git commit of the checkout when there is one (``0.1.0+g1a2b3c4``)."""
    try:
        version = metadata.version("tarewise")
    except metadata.PackageNotFoundError:
        version = "unknown"
    try:
        sha = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=Path(__file__).parent,
                             capture_output=True, text=True, timeout=5, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=Path(__file__).parent,
                               capture_output=True, text=True, timeout=5).stdout.strip()
        return f"{version}+g{sha}{'.dirty' if dirty else ''}"
    except (OSError, subprocess.SubprocessError):
        return version


def window_bounds(run_date: str, days: int) -> tuple[str, str]:
    return window_start(run_date, days), run_date


def build_manifest(cfg: Config, run_date: str, kind: str, base_version: str | None, files: list[dict],
                   window_dates: list[str], counts: dict, evaluation: Evaluation, gate: GateDecision,
                   rounds: list[dict], notes: list[str], method: str) -> dict:
    """The manifest of the version trained on ``run_date``: its inputs (files with sizes and hashes, the
    window's dates, the base version), config hash, code version, counts, held-out errors under
    ``metrics`` (``Evaluation.to_dict()``), the gate decision, training rounds and engine notes."""
    start, end = window_bounds(run_date, cfg.window.days)
    return {
        "run_date": run_date,
        "kind": kind,
        "base_version": base_version,
        "method": method,
        "data_window": {"start": start, "end": end, "dates_present": window_dates},
        "input_files": files,
        "counts": counts,
        "config_hash": cfg.digest(),
        "code_version": code_version(),
        "metrics": evaluation.to_dict(),
        "gate": gate.to_dict(),
        "training_rounds": rounds,
        "engine_notes": notes,
    }


#: The manifest's own name: the one file of a version it cannot describe.
MANIFEST = "manifest.json"


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    """Hex sha256 of a file's bytes, read in ``chunk``-byte pieces (memory stays flat for large files)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def version_files(folder: Path) -> dict[str, dict]:
    """``{relative path: {"size": bytes, "sha256": hex}}`` of every file under a version folder except the
    manifest, sorted by path (``predictions.parquet``, ``model/model.pt``, ``shadow/meta.json``, ...)."""
    folder = Path(folder)
    out = {}
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        rel = path.relative_to(folder).as_posix()
        if rel != MANIFEST:
            out[rel] = {"size": path.stat().st_size, "sha256": sha256_file(path)}
    return out


def file_problems(folder: Path, recorded: dict[str, dict], check_sha: bool = True) -> list[str]:
    """One line per recorded file that is missing or differs in size or sha256 from ``recorded`` (the
    manifest's ``files``); empty when all match. ``check_sha=False``: presence and sizes only (cheap)."""
    problems = []
    for rel, want in sorted(recorded.items()):
        path = Path(folder) / rel
        if not path.is_file():
            problems.append(f"{path} is missing")
        elif path.stat().st_size != want.get("size"):
            problems.append(f"{path} has {path.stat().st_size} bytes, the manifest records {want.get('size')}")
        elif check_sha and sha256_file(path) != want.get("sha256"):
            problems.append(f"{path} differs from the manifest's sha256 (same size, other bytes)")
    return problems
