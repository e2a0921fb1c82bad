"""``tarewise`` command line. The edge: parses flags, validates config once, calls flows and tasks.

Prefect is imported lazily, after :func:`_prefect_env` has set quiet local defaults, so commands that
need no flow (``versions``, ``score``) start fast and never touch ``~/.prefect`` by accident.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Keep a rating model honest against a random probe: nightly runs, versions, reports.")
console = Console()
err = Console(stderr=True)

REPO = Path(__file__).resolve().parent.parent
ConfigOpt = typer.Option(None, "--config", "-c", help="TOML config (see configs/example.toml).")
LogsOpt = typer.Option(None, "--logs", help="Logs folder or URI; overrides config and TAREWISE_LOGS.")
WorkspaceOpt = typer.Option(None, "--workspace", help="Workspace folder; overrides config and TAREWISE_WORKSPACE.")


def _prefect_env(workspace: str, verbose: bool = False) -> None:
    """Quiet, self-contained Prefect defaults; anything already set in the environment wins."""
    os.environ.setdefault("PREFECT_HOME", str(Path(workspace).expanduser().resolve() / ".prefect-home"))
    Path(os.environ["PREFECT_HOME"]).mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "INFO" if verbose else "WARNING")
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")


def load(config: Optional[Path], logs: Optional[str], workspace: Optional[str]):
    from tasks.config import ConfigError, load_config
    try:
        return load_config(config, logs=logs, workspace=workspace)
    except ConfigError as exc:
        err.print(f"[bold red]config error[/]: {exc}", markup=True, highlight=False)
        raise typer.Exit(2)


def _fail(exc: BaseException, what: str) -> None:
    err.print(f"[bold red]{what} failed[/]: {type(exc).__name__}: {exc}", highlight=False)
    raise typer.Exit(1)


@app.command()
def run(date: Optional[str] = typer.Option(None, "--date", "-d", help="Run date YYYY-MM-DD (default: yesterday "
                                          "in runtime.timezone)."),
        config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
        verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """One nightly run. Exits non-zero on failure; the live version is then untouched."""
    cfg = load(config, logs, workspace)
    _prefect_env(cfg.paths.workspace, verbose)
    from flows.nightly import nightly
    try:
        with console.status(f"nightly run for {date or 'yesterday'} ..."):
            out = nightly.with_options(timeout_seconds=cfg.runtime.flow_timeout_seconds)(cfg=cfg, run_date=date)
    except Exception as exc:  # noqa: BLE001 - the CLI reports every failure the same way
        _fail(exc, "run")
    _print_night(out)


def _print_night(out: dict) -> None:
    if out["status"] != "done":
        console.print(f"{out['run_date']}: [yellow]{out['status']}[/] - {out.get('message', '')}")
        return
    t = Table(title=f"night {out['run_date']} -> version {out['version_id']} ({out['state']})")
    for col in ("model", "held-out n", "MAE", "MAE interval", "RMSE"):
        t.add_column(col)
    for name in ("candidate", "shadow", "live"):
        e = out["evaluation"].get(name)
        if e:
            t.add_row(name, str(e["n"]), f"{e['mae']:.4f}", f"{e['mae_lo']:.4f} - {e['mae_hi']:.4f}",
                      f"{e['rmse']:.4f}")
    console.print(t)
    console.print(f"gate: {'promote' if out['gate']['promote'] else 'hold'} - {out['gate']['reason']}",
                  highlight=False)
    for a in out.get("alerts", []):
        console.print(f"[bold magenta]alert[/] {a}", highlight=False)


@app.command()
def score(pairs: Path = typer.Option(..., "--pairs", help="Parquet with user_id, item_id columns."),
          out: Path = typer.Option(..., "--out", help="Where to write the scored Parquet."),
          version: Optional[str] = typer.Option(None, "--version", help="Version id (default: live)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Score arbitrary (user_id, item_id) pairs; unknown ids get a fallback score and a flag."""
    cfg = load(config, None, workspace)
    from tasks.scoring_io import score_pairs
    try:
        n, used, fallbacks = score_pairs(cfg, pairs, out, version)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "score")
    console.print(f"scored {n} pairs with version {used} -> {out} ({fallbacks} with a fallback score)")


