"""The config's shared pieces: the error it raises, the base of every section, one-line error text."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, ValidationError


class ConfigError(ValueError):
    """A config file or value is wrong; the message names the key and what is allowed."""


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def format_error(err: ValidationError, source: str, prefix: tuple[str, ...] = ()) -> str:
    """One line per problem (key, what is wrong, the value given); a single problem is one line in all."""
    problems = []
    for e in err.errors():
        key = ".".join(str(p) for p in (*prefix, *e["loc"])) or "<top level>"
        if e["type"] == "extra_forbidden":
            problems.append(f"{key}: unknown key (check spelling; see configs/example.toml)")
            continue
        msg = str(e["msg"]).removeprefix("Value error, ")
        given = repr(e.get("input"))
        problems.append(f"{key}: {msg}" + ("" if given in msg else f" (got {given})"))
    if len(problems) == 1:
        return f"invalid config in {source}: {problems[0]}"
    return "\n".join([f"invalid config in {source}:"] + [f"  {p}" for p in problems])

