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

each chunk read by `pipelines.engines.csv_chunks`: numpy finds the line
breaks, the lines too long and the lines with a control character (rejected by
number), pyarrow parses the rest serially with every line numbered, and a line
with the wrong number of fields is rejected (or read alone by the csv module
when a quoted cell may hold a comma). A line longer than a chunk is skipped
byte-block by byte-block here, never held.

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
import contextlib
import csv
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from pipelines.engines.csv_chunks import (
    CONTROL_CHARACTERS,
    LINE_TOO_LONG,
    PREVIEW_CHARS,
    CsvChunks,
    TextRead,
    clean_cells,
    encoding_error,
)
from pipelines.errors import InputFileError

CHUNK_BYTES = 32 << 20  # bytes per chunk: bounds the reader's working memory (a few times this)
DEFAULT_MAX_LINE_BYTES = 1 << 16  # 64 KiB: a history line is about 50 bytes; a longer line is not data
_BOM = b"\xef\xbb\xbf"


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
        raise InputFileError(
            f"{path}: missing column(s) {missing}; the file has {names}. Expected columns: {list(columns)}."
        )


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


@contextlib.contextmanager
def _utf8(path: Path, encoding: str):
    """(path, encoding) to read as UTF-8: the file itself, or for another encoding a UTF-8 copy of it in a temporary
    folder that is removed on leaving (the encoding stays `utf-8` for the reader then)."""
    if _normal_encoding(encoding) == "utf-8":
        yield path, encoding
        return
    with tempfile.TemporaryDirectory(prefix="apportion-") as tmp:
        copy = Path(tmp) / path.name
        _transcode(path, encoding, copy)
        yield copy, "utf-8"


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
    with _utf8(Path(path), encoding) as (path, encoding), open(path, "rb") as fh:
        chunks, offset = _csv_chunks(path, fh, columns, optional, max_line_bytes, encoding)
        for _ in _feed(fh, chunks, offset, max_line_bytes, chunk_bytes):
            pass
        return chunks.result(list(columns) + list(optional))


def iter_csv_text(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    encoding: str = "utf-8",
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
    chunk_bytes: int = CHUNK_BYTES,
):
    """`read_csv_text` chunk by chunk: one TextRead per chunk of about `chunk_bytes` (its lines, its malformed
    lines, its blank lines), in file order; at least one (empty) for a file without lines. The chunks' frames
    stacked are `read_csv_text`'s frame, their malformed lines its malformed lines, their blank lines its count."""
    order = list(columns) + list(optional)
    with _utf8(Path(path), encoding) as (path, encoding), open(path, "rb") as fh:
        chunks, offset = _csv_chunks(path, fh, columns, optional, max_line_bytes, encoding)
        given = False
        for _ in _feed(fh, chunks, offset, max_line_bytes, chunk_bytes):
            if chunks.pending():
                given = True
                yield chunks.take(order)
        if chunks.pending() or not given:
            yield chunks.take(order)


def _csv_chunks(path: Path, fh, columns, optional, max_line_bytes: int, encoding: str) -> tuple[CsvChunks, int]:
    """The reader of the file open at `fh` (its header read and checked) and the header's bytes."""
    names, offset = _header(path, fh, max_line_bytes, "utf-8")
    check_columns(path, names, columns, optional)
    wanted = [c for c in list(columns) + list(optional) if c in names]
    return CsvChunks(path, names, wanted, max_line_bytes, encoding), offset


def _feed(fh, chunks: CsvChunks, offset: int, max_line_bytes: int, chunk_bytes: int):
    """Give `chunks` the file's lines after the header (`offset` bytes) block by block, each block ending on a
    line break; yields after each block."""
    names = chunks.names
    line = 2  # the first line after the header
    carry = b""
    while True:
        block = fh.read(chunk_bytes)
        buf = carry + block if carry else block
        if not block:
            if buf:
                chunks.add(buf, line, offset)
                yield
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
                yield
                continue
            carry = buf
            continue
        body, carry = buf[: cut + 1], buf[cut + 1 :]
        line += chunks.add(body, line, offset)
        offset += len(body)
        yield


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
    pf, wanted = _parquet_file(path, columns, optional)
    tables, bad = [], []
    for table in _parquet_batches(path, pf, wanted, max_line_bytes, batch_rows, bad):
        tables.append(table)
    return text_read(tables, bad, wanted, list(columns) + list(optional), list(pf.schema_arrow.names))


