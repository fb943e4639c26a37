"""Small helpers shared by the Interfaces."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from nipype.interfaces.base import isdefined

__all__ = ["optional"]


def optional(inputs, name: str, convert: Callable[[Any], Any] | None = None) -> Any:
    """The value of input trait ``name``, ``convert``-ed if given, or None when it is undefined."""
    value = getattr(inputs, name)
    if not isdefined(value):
        return None
    return convert(value) if convert is not None else value
