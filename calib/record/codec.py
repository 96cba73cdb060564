"""One JSON encoder and decoder for calib's frozen records (dataclasses).

:func:`encode` turns a dataclass into plain JSON values field by field (nested dataclasses,
tuples, numpy scalars and arrays, dates); :func:`decode` builds the dataclass back from its
type hints. A field added to a record with a default is encoded and decoded with no change
here, and a stored value that lacks it decodes to the default, so old rows keep reading.
Keys a record does not know are ignored (a newer writer's extra fields).

Notes
-----
Types understood by :func:`decode`: ``bool``, ``int``, ``float``, ``str``, ``None`` and unions
of them, ``date``, ``datetime`` (ISO text), ``tuple[X, ...]``, ``dict[str, X]``, ``Any`` and
nested dataclasses. A float stored as JSON ``null`` by a writer that had NaN decodes to NaN
where the field is a plain ``float``.
"""

from __future__ import annotations

import dataclasses
import math
import types
import typing
from collections.abc import Mapping
from datetime import date, datetime
from functools import cache
from typing import Any, TypeVar, cast, get_args, get_origin

T = TypeVar("T")


def encode(value: Any) -> Any:
    """Plain JSON values for ``value`` (a dataclass, or anything a dataclass field holds).

    Non-finite floats become ``None`` (JSON has no NaN).
    """
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: encode(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, bool) or value is None or isinstance(value, str | int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, Mapping):
        return {str(k): encode(v) for k, v in value.items()}
    if isinstance(value, tuple | list):
        return [encode(v) for v in value]
    if hasattr(value, "tolist"):  # numpy scalar or array
        return encode(value.tolist())
    raise TypeError(f"cannot encode {type(value).__name__}")


class Encoded:
    """Mixed into a dataclass whose JSON object is :func:`encode` of it: its ``to_dict``."""

    __slots__ = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON (dates in ISO form, a NaN as ``null``)."""
        out: dict[str, Any] = encode(self)
        return out


def copy_fields(cls: type[T], source: object, **given: Any) -> T:
    """An instance of the dataclass ``cls``: each field ``given``, else ``source``'s attribute of
    the same name (a record built from a row or from another record)."""
    names = [f.name for f in dataclasses.fields(cast(Any, cls)) if f.init]
    return cls(**{n: given[n] if n in given else getattr(source, n) for n in names})


@cache
def _hints(cls: type) -> dict[str, Any]:
    return typing.get_type_hints(cls)


def decode(cls: type[T], data: Mapping[str, Any]) -> T:
    """The ``cls`` record that :func:`encode` wrote as ``data``.

    Missing keys take the field's default; unknown keys are ignored.

    Raises
    ------
    TypeError, ValueError
        ``data`` does not fit ``cls`` (a required key missing, a value of the wrong type).
    """
    hints = _hints(cast(Any, cls))
    kwargs: dict[str, Any] = {}
    for f in dataclasses.fields(cls):  # type: ignore[arg-type]
        if f.name in data:
            kwargs[f.name] = _value(hints[f.name], data[f.name], f"{cls.__name__}.{f.name}")
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            raise ValueError(f"{cls.__name__}: missing {f.name!r}")
    return cls(**kwargs)


def _value(hint: Any, raw: Any, where: str) -> Any:
    origin = get_origin(hint)
    if hint is Any:
        return raw
    if origin in (typing.Union, types.UnionType):
        options = get_args(hint)
        if raw is None and type(None) in options:
            return None
        if raw is None and float in options:
            return math.nan
        errors = []
        for option in options:
            if option is type(None):
                continue
            try:
                return _value(option, raw, where)
            except (TypeError, ValueError) as exc:
                errors.append(str(exc))
        raise TypeError(f"{where}: {raw!r} fits none of {hint} ({'; '.join(errors)})")
    if origin is tuple:
        args = get_args(hint)
        return tuple(_value(args[0], v, where) for v in raw)
    if origin is dict:
        args = get_args(hint)
        return {str(k): _value(args[1], v, where) for k, v in raw.items()}
    if dataclasses.is_dataclass(hint):
        if not isinstance(raw, Mapping):
            raise TypeError(f"{where}: expected an object, got {raw!r}")
        return decode(hint, raw)  # type: ignore[arg-type]
    if hint is float:
        if raw is None:
            return math.nan
        if isinstance(raw, bool) or not isinstance(raw, int | float):
            raise TypeError(f"{where}: expected a number, got {raw!r}")
        return float(raw)
    if hint is bool:
        if not isinstance(raw, bool):
            raise TypeError(f"{where}: expected true or false, got {raw!r}")
        return raw
    if hint is int:
        if isinstance(raw, bool) or not isinstance(raw, int):
            raise TypeError(f"{where}: expected an integer, got {raw!r}")
        return raw
    if hint is str:
        if not isinstance(raw, str):
            raise TypeError(f"{where}: expected text, got {raw!r}")
        return raw
    if hint is datetime:
        return datetime.fromisoformat(raw)
    if hint is date:
        return date.fromisoformat(raw)
    raise TypeError(f"{where}: no decoder for {hint}")
