"""``python -m tasks.config`` prints the example config (every key with its default)."""

from tasks.config.example import render_example

print(render_example(), end="")
