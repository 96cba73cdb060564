"""Reading quote files (CSV or Parquet) in chunks of rows, as text.

A file is opened with :class:`QuoteFile`, which reads and checks the header at once (a file
the rules cannot use is refused whole with :class:`~calib.errors.IngestFileError`), then hands
out the body as :class:`Table` chunks of at most about :data:`CHUNK_BYTES` (CSV) or
:data:`CHUNK_ROWS` (Parquet), so memory stays bounded whatever the file's size.

CSV
---
One physical line is one record: line numbers count from 1 at the header, blank lines are
skipped (and counted), and a quoted field never spans lines. A line that cannot be a record is
one refused row with the reason, never the end of the file: a wrong number of fields, an
unbalanced quote (an odd number of ``"``), a line longer than :data:`MAX_LINE_CHARS`. Chunks
without quotes, NUL bytes, blank lines or lone carriage returns are parsed by pyarrow's CSV
reader (the common case, and the fast one); the others line by line by the ``csv`` module,
which reads the same values.

Parquet rows count from 1; dates are written back as ``YYYY-MM-DD`` text and every other value
as its text, so the rules read both formats alike.
"""

from __future__ import annotations

import csv
import hashlib
import io
from collections import Counter
from collections.abc import Callable, Collection, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

from calib import errors as msg
from calib.errors import IngestFileError
from calib.types import FloatArray, IntArray

FileKind = Literal["futures", "options", "rates"]
"""What a quote file holds (one kind a file)."""
FILE_KINDS: tuple[FileKind, ...] = ("futures", "options", "rates")

REQUIRED_COLUMNS: dict[FileKind, tuple[str, ...]] = {
    "futures": ("trade_date", "commodity", "delivery", "settle"),
    "options": ("trade_date", "commodity", "delivery", "expiry", "kind", "strike"),
    "rates": ("trade_date", "maturity", "zero_rate"),
}
OPTIONAL_COLUMNS: dict[FileKind, tuple[str, ...]] = {
    "futures": (),
    "options": ("premium", "implied_vol", "bid", "ask", "exercise"),
    "rates": (),
}

MAX_COLUMNS = 256
"""Most columns a header may have (a quote file needs at most 11): a wider one is refused."""
MAX_HEADER_BYTES = 64 * 1024
"""Longest header line read: :data:`MAX_COLUMNS` names of up to 256 bytes each."""
MAX_LINE_CHARS = 128 * 1024
"""Longest line (hence field) read as a record; a longer one is one refused row."""
MAX_RAW_CHARS = 4096
"""Longest raw text kept with a refused row; the rest is summarised by its length."""
MAX_LISTED = 10
"""Most names a message lists (the rest are counted)."""
CHUNK_BYTES = 4 * 1024 * 1024
"""CSV bytes read per chunk (about 70,000 option rows)."""
CHUNK_ROWS = 100_000
"""Parquet rows read per chunk."""

ObjArray = npt.NDArray[np.object_]


def listed(names: Sequence[str], limit: int = MAX_LISTED) -> str:
    """``names`` joined by commas, at most ``limit`` of them and a count of the rest."""
    shown = ", ".join(names[:limit])
    return shown if len(names) <= limit else f"{shown} and {len(names) - limit} more"


def clipped(text: str, limit: int = MAX_RAW_CHARS) -> str:
    """``text`` cut to ``limit`` characters, saying how long it was."""
    if len(text) <= limit:
        return text
    return f"{text[:limit]}... ({len(text)} characters in all)"


@dataclass(frozen=True)
class RowProblem:
    """A refused row: where, which field, why, and the row as read."""

    line: int
    field: str
    reason: str
    raw: str


@dataclass
class Table:
    """A chunk of a file's rows, as text.

    Columns come as object arrays of stripped strings (:meth:`text`); columns whose every value
    is a plain number are also parsed already (:attr:`numbers`), and their text is made only
    for the rows a message quotes (:meth:`text_at`).
    """

    lines: IntArray
    raw: Callable[[int], str]
    """The row at position ``i`` as read (CSV text)."""
    early: list[RowProblem]
    """Lines refused while reading (wrong number of fields, unbalanced quote, too long)."""
    texts: dict[str, ObjArray] = field(default_factory=dict)
    numbers: dict[str, FloatArray] = field(default_factory=dict)
    arrow: dict[str, pa.ChunkedArray] = field(default_factory=dict)
    """Text of the numeric columns, kept in arrow form until asked for."""

    def __len__(self) -> int:
        return len(self.lines)

    def has(self, name: str) -> bool:
        return name in self.texts or name in self.numbers

    def text(self, name: str) -> ObjArray:
        """Every value of column ``name`` as text ('' for every row if there is no such column)."""
        found = self.texts.get(name)
        if found is None:
            column = self.arrow.get(name)
            if column is None:
                return np.full(len(self), "", dtype=object)
            found = np.asarray(column.to_numpy(zero_copy_only=False))
            self.texts[name] = found
        return found

    def text_at(self, name: str, rows: IntArray) -> list[str]:
        """The text of column ``name`` at ``rows``."""
        column = self.arrow.get(name)
        if column is not None and name not in self.texts:
            return [str(v) for v in column.take(pa.array(rows)).to_pylist()]
        text = self.text(name)
        return [str(text[i]) for i in rows]


