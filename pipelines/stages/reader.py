"""The columnar text reader behind every input file: CSV or Parquet cells as text, with the line of each row.

Why not a CSV library alone: a history file of 100+ million lines must be read
in bounded memory, every line must keep its line number (the contract of
`raw_history`: raw lines = used + rejected, each with file and row), and one
malformed line must cost one rejected line, not the run. pyarrow's CSV parser
numbers rows only serially and fails a whole read on a line longer than its
block; DuckDB's numbers rejected lines but skips blank lines while counting
them (so valid rows cannot be numbered) and stores one reject per surplus field
(a line of 100,000 fields took 108 s and 3 GB). So the file is read in chunks
of `CHUNK_BYTES` ending on a line break:

1. numpy finds the line breaks of the chunk (LF or CRLF), the lines longer
   than `max_line_bytes` and the lines holding a control character (a byte
   below 0x20 other than tab, DEL, or a carriage return not followed by a line
   feed). Those lines are emptied in a copy of the chunk and reported by
   number (`line_too_long`, `control_characters`). A line longer than a chunk
   is skipped byte-block by byte-block, never held.
2. pyarrow's CSV parser reads the chunk serially, quoting off, every column as
   text, empty lines kept: each physical line is exactly one row or one
   invalid row reported with its number, so the valid rows are numbered by the
   lines left over. A row with the wrong number of fields is
   `too_many_fields` / `too_few_fields`, unless it holds a double quote: then
   Python's csv module reads that line alone (a quoted cell may hold a comma;
   such lines are rare).
3. Cells are trimmed of white space; a cell in double quotes loses them and
   `""` inside becomes `"`. An empty line is skipped and counted.

Invalid UTF-8 (or invalid bytes for `inputs.encoding`) stops the read with an
`InputFileError` naming the file, the line, the byte offset and the byte, and
saying to set `inputs.encoding`. Another encoding than UTF-8 is first
transcoded, chunk by chunk, into a temporary UTF-8 copy.

Parquet files are read by row group batches, each column cast to text; a cell
longer than `max_line_bytes` or holding a control character rejects its row
the same way.
"""

from __future__ import annotations

import codecs
import csv
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from pipelines.errors import InputFileError

CHUNK_BYTES = 32 << 20  # bytes per chunk: bounds the reader's working memory (a few times this)
DEFAULT_MAX_LINE_BYTES = 1 << 16  # 64 KiB: a history line is about 50 bytes; a longer line is not data
PREVIEW_CHARS = 100  # characters of each field of a malformed line kept in rejected_rows
READ_ERRORS = ("too_many_fields", "too_few_fields", "line_too_long", "control_characters")
_BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True)
class TextRead:
    """What the reader delivers for one file.

    `frame`: `source_row` (1-based data row: the file's line number minus the
    header line) and one text column per wanted column ('' for blank), in file
    order. `malformed`: the lines that could not be split into the file's
    columns: `source_row`, `read_error` (one of READ_ERRORS) and the wanted
    columns holding the line's first fields as written (cut to PREVIEW_CHARS).
    `blank_lines`: empty lines skipped. `columns`: the file's header.
    """

    frame: pd.DataFrame
    malformed: pd.DataFrame
    blank_lines: int = 0
    columns: tuple[str, ...] = field(default_factory=tuple)

    @property
    def rows(self) -> int:
        """Rows delivered: well-formed plus malformed (blank lines not counted)."""
        return len(self.frame) + len(self.malformed)


def encoding_error(path: Path, line: int, offset: int, byte: int, encoding: str) -> InputFileError:
    return InputFileError(
        f"{path}: line {line} is not valid {encoding}: byte 0x{byte:02x} at byte offset {offset} of the file. "
        f"Save the file as UTF-8, or set inputs.encoding in the planning config to the file's encoding "
        f"(e.g. latin-1 or cp1252 for files from older spreadsheet exports)."
    )


