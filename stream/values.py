"""Checks and descriptions of decoded JSON values, shared by every decoder (vector, sample, OTLP,
Prometheus range queries) so that they accept the same values and describe bad ones alike."""

from __future__ import annotations

import numbers
from typing import Any

__all__ = ["is_number", "is_utf8", "kind_of", "show"]


def is_number(value: Any) -> bool:
    """Real numbers (also numpy's) but not booleans, which JSON and Python both treat as ints."""
    kind = type(value)
    return kind is float or kind is int or (isinstance(value, numbers.Real) and not isinstance(value, bool))


def is_utf8(text: str) -> bool:
    """False for strings with unpaired surrogates (possible from the stdlib parser or Python callers)."""
    if text.isascii():
        return True
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


_KINDS = {dict: "an object", list: "an array", str: "a string", bool: "a boolean", type(None): "null",
          int: "a number", float: "a number"}


def kind_of(value: Any) -> str:
    """How a person would name the JSON kind of ``value`` ("an object", "a string", ...)."""
    return _KINDS.get(type(value)) or type(value).__name__


def show(value: Any, limit: int = 60) -> str:
    """``value`` as Python shows it, clipped to ``limit`` characters for an error message."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "..."
