"""The row-rule language: parse a column, refuse the rows that fail, keep the first reason.

A :class:`RowCheck` follows one :class:`~calib.inputs.files.Table` through the rules. Each
parser (:meth:`~RowCheck.number`, :meth:`~RowCheck.date`, :meth:`~RowCheck.choice`) refuses
the rows it cannot read and returns the column parsed; each rule is one call of
:meth:`~RowCheck.reject` with a boolean mask, the field and the reason (one text, or one per
row). Only still-good rows are refused, so a row carries the first reason found. Everything is
vectorised: a reason's text is made only for the rows refused.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from datetime import date
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from calib import errors as msg
from calib.inputs.files import ObjArray, RowProblem, Table, clipped
from calib.types import BoolArray, FloatArray, IntArray

DateArray = npt.NDArray[np.datetime64]
"""``datetime64[D]`` array of calendar dates."""

DATE_MIN = date(1900, 1, 1)
DATE_MAX = date(2199, 12, 31)
KEY_FIELD = "key"
"""The field named for a duplicate-key problem (the key is several columns)."""
MAX_VALUE_CHARS = 60
"""Longest value a reason quotes (the raw row keeps more)."""

_ISO_DATE = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")

Reason = str | Callable[[IntArray], Iterable[str]]
"""A reason: one text for every refused row, or a function of the refused rows' positions."""


def _shown(value: str) -> str:
    return value if len(value) <= MAX_VALUE_CHARS else f"{value[:MAX_VALUE_CHARS]}..."


class RowCheck:
    """The rows of a table under check: which are still good, and why the others are not."""

    def __init__(self, table: Table) -> None:
        self.table = table
        n = len(table)
        self.n = n
        self.ok: BoolArray = np.ones(n, dtype=np.bool_)
        self.field: ObjArray = np.empty(n, dtype=object)
        self.reason: ObjArray = np.empty(n, dtype=object)
        for name, text in table.texts.items():  # NUL cannot be stored as text by every engine
            if n and any("\x00" in str(v) for v in pd.unique(text)):
                has_nul = np.fromiter(("\x00" in str(v) for v in text), dtype=np.bool_, count=n)
                self.reject(has_nul, name, msg.ROW_NUL)

    def text(self, name: str) -> ObjArray:
        return self.table.text(name)

    def reject(self, mask: BoolArray, name: str, reason: Reason) -> None:
        """Refuse the still-good rows of ``mask``, giving ``reason`` (text or per row)."""
        idx = np.flatnonzero(mask & self.ok)
        if idx.size == 0:
            return
        self.ok[idx] = False
        self.field[idx] = name
        reasons = [reason] * idx.size if isinstance(reason, str) else list(reason(idx))
        self.reason[idx] = np.array(reasons, dtype=object)

    def value_reason(
        self, name: str, template: str, **fixed: object
    ) -> Callable[[IntArray], Iterable[str]]:
        """Per-row reasons: ``template`` filled with each refused row's text of ``name`` (as
        ``value``, cut to :data:`MAX_VALUE_CHARS`) and the ``fixed`` fields."""
        return lambda idx: (
            template.format(value=_shown(v), **fixed) for v in self.table.text_at(name, idx)
        )

    # parsers: each refuses the rows it cannot parse and returns the parsed column

    def number(self, name: str, *, required: bool = True) -> FloatArray:
        if not self.table.has(name) and not required:
            return np.full(self.n, np.nan)
        parsed = self.table.numbers.get(name)
        if parsed is not None:  # every value a plain number: none empty, none unreadable
            values = np.array(parsed, dtype=np.float64)
            self.reject(np.isnan(values), name, self.value_reason(name, msg.ROW_NOT_NUMBER))
            self.reject(np.isinf(values), name, self.value_reason(name, msg.ROW_NOT_FINITE))
            return values
        text = self.text(name)
        values = np.array(pd.to_numeric(text, errors="coerce"), dtype=np.float64)
        empty = text == ""
        unparsed = np.flatnonzero(np.isnan(values) & ~empty)
        if unparsed.size:  # blanks count as empty; the others are not numbers
            empty[unparsed] = [not str(v).strip() for v in text[unparsed]]
        if required:
            self.reject(empty, name, msg.ROW_EMPTY)
        self.reject(np.isnan(values) & ~empty, name, self.value_reason(name, msg.ROW_NOT_NUMBER))
        self.reject(np.isinf(values), name, self.value_reason(name, msg.ROW_NOT_FINITE))
        values[empty] = np.nan
        return values

    def _factor(self, name: str, *, lower: bool = False) -> tuple[IntArray, list[str]]:
        """Row codes and the distinct values (stripped), for columns with few distinct values."""
        codes, uniques = pd.factorize(self.text(name))
        values = [str(u).strip() for u in uniques]
        if lower:
            values = [v.lower() for v in values]
        return np.asarray(codes, dtype=np.int64), values

    def date(self, name: str) -> DateArray:
        codes, uniques = self._factor(name)
        parsed = np.full(len(uniques) + 1, np.datetime64("NaT"), dtype="datetime64[D]")
        status = np.zeros(len(uniques) + 1, dtype=np.int64)  # 0 ok, 1 empty, 2 not ISO, 3 range
        for j, value in enumerate(uniques):
            if value == "":
                status[j] = 1
                continue
            try:
                day = date.fromisoformat(value) if _ISO_DATE.fullmatch(value) else None
            except ValueError:
                day = None
            if day is None:
                status[j] = 2
            elif not DATE_MIN <= day <= DATE_MAX:
                status[j] = 3
            else:
                parsed[j] = np.datetime64(day, "D")
        row_status = status[codes]
        self.reject(row_status == 1, name, msg.ROW_EMPTY)
        self.reject(row_status == 2, name, self.value_reason(name, msg.ROW_NOT_DATE))
        out_of_range = self.value_reason(name, msg.ROW_DATE_RANGE, low=DATE_MIN, high=DATE_MAX)
        self.reject(row_status == 3, name, out_of_range)
        return np.asarray(parsed[codes])

    def choice(
        self, name: str, pattern: re.Pattern[str], template: str, *, lower: bool = False
    ) -> tuple[IntArray, list[str]]:
        """Refuse values not matching ``pattern``; returns row codes and distinct values."""
        codes, uniques = self._factor(name, lower=lower)
        empty = np.array([u == "" for u in uniques] + [False], dtype=np.bool_)
        good = np.array([bool(pattern.fullmatch(u)) for u in uniques] + [True], dtype=np.bool_)
        self.reject(empty[codes], name, msg.ROW_EMPTY)
        self.reject(~good[codes], name, self.value_reason(name, template))
        return codes, uniques

    def optional_choice(
        self, name: str, choices: tuple[str, ...], template: str
    ) -> ObjArray | None:
        """An optional column of ``choices`` (case-insensitive): each row's value, lower case,
        ``""`` where empty; other values are refused. ``None`` when the file lacks the column."""
        if not self.table.has(name):
            return None
        codes, uniques = self._factor(name, lower=True)
        good = np.array([u in choices or u == "" for u in uniques] + [True], dtype=np.bool_)
        self.reject(~good[codes], name, self.value_reason(name, template))
        return np.asarray(np.array([*uniques, ""], dtype=object)[codes])

    def problems(self) -> list[RowProblem]:
        """The refused rows with their reasons, in file order (read-time refusals included)."""
        bad = np.flatnonzero(~self.ok)
        found = [
            RowProblem(
                int(self.table.lines[i]),
                str(self.field[i]),
                str(self.reason[i]),
                clipped(self.table.raw(int(i))),
            )
            for i in bad
        ]
        return sorted(self.table.early + found, key=lambda p: p.line)