def _header(path: Path, fh, max_line_bytes: int, encoding: str) -> tuple[list[str], int]:
    """The header's column names and the bytes it took (BOM and line break included)."""
    raw = fh.readline(max_line_bytes + 3)
    if not raw:
        raise InputFileError(f"{path}: the file is empty; its first line must be the header naming the columns.")
    if not raw.endswith(b"\n") and len(raw) > max_line_bytes:
        raise InputFileError(
            f"{path}: line 1 (the header) is longer than inputs.max_line_bytes ({max_line_bytes} bytes); "
            f"is this a CSV file with a header line?"
        )
    body = raw[3:] if raw.startswith(_BOM) else raw
    try:
        text = body.decode(encoding)
    except UnicodeDecodeError as err:
        raise encoding_error(path, 1, err.start + len(raw) - len(body), body[err.start], encoding) from None
    text = text.rstrip("\r\n")
    if not text.strip():
        raise InputFileError(f"{path}: line 1 is blank; the first line must be the header naming the columns.")
    names = [n.strip() for n in next(csv.reader([text], skipinitialspace=True))]
    return names, len(raw)


def check_columns(path: Path, names: list[str], columns: tuple[str, ...], optional: tuple[str, ...]) -> None:
    """Raise naming the file and the column for a blank, repeated, unknown or missing column."""
    expected = list(columns) + list(optional)
    blank = [i + 1 for i, n in enumerate(names) if not n]
    if blank:
        raise InputFileError(
            f"{path}: column {blank[0]} of the header has no name (a trailing comma?). "
            f"Expected columns: {expected}; remove the empty column."
        )
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise InputFileError(f"{path}: column(s) {repeated} appear more than once in the header; keep one of each.")
    unknown = [n for n in names if n not in expected]
    missing = [c for c in columns if c not in names]
    if unknown:
        raise InputFileError(
            f"{path}: unknown column(s) {unknown}"
            + (f" and missing column(s) {missing}" if missing else "")
            + f"; this file takes the columns {expected}"
            + (f" ({list(optional)} optional)" if optional else "")
            + ". Remove or rename the unknown column(s)."
        )
    if missing:
        raise InputFileError(f"{path}: missing column(s) {missing}; the file has {names}. Expected columns: {list(columns)}.")


def _clean(cells: pa.Array, spaces: bool = True, quotes: bool = True) -> pa.Array:
    """Trim white space; a cell in double quotes loses them, and a doubled quote inside becomes one.

    `spaces` / `quotes` False: the caller knows the cells hold no white space / no quote, and each pass is skipped.
    """
    if spaces:
        cells = pc.utf8_trim_whitespace(cells)
    if not quotes:
        return cells
    quoted = pc.and_(
        pc.and_(pc.starts_with(cells, '"'), pc.ends_with(cells, '"')), pc.greater_equal(pc.utf8_length(cells), 2)
    )
    if not pc.any(quoted).as_py():
        return cells
    inner = pc.replace_substring(pc.utf8_slice_codeunits(cells, 1, -1), '""', '"')
    return pc.if_else(quoted, inner, cells)


def _printable(raw: bytes) -> str:
    """Bytes of a rejected line as text for rejected_rows: undecodable bytes and control characters as '?'."""
    return "".join(ch if ch.isprintable() else "?" for ch in raw.decode("utf-8", "replace"))


def _fields(text: str, k: int) -> list[str]:
    """The first k fields of a malformed line, cut to PREVIEW_CHARS, padded with ''."""
    parts = text.split(",")[:k]
    return [p.strip()[:PREVIEW_CHARS] for p in parts] + [""] * (k - len(parts))