def iter_parquet_text(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
    batch_rows: int = 1 << 20,
):
    """`read_parquet_text` batch by batch: one TextRead per batch of `batch_rows` rows, in file order; at least
    one (empty) for a file without rows."""
    pf, wanted = _parquet_file(path, columns, optional)
    order, names = list(columns) + list(optional), list(pf.schema_arrow.names)
    given = False
    bad: list[tuple] = []
    for table in _parquet_batches(Path(path), pf, wanted, max_line_bytes, batch_rows, bad):
        given = True
        yield text_read([table], bad, wanted, order, names)
        bad.clear()  # read into the TextRead's frame already
    if not given:
        yield text_read([], [], wanted, order, names)


def _parquet_file(path: Path, columns, optional):
    """The Parquet file (refused when unreadable or its columns are not the ones wanted) and its wanted columns."""
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        pf = pq.ParquetFile(path)
    except Exception as err:  # pyarrow's message says what is wrong with the file
        raise InputFileError(f"{path}: cannot be read as Parquet ({type(err).__name__}: {err})") from None
    names = list(pf.schema_arrow.names)
    check_columns(path, names, columns, optional)
    return pf, [c for c in list(columns) + list(optional) if c in names]


def _parquet_batches(path: Path, pf, wanted: list[str], max_line_bytes: int, batch_rows: int, bad: list[tuple]):
    """The file's rows batch by batch (`screen_cells`: cells as text, rows with a bad cell appended to `bad`)."""
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
                cols.append(text)
            source = np.arange(first, first + batch.num_rows, dtype=np.int64)
            table = screen_cells(cols, wanted, source, max_line_bytes, bad)
            first += batch.num_rows
            yield table
    except InputFileError:
        raise
    except Exception as err:
        raise InputFileError(f"{path}: cannot be read as Parquet ({type(err).__name__}: {err})") from None


def screen_cells(
    cols: list[pa.Array], wanted: list[str], source: np.ndarray, max_line_bytes: int, bad: list[tuple]
) -> pa.Table:
    """One batch of rows whose cells are text already (null for blank): `source_row` and the cleaned cells.

    Cells are trimmed and lose their quotes as a CSV cell does (`clean_cells`);
    a row with a cell longer than `max_line_bytes` (`line_too_long`) or holding
    a control character (`control_characters`) is left out and appended to
    `bad` as (source_row, read_error, its first characters per cell).
    """
    cols = [clean_cells(pc.fill_null(col, "")) for col in cols]
    table = pa.table([pa.array(source, pa.int64())] + cols, names=["source_row"] + wanted)
    n = len(source)
    too_long = np.zeros(n, dtype=bool)
    control = np.zeros(n, dtype=bool)
    for col in cols:
        too_long |= pc.greater(pc.binary_length(col), max_line_bytes).to_numpy(zero_copy_only=False)
        control |= pc.match_substring_regex(col, _CONTROL).to_numpy(zero_copy_only=False)
    drop = too_long | control
    if drop.any():
        for i in np.flatnonzero(drop):
            cells = [str(col[i].as_py())[:PREVIEW_CHARS] for col in cols]
            cells = ["".join(ch if ch.isprintable() else "?" for ch in s) for s in cells]
            bad.append((int(source[i]), LINE_TOO_LONG if too_long[i] else CONTROL_CHARACTERS, *cells))
        table = table.filter(pa.array(~drop))
    return table


def text_read(
    tables: list[pa.Table], bad: list[tuple], wanted: list[str], order: list[str], names: list[str]
) -> TextRead:
    """The batches of `screen_cells` as one TextRead, the columns of `order` a source lacks added blank."""
    schema = pa.schema([("source_row", pa.int64())] + [(c, pa.string()) for c in wanted])
    table = pa.concat_tables(tables) if tables else schema.empty_table()
    for c in order:
        if c not in table.column_names:
            table = table.append_column(c, pa.repeat("", table.num_rows).cast(pa.string()))
    frame = table.select(["source_row"] + order).to_pandas(split_blocks=True, self_destruct=True)
    del table
    tables.clear()
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

