"""Stage 3, evaluate and gate: held-out probe errors of candidate, shadow and live, overall and per
selection-skew segment, and the promotion gate's decision."""
