"""Named crash points for crash-safety tests.

``TAREWISE_FAILPOINT=<name>`` makes the process SIGKILL itself when it reaches ``hit(<name>)``: a real
kill at a precise step, so tests prove that no step leaves the workspace half-updated.
``TAREWISE_FAILPOINT=<name>@<n>`` kills on the n-th hit of that point in this process (e.g.
``backfill:date-done@3`` after the third backfilled date, ``publish:renamed@5`` inside the fifth night).
``TAREWISE_FAILPOINT=<name>=SIGTERM`` (or ``=SIGINT``, with or without ``@<n>``) sends that signal
instead, to test what a stop request records.
Unset (always, in production) it costs one dictionary lookup.
"""

from __future__ import annotations

import os
import signal

_hits: dict[str, int] = {}


def hit(name: str) -> None:
    spec = os.environ.get("TAREWISE_FAILPOINT")
    if not spec:
        return
    spec, _, sig = spec.partition("=")
    target, _, nth = spec.partition("@")
    if target != name:
        return
    _hits[name] = _hits.get(name, 0) + 1
    if not nth or _hits[name] == int(nth):
        os.kill(os.getpid(), getattr(signal, sig) if sig else signal.SIGKILL)
