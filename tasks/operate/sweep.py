"""Sweeps: replay a window of history under several settings and compare held-out probe MAE.

A team chooses settings (``debias.calibration_weight``, ``debias.reference_temperature``,
``debias.profile_points``, ...) from their own logs: each setting replays the same dates in its own
scratch workspace under ``<workspace>/sweeps/<start>_<end>/s<k>/``, never touching the main live
version, run ledger or alert receivers. The result is one row per setting: the candidate's held-out
probe MAE averaged over the nights it trained.

Comparable by construction: every setting sees the same logs, the same stored history before the
window (copied from the main store), the same held-out probe pairs (chosen by a hash of user and item,
so sweeping ``debias.heldout_share`` is refused) and the same seeds; each starts cold and carries its
own model forward night to night.

Plain functions; ``flows/backfill.py`` runs the nights.
"""

from __future__ import annotations

import itertools
import json
import math
import shutil
import tomllib
from pathlib import Path

from tasks.config import Config, ConfigError
from tasks.dates import window_start
from tasks.ingest.store import stored_dates
from tasks.files import atomic_write_json
from tasks.workspace import Workspace

#: Keys a sweep may not vary: paths belong to the run, and the held-out share defines what is measured.
FORBIDDEN_PREFIXES = ("paths.", "alerts.", "retention.", "runtime.")
FORBIDDEN_KEYS = ("debias.heldout_share",)
#: An environment variable name nobody sets: sweep nights deliver no webhook alerts.
SILENT_WEBHOOK_ENV = "TAREWISE_SWEEP_ALERTS_OFF"
MAX_SETTINGS = 200


class SweepError(ValueError):
    """A ``--sweep`` spec is malformed or names a key that cannot be swept; the message says which."""


def parse_value(text: str) -> object:
    """A TOML literal (``0.1``, ``10``, ``true``, ``"x"``) or, failing that, the bare text (``plain``)."""
    text = text.strip()
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_specs(specs: list[str]) -> dict[str, list[object]]:
    """``["debias.calibration_weight=0.1,1,10", "debias.method=plain,calibrated"]`` ->
    ``{key: [values]}`` in the order given. Each key once; at least one value each."""
    axes: dict[str, list[object]] = {}
    for spec in specs:
        key, sep, values = spec.partition("=")
        key = key.strip()
        if not sep or not key or not values.strip():
            raise SweepError(f"--sweep {spec!r}: expected KEY=V1,V2,... (e.g. debias.calibration_weight=0.1,1,10)")
        if key in axes:
            raise SweepError(f"--sweep: key {key!r} given twice; list all its values in one --sweep")
        if key.startswith(FORBIDDEN_PREFIXES) or key in FORBIDDEN_KEYS:
            raise SweepError(f"--sweep: {key!r} cannot be swept (paths, alerts, retention and runtime belong to "
                             "the run; debias.heldout_share defines the held-out set every setting is judged on)")
        vals = [parse_value(v) for v in values.split(",") if v.strip()]
        if len(set(map(repr, vals))) != len(vals):
            raise SweepError(f"--sweep {spec!r}: a value is repeated")
        axes[key] = vals
    if not axes:
        raise SweepError("--sweep: no settings given")
    return axes


def expand_grid(cfg: Config, axes: dict[str, list[object]]) -> list[dict[str, object]]:
    """Every combination (first key varies slowest), each validated against the config now, so a bad
    value fails before any night runs (:class:`SweepError` naming the setting and key)."""
    keys = list(axes)
    grid = [dict(zip(keys, combo)) for combo in itertools.product(*(axes[k] for k in keys))]
    if len(grid) > MAX_SETTINGS:
        raise SweepError(f"--sweep: {len(grid)} settings; at most {MAX_SETTINGS} per sweep")
    for overrides in grid:
        try:
            cfg.updated(overrides)
        except ConfigError as exc:
            raise SweepError(f"--sweep setting {label(overrides)}: {exc}") from None
    return grid


def label(overrides: dict[str, object]) -> str:
    """``calibration_weight=0.1, method=plain`` (section names dropped when unambiguous)."""
    short = [k.rsplit(".", 1)[-1] for k in overrides]
    names = short if len(set(short)) == len(short) else list(overrides)
    return ", ".join(f"{n}={v}" for n, v in zip(names, overrides.values()))


def sweep_root(ws: Workspace, start: str, end: str) -> Path:
    return ws.root / "sweeps" / f"{start}_{end}"


def scratch_config(cfg: Config, overrides: dict[str, object], scratch: Path) -> Config:
    """The setting's config: the main config with ``overrides``, its own workspace, no alert
    receivers (history is still recorded in the scratch workspace) and no shared copy."""
    silent = {"alerts.webhook_url_env": SILENT_WEBHOOK_ENV, "alerts.prefect_blocks": []}
    return cfg.updated({**overrides, **silent}).with_overrides(workspace=str(scratch), shared="")


def prepare_scratch(main: Workspace, scratch: Path, start: str, window_days: int) -> Workspace:
    """A fresh scratch workspace whose store holds the main store's dates inside the first night's
    window but before ``start`` (so the first night trains on the same history as in the main run)."""
    shutil.rmtree(scratch, ignore_errors=True)
    sws = Workspace.at(scratch)
    first = window_start(start, window_days)
    for d in stored_dates(main):
        if first <= d < start:
            shutil.copytree(main.partition(main.store, d), sws.partition(sws.store, d))
    return sws


def night_mae(out: dict, model: str = "candidate") -> float | None:
    e = (out.get("evaluation") or {}).get(model)
    if not e or not e.get("n"):
        return None
    mae = float(e["mae"])
    return mae if math.isfinite(mae) else None


def summarise(settings: list[dict]) -> list[dict]:
    """One row per setting: ``label``, ``nights`` (trained), ``skipped``, ``mae`` (mean held-out probe
    MAE of the candidate over trained nights), ``shadow_mae`` (same for the plain shadow model, when
    trained), ``heldout`` (held-out probe ratings summed over nights), ``error``; ``best`` marks the
    lowest ``mae``. ``settings``: ``{"label", "overrides", "nights": [night outputs], "error"}``."""
    rows = []
    for s in settings:
        trained = [n for n in s["nights"] if n.get("status") == "done"]
        maes = [m for m in (night_mae(n) for n in trained) if m is not None]
        shadows = [m for m in (night_mae(n, "shadow") for n in trained) if m is not None]
        rows.append({"label": s["label"], "overrides": s["overrides"], "nights": len(trained),
                     "skipped": sum(n.get("status") == "skipped" for n in s["nights"]),
                     "mae": sum(maes) / len(maes) if maes else None,
                     "shadow_mae": sum(shadows) / len(shadows) if shadows else None,
                     "heldout": sum(int(n["evaluation"]["candidate"]["n"]) for n in trained),
                     "error": s.get("error"), "best": False})
    scored = [r for r in rows if r["mae"] is not None and not r["error"]]
    if scored:
        min(scored, key=lambda r: r["mae"])["best"] = True
    return rows


def write_setting(scratch: Path, start: str, end: str, overrides: dict[str, object]) -> None:
    """``setting.json`` in the scratch workspace: what this folder replayed, for whoever opens it later."""
    atomic_write_json(scratch / "setting.json", {"start": start, "end": end, "label": label(overrides),
                                                 "overrides": overrides})


def write_results(root: Path, start: str, end: str, rows: list[dict]) -> Path:
    path = root / "results.json"
    atomic_write_json(path, {"start": start, "end": end, "settings": rows})
    return path


def read_results(root: Path) -> dict:
    return json.loads((root / "results.json").read_text())