class _Chunks:
    """Reads one CSV file chunk by chunk; collects rows, malformed lines and blank lines."""

    def __init__(self, path: Path, names: list[str], wanted: list[str], max_line_bytes: int, encoding_label: str):
        self.path = path
        self.names = names
        self.k = len(names)
        self.positions = [names.index(c) for c in wanted]
        self.wanted = wanted
        self.max_line = max_line_bytes
        self.encoding_label = encoding_label
        self.tables: list[pa.Table] = []
        self.extra: list[tuple] = []  # (source_row, cells...) of quoted lines read by the csv module
        self.bad: list[tuple] = []  # (source_row, read_error, cells...)
        self.blank = 0

    # ---- one chunk: whole lines, the first being file line `first_line`
    def add(self, body: bytes, first_line: int, file_offset: int) -> int:
        """Read the whole lines of `body`, which starts at file line `first_line`; the number of lines read."""
        arr = np.frombuffer(body, dtype=np.uint8)
        nl = np.flatnonzero(arr == 10)
        n = len(nl) + int(len(arr) > 0 and arr[-1] != 10)
        if n == 0:
            return 0
        starts = np.concatenate(([0], nl + 1))[:n]
        ends = np.concatenate((nl, [len(arr)]))[:n]  # exclusive: the LF left out
        crlf = (ends > starts) & (arr[np.maximum(ends - 1, 0)] == 13)
        length = ends - crlf - starts

        too_long = length > self.max_line
        control = np.zeros(n, dtype=bool)
        suspicious = (arr < 32) | (arr == 127)
        if suspicious.any():
            pos = np.flatnonzero(suspicious & (arr != 9) & (arr != 10))
            pos = pos[~np.isin(pos, ends[crlf] - 1)]  # a CR is allowed only as the CR of a CRLF line end
            if len(pos):
                control[np.unique(np.searchsorted(starts, pos, side="right") - 1)] = True
        drop = too_long | control
        data = body
        if drop.any():
            for i in np.flatnonzero(drop):
                head = bytes(body[starts[i] : starts[i] + PREVIEW_CHARS * self.k])
                self._bad(first_line + i, "line_too_long" if too_long[i] else "control_characters", _printable(head))
            delta = np.zeros(len(arr) + 1, dtype=np.int64)
            np.add.at(delta, starts[drop], 1)
            np.add.at(delta, ends[drop], -1)
            data = arr[np.cumsum(delta[:-1]) == 0].tobytes()  # the dropped lines emptied, their line breaks kept

        # UTF-8 first: pyarrow decodes an invalid row's text before it calls the handler, so a malformed line
        # that is not UTF-8 would be lost there (found by the fuzz test of tests/test_bad_inputs.py)
        if not data.isascii():
            try:
                offsets = pa.array([0, len(data)], pa.int64()).buffers()[1]
                pa.Array.from_buffers(pa.large_string(), 1, [None, offsets, pa.py_buffer(data)]).validate(full=True)
            except pa.ArrowInvalid:
                self._raise_encoding(body, starts, drop, first_line, file_offset)

        invalid: dict[int, str] = {}

        def on_invalid(row) -> str:
            invalid[-1 if row.number is None else row.number] = row.text
            return "skip"

        try:
            table = pacsv.read_csv(
                pa.py_buffer(data),
                read_options=pacsv.ReadOptions(
                    column_names=[f"c{i}" for i in range(self.k)], use_threads=False, block_size=len(data) + 1
                ),
                parse_options=pacsv.ParseOptions(quote_char=False, ignore_empty_lines=False, invalid_row_handler=on_invalid),
                convert_options=pacsv.ConvertOptions(
                    column_types={f"c{i}": pa.string() for i in range(self.k)}, strings_can_be_null=False
                ),
            )
        except pa.ArrowInvalid as err:
            if "utf8" in str(err).lower():
                self._raise_encoding(body, starts, drop, first_line, file_offset)
            raise InputFileError(f"{self.path}: cannot be read near line {first_line} ({err})") from None

        # pyarrow returned every line of the chunk as a row but the invalid ones, which it numbered
        numbers = np.array(sorted(invalid), dtype=np.int64) - 1
        if len(numbers) and (numbers.min() < 0 or numbers.max() >= n):
            raise InputFileError(f"{self.path}: cannot number the lines near line {first_line}; please report this file")
        row_line = np.ones(n, dtype=bool)
        row_line[numbers] = False
        if table.num_rows != int(row_line.sum()):
            raise InputFileError(
                f"{self.path}: cannot number the lines near line {first_line} ({table.num_rows} rows for "
                f"{int(row_line.sum())} lines); please report this file"
            )
        empty = (length == 0) & ~drop
        for number, text in invalid.items():
            i = number - 1
            if text.strip() == "":
                empty[i] = True
                continue
            if '"' in text:  # a quoted cell may hold a comma: read this line alone with the csv module
                try:
                    cells = next(csv.reader([text], skipinitialspace=True))
                except csv.Error:
                    cells = []
                if len(cells) == self.k:
                    self.extra.append((first_line + i - 1, *[cells[p].strip() for p in self.positions]))
                    continue
            self._bad(first_line + i, "too_many_fields" if text.count(",") + 1 > self.k else "too_few_fields", text)
        self.blank += int(empty.sum())
        at = np.flatnonzero(row_line)
        keep = ~(empty | drop)[at]
        if b'"' in data:
            keep &= ~self._requoted(table, at, first_line)
        # passes over the cells only where the chunk can need them: white space (any non-ASCII byte may be
        # Unicode white space) and double quotes
        ascii_only = data.isascii()
        spaces = not ascii_only or b" " in data or b"\t" in data or b"\x0b" in data or b"\x0c" in data
        cols = [_clean(table.column(p).combine_chunks(), spaces, b'"' in data) for p in self.positions]
        out = pa.table([pa.array(first_line + at - 1, type=pa.int64())] + cols, names=["source_row"] + self.wanted)
        self.tables.append(out if keep.all() else out.filter(pa.array(keep)))
        return n

    def _requoted(self, table: pa.Table, at: np.ndarray, first_line: int) -> np.ndarray:
        """Rows whose fields came apart at a comma inside double quotes, read again with the csv module.

        A quoted cell holding a comma can split into the right number of fields
        by chance (`"P1,X",S1,C1,2025-12-03` is 4 cells, 5 pieces); a piece that
        opens a quote without closing it (or the reverse) gives it away. Such a
        row is replaced by its csv reading, or rejected with its true field count.
        Returns the flags of the rows handled here.
        """
        flags = np.zeros(table.num_rows, dtype=bool)
        for p in range(self.k):
            cell = pc.utf8_trim_whitespace(table.column(p))
            opened, closed = pc.starts_with(cell, '"'), pc.ends_with(cell, '"')
            lone = pc.equal(cell, '"')
            flags |= pc.or_(pc.not_equal(opened, closed), lone).to_numpy(zero_copy_only=False)
        for r in np.flatnonzero(flags):  # rare: only rows with an unbalanced quote
            text = ",".join(table.column(p)[int(r)].as_py() for p in range(self.k))
            line = first_line + int(at[r])
            try:
                cells = next(csv.reader([text], skipinitialspace=True))
            except csv.Error:
                cells = text.split(",")
            if len(cells) == self.k:
                self.extra.append((line - 1, *[cells[p].strip() for p in self.positions]))
            else:
                self._bad(line, "too_many_fields" if len(cells) > self.k else "too_few_fields", text)
        return flags

    def _bad(self, line: int, why: str, text: str) -> None:
        fields = _fields(text, self.k)
        self.bad.append((line - 1, why, *[fields[p] for p in self.positions]))

    def _raise_encoding(self, body: bytes, starts: np.ndarray, drop: np.ndarray, first_line: int, file_offset: int) -> None:
        """Name the first line of `body` (dropped lines aside) that is not UTF-8, and its byte."""
        ends = np.concatenate((starts[1:], [len(body)]))
        for i in np.flatnonzero(~drop):
            piece = bytes(body[starts[i] : ends[i]])
            try:
                piece.decode("utf-8")
            except UnicodeDecodeError as err:
                raise encoding_error(
                    self.path, first_line + i, file_offset + starts[i] + err.start, piece[err.start], self.encoding_label
                ) from None
        raise InputFileError(f"{self.path}: invalid text near line {first_line}; set inputs.encoding to the file's encoding")

    def skipped_long_line(self, line: int, head: bytes) -> None:
        self._bad(line, "line_too_long", _printable(head[: PREVIEW_CHARS * self.k]))

    def result(self, order: list[str]) -> TextRead:
        """The rows read, columns in `order` (wanted columns the file lacks come out blank)."""
        schema = pa.schema([("source_row", pa.int64())] + [(c, pa.string()) for c in self.wanted])
        table = pa.concat_tables(self.tables) if self.tables else schema.empty_table()
        self.tables = []
        if self.extra:
            extra = pa.table(
                [pa.array([e[0] for e in self.extra], pa.int64())]
                + [pa.array([e[j + 1] for e in self.extra], pa.string()) for j in range(len(self.wanted))],
                schema=schema,
            )
            table = pa.concat_tables([table, extra]).sort_by("source_row")
        for c in order:
            if c not in table.column_names:
                table = table.append_column(c, pa.repeat("", table.num_rows).cast(pa.string()))
        table = table.select(["source_row"] + order)
        # strings become shared Python objects (a product code once, not per line); Arrow buffers freed as they go
        frame = table.to_pandas(split_blocks=True, self_destruct=True)
        del table
        malformed = pd.DataFrame(self.bad, columns=["source_row", "read_error", *self.wanted])
        for c in order:
            if c not in malformed.columns:
                malformed[c] = ""
        malformed = malformed.astype({"source_row": np.int64}).sort_values("source_row", kind="stable").reset_index(drop=True)
        return TextRead(frame=frame, malformed=malformed[["source_row", "read_error"] + order], blank_lines=self.blank, columns=tuple(self.names))


