"""``python -m flows.cli``: the same command line as the ``tarewise`` entry point."""

import sys

from flows.cli import app

sys.exit(app())
