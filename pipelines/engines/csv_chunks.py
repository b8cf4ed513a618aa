"""The CSV chunk scanner of the reader (`pipelines.engines.reader`): whole lines of one chunk to rows with their lines.

Per chunk of whole lines (the reader's docstring gives the reasons):

1. numpy finds the line breaks (LF or CRLF), the lines longer than
   `max_line_bytes` and the lines holding a control character (a byte below
   0x20 other than tab, DEL, or a carriage return not followed by a line feed).
   Those lines are emptied in a copy of the chunk and reported by number
   (`line_too_long`, `control_characters`).
2. pyarrow's CSV parser reads the chunk serially, quoting off, every column as
   text, empty lines kept: each physical line is exactly one row or one invalid
   row reported with its number, so the valid rows are numbered by the lines
   left over. A row with the wrong number of fields is `too_many_fields` /
   `too_few_fields`, unless it holds a double quote: then Python's csv module
   reads that line alone (a quoted cell may hold a comma; such lines are rare).
3. Cells are trimmed of white space; a cell in double quotes loses them and
   `""` inside becomes `"`. An empty line is skipped and counted.

The chunk must be valid UTF-8; the first invalid byte stops the read with an
`InputFileError` naming the file, the line, the byte offset and the byte.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from pipelines.errors import InputFileError
from pipelines.vocabulary import ReadError

PREVIEW_CHARS = 100  # characters of each field of a malformed line kept in rejected_rows
TOO_MANY_FIELDS = ReadError.TOO_MANY_FIELDS.value
TOO_FEW_FIELDS = ReadError.TOO_FEW_FIELDS.value
LINE_TOO_LONG = ReadError.LINE_TOO_LONG.value
CONTROL_CHARACTERS = ReadError.CONTROL_CHARACTERS.value


@dataclass(frozen=True)
class TextRead:
    """What the reader delivers for one file.

    `frame`: `source_row` (1-based data row: the file's line number minus the
    header line) and one text column per wanted column ('' for blank), in file
    order. `malformed`: the lines that could not be split into the file's
    columns: `source_row`, `read_error` (a `ReadError`) and the wanted
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


def clean_cells(cells: pa.Array, spaces: bool = True, quotes: bool = True) -> pa.Array:
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


def printable(raw: bytes) -> str:
    """Bytes of a rejected line as text for rejected_rows: undecodable bytes and control characters as '?'."""
    return "".join(ch if ch.isprintable() else "?" for ch in raw.decode("utf-8", "replace"))


def _fields(text: str, k: int) -> list[str]:
    """The first k fields of a malformed line, cut to PREVIEW_CHARS, padded with ''."""
    parts = text.split(",")[:k]
    return [p.strip()[:PREVIEW_CHARS] for p in parts] + [""] * (k - len(parts))


class CsvChunks:
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
                self._bad(first_line + i, LINE_TOO_LONG if too_long[i] else CONTROL_CHARACTERS, printable(head))
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
                parse_options=pacsv.ParseOptions(
                    quote_char=False, ignore_empty_lines=False, invalid_row_handler=on_invalid
                ),
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
            raise InputFileError(
                f"{self.path}: cannot number the lines near line {first_line}; please report this file"
            )
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
            self._bad(first_line + i, TOO_MANY_FIELDS if text.count(",") + 1 > self.k else TOO_FEW_FIELDS, text)
        self.blank += int(empty.sum())
        at = np.flatnonzero(row_line)
        keep = ~(empty | drop)[at]
        if b'"' in data:
            keep &= ~self._requoted(table, at, first_line)
        # passes over the cells only where the chunk can need them: white space (any non-ASCII byte may be
        # Unicode white space) and double quotes
        ascii_only = data.isascii()
        spaces = not ascii_only or b" " in data or b"\t" in data or b"\x0b" in data or b"\x0c" in data
        cols = [clean_cells(table.column(p).combine_chunks(), spaces, b'"' in data) for p in self.positions]
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
                self._bad(line, TOO_MANY_FIELDS if len(cells) > self.k else TOO_FEW_FIELDS, text)
        return flags

    def _bad(self, line: int, why: str, text: str) -> None:
        fields = _fields(text, self.k)
        self.bad.append((line - 1, why, *[fields[p] for p in self.positions]))

    def _raise_encoding(
        self, body: bytes, starts: np.ndarray, drop: np.ndarray, first_line: int, file_offset: int
    ) -> None:
        """Name the first line of `body` (dropped lines aside) that is not UTF-8, and its byte."""
        ends = np.concatenate((starts[1:], [len(body)]))
        for i in np.flatnonzero(~drop):
            piece = bytes(body[starts[i] : ends[i]])
            try:
                piece.decode("utf-8")
            except UnicodeDecodeError as err:
                offset = file_offset + starts[i] + err.start
                raise encoding_error(self.path, first_line + i, offset, piece[err.start], self.encoding_label) from None
        raise InputFileError(
            f"{self.path}: invalid text near line {first_line}; set inputs.encoding to the file's encoding"
        )

    def skipped_long_line(self, line: int, head: bytes) -> None:
        self._bad(line, LINE_TOO_LONG, printable(head[: PREVIEW_CHARS * self.k]))

    def pending(self) -> bool:
        """Whether lines (rows, malformed or blank) were read since the last `take`."""
        return bool(self.tables or self.extra or self.bad or self.blank)

    def take(self, order: list[str]) -> TextRead:
        """`result` of the lines read since the last `take`, which are then forgotten (a chunk of the file)."""
        read = self.result(order)
        self.extra, self.bad, self.blank = [], [], 0
        return read

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
        malformed = malformed.astype({"source_row": np.int64}).sort_values("source_row", kind="stable")
        malformed = malformed.reset_index(drop=True)
        return TextRead(
            frame=frame,
            malformed=malformed[["source_row", "read_error"] + order],
            blank_lines=self.blank,
            columns=tuple(self.names),
        )
