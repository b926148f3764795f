"""Checks and descriptions of decoded JSON values, shared by every decoder (vector, sample, OTLP,
Prometheus range queries) so that they accept the same values and describe bad ones alike."""

from __future__ import annotations

import numbers
import re
from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["describe_invalid", "invalid_value_notes", "is_number", "is_utf8", "kind_of", "not_a_number_reason", "show",
           "show_value"]

#: A JSON number (RFC 8259, section 6), with the JSON whitespace allowed around a value.
_JSON_NUMBER = re.compile(r"[ \t\n\r]*-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?[ \t\n\r]*")
#: Invalid entries named one by one in a description before "and N more".
_NAMED = 20


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


def show_value(value: Any) -> str:
    """A decoded value for a person: scalars as :func:`show` gives them, containers by their kind
    (a deep or large structure is never rendered)."""
    return show(value) if value is None or isinstance(value, (str, int, float)) else kind_of(value)


def not_a_number_reason(value: Any) -> str:
    """Why a value that is not a number is invalid: "numeric_string" for a string whose text is a
    JSON number (RFC 8259, section 6: ``"12"``; the producer should send it without the quotes),
    else "not_a_number" (words such as ``"n/a"`` or ``"12ms"``, booleans, arrays, objects)."""
    return "numeric_string" if isinstance(value, str) and _JSON_NUMBER.fullmatch(value) else "not_a_number"


def describe_invalid(invalid: Sequence[tuple[str, str]], shown: Sequence[str] = ()) -> str:
    """A vector's invalid entries for a person: ``cpu_util: not_a_number ('n/a'); lat_ms: ...``, each
    with its value as :func:`show_value` gave it when the decoder kept it (``shown``, parallel to ``invalid``)."""
    parts = [f"{name}: {reason}" + (f" ({shown[i]})" if i < len(shown) else "")
             for i, (name, reason) in enumerate(invalid[:_NAMED])]
    if len(invalid) > _NAMED:
        parts.append(f"and {len(invalid) - _NAMED:,} more")
    return "; ".join(parts)


def invalid_value_notes(counts: Mapping[str, int]) -> list[str]:
    """Sentences for a person about the values treated as missing (``counts``: entries by reason)."""
    total = sum(counts.values())
    if not total:
        return []
    reasons = ", ".join(f"{reason} {n:,}" for reason, n in sorted(counts.items()))
    lines = [f"warning: {total:,} value{'s' if total != 1 else ''} invalid and treated as missing ({reasons}); "
             f"the dead letters (reason invalid_values, kept: true) name each"]
    if counts.get("numeric_string"):
        lines.append('  numeric_string: numbers sent as strings ("12"); the producer should send JSON numbers.')
    return lines
