"""What a version's manifest records, so anyone can tell where its predictions came from."""

from __future__ import annotations

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