@app.command("versions")
def versions_cmd(config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """List versions with state, run date, held-out MAE and gate reason."""
    cfg = load(config, None, workspace)
    from tasks.versions import list_versions
    from tasks.workspace import Workspace
    t = Table(title=f"versions in {cfg.paths.workspace}")
    for col in ("version", "state", "run date", "method", "MAE cand.", "MAE shadow", "MAE live", "gate"):
        t.add_column(col)
    for m in list_versions(Workspace.at(cfg.paths.workspace)):
        mt = m.get("metrics", {})
        f = lambda k: f"{mt[k]['mae']:.4f}" if mt.get(k) else "-"  # noqa: E731
        t.add_row(m["version_id"], m["state"], m.get("run_date", ""), m.get("method", ""), f("candidate"),
                  f("shadow"), f("live"), m.get("gate", {}).get("reason", ""))
    console.print(t)


@app.command()
def report(date: Optional[str] = typer.Option(None, "--date", "-d", help="Night to render (default: latest)."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Re-render a night's HTML report and its JSON twin from stored metrics."""
    cfg = load(config, None, workspace)
    from tasks.report import render_report
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    if date is None:
        from tasks.metrics_store import read_metrics
        m = read_metrics(ws)
        if m.empty:
            err.print(f"no stored metrics in {ws.metrics}; run a night first")
            raise typer.Exit(1)
        date = str(m["run_date"].max())
    try:
        html, js = render_report(ws, date, cfg)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "report")
    console.print(f"report: {html}\njson:   {js}")


@app.command()
def demo(folder: Optional[Path] = typer.Option(None, "--dir", help="Folder for demo workspace (default: a new "
                                               "temporary folder)."),
         nights: int = typer.Option(0, "--nights", help="Nights to run (default: every day in the sample)."),
         fresh_data: bool = typer.Option(False, "--generate", help="Generate new demo logs instead of using "
                                         "the committed sample_parquet/."),
         verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """Run the invented reading-app demo end to end and print where predictions and reports are."""
    import tempfile
    from tasks.config import load_config
    base = folder or Path(tempfile.mkdtemp(prefix="tarewise-demo-"))
    base.mkdir(parents=True, exist_ok=True)
    logs = REPO / "sample_parquet"
    if fresh_data:
        from tasks.demo_data import generate
        logs = base / "logs"
        generate(logs, start_date="2026-11-01", days=max(nights, 4), seed=11)
    cfg = load_config(REPO / "configs" / "demo.toml", logs=str(logs), workspace=str(base / "workspace"))
    _prefect_env(cfg.paths.workspace, verbose)
    from tasks.ingest import list_partition_dates
    dates = list_partition_dates(str(logs))
    if nights:
        dates = dates[:nights]
    if not dates:
        err.print(f"no dt=YYYY-MM-DD partitions under {logs}")
        raise typer.Exit(1)
    from flows.nightly import nightly
    from rich.progress import Progress
    outs = []
    with Progress(console=console) as progress:
        bar = progress.add_task("demo nights", total=len(dates))
        for d in dates:
            try:
                outs.append(nightly(cfg=cfg, run_date=d))
            except Exception as exc:  # noqa: BLE001
                _fail(exc, f"demo night {d}")
            progress.advance(bar)
    for out in outs:
        _print_night(out)
    ws = Path(cfg.paths.workspace)
    live = [o for o in outs if o.get("state") == "live"]
    console.print(f"\nworkspace:   {ws}")
    if live:
        console.print(f"predictions: {ws / 'versions' / live[-1]['version_id'] / 'predictions.parquet'}")
    console.print(f"reports:     {ws / 'reports'}")
    console.print("(demo data is invented: a fictional library network's reading app)")


def main() -> None:  # pragma: no cover - console entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