def _csv_text(values: Sequence[str]) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="").writerow(list(values))
    return buf.getvalue()


def _header(name: str, names: Sequence[str]) -> list[str]:
    if len(names) > MAX_COLUMNS:
        raise IngestFileError(
            name, msg.FILE_TOO_MANY_COLUMNS.format(found=len(names), limit=MAX_COLUMNS)
        )
    header = [str(h).strip().lower() for h in names]
    if not any(header):
        raise IngestFileError(name, msg.FILE_NO_HEADER)
    counts = Counter(h for h in header if h)
    repeated = sorted(h for h, n in counts.items() if n > 1)
    if repeated:
        reason = msg.FILE_DUPLICATE_COLUMNS.format(columns=listed([repr(h) for h in repeated]))
        raise IngestFileError(name, reason)
    return header


def _not_text(name: str, offset: int, exc: UnicodeDecodeError) -> IngestFileError:
    return IngestFileError(name, msg.FILE_NOT_TEXT.format(detail=f"byte {offset + exc.start}"))


def _text_array(column: pa.ChunkedArray) -> ObjArray:
    """An arrow text column as an object array; each distinct value is one ``str`` object."""
    encoded = pc.dictionary_encode(column).combine_chunks()
    distinct = encoded.dictionary.to_numpy(zero_copy_only=False)
    return np.asarray(distinct[encoded.indices.to_numpy()])


def _number_array(column: pa.ChunkedArray) -> FloatArray | None:
    """An arrow text column parsed as float64 if every value is a plain number, else ``None``.

    Arrow's grammar (optional sign, digits, point, exponent; ``nan``, ``inf``) accepts a subset
    of what :func:`pandas.to_numeric` does, so the rules see the same numbers either way.
    """
    try:
        pc.cast(column.slice(0, 1), pa.float64())  # a text column fails here, cheaply
        floats = pc.cast(column, pa.float64())
    except pa.ArrowInvalid:
        return None
    return np.asarray(floats.to_numpy(), dtype=np.float64)


def _is_plain(chunk: bytes) -> bool:
    """No quotes, NUL, lone carriage return, blank line or over-long line in ``chunk``."""
    if b'"' in chunk or b"\x00" in chunk or chunk.count(b"\r") != chunk.count(b"\r\n"):
        return False
    if chunk.startswith((b"\n", b"\r\n")) or b"\n\n" in chunk or b"\n\r\n" in chunk:
        return False
    if len(chunk) <= MAX_LINE_CHARS:
        return True
    ends = np.flatnonzero(np.frombuffer(chunk, dtype=np.uint8) == ord("\n"))
    widths = np.diff(ends, prepend=-1, append=len(chunk))
    return int(widths.max()) <= MAX_LINE_CHARS


def _line_text(data: bytes) -> str:
    return data.decode("utf-8").removesuffix("\r")


