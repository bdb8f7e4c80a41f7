"""Turn plain TOML data into frozen, typed dataclasses, with one-line errors that name the key.

Each configuration section is a frozen dataclass whose fields carry their constraints in
``dataclasses.field(metadata=...)``: ``doc``, ``min``, ``max``, ``min_exclusive``, ``choices``.
:func:`build` walks the type hints, so adding a key is adding a field; nothing else needs to change.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import types
import typing
from typing import Any, Union, get_args, get_origin, get_type_hints

from selector.errors import ConfigError


def setting(default=dataclasses.MISSING, *, doc: str = "", default_factory=dataclasses.MISSING, **rules):
    """Declare a configuration field with its documentation and validation rules."""
    meta = {"doc": doc, **rules}
    if default_factory is not dataclasses.MISSING:
        return dataclasses.field(default_factory=default_factory, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def suggest(word: str, options) -> str:
    """``" (did you mean 'x'?)"`` for the closest option, or a list of the valid ones."""
    options = sorted(str(o) for o in options)
    close = difflib.get_close_matches(str(word), options, n=1, cutoff=0.5)
    if close:
        return f" (did you mean '{close[0]}'?)"
    return f" (valid keys: {', '.join(options)})" if options else ""


def _type_name(tp) -> str:
    origin = get_origin(tp)
    if origin in (Union, types.UnionType):
        return " or ".join(_type_name(a) for a in get_args(tp) if a is not type(None))
    if origin is list:
        return f"a list of {_type_name(get_args(tp)[0])}"
    if origin is dict:
        return "a table"
    if dataclasses.is_dataclass(tp):
        return "a table"
    return {int: "an integer", float: "a number", str: "a string", bool: "true or false"}.get(tp, str(tp))


def _check_rules(value, meta, where: str):
    if "choices" in meta and value not in meta["choices"]:
        allowed = ", ".join(repr(c) for c in meta["choices"])
        raise ConfigError(f"{where} = {value!r} is not allowed; choose one of {allowed}{suggest(str(value), meta['choices'])}")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if isinstance(value, float) and not math.isfinite(value):
            raise ConfigError(f"{where} = {value!r} must be a finite number")
        lo, hi = meta.get("min"), meta.get("max")
        if meta.get("min_exclusive") and lo is not None and not value > lo:
            raise ConfigError(f"{where} = {value!r} is out of range; it must be greater than {lo}")
        if lo is not None and value < lo:
            raise ConfigError(f"{where} = {value!r} is out of range; it must be at least {lo}")
        if hi is not None and value > hi:
            raise ConfigError(f"{where} = {value!r} is out of range; it must be at most {hi}")


def convert(value, tp, where: str, meta=None):
    """Check ``value`` against the annotation ``tp`` and return it in typed form."""
    meta = meta or {}
    origin = get_origin(tp)
    if origin in (Union, types.UnionType):
        inner = [a for a in get_args(tp) if a is not type(None)]
        if value is None:
            return None
        errors = []
        for candidate in inner:
            try:
                return convert(value, candidate, where, meta)
            except ConfigError as exc:
                errors.append(exc)
        raise errors[0]
    if origin is list:
        (item_tp,) = get_args(tp)
        if isinstance(value, (str, int, float, bool)):
            # a single name where a list is expected is a list of one (`--set colours.criteria=stern2012`,
            # `criteria = "stern2012"`): nothing else could be meant
            value = [value]
        if not isinstance(value, list):
            raise ConfigError(f"{where} = {value!r} has the wrong type; expected {_type_name(tp)}")
        return tuple(convert(v, item_tp, f"{where}[{i}]", meta) for i, v in enumerate(value))
    if origin is dict:
        key_tp, val_tp = get_args(tp)
        if not isinstance(value, dict):
            raise ConfigError(f"{where} has the wrong type; expected a table, got {value!r}")
        return {k: convert(v, val_tp, f"{where}.{k}", meta) for k, v in value.items()}
    if dataclasses.is_dataclass(tp):
        hook = getattr(tp, "_from_config", None)
        if hook is not None:
            return hook(value, where)
        if not isinstance(value, dict):
            raise ConfigError(f"{where} has the wrong type; expected a table, got {value!r}")
        return build(tp, value, where)
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where} = {value!r} has the wrong type; expected a number")
        value = float(value)
    elif tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where} = {value!r} has the wrong type; expected an integer")
    elif tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{where} = {value!r} has the wrong type; expected true or false")
    elif tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"{where} = {value!r} has the wrong type; expected a string")
    elif tp is Any:
        return value
    _check_rules(value, meta, where)
    return value


def build(cls, data: dict, where: str):
    """Build the dataclass ``cls`` from a TOML table, refusing unknown keys with a suggestion."""
    hints = get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    unknown = [k for k in data if k not in fields]
    if unknown:
        key = unknown[0]
        prefix = f"{where}." if where else ""
        raise ConfigError(f"unknown key '{prefix}{key}'{suggest(key, fields)}")
    kwargs = {}
    for name, f in fields.items():
        key = f"{where}.{name}" if where else name
        if name in data:
            kwargs[name] = convert(data[name], hints[name], key, f.metadata)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            raise ConfigError(f"missing required key '{key}'" + (f": {f.metadata['doc']}" if f.metadata.get("doc") else ""))
    obj = cls(**kwargs)
    check = getattr(obj, "_check", None)
    if check is not None:
        check(where)
    return obj


def to_plain(obj):
    """A JSON-ready form of a configuration object (tuples → lists, mappings → dicts, sorted keys)."""
    if dataclasses.is_dataclass(obj):
        return {f.name: to_plain(getattr(obj, f.name)) for f in dataclasses.fields(obj) if f.init}
    if isinstance(obj, (list, tuple)):
        return [to_plain(v) for v in obj]
    if isinstance(obj, typing.Mapping):
        return {k: to_plain(obj[k]) for k in sorted(obj)}
    return obj
