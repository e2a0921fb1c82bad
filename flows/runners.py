"""Which Prefect task runner a flow uses, from ``[runtime]`` in the config.

Task-level parallelism only (no scheduler of our own): the nightly flow submits the independent pieces of
a night, the files of a day's partition and the blocks of users to score, to the flow's task runner,
which runs them side by side:

``runner = "thread"`` (default)
    Prefect's ``ThreadPoolTaskRunner`` with ``runtime.workers`` threads in the run's own process. The
    heavy parts (Parquet decoding, pyarrow compute, torch matrix products and top-k) release the GIL,
    so threads use several cores without copying data.
``runner = "dask"``
    ``prefect_dask.DaskTaskRunner``. With ``runtime.dask_address`` empty: a local cluster of
    ``runtime.workers`` single-threaded workers *in this process* (``processes=False``). Process workers
    would each start their own temporary Prefect API server in Prefect's local mode (seconds each) and
    every task's inputs would be pickled across; in-process workers avoid both. With an address
    (``tcp://scheduler:8786``): that existing cluster; its workers need tarewise installed and
    ``PREFECT_API_URL`` pointing at a Prefect server reachable from them, and they read the logs
    themselves (so logs must live where every worker can read them: a shared path or an object store).

Outputs do not depend on the runner: each parallel piece computes exactly what the serial code computes
on the same slice, and results are joined in a fixed order (tests/test_runners.py checks that the
predictions Parquet is byte-identical under both runners).

This module imports Prefect (lazily), which is why it is not part of ``tasks/engine``.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from typing import Iterator

from tasks.config import RuntimeConfig


class RunnerError(ValueError):
    """The configured task runner cannot be built; the message names the config key."""


def workers(runtime: RuntimeConfig) -> int:
    """Parallel slots: ``runtime.workers``, or the machine's CPU count when it is 0."""
    return runtime.workers or (os.cpu_count() or 1)


def task_runner(runtime: RuntimeConfig, dask_address: str | None = None):
    """A fresh task runner for one flow run (runners are entered and shut down by the flow run).

    ``dask_address`` overrides ``runtime.dask_address`` (used with :func:`shared_cluster`)."""
    if runtime.runner == "thread":
        from prefect.task_runners import ThreadPoolTaskRunner
        return ThreadPoolTaskRunner(max_workers=workers(runtime))
    if runtime.runner == "dask":
        try:
            from prefect_dask import DaskTaskRunner
        except ImportError as exc:  # an optional dependency: say which package to install
            raise RunnerError("runtime.runner = 'dask' needs the prefect-dask package "
                              "(pip install 'tarewise[dask]', or pip install prefect-dask)") from exc
        _dask_log_level()
        address = dask_address or runtime.dask_address
        if address:
            return DaskTaskRunner(address=address)
        return DaskTaskRunner(cluster_kwargs={"n_workers": workers(runtime), "threads_per_worker": 1,
                                              "processes": False, "dashboard_address": None})
    raise RunnerError(f"runtime.runner: unknown runner {runtime.runner!r} (use 'thread' or 'dask')")


def _dask_log_level() -> None:
    """Dask logs cluster start/stop at INFO; follow Prefect's level (the CLI sets WARNING unless -v)."""
    import logging
    level = os.environ.get("PREFECT_LOGGING_LEVEL", "INFO").upper()
    logging.getLogger("distributed").setLevel(level if level in logging.getLevelNamesMapping() else "INFO")


@contextmanager
def shared_cluster(runtime: RuntimeConfig) -> Iterator[str | None]:
    """For flows that run many nights (backfill, sweep): one local Dask cluster for all of them instead of
    one per night. Yields its scheduler address, or None when no cluster is needed (thread runner, or an
    existing cluster named by ``runtime.dask_address``)."""
    if runtime.runner != "dask" or runtime.dask_address:
        yield None
        return
    from distributed import LocalCluster
    _dask_log_level()
    with LocalCluster(n_workers=workers(runtime), threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def describe(runtime: RuntimeConfig) -> str:
    """One line for logs and the CLI: which runner, how many workers, which cluster."""
    if runtime.runner == "dask":
        where = runtime.dask_address or f"local in-process cluster, {workers(runtime)} workers"
        return f"dask ({where})"
    return f"thread pool ({workers(runtime)} threads)"