class QuoteFile:
    """A quote file of one kind: its header checked, its rows read chunk by chunk.

    Raises
    ------
    IngestFileError
        On opening: no such file, unknown format, unreadable, not UTF-8 text, no header, too
        many or repeated columns, required columns missing.
    """

    def __init__(self, path: Path, kind: FileKind) -> None:
        self.path = path
        self.name = str(path)
        self.kind = kind
        suffix = path.suffix.lower()
        if suffix == ".csv":
            self.format = "csv"
        elif suffix in (".parquet", ".pq"):
            self.format = "parquet"
        else:
            raise IngestFileError(self.name, msg.FILE_FORMAT.format(suffix=suffix))
        self._body = 0
        try:
            names = self._csv_header() if self.format == "csv" else self._parquet_header()
        except FileNotFoundError:
            raise IngestFileError(self.name, msg.FILE_NOT_FOUND) from None
        except OSError as exc:
            detail = exc.strerror or type(exc).__name__
            raise IngestFileError(self.name, msg.FILE_UNREADABLE.format(detail=detail)) from None
        self.header = _header(self.name, names)
        required = REQUIRED_COLUMNS[kind]
        missing = [c for c in required if c not in self.header]
        if missing:
            reason = msg.FILE_MISSING_COLUMNS.format(
                columns=", ".join(missing), kind=kind, required=", ".join(required)
            )
            raise IngestFileError(self.name, reason)
        if kind == "options" and not {"premium", "implied_vol"} & set(self.header):
            raise IngestFileError(self.name, msg.FILE_NO_PRICE_COLUMN)
        known = set(required) | set(OPTIONAL_COLUMNS[kind])
        self.ignored = sorted({h for h in self.header if h} - known)

    # --- header -----------------------------------------------------------------------------

    def _csv_header(self) -> list[str]:
        with self.path.open("rb") as handle:
            first = handle.readline(MAX_HEADER_BYTES + 1)
        if not first.strip(b"\r\n\t \xef\xbb\xbf"):
            raise IngestFileError(self.name, msg.FILE_NO_HEADER)
        if len(first) > MAX_HEADER_BYTES and not first.endswith(b"\n"):
            reason = msg.FILE_HEADER_TOO_LONG.format(limit=MAX_HEADER_BYTES, columns=MAX_COLUMNS)
            raise IngestFileError(self.name, reason)
        self._body = len(first)
        try:
            text = first.decode("utf-8").removeprefix("\ufeff").rstrip("\r\n")
        except UnicodeDecodeError as exc:
            raise _not_text(self.name, 0, exc) from None
        if '"' in text:
            return next(csv.reader([text]))
        return text.split(",")

    def _parquet_header(self) -> list[str]:
        try:
            self._parquet = pq.ParquetFile(self.path)
        except (ValueError, pa.ArrowException) as exc:
            detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise IngestFileError(self.name, msg.FILE_UNREADABLE.format(detail=detail)) from None
        return [str(n) for n in self._parquet.schema_arrow.names]

    # --- body -------------------------------------------------------------------------------

    def chunks(self) -> Iterator[Table]:
        """The file's rows, chunk by chunk, in file order."""
        if self.format == "csv":
            yield from self._csv_chunks()
        else:
            yield from self._parquet_chunks()

    def raw_rows(self, lines: Collection[int]) -> dict[int, str]:
        """The raw text of the rows at ``lines`` (a second pass over the file)."""
        wanted = np.unique(np.fromiter(lines, dtype=np.int64, count=len(lines)))
        out: dict[int, str] = {}
        if wanted.size == 0:
            return out
        for table in self.chunks():
            found = np.flatnonzero(np.isin(table.lines, wanted))
            out.update((int(table.lines[i]), clipped(table.raw(int(i)))) for i in found)
        return out

    def _csv_chunks(self) -> Iterator[Table]:
        line = 2
        offset = self._body
        with self.path.open("rb") as handle:
            handle.seek(self._body)
            tail = b""
            while True:
                block = handle.read(CHUNK_BYTES)
                data = tail + block
                if not data:
                    return
                cut = len(data) if not block else data.rfind(b"\n") + 1
                if cut == 0:
                    tail = data  # no line end yet: a long line, read on
                    continue
                chunk, tail = data[:cut], data[cut:]
                table, count = self._csv_chunk(chunk, line, offset)
                pa.default_memory_pool().release_unused()  # the chunk's arrow buffers
                line += count
                offset += len(chunk)
                if len(table) or table.early:
                    yield table

    def _csv_chunk(self, chunk: bytes, first: int, offset: int) -> tuple[Table, int]:
        """Parse ``chunk`` (whole lines, the first numbered ``first``); rows and line count."""
        if _is_plain(chunk):
            count = chunk.count(b"\n") + (not chunk.endswith(b"\n"))
            table = self._plain_chunk(chunk, first, count)
            if table is not None:
                return table, count
        try:
            chunk.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise _not_text(self.name, offset, exc) from None
        physical = chunk.splitlines()
        width = len(self.header)
        records: list[list[str]] = []
        lines: list[int] = []
        early: list[RowProblem] = []
        for k, data in enumerate(physical):
            number = first + k
            text = _line_text(data)
            if not text.strip():
                continue
            if len(text) > MAX_LINE_CHARS:
                reason = msg.ROW_LINE_TOO_LONG.format(found=len(text), limit=MAX_LINE_CHARS)
                early.append(RowProblem(number, "*", reason, clipped(text)))
                continue
            quotes = text.count('"')
            if quotes % 2:
                reason = msg.ROW_UNBALANCED_QUOTE.format(count=quotes)
                early.append(RowProblem(number, "*", reason, clipped(text)))
                continue
            record = next(csv.reader([text]))
            if len(record) == width:
                records.append(record)
                lines.append(number)
            elif any(f.strip() for f in record):
                reason = msg.ROW_FIELD_COUNT.format(expected=width, found=len(record))
                early.append(RowProblem(number, "*", reason, clipped(_csv_text(record))))
        fields = list(zip(*records, strict=True)) if records else [()] * width
        texts: dict[str, ObjArray] = {}
        for h, values in zip(self.header, fields, strict=True):
            if h:
                column = np.empty(len(values), dtype=object)
                column[:] = values
                texts[h] = column
        table = Table(
            lines=np.asarray(lines, dtype=np.int64),
            raw=lambda i: _csv_text(records[i]),
            early=early,
            texts=texts,
        )
        return table, len(physical)

    def _plain_chunk(self, chunk: bytes, first: int, count: int) -> Table | None:
        names = [f"c{j}" for j in range(len(self.header))]
        try:
            frame = pa_csv.read_csv(
                io.BytesIO(chunk),
                read_options=pa_csv.ReadOptions(column_names=names, block_size=len(chunk) + 1),
                parse_options=pa_csv.ParseOptions(quote_char=False),
                convert_options=pa_csv.ConvertOptions(
                    column_types=dict.fromkeys(names, pa.string())
                ),
            )
        except pa.ArrowInvalid:  # a line of another width, not UTF-8: the general reader says
            return None
        if frame.num_rows != count:
            return None
        table = Table(
            lines=np.arange(first, first + count, dtype=np.int64),
            raw=_lazy_lines(chunk),
            early=[],
        )
        for h, column in zip(self.header, frame.columns, strict=True):
            if not h:
                continue
            number = _number_array(column)
            if number is None:
                table.texts[h] = _text_array(column)
            else:
                table.numbers[h] = number
                table.arrow[h] = column
        return table

    def _parquet_chunks(self) -> Iterator[Table]:
        first = 1
        try:
            for batch in self._parquet.iter_batches(batch_size=CHUNK_ROWS):
                frame = batch.to_pandas()
                texts = {h: _text_column(frame.iloc[:, j]) for j, h in enumerate(self.header) if h}
                order = [h for h in self.header if h]

                def raw(
                    i: int, texts: dict[str, ObjArray] = texts, order: list[str] = order
                ) -> str:
                    return _csv_text([str(texts[h][i]) for h in order])

                count = len(frame)
                yield Table(
                    lines=np.arange(first, first + count, dtype=np.int64),
                    raw=raw,
                    early=[],
                    texts=texts,
                )
                first += count
        except (ValueError, OSError, pa.ArrowException) as exc:
            detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise IngestFileError(self.name, msg.FILE_UNREADABLE.format(detail=detail)) from None


