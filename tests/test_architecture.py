"""The layout's rules, each checked so that breaking it fails the suite (DEVELOPERS.md, "Rules that hold").

1. Data flows one way: a stage imports only itself, earlier stages and the foundation modules.
2. ``tasks/`` never imports ``flows/``.
3. Prefect is imported only by ``tasks/steps.py`` and ``flows/``.
4. The engine imports nothing of the pipeline (only itself and numerical libraries), so it can be
   reused and tested alone; checked statically and in a fresh interpreter.
"""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
TASKS = REPO / "tasks"

#: The foundation: modules every stage may use (config, contracts, workspace layout, small helpers).
FOUNDATION = ("config", "schemas", "workspace", "files", "dates", "ledger", "lock", "failpoints", "allocators")
#: Stages in data-flow order: logs -> store -> model -> evaluate and gate -> versions -> monitor; then
#: the operations built on all of them.
STAGES = ("engine", "ingest", "train", "evaluate", "publish", "monitor", "operate")
#: Prefect's side of tasks/: task wrappers only.
PREFECT_EDGE = {"tasks/steps.py"}


def _modules() -> list[Path]:
    return sorted(p for p in TASKS.rglob("*.py"))


def _imports(path: Path) -> list[str]:
    """Every module name imported anywhere in the file (top level and inside functions)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    names = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
            names += [f"{node.module}.{a.name}" for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level:
            raise AssertionError(f"{path}: relative import; tarewise uses absolute tasks.* imports")
    return names


def _rank(module: str) -> int | None:
    """Position in the data flow: -1 foundation, 0.. stages; None when not a tasks module we rank."""
    parts = module.split(".")
    if parts[0] != "tasks" or len(parts) < 2:
        return None
    if parts[1] in FOUNDATION:
        return -1
    if parts[1] in STAGES:
        return STAGES.index(parts[1])
    return None


def _own(path: Path) -> str:
    return ".".join(path.relative_to(REPO).with_suffix("").parts).removesuffix(".__init__")


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(REPO)))
def test_imports_follow_the_data_flow(path: Path) -> None:
    rel = str(path.relative_to(REPO))
    own = _own(path)
    mine = _rank(own)
    for name in _imports(path):
        assert not name.startswith("flows"), f"{rel} imports {name}: tasks/ never imports flows/"
        if rel not in PREFECT_EDGE:
            assert not name.startswith("prefect"), f"{rel} imports {name}: Prefect belongs in tasks/steps.py and flows/"
        if mine is None:      # steps.py: the Prefect edge may wrap every stage
            continue
        theirs = _rank(name)
        if theirs is None:
            continue
        if mine == STAGES.index("engine"):
            assert name.startswith("tasks.engine"), f"{rel} imports {name}: the engine imports nothing of the pipeline"
        assert theirs <= mine, (f"{rel} ({'foundation' if mine < 0 else STAGES[mine]}) imports {name} "
                                f"({'foundation' if theirs < 0 else STAGES[theirs]}), a later stage")


def test_every_tasks_module_is_ranked() -> None:
    """A new top-level module or stage folder must be placed in the order above, on purpose."""
    for path in _modules():
        own = _own(path)
        if own in ("tasks", "tasks.steps"):
            continue
        assert _rank(own) is not None, f"{own}: add it to FOUNDATION or STAGES in tests/test_architecture.py"


def test_engine_and_stages_load_without_prefect_or_pipeline_config() -> None:
    """In a fresh interpreter: importing every engine module loads neither Prefect nor the pipeline's
    config; importing every stage module loads no Prefect."""
    engine = [_own(p) for p in (TASKS / "engine").rglob("*.py")]
    stages = [_own(p) for p in _modules() if str(p.relative_to(REPO)) not in PREFECT_EDGE]
    code = (
        "import importlib, json, sys\n"
        f"for m in {engine!r}: importlib.import_module(m)\n"
        "engine = sorted(k for k in sys.modules if k.startswith(('prefect', 'tasks.')) and not k.startswith('tasks.engine'))\n"
        f"for m in {stages!r}: importlib.import_module(m)\n"
        "print(json.dumps({'engine': engine, 'stages': sorted(k for k in sys.modules if k.startswith('prefect'))}))\n")
    out = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    loaded = json.loads(out.stdout.strip().splitlines()[-1])
    assert loaded["engine"] == [], f"engine modules pulled in {loaded['engine']}"
    assert loaded["stages"] == [], f"stage modules pulled in Prefect: {loaded['stages'][:5]}"
