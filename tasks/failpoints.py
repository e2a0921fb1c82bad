"""Named crash points for crash-safety tests.

``TAREWISE_FAILPOINT=<name>`` makes the process SIGKILL itself when it reaches ``hit(<name>)``: a real
kill at a precise step, so tests prove that no step leaves the workspace half-updated. Unset (always, in
production) it costs one dictionary lookup.
"""

from __future__ import annotations

import os
import signal


def hit(name: str) -> None:
    if os.environ.get("TAREWISE_FAILPOINT") == name:
        os.kill(os.getpid(), signal.SIGKILL)
