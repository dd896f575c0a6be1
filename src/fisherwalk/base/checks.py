"""Validators shared by the whole package: one of each kind, one message style."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InputError, explain

__all__ = ["whole_number"]


def whole_number(value: Any, name: str, where: str, *, minimum: int = 1,
                 maximum: int | None = None) -> int:
    """``value`` as an int in [minimum, maximum]; booleans, floats and strings refused."""
    ok = not isinstance(value, bool | np.bool_) and isinstance(value, int | np.integer)
    if ok and value >= minimum and (maximum is None or value <= maximum):
        return int(value)
    bound = f"an int >= {minimum}" + ("" if maximum is None else f" and <= {maximum}")
    raise InputError(explain(f"{name}={value!r} is not a whole number in range.", where,
                             f"pass {name} as {bound}."))
