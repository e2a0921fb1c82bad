"""Operations around the nightly stages: backfill plans, retention, settings sweeps, the shared copy,
status and rollback, and the invented demo data."""
