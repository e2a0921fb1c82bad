"""One run at a time: an exclusive lock file on the workspace, with stale-lock detection.

The lock is a file created with ``O_CREAT | O_EXCL`` holding the holder's pid, host and start time. A
lock is stale when its holder's process is gone (same host) or it is older than
``runtime.lock_stale_seconds``; a stale lock is taken over, and the takeover is reported.
"""

from __future__ import annotations

import json
import os
import socket
import time
from contextlib import contextmanager
from pathlib import Path


class LockHeld(RuntimeError):
    """Another run holds the workspace lock."""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def read_lock(path: Path) -> dict | None:
    try:
        return json.loads(path.read_text())
    except (FileNotFoundError, json.JSONDecodeError):
        return None


def is_stale(info: dict | None, stale_seconds: float) -> bool:
    if info is None:
        return True   # unreadable lock content: a crash while writing it
    if time.time() - float(info.get("started", 0)) > stale_seconds:
        return True
    return info.get("host") == socket.gethostname() and not _alive(int(info.get("pid", -1)))


def _held_message(path: Path, holder: dict) -> str:
    since = time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(float(holder.get("started", 0))))
    return (f"workspace is locked by {holder.get('what', '?')} (pid {holder.get('pid')} on "
            f"{holder.get('host')}, since {since} UTC); lock file: {path}. "
            "If that process is gone, the lock is taken over automatically once it is detected as stale.")


def check_free(path: Path, stale_seconds: float) -> None:
    """Raise :class:`LockHeld` (same message as :func:`workspace_lock`) when a live holder has the lock.
    A courtesy check before starting a long run; only taking the lock is a guarantee."""
    holder = read_lock(path)
    if path.exists() and holder is not None and not is_stale(holder, stale_seconds):
        raise LockHeld(_held_message(path, holder))


class LockWaitExpired(LockHeld):
    """The lock stayed held for the whole wait (``runtime.lock_wait_seconds``)."""


@contextmanager
def workspace_lock(path: Path, what: str, stale_seconds: float, wait_seconds: float = 0.0, poll_seconds: float = 1.0):
    """Hold the lock for the ``with`` block; raise :class:`LockHeld` with the holder's details if taken.
    With ``wait_seconds`` > 0, wait that long for a live holder to finish first (checking every
    ``poll_seconds``), then raise :class:`LockWaitExpired`.

    Yields a dict with ``took_over`` (the stale holder's info, or None) and ``waited`` (seconds).
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    me = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time(), "what": what}
    took_over = None
    t0 = time.monotonic()
    attempts = 0
    while True:
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            holder = read_lock(path)
            if not is_stale(holder, stale_seconds):
                waited = time.monotonic() - t0
                if waited >= wait_seconds:
                    if wait_seconds > 0:
                        raise LockWaitExpired(f"gave up after waiting {waited:.0f} s (runtime.lock_wait_seconds = "
                                              f"{wait_seconds:g}): {_held_message(path, holder)}") from None
                    raise LockHeld(_held_message(path, holder)) from None
                time.sleep(min(poll_seconds, max(wait_seconds - waited, 0.01)))
                continue
            attempts += 1
            if attempts > 2:
                raise LockHeld(f"could not take the workspace lock {path} (raced with another run)")
            took_over = holder
            path.unlink(missing_ok=True)
            continue
        with os.fdopen(fd, "w") as fh:
            json.dump(me, fh)
        break
    try:
        yield {"took_over": took_over, "waited": round(time.monotonic() - t0, 1)}
    finally:
        if (read_lock(path) or {}).get("pid") == me["pid"]:
            path.unlink(missing_ok=True)