def _transcode(path: Path, encoding: str, out: Path, block: int = CHUNK_BYTES) -> None:
    """Write `path` (in `encoding`) to `out` as UTF-8, block by block; raise naming line and byte on bad bytes."""
    decoder = codecs.getincrementaldecoder(encoding)(errors="strict")
    consumed, lines = 0, 1
    with open(path, "rb") as src, open(out, "wb") as dst:
        while True:
            raw = src.read(block)
            try:
                text = decoder.decode(raw, final=not raw)
            except UnicodeDecodeError as err:
                start = max(err.start, 0)
                bad = raw[start] if start < len(raw) else 0
                raise encoding_error(path, lines + raw[:start].count(b"\n"), consumed + start, bad, encoding) from None
            except UnicodeError as err:  # e.g. a UTF-16 file without its byte order mark
                raise InputFileError(
                    f"{path}: cannot be read as {encoding} ({err}); set inputs.encoding to the file's encoding "
                    f"(every CSV input is read with it), or save the file as UTF-8."
                ) from None
            dst.write(text.encode("utf-8"))
            lines += raw.count(b"\n")
            consumed += len(raw)
            if not raw:
                break


def _normal_encoding(encoding: str) -> str:
    try:
        return codecs.lookup(encoding).name
    except LookupError:
        raise InputFileError(
            f"inputs.encoding {encoding!r} is not an encoding Python knows; use e.g. utf-8, latin-1, cp1252 or utf-16"
        ) from None