def _lazy_lines(chunk: bytes) -> Callable[[int], str]:
    cache: list[list[str]] = []

    def raw(i: int) -> str:
        if not cache:
            cache.append(chunk.decode("utf-8").replace("\r\n", "\n").split("\n"))
        return cache[0][i]

    return raw


def _text_column(series: pd.Series) -> ObjArray:
    if pd.api.types.is_datetime64_any_dtype(series):
        text = series.dt.strftime("%Y-%m-%d")
    else:
        text = series.astype(str)
    return np.asarray(text.where(~series.isna(), "").str.strip().to_numpy(dtype=object))


def file_sha256(path: Path) -> str:
    """The sha256 of a file's bytes, read in chunks.

    Raises
    ------
    IngestFileError
        No such file, or it cannot be read.
    """
    digest = hashlib.sha256()
    try:
        with path.open("rb") as handle:
            while block := handle.read(CHUNK_BYTES):
                digest.update(block)
    except FileNotFoundError:
        raise IngestFileError(str(path), msg.FILE_NOT_FOUND) from None
    except OSError as exc:
        detail = exc.strerror or type(exc).__name__
        raise IngestFileError(str(path), msg.FILE_UNREADABLE.format(detail=detail)) from None
    return digest.hexdigest()


__all__ = [
    "CHUNK_BYTES",
    "FILE_KINDS",
    "MAX_COLUMNS",
    "MAX_LINE_CHARS",
    "OPTIONAL_COLUMNS",
    "REQUIRED_COLUMNS",
    "FileKind",
    "QuoteFile",
    "RowProblem",
    "Table",
    "clipped",
    "file_sha256",
    "listed",
]
