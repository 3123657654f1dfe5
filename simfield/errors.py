"""Exceptions of simfield.

Each class also subclasses the matching builtin, keeps the offending value and puts the key,
the value and what is allowed into one message, so a command-line user reads one clear line.
"""

from __future__ import annotations

import numbers
from typing import Any

__all__ = ["SimfieldError", "ConfigError", "CatalogError", "require", "check_range",
           "closest", "did_you_mean", "plain_type"]


class SimfieldError(Exception):
    """Base class of every error raised on purpose by simfield."""


class ConfigError(SimfieldError, ValueError):
    """A configuration value is invalid.

    Parameters
    ----------
    key : str
        Dotted configuration key, e.g. ``survey.exposure_time``.
    value : object
        The offending value.
    allowed : str
        Human description of what is allowed, e.g. ``"must be > 0"``.
    """

    def __init__(self, key: str, value: Any, allowed: str):
        self.key = key
        self.value = value
        self.allowed = allowed
        super().__init__(f"invalid configuration: {key}={value!r} {allowed}")

    def __reduce__(self):  # picklable, so an error raised in a worker process reaches the user
        return (type(self), (self.key, self.value, self.allowed))


class CatalogError(SimfieldError, ValueError):
    """A user catalogue (detections, truth) cannot be used as given."""


def require(condition: bool, key: str, value: Any, allowed: str) -> None:
    """Raise :class:`ConfigError` for ``key``/``value`` unless ``condition`` holds."""
    if not condition:
        raise ConfigError(key, value, allowed)


def check_range(key: str, value: float, lo: float | None = None, hi: float | None = None,
                lo_open: bool = False, hi_open: bool = False) -> None:
    """Check ``lo <= value <= hi`` (open ends with ``lo_open``/``hi_open``).

    Raises :class:`ConfigError` naming ``key``, ``value`` and the allowed range. NaN and
    anything that is not a real number (a list, a string, a boolean) are always refused.
    """
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ConfigError(key, value, "must be a number")
    bad = value != value  # NaN
    if lo is not None:
        bad |= value <= lo if lo_open else value < lo
    if hi is not None:
        bad |= value >= hi if hi_open else value > hi
    if bad:
        left = "(" if lo_open else "["
        right = ")" if hi_open else "]"
        lo_s = "-inf" if lo is None else f"{lo:g}"
        hi_s = "inf" if hi is None else f"{hi:g}"
        raise ConfigError(key, value, f"must be in {left}{lo_s}, {hi_s}{right}")


def closest(word: str, options) -> str | None:
    """The option closest to a mistyped ``word`` (difflib's ratio at least 0.7), or None."""
    import difflib

    near = difflib.get_close_matches(word, sorted(options), n=1, cutoff=0.7)
    return near[0] if near else None


def did_you_mean(word: str, options) -> str:
    """`` (did you mean X?)`` for :func:`closest`, else ''."""
    near = closest(word, options)
    return f" (did you mean {near}?)" if near else ""


#: OmegaConf's names of the types a value failed to convert to, as a user would say them
_TYPE_WORDS = {"Integer": "must be a whole number", "Float": "must be a number",
               "Boolean": "must be true or false"}


def plain_type(why: str) -> str:
    """OmegaConf's "Value 'x' of type 'str' could not be converted to Integer" as "must be a
    whole number" (the key and value are already in the line); other reasons as they are."""
    import re

    m = re.search(r"could not be converted to (\w+)", why)
    return _TYPE_WORDS.get(m.group(1), why) if m else why
