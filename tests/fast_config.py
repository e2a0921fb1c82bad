"""A small, fast config for tests that run whole nights: the properties under test (ordering, refusal,
switching live) do not depend on model quality. The lenient gate makes every night go live."""

FAST_TOML = """
[model]
dim = 4
max_epochs = 6
finetune_epochs = 2

[evaluate]
bootstrap = 20

[gate]
tolerance_mae = 1.0
anchor_budget = 1.0
max_segment_regression = 2.0
min_heldout = 1

[runtime]
shadow = false
timezone = "Europe/Berlin"
"""
