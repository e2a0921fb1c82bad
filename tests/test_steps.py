"""The Prefect task wrappers' retry rule: transient OS-level I/O errors are retried, bad data and code
errors fail at once (tasks/steps.py ``transient_only``), checked on Prefect's own failed states and in
real task runs."""

from __future__ import annotations

import asyncio
import io

import pyarrow as pa
import pytest
from prefect import flow, task
from prefect.states import exception_to_failed_state

from tasks import steps
from tasks.config import Config
from tasks.monitor.metrics_store import MetricsStoreError


def _failed(exc: BaseException):
    """The state Prefect itself makes of a task that raised ``exc``."""
    return asyncio.run(exception_to_failed_state(exc=exc))


@pytest.mark.parametrize("exc", [OSError("disk hiccup"), ConnectionResetError("reset by peer"),
                                 TimeoutError("read timed out"), FileNotFoundError("not there yet")],
                         ids=lambda e: type(e).__name__)
def test_os_level_errors_are_retried(exc):
    assert steps.transient_only(None, None, _failed(exc)) is True


@pytest.mark.parametrize("exc", [
    ValueError("rating 9 off the scale"),
    pa.ArrowInvalid("not Parquet"),                       # a ValueError from pyarrow: bad data
    io.UnsupportedOperation("not seekable"),              # both OSError and ValueError: not transient
    MetricsStoreError("metrics file unreadable"),
    TypeError("a code error"), KeyError("user_id"), ZeroDivisionError("division by zero"),
], ids=lambda e: type(e).__name__)
def test_bad_data_and_code_errors_are_not_retried(exc):
    assert steps.transient_only(None, None, _failed(exc)) is False


def test_io_options_carry_the_rule_and_the_configured_retries():
    cfg = Config().updated({"runtime.io_retries": 4})
    io_task = steps.with_io_retries(steps.read_window, cfg)
    assert io_task.retries == 4 and io_task.retry_condition_fn is steps.transient_only
    assert steps.read_window.retries == steps.IO["retries"]


def test_rule_in_real_task_runs(prefect_harness):
    attempts: dict[str, int] = {"flaky": 0, "bad": 0}

    @task(**{**steps.IO, "retry_delay_seconds": 0})
    def flaky() -> str:
        attempts["flaky"] += 1
        if attempts["flaky"] < 3:
            raise ConnectionResetError("connection reset by the store")
        return "read"

    @task(**{**steps.IO, "retry_delay_seconds": 0})
    def bad() -> None:
        attempts["bad"] += 1
        raise ValueError("row 12: rating 9 is off the scale")

    @flow
    def night() -> str:
        out = flaky()
        with pytest.raises(ValueError, match="row 12"):
            bad()
        return out

    assert night() == "read"
    assert attempts == {"flaky": 3, "bad": 1}  # two retries (steps.IO), then success; bad data once