def days(values: DateArray) -> IntArray:
    """Dates as day numbers (for keys and differences)."""
    return np.asarray(values.astype(np.int64))


def each(template: str, **columns: object) -> Callable[[IntArray], Iterable[str]]:
    """Per-row reasons: ``template`` filled with each refused row's values of ``columns``
    (arrays, one value a row; anything else is the same for every row)."""

    def at(value: object, i: int) -> object:
        return value[i] if isinstance(value, np.ndarray) else value

    return lambda idx: (
        template.format(**{k: at(v, int(i)) for k, v in columns.items()}) for i in idx
    )


def lookup(reasons: dict[int, str]) -> Callable[[IntArray], Iterable[str]]:
    """Per-row reasons from a position -> reason mapping."""
    return lambda idx: (reasons[int(i)] for i in idx)


def _comparable(value: Any) -> Any:
    """A value as rows are compared: NaN equal to NaN (as ``-inf``), text as itself."""
    return value if isinstance(value, str) else np.nan_to_num(value, nan=-np.inf)


def key_hash(keys: Sequence[npt.NDArray[Any]]) -> npt.NDArray[np.uint64]:
    """A 64-bit hash of each row's key (the columns ``keys``): equal keys hash alike, so
    repeated keys are found among the repeated hashes in little memory."""
    hashed = np.zeros(len(keys[0]) if keys else 0, dtype=np.uint64)
    for column in keys:
        hashed = hashed * np.uint64(1_000_003) ^ pd.util.hash_array(np.asarray(column))
    return hashed


def duplicate_reasons(
    ok: BoolArray,
    lines: IntArray,
    keys: Sequence[npt.NDArray[Any]],
    values: Sequence[npt.NDArray[Any]],
) -> dict[int, str]:
    """Reasons for same-key rows among ``ok``: all of a group if their values differ, else the
    repeats after the first. Returns position -> reason."""
    idx = np.flatnonzero(ok)
    if idx.size < 2:
        return {}
    candidates = idx[pd.Series(key_hash([k[idx] for k in keys])).duplicated(keep=False).to_numpy()]
    if candidates.size == 0:
        return {}
    frame = pd.DataFrame({f"k{j}": k[candidates] for j, k in enumerate(keys)})
    dup = candidates[frame.duplicated(keep=False).to_numpy()]
    if dup.size == 0:
        return {}
    groups: dict[tuple[Any, ...], list[int]] = {}
    for i in dup:
        groups.setdefault(tuple(k[i] for k in keys), []).append(int(i))
    found: dict[int, str] = {}
    for members in groups.values():
        signature = [tuple(_comparable(v[i]) for v in values) for i in members]
        at = [int(lines[i]) for i in members]
        if len(set(signature)) > 1:
            for i, line in zip(members, at, strict=True):
                others = ", ".join(str(x) for x in at if x != line)
                found[i] = msg.ROW_CONFLICT.format(lines=others)
        else:
            for i in members[1:]:
                found[i] = msg.ROW_REPEAT.format(line=at[0])
    return found
