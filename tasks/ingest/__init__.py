"""Stage 1, ingest: a day's rating logs (Parquet) are read, checked row by row, and land in the curated
store (``store.py``) or the quarantine with a reason. Nothing here trains or judges."""
