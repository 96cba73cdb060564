"""The shapes of the HTTP API's bodies, for its OpenAPI schema and for parsing requests.

Responses are rendered from the records' ``to_dict`` (JSON of
:func:`calib.record.codec.encode`); the response models here are **derived** from those same
record types (:class:`~calib.store.runs.ApprovedSet`, :class:`~calib.store.runs.RunRecord`,
:class:`~calib.record.fit.FitRecord`, ...), never written again: a field added to a record
appears here by itself. The seven parameter names of
:class:`~calib.model.twofactor.TwoFactorParams` are stable top-level keys (the records'
``params`` is spread into the body).
"""

from __future__ import annotations

import dataclasses
import re
import types
import typing
from collections.abc import Mapping
from datetime import date, datetime
from typing import Annotated, Any, get_args, get_origin

from fastapi import Path
from pydantic import BaseModel, Field, create_model

from calib.inputs.rules import CODE
from calib.model.twofactor import TwoFactorParams
from calib.record.fit import DERIVED_KEYS, BucketVols, FitRecord
from calib.store.runs import ApprovalRecord, ApprovedSet, EventRecord, RunRecord

_MODELS: dict[type, type[BaseModel]] = {}

MAX_ID = 2**31 - 1
"""The largest id the store's id columns hold on every engine (``INTEGER``: 32-bit signed on
PostgreSQL; SQLite would take 64 bits, the same limit is kept on both)."""

_NO_NUL = r"^[^\x00]*$"
"""Free text: anything but NUL, which PostgreSQL cannot store (refused the same everywhere)."""

RunId = Annotated[int, Path(ge=1, le=MAX_ID, description="A stored run's id.")]
PageCode = Annotated[str, Path(pattern=_NO_NUL, description="A commodity code.")]
"""A commodity code on the review pages: any stored text but NUL (a page shows the store as
it is, escaped)."""
CommodityCode = Annotated[
    str,
    Path(
        pattern=f"^{CODE.pattern}$",
        description="A commodity code as quote files carry it.",
        examples=["QLM"],
    ),
]


def _attribute_docs(cls: type) -> dict[str, str]:
    """``name : text`` lines of a numpydoc ``Attributes`` section, by name."""
    docs: dict[str, str] = {}
    for line in (cls.__doc__ or "").splitlines():
        m = re.match(r"\s*([a-z_, ]+) : (.+)", line)
        if m:
            for name in m.group(1).split(","):
                docs[name.strip()] = m.group(2).strip()
    return docs


def _annotation(hint: Any) -> Any:
    """The pydantic annotation of a record field's type (dates and times as ISO text)."""
    origin = get_origin(hint)
    if hint in (date, datetime):
        return str
    if origin in (typing.Union, types.UnionType):
        args = tuple(_annotation(a) for a in get_args(hint))
        out = args[0]
        for a in args[1:]:
            out = out | a
        return out
    if origin is tuple:
        return list[_annotation(get_args(hint)[0])]  # type: ignore[misc]
    if origin in (dict, Mapping) or hint is Mapping:
        return dict[str, Any]
    if dataclasses.is_dataclass(hint):
        return model_of(hint)  # type: ignore[arg-type]
    return hint


def model_of(
    cls: type,
    *,
    name: str | None = None,
    exclude: tuple[str, ...] = (),
    extra: Mapping[str, Any] | None = None,
    spread_params: bool = True,
    base: type[BaseModel] | None = None,
) -> type[BaseModel]:
    """A pydantic model of the JSON of record ``cls``: its fields less ``exclude``, plus
    ``extra`` (name -> annotation); a ``params`` field is spread into the seven parameters."""
    key = cls if (name, exclude, extra, base) == (None, (), None, None) else None
    if key is not None and key in _MODELS:
        return _MODELS[key]
    hints = typing.get_type_hints(cls)
    docs = _attribute_docs(cls)
    fields: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        if f.name in exclude:
            continue
        hint = hints[f.name]
        if f.name == "params" and spread_params and cls is not TwoFactorParams:
            optional = type(None) in get_args(hint)
            for p, spec in model_of(TwoFactorParams).model_fields.items():
                ann = float | None if optional else float
                fields[p] = (ann, Field(description=spec.description))
            continue
        fields[f.name] = (_annotation(hint), Field(description=docs.get(f.name)))
    for extra_name, ann in (extra or {}).items():
        fields[extra_name] = (ann, Field())
    doc = (cls.__doc__ or "").strip().split("\n\n")[0]
    made: type[BaseModel] = create_model(
        name or f"{cls.__name__}Body", __doc__=doc, __base__=base, **fields
    )
    if key is not None:
        _MODELS[key] = made
    return made


Parameters = model_of(TwoFactorParams, name="Parameters")
ApprovedSetBody = model_of(ApprovedSet)
ApprovalBody = model_of(ApprovalRecord)
EventBody = model_of(EventRecord)
FitBody = model_of(
    FitRecord,
    name="DiagnosticsBody",
    exclude=("params", "buckets"),
    extra={k: (list[str] if k == "binding" else bool) for k in DERIVED_KEYS},
)


class FailureBody(BaseModel):
    """The diagnostics of a failed run: the reason only."""

    failure: str | None


RunBody = model_of(
    RunRecord,
    exclude=("fit", "inputs"),
    extra={
        **{p: float | None for p in Parameters.model_fields},
        "buckets": list[model_of(BucketVols)],  # type: ignore[misc]
        "diagnostics": FitBody | FailureBody,
    },
)
ApprovedBody = create_model(
    "ApprovedBody",
    __doc__="The run just approved, and the run it superseded.",
    __base__=RunBody,
    superseded_run_id=(int | None, Field()),
)


class ApproveRequest(BaseModel):
    """Who approves a run, and why (recorded on the approval event)."""

    by: str = Field(min_length=1, max_length=128, pattern=_NO_NUL)
    note: str = Field(min_length=1, pattern=_NO_NUL)


class ErrorBody(BaseModel):
    """What went wrong, in one line."""

    detail: str