def read_csv_text(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    encoding: str = "utf-8",
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
    chunk_bytes: int = CHUNK_BYTES,
) -> TextRead:
    """Read the CSV file `path`: its `columns` (and those of `optional` it has) as text, each row with its line.

    Raises InputFileError for an empty file, a header without a required
    column or with an unknown, blank or repeated one, and for bytes that are not
    text in `encoding`. Malformed lines are returned, not raised.
    """
    path = Path(path)
    codec = _normal_encoding(encoding)
    if codec != "utf-8":
        with tempfile.TemporaryDirectory(prefix="apportion-") as tmp:
            copy = Path(tmp) / path.name
            _transcode(path, encoding, copy)
            read = read_csv_text(copy, columns, optional, max_line_bytes=max_line_bytes, chunk_bytes=chunk_bytes)
            return read
    with open(path, "rb") as fh:
        names, offset = _header(path, fh, max_line_bytes, "utf-8")
        check_columns(path, names, columns, optional)
        wanted = [c for c in list(columns) + list(optional) if c in names]
        chunks = _Chunks(path, names, wanted, max_line_bytes, encoding)
        line = 2  # the first line after the header
        carry = b""
        while True:
            block = fh.read(chunk_bytes)
            buf = carry + block if carry else block
            if not block:
                if buf:
                    chunks.add(buf, line, offset)
                break
            cut = buf.rfind(b"\n")
            if cut < 0:
                if len(buf) > max_line_bytes:  # a line longer than allowed and not ended yet: skip it unread
                    head = buf[: PREVIEW_CHARS * len(names)]
                    offset += len(buf)
                    while True:
                        more = fh.read(chunk_bytes)
                        if not more:
                            carry = b""
                            break
                        end = more.find(b"\n")
                        if end >= 0:
                            carry = more[end + 1 :]
                            offset += end + 1
                            break
                        offset += len(more)
                    chunks.skipped_long_line(line, head)
                    line += 1
                    continue
                carry = buf
                continue
            body, carry = buf[: cut + 1], buf[cut + 1 :]
            line += chunks.add(body, line, offset)
            offset += len(body)
    return chunks.result(list(columns) + list(optional))


