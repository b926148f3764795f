"""Configuration schema derived from typed section dataclasses.

A section of the TOML file is a frozen dataclass whose fields are declared with :func:`setting`:
the field's name is the key, its annotation the type, and the default, allowed range or choices
and help text travel in the field's metadata. :func:`derive_schema` turns a dataclass of sections
into :class:`Setting` rows, so keys, types, defaults, ranges and the ``SHIFTSIEVE_<SECTION>_<KEY>``
variable names are written once. :func:`coerce` and :func:`parse_env` check a value against a row
and produce the one-line :class:`ConfigError` messages.
"""

from __future__ import annotations

import copy
import math
import tomllib
import typing
from dataclasses import MISSING, dataclass, field, fields, is_dataclass
from typing import Any, Callable

ENV_PREFIX = "SHIFTSIEVE_"


class ConfigError(ValueError):
    """An invalid configuration; ``str()`` is a one-line message naming the key."""


@dataclass(frozen=True)
class Range:
    """A closed or half-open numeric interval; as text ``lo..hi`` for integers, ``(lo, hi]`` for numbers."""

    lo: float
    hi: float
    lo_open: bool = False
    hi_open: bool = False

    def __call__(self, value: Any) -> bool:
        above = value > self.lo if self.lo_open else value >= self.lo
        below = value < self.hi if self.hi_open else value <= self.hi
        return math.isfinite(value) and above and below

    def text(self, kind: type) -> str:
        """The interval as error messages and `config check` state it."""
        if kind is int:
            return f"{self.lo}..{self.hi}"
        return f"{'(' if self.lo_open else '['}{_number(self.lo)}, {_number(self.hi)}{')' if self.hi_open else ']'}"


def _number(x: float) -> str:
    """``0.5``, ``60``, ``1e9``: a bound as a person writes it."""
    return f"{x:g}".replace("e+0", "e").replace("e+", "e")


def setting(default: Any, within: Range | tuple[str, ...] | None = None, *, help: str, noun: str | None = None,
            note: str = "", allowed: str | None = None, check: Callable[[Any], bool] | None = None,
            secret: bool = False) -> Any:
    """A section field: its default, what it accepts, and help text for `config check`.

    ``within`` is a numeric :class:`Range` (described as ``{noun} in {range}{note}``, the noun
    defaulting to "an integer" or "a number") or a tuple of string choices; ``allowed`` and
    ``check`` describe and test any other constraint. A secret is never echoed or printed.
    """
    meta = {"within": within, "help": help, "noun": noun, "note": note, "allowed": allowed, "check": check,
            "secret": secret}
    if isinstance(default, (list, dict)):
        return field(default_factory=lambda: copy.deepcopy(default), metadata=meta)
    return field(default=default, metadata=meta, repr=not secret)


@dataclass(frozen=True)
class Setting:
    """One key of the schema, as derived from its section's field."""

    section: str
    key: str
    kind: type  # int, float, str, list (of str), dict (str -> list of str)
    default: Any
    allowed: str  # human description of the allowed values, used in error messages
    check: Callable[[Any], bool]
    help: str
    secret: bool = False

    @property
    def env(self) -> str:
        return f"{ENV_PREFIX}{self.section.upper()}_{self.key.upper()}"


_TYPE_OK: dict[type, Callable[[Any], bool]] = {
    int: lambda v: isinstance(v, int) and not isinstance(v, bool),
    float: lambda v: isinstance(v, (int, float)) and not isinstance(v, bool),
    str: lambda v: isinstance(v, str),
    list: lambda v: isinstance(v, list),
    dict: lambda v: isinstance(v, dict),
}


def _anything(value: Any) -> bool:
    return True


def _setting(section: str, f: Any, annotation: Any) -> Setting:
    kind = typing.get_origin(annotation) or annotation
    if kind not in _TYPE_OK:
        raise TypeError(f"{section}.{f.name}: unsupported setting type {annotation!r}")
    meta = f.metadata
    within, check, allowed = meta["within"], meta["check"], meta["allowed"]
    if isinstance(within, Range):
        noun = meta["noun"] or ("an integer" if kind is int else "a number")
        allowed, check = allowed or f"{noun} in {within.text(kind)}{meta['note']}", within
    elif within is not None:
        choices = within
        allowed = allowed or "one of " + ", ".join(choices)
        check = lambda v: v in choices  # noqa: E731
    if allowed is None and kind is not str:
        raise TypeError(f"{section}.{f.name}: a {kind.__name__} setting must state what it allows")
    default = f.default_factory() if f.default is MISSING else f.default
    return Setting(section, f.name, kind, default, allowed or "a string", check or _anything, meta["help"],
                   meta["secret"])


def derive_schema(root: type) -> tuple[Setting, ...]:
    """The settings of ``root``, a dataclass whose fields are the sections (dataclasses of :func:`setting` fields)."""
    rows: list[Setting] = []
    for name, section in section_types(root).items():
        hints = typing.get_type_hints(section)
        rows.extend(_setting(name, f, hints[f.name]) for f in fields(section))
    return tuple(rows)


def section_types(root: type) -> dict[str, type]:
    """Section name -> section dataclass (the fields of ``root`` typed by a dataclass), in declaration order."""
    hints = typing.get_type_hints(root)
    return {f.name: hints[f.name] for f in fields(root) if is_dataclass(hints[f.name])}


def _shown(setting: Setting, value: Any) -> str:
    """The offending value as an error message shows it: secrets masked, long values cut (one short line)."""
    if setting.secret:
        return "***"  # a mistyped secret is still a secret: never echo it into logs or terminals
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def coerce(setting: Setting, value: Any, origin: str) -> Any:
    """``value`` checked against ``setting`` (integers become floats for a float setting); ConfigError otherwise."""
    name = f"{setting.section}.{setting.key}"
    ok = _TYPE_OK[setting.kind](value)
    if ok:
        try:
            if setting.kind is float:
                value = float(value)
            ok = setting.check(value)
        except (OverflowError, TypeError, ValueError):
            # e.g. an integer too large for a float (TOML integers are unbounded in tomllib): out of range,
            # not a traceback
            ok = False
    if not ok:
        raise ConfigError(f"{name} ({origin}): expected {setting.allowed}, got {_shown(setting, value)}")
    return value


def parse_env(setting: Setting, text: str) -> Any:
    """Environment values are TOML values (``0.01``, ``["a_*"]``, ``{x = ["y"]}``); bare words are strings.

    For string settings anything that is not a TOML string literal is taken as it stands, so a
    user name, path or topic such as ``12345`` or ``true`` stays a string; secrets are always
    taken verbatim (a password is whatever the secret store injected, quotes included).
    """
    if setting.secret:
        return text
    try:
        value = tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        if setting.kind is str:
            return text
        raise ConfigError(f"{setting.section}.{setting.key} ({setting.env}): expected {setting.allowed}, "
                          f"got {_shown(setting, text)}") from None
    if setting.kind is str and not isinstance(value, str):
        return text
    return value


def toml_value(value: Any) -> str:
    """``value`` as a TOML literal."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{toml_value(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    return repr(value)
