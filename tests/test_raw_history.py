"""raw_history: the reader's line numbers and chunks, dates as written, and the trusted extent behind the cycle date."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipelines.config import load_config
from pipelines.engines.history_files import HISTORY_COLUMNS, choose_cycle_date, load_raw_history
from pipelines.engines.plausible import distinct_dates, parse_dates, trusted_extent, year_outside
from pipelines.engines.reader import read_csv_text, read_parquet_text
from pipelines.errors import InputFileError

ROOT = Path(__file__).resolve().parents[1]
HEADER = b"product,site,customer,period_start,quantity\n"


def read(tmp_path, body: bytes, **kw):
    path = tmp_path / "history.csv"
    path.write_bytes(HEADER + body)
    return read_csv_text(path, HISTORY_COLUMNS, **kw)


# ----------------------------------------------------------------- reader
def test_every_line_keeps_its_row_through_blank_malformed_and_quoted_lines(tmp_path):
    body = (
        b"P1,S1,C1,2025-01-06,5\n"  # row 1
        b"\n"  # row 2: empty, skipped
        b"P1,S1\n"  # row 3: too few
        b'"P1,X",S1,C1,2025-01-06,"7"\n'  # row 4: a quoted comma, read by the csv module
        b"P1,S1,C1,2025-01-06,5,6\n"  # row 5: too many
        b"P1,S1,C\x001,2025-01-06,5\r\n"  # row 6: a NUL byte
        b" P2 , S1 ,C2,2025-01-07 , 8 \r\n"  # row 7: spaces trimmed, CRLF
        b"P3,S1,C3,2025-01-08,9"  # row 8: no line break at the end
    )
    r = read(tmp_path, body)
    assert r.frame.values.tolist() == [
        [1, "P1", "S1", "C1", "2025-01-06", "5"],
        [4, "P1,X", "S1", "C1", "2025-01-06", "7"],
        [7, "P2", "S1", "C2", "2025-01-07", "8"],
        [8, "P3", "S1", "C3", "2025-01-08", "9"],
    ]
    assert dict(zip(r.malformed["source_row"], r.malformed["read_error"], strict=True)) == {
        3: "too_few_fields", 5: "too_many_fields", 6: "control_characters"
    }
    assert r.blank_lines == 1


def test_a_quoted_comma_never_passes_for_a_field_boundary(tmp_path):
    body = (
        b'"P1,X",S1,C1,2025-01-06\n'  # 4 cells, 5 pieces at the commas: too few fields
        b'P1,"S1,S2",C1,2025-01-06,5\n'  # 5 cells, 6 pieces: read by the csv module
        b'P1,S1,"C1",2025-01-06,"a ""big"" one"\n'  # doubled quotes inside a quoted cell
        b'P1,S1,C1,2025-01-06,5"\n'  # a stray quote at the end of a cell: kept as written
    )
    r = read(tmp_path, body)
    assert r.frame.values.tolist() == [
        [2, "P1", "S1,S2", "C1", "2025-01-06", "5"],
        [3, "P1", "S1", "C1", "2025-01-06", 'a "big" one'],
        [4, "P1", "S1", "C1", "2025-01-06", '5"'],
    ]
    assert r.malformed[["source_row", "read_error"]].values.tolist() == [[1, "too_few_fields"]]


@pytest.mark.parametrize("chunk", [16, 37, 64, 1 << 20])
def test_chunks_of_any_size_give_the_same_rows(tmp_path, chunk):
    """Chunks end on a line break; a line longer than a chunk is skipped without being held (row 3 here)."""
    lines = [f"P{i % 3},S1,C{i % 7},2025-01-{1 + i % 28:02d},{i}".encode() for i in range(40)]
    lines[2] = b"P1,S1,C1,2025-01-06," + b"9" * 300
    r = read(tmp_path, b"\n".join(lines) + b"\n", max_line_bytes=128, chunk_bytes=chunk)
    assert r.frame["source_row"].tolist() == [i + 1 for i in range(40) if i != 2]
    assert r.frame["quantity"].tolist() == [str(i) for i in range(40) if i != 2]
    assert r.malformed[["source_row", "read_error"]].values.tolist() == [[3, "line_too_long"]]


def test_a_byte_that_is_not_utf8_names_file_line_offset_and_byte(tmp_path):
    # header 44 bytes + "P1,S1,C1,2025-01-06,5\n" 22 bytes: row 2 (line 3) starts at byte 66; 0xe9 follows "P1,S1,Mx"
    with pytest.raises(InputFileError) as err:
        read(tmp_path, b"P1,S1,C1,2025-01-06,5\nP1,S1,Mx\xe9ller,2025-01-06,5\n")
    message = str(err.value)
    assert "history.csv" in message and "line 3" in message and "0xe9" in message and "offset 74" in message
    assert "inputs.encoding" in message


def test_another_encoding_is_read_when_set(tmp_path):
    r = read(tmp_path, "P1,S1,Müller,2025-01-06,5\n".encode("cp1252"), encoding="cp1252")
    assert r.frame["customer"].tolist() == ["Müller"]


def test_parquet_cells_become_text_and_an_oversized_cell_its_row(tmp_path):
    frame = pd.DataFrame(
        {"product": ["P1", "P1", "P2"], "site": ["S1"] * 3, "customer": ["C1", "C2", "x" * 500],
         "period_start": pd.to_datetime(["2025-01-06", "2025-01-07", "2025-01-08"]), "quantity": [5.0, 1e308, 2.5]}
    )
    path = tmp_path / "history.parquet"
    frame.to_parquet(path, index=False)
    r = read_parquet_text(path, HISTORY_COLUMNS, max_line_bytes=256)
    rows = r.frame[["source_row", "product", "customer", "quantity"]].values.tolist()
    assert rows == [[1, "P1", "C1", "5"], [2, "P1", "C2", "1e+308"]]
    assert parse_dates(r.frame["period_start"]).tolist() == [pd.Timestamp("2025-01-06"), pd.Timestamp("2025-01-07")]
    assert r.malformed[["source_row", "read_error"]].values.tolist() == [[3, "line_too_long"]]


# ----------------------------------------------------------------- dates as written
def test_dates_with_offsets_keep_the_date_as_written_and_never_raise():
    text = pd.Series(["2025-01-06", "2025-01-06T23:30:00-05:00", "2025-01-07T01:00:00+14:00", "2025-01-06T10:00Z",
                      "20250106", "2025-13-45", "", "soon", "9999-12-31", "0001-01-01"])
    got = parse_dates(text)
    assert got.dt.strftime("%Y-%m-%d").fillna("NaT").tolist() == [
        "2025-01-06", "2025-01-06", "2025-01-07", "2025-01-06", "2025-01-06", "NaT", "NaT", "NaT", "NaT", "NaT"
    ]
    assert year_outside(text).tolist() == [0, 0, 0, 0, 0, 0, 0, 0, 1, -1]


# ----------------------------------------------------------------- trusted extent (worked by hand)
def test_a_lone_line_after_a_long_gap_is_isolated_at_either_end():
    # periods 100..109 with 5 lines each (50 lines); one line at 10 and one at 400: each a group of 1 line cut off
    # by more than 52 periods, so both are isolated: the extent is 100..109
    ordinals = np.r_[[10], np.repeat(np.arange(100, 110), 5), [400]]
    assert trusted_extent(ordinals, 52) == (100, 109)
    assert trusted_extent(ordinals, 52, trim_end=False) == (100, 400)  # the end left as it is


def test_a_group_holding_more_than_one_percent_of_the_lines_is_kept():
    # 200 lines in 100..109; a group of 3 lines at 300: 3 > max(1, 1% of 203 = 2.03), so it stays
    ordinals = np.r_[np.repeat(np.arange(100, 110), 20), [300, 300, 300]]
    assert trusted_extent(ordinals, 52) == (100, 300)


def test_a_sparse_last_period_is_left_out_of_a_dense_history():
    # 10 periods of 100 lines, then one period with 3 lines: 3 < 10% of the median 100 and 3 <= 1% of 1,003
    ordinals = np.r_[np.repeat(np.arange(100, 110), 100), [110, 110, 110]]
    assert trusted_extent(ordinals, 52) == (100, 109)
    # with 20 lines it is a (small) period of its own: 20 > 1% of 1,020 = 10.2
    ordinals = np.r_[np.repeat(np.arange(100, 110), 100), np.repeat(110, 20)]
    assert trusted_extent(ordinals, 52) == (100, 110)


def test_a_gap_without_a_small_group_leaves_the_history_whole():
    ordinals = np.r_[np.repeat(np.arange(0, 5), 4), np.repeat(np.arange(200, 205), 4)]
    assert trusted_extent(ordinals, 52) == (0, 204)
    assert trusted_extent(np.array([], dtype=np.int64), 52) == (None, None)


# ----------------------------------------------------------------- the cycle date on the demo
@pytest.mark.parametrize("stray", ["2099-01-05", "2026-12-01", "1900-01-01"])
def test_a_stray_demo_line_never_moves_the_cycle_date(tmp_path, stray):
    """The issue's finding: one line dated far ahead moved latest_complete_period, and the whole cycle with it."""
    folder = tmp_path / "demo"
    shutil.copytree(ROOT / "data" / "demo", folder)
    with open(folder / "history.csv", "a") as fh:
        fh.write(f"DRIP-001,SITE-NORTH,C0001,{stray},12\n")
    config = load_config(ROOT / "config" / "planning.yaml")
    config = config.model_copy(update={"inputs": config.inputs.model_copy(update={"folder": folder})})
    choice = choose_cycle_date(config.inputs, config.calendar.period)
    assert choice.cycle_date == pd.Timestamp("2026-11-30")
    ignored = choice.ignored["period_start"].tolist()
    assert ignored == ([stray] if stray > "2026-11-30" else [])
    if ignored:
        assert stray in choice.describe() and "history.csv row 106193" in choice.describe()