_CONTROL = r"[\x00-\x08\x0a-\x1f\x7f]"


def read_parquet_text(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
    batch_rows: int = 1 << 20,
) -> TextRead:
    """Read the Parquet file `path` batch by batch, every wanted column cast to text ('' for null).

    A row with a cell longer than `max_line_bytes` is `line_too_long`, one with a
    control character in a cell `control_characters`; `source_row` is the
    1-based row of the file.
    """
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        pf = pq.ParquetFile(path)
    except Exception as err:  # pyarrow's message says what is wrong with the file
        raise InputFileError(f"{path}: cannot be read as Parquet ({type(err).__name__}: {err})") from None
    names = list(pf.schema_arrow.names)
    check_columns(path, names, columns, optional)
    wanted = [c for c in list(columns) + list(optional) if c in names]
    tables, bad = [], []
    first = 1
    try:
        for batch in pf.iter_batches(batch_size=batch_rows, columns=wanted):
            cols = []
            for c in wanted:
                col = batch.column(c)
                try:
                    text = pc.cast(col, pa.string())
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as err:
                    raise InputFileError(
                        f"{path}: column {c!r} of type {col.type} cannot be read as text ({err}); store it as a "
                        f"string, number or date column"
                    ) from None
                cols.append(_clean(pc.fill_null(text, "")))
            source = pa.array(np.arange(first, first + batch.num_rows, dtype=np.int64))
            table = pa.table([source] + cols, names=["source_row"] + wanted)
            too_long = np.zeros(batch.num_rows, dtype=bool)
            control = np.zeros(batch.num_rows, dtype=bool)
            for col in cols:
                too_long |= pc.greater(pc.binary_length(col), max_line_bytes).to_numpy(zero_copy_only=False)
                control |= pc.match_substring_regex(col, _CONTROL).to_numpy(zero_copy_only=False)
            drop = too_long | control
            if drop.any():
                for i in np.flatnonzero(drop):
                    cells = [str(col[i].as_py())[:PREVIEW_CHARS] for col in cols]
                    cells = ["".join(ch if ch.isprintable() else "?" for ch in s) for s in cells]
                    bad.append((first + i, "line_too_long" if too_long[i] else "control_characters", *cells))
                table = table.filter(pa.array(~drop))
            tables.append(table)
            first += batch.num_rows
    except InputFileError:
        raise
    except Exception as err:
        raise InputFileError(f"{path}: cannot be read as Parquet ({type(err).__name__}: {err})") from None
    schema = pa.schema([("source_row", pa.int64())] + [(c, pa.string()) for c in wanted])
    table = pa.concat_tables(tables) if tables else schema.empty_table()
    order = list(columns) + list(optional)
    for c in order:
        if c not in table.column_names:
            table = table.append_column(c, pa.repeat("", table.num_rows).cast(pa.string()))
    frame = table.select(["source_row"] + order).to_pandas(split_blocks=True, self_destruct=True)
    del table, tables
    malformed = pd.DataFrame(bad, columns=["source_row", "read_error", *wanted]).astype({"source_row": np.int64})
    for c in order:
        if c not in malformed.columns:
            malformed[c] = ""
    return TextRead(frame=frame, malformed=malformed[["source_row", "read_error"] + order], columns=tuple(names))


def read_text(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    encoding: str = "utf-8",
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
) -> TextRead:
    """CSV or Parquet by the file's suffix."""
    if Path(path).suffix == ".parquet":
        return read_parquet_text(path, columns, optional, max_line_bytes=max_line_bytes)
    return read_csv_text(path, columns, optional, encoding=encoding, max_line_bytes=max_line_bytes)
