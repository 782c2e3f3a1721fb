"""Validate a driver's ``options`` table from the bench file with a pydantic model.

Every driver declares its options as a small pydantic model (unknown keys forbidden) and calls
:func:`parse_options` in its factory, so a mistake in ``[bench.<name>.options]`` gives the same one-line
ConfigError, naming the key path, the bad value and what is allowed, as a mistake anywhere else in the
file. Nothing is opened or moved here.
"""

from __future__ import annotations

import difflib
from typing import Any, Mapping, TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError

from .errors import ConfigError

__all__ = ["DriverOptions", "parse_options"]

M = TypeVar("M", bound=BaseModel)


class DriverOptions(BaseModel):
    """Base for driver option models: unknown keys are errors, values are frozen once read."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _key(loc: tuple[Any, ...]) -> str:
    return ".".join(f"[{p}]" if isinstance(p, int) else str(p) for p in loc).replace(".[", "[")


def parse_options(model: type[M], options: Mapping[str, Any], key_path: str) -> M:
    """Validate ``options`` against ``model``; ``key_path`` is where they sit (``bench.chopper.options``).

    Raises
    ------
    ConfigError
        For the first problem found, with ``key_path`` extended to the offending key.
    """
    try:
        return model.model_validate(dict(options))
    except ValidationError as exc:
        err = exc.errors()[0]
        loc = tuple(err.get("loc", ()))
        where = f"{key_path}.{_key(loc)}" if loc else key_path
        kind = err.get("type", "")
        if kind == "extra_forbidden":
            allowed = sorted(model.model_fields)
            hint = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
            raise ConfigError("unknown option" + (f" (did you mean {hint[0]!r}?)" if hint else ""), key_path=where,
                              value=err.get("input"), allowed=", ".join(allowed)) from None
        if kind == "missing":
            raise ConfigError("required option is missing", key_path=where) from None
        msg = str(err.get("msg", "invalid value")).removeprefix("Value error, ")
        raise ConfigError(msg, key_path=where, value=err.get("input")) from None