def test_history_lines_carry_their_read_error(tmp_path):
    (tmp_path / "history.csv").write_bytes(HEADER + b"P1,S1,C1,2025-01-06,5\nP1,S1\n")
    lines, files = load_raw_history(tmp_path)
    assert lines[["source_row", "read_error"]].values.tolist() == [[1, ""], [2, "too_few_fields"]]
    assert (files[0].rows, files[0].malformed) == (2, 1)


def test_lines_per_period_counted_from_the_distinct_dates():
    """`DistinctDates.period_counts`: the periods and lines of the chosen lines as `np.unique` of their ordinals
    gives them, and `trusted_extent` on those counts as on the lines' ordinals (the cycle date's and the first
    period's rule in `reject_lines`)."""
    rng = np.random.default_rng(5)
    days = pd.date_range("2020-01-01", periods=900, freq="D").strftime("%Y-%m-%d").to_numpy(dtype=object)
    cells = rng.choice(np.append(days, ["not a date", "1890-02-03"]), size=5000)
    cells[:40] = "2011-05-05"  # an isolated group at the start
    day = distinct_dates(pd.Series(cells, dtype=object))
    cell_ordinals = day.ordinals("week")
    per_line = day.take(cell_ordinals)
    for chosen in (~day.take(day.value_nat), (rng.random(5000) < 0.3) & ~day.take(day.value_nat)):
        periods, counts = day.period_counts(cell_ordinals, chosen)
        wanted_periods, wanted_counts = np.unique(per_line[chosen], return_counts=True)
        assert periods.tolist() == wanted_periods.tolist() and counts.tolist() == wanted_counts.tolist()
        for trim_end in (True, False):
            assert trusted_extent(periods, 52, trim_end=trim_end, counts=counts) == trusted_extent(
                per_line[chosen], 52, trim_end=trim_end
            )
