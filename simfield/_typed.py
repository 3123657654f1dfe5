"""Build the scenario dataclasses straight from plain data that already has the schema's types.

OmegaConf's structured merge (``OmegaConf.merge(OmegaConf.structured(Scenario), data)``) checks
and converts every value, and costs ~0.2-0.3 s per scenario on this project's schema: most of a
refused command line's time and of a sweep's preflight. Nearly every configuration Hydra
composes is already exactly typed (Hydra's override grammar parses ``5`` as int, ``5.0`` as
float, ``true`` as bool), so :func:`build_exact` builds the dataclasses directly in that case
and returns ``None`` for anything that needs OmegaConf's conversion or its error message (a
string for a number, an unknown or missing key, ``???``, an interpolation). The caller then
takes OmegaConf's path, so results and messages are those of OmegaConf either way.

The one conversion done here is OmegaConf's own for exact values: an int given to a float field
becomes a float (``FloatNode``), including dataclass defaults written as ints.
"""

from __future__ import annotations

import dataclasses
import functools
import typing
from typing import Any

__all__ = ["build_exact"]


class _NeedsOmegaConf(Exception):
    """A value this module does not convert: leave it to OmegaConf."""


@functools.lru_cache(maxsize=None)
def _fields(cls) -> tuple:
    """(name, type, default factory or None) of each field of dataclass ``cls``."""
    hints = typing.get_type_hints(cls)
    out = []
    for f in dataclasses.fields(cls):
        if f.default is not dataclasses.MISSING:
            default = functools.partial(lambda v: v, f.default)
        elif f.default_factory is not dataclasses.MISSING:
            default = f.default_factory
        else:
            default = None
        out.append((f.name, hints[f.name], default))
    return tuple(out)


def _value(tp, v: Any) -> Any:
    """``v`` as schema type ``tp``, or raise :class:`_NeedsOmegaConf`."""
    if dataclasses.is_dataclass(tp):
        if type(v) is dict:
            return _build(tp, v)
        if type(v) is tp:  # a dataclass default (field(default_factory=...))
            return _build(tp, dataclasses.asdict(v))
        raise _NeedsOmegaConf
    origin = typing.get_origin(tp)
    if origin is typing.Union:  # Optional[X]
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if v is None:
            return None
        if len(args) != 1:
            raise _NeedsOmegaConf
        return _value(args[0], v)
    if origin is list:
        if type(v) is not list:
            raise _NeedsOmegaConf
        (item,) = typing.get_args(tp)
        return [_value(item, x) for x in v]
    if tp is float:
        if type(v) is float:
            return v
        if type(v) is int:
            return float(v)
        raise _NeedsOmegaConf
    if tp in (int, bool):
        if type(v) is tp:
            return v
        raise _NeedsOmegaConf
    if tp is str:
        if type(v) is str and v != "???" and "${" not in v:
            return v
        raise _NeedsOmegaConf
    raise _NeedsOmegaConf


def _build(cls, data: dict) -> Any:
    fields = _fields(cls)
    names = {name for name, _, _ in fields}
    if any(k not in names for k in data):
        raise _NeedsOmegaConf  # an unknown key: OmegaConf names it
    kwargs = {}
    for name, tp, default in fields:
        if name in data:
            kwargs[name] = _value(tp, data[name])
        elif default is None:
            raise _NeedsOmegaConf  # a mandatory value is missing
        else:
            kwargs[name] = _value(tp, default())
    return cls(**kwargs)


def build_exact(cls, data: dict) -> Any | None:
    """Dataclass ``cls`` built from plain ``data`` (dicts, lists, scalars) if every value has
    exactly its schema type, else ``None`` (the caller falls back to OmegaConf)."""
    try:
        return _build(cls, data)
    except _NeedsOmegaConf:
        return None
