"""The ingest stage's one error: input that cannot be ingested at all (as opposed to a bad row, which goes
to the quarantine with its reason and never raises)."""

from __future__ import annotations


class IngestError(ValueError):
    """Input cannot be ingested; the message names the partition, file, column or config key."""
