"""Building blocks of cleansing: raw lines rejected with a reason, correction rows, the cycle's calendar row (the
shortage grid is in `cleansing_blocks`).

The rules and their order are stated in `pipelines.stages.cleaned_history`.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import (
    LATEST_COMPLETE_PERIOD,
    horizon_starts,
    ordinal_to_start,
    period_ordinal,
    resolve_cycle_date,
)
from pipelines.config_inputs import PlausibilityConfig
from pipelines.engines.history_proofs import RUNS_UNSEEN
from pipelines.engines.plausible import distinct_dates, distinct_quantities, gap_periods, trusted_extent
from pipelines.keys import LEAF, factorize, pack_codes
from pipelines.text_codes import RUNS_SHARE, codes_of, first_appearances, run_starts


@dataclass(frozen=True)
class UsedLines:
    """The usable lines as integers, read in place from the raw lines' arrays: each raw line's period ordinal
    and quantity code, whether it is used, and the runs of lines of one key that hold a used line (in line
    order; each used line a run of its own where the lines are not in runs) with the leaf code of each
    (0..len(leaves) - 1, numbered by first appearance). No array of the used lines is made unless asked for
    (`leaf_code`, `ordinal`, `quantity`: the used lines in line order). `raw_runs`: for the proofs."""

    leaves: pd.DataFrame  # product, site, customer of each code
    line_ordinal: np.ndarray  # int32 period number per raw line (a rejected line's: the largest int32)
    qty_code: np.ndarray  # per raw line: its distinct quantity cell
    qty_values: np.ndarray  # float64 per distinct quantity cell
    used: np.ndarray  # bool per raw line
    run_start: np.ndarray  # int64 first raw line of each run holding a used line
    run_length: np.ndarray  # int64 raw lines of the run
    run_used: np.ndarray  # int64 used lines of the run
    leaf_of_run: np.ndarray  # int64 leaf code of the run
    raw_runs: object = RUNS_UNSEEN  # `history_proofs.leaf_runs(raw)`, where the coding found it on the way

    @property
    def leaf_code(self) -> np.ndarray:
        return np.repeat(self.leaf_of_run, self.run_used)

    @property
    def ordinal(self) -> np.ndarray:
        return self.line_ordinal[self.used]

    @property
    def quantity(self) -> np.ndarray:
        return self.qty_values[self.qty_code[self.used]]

    def first_ordinals(self) -> np.ndarray:
        """Each leaf's first period ordinal with a used line (int64; every leaf has one)."""
        first = np.full(len(self.leaves), np.iinfo(np.int32).max, dtype=np.int64)
        if len(self.run_start):  # runs in line order; the lines between two runs are rejected: the largest int32
            np.minimum.at(first, self.leaf_of_run, np.minimum.reduceat(self.line_ordinal, self.run_start))
        return first


def reject_lines(
    raw: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, calendar, source, plausible: PlausibilityConfig,
    first_period: int | None = None,
) -> tuple[UsedLines, pd.DataFrame, pd.Timestamp]:
    """Split raw lines into usable lines (parsed, as integer codes) and rejected lines (with reason).

    `first_period` (a shard of a class, `pipelines.shards`): the class's first trusted period (ordinal), so the
    shard rejects as `isolated_date` exactly the lines the whole class would; None: from these lines.

    Returns (used, rejected, cycle_date). Each text column is coded once
    (`text_codes.codes_of`) and each rule on a cell (a date, a quantity, a
    known product) is judged once per distinct cell; the keys are packed into
    one integer jointly with the spans' (as `keys.joint_codes`), so the lines
    are never copied as text. The reasons, first that applies:
    the reader's (`read_error`), `missing_key`, `bad_date`, `bad_quantity`,
    `quantity_out_of_bounds`, `unknown_product`, `no_customer_span`,
    `duplicate_of_other_file`, `date_before_window`, `date_after_window`,
    `isolated_date`, `on_or_after_cycle_date` (`pipelines.stages.cleaned_history`, rule 1).
    """
    period = calendar.period
    reason = np.zeros(len(raw), dtype=np.int16)  # 0: no reason yet, else 1 + its place in `reasons`
    reasons: list[str] = []
    free = np.ones(len(raw), dtype=bool)  # reason == 0, kept in place as lines are marked
    hit = np.empty(len(raw), dtype=bool)  # one buffer for every rule's newly marked lines

    def mark(mask, why) -> None:
        np.logical_and(mask, free, out=hit)
        if hit.any():
            if why not in reasons:
                reasons.append(why)
            reason[hit] = reasons.index(why) + 1
            np.greater(free, hit, out=free)  # free & ~hit

    if "read_error" in raw.columns:
        for why, mask in _read_errors(raw["read_error"]):
            mark(mask, why)
    # each text column coded once (`text_codes`); its rules judged on its distinct values, reached by the codes.
    # Lines in runs of one key (a leaf's lines read together): the keys coded and judged per run, then repeated
    keyed, starts = _key_runs(raw)
    lengths = None if starts is None else np.diff(np.append(starts, len(raw)))

    def spread(per_run: np.ndarray) -> np.ndarray:  # a per-run array repeated to the lines
        return per_run if lengths is None else np.repeat(per_run, lengths)

    key_codes = {c: codes_of(keyed[c], use_na_sentinel=False) for c in LEAF}
    mark(spread(np.logical_or.reduce([(u == "")[k] for k, u in key_codes.values()])), "missing_key")
    day = distinct_dates(raw["period_start"])
    # a date pandas cannot hold (year 9999) is still a date, outside the window: looked for among the unparsed only
    # (each rule judged on the distinct cells, then taken to the lines)
    unparsed = day.take(day.value_nat)
    mark(day.take(day.value_nat & (day.outside == 0)), "bad_date")
    qty_code, qty_values = distinct_quantities(raw["quantity"])
    mark((~np.isfinite(qty_values))[qty_code], "bad_quantity")
    size = np.abs(np.nan_to_num(qty_values, nan=0.0, posinf=0.0, neginf=0.0))
    mark((size > plausible.max_abs_quantity)[qty_code], "quantity_out_of_bounds")
    product_code, product_text = key_codes["product"]
    mark(spread(~pd.Series(product_text).isin(products["product"]).to_numpy()[product_code]), "unknown_product")
    codes = _joint_leaf_codes(key_codes, spans)
    del key_codes
    if codes is None:  # too many distinct keys to pack into one integer: pandas' own grouping
        codes = factorize(pd.concat([keyed[LEAF], spans[LEAF]], ignore_index=True), LEAF)[0]
        codes = codes[: len(keyed)], codes[len(keyed) :]
    run_code = codes[0]

    def line_code(rows: np.ndarray) -> np.ndarray:  # the key code of the lines `rows` (from their runs)
        return run_code[rows] if starts is None else run_code[np.searchsorted(starts, rows, side="right") - 1]

    mark(spread(~pd.Series(run_code).isin(codes[1]).to_numpy()), "no_customer_span")
    del codes
    same_value = (day.take(day.value_code), qty_code, pd.factorize(qty_values, use_na_sentinel=False)[0])
    mark(_repeated_in_earlier_file(raw, line_code, same_value, free), "duplicate_of_other_file")

    # the cycle date: given, or the period after the trusted end of the usable lines
    has_date = ~unparsed
    ok = free & has_date
    cell_ordinals = day.ordinals(period)  # per distinct date cell (0 where none)
    ordinals = day.take(cell_ordinals.astype(np.int32))  # int32; 0 for a line without a date (rejected)
    gap = gap_periods(plausible.isolation_gap_years, period)
    last = None
    if ok.any() and calendar.cycle_date == LATEST_COMPLETE_PERIOD:
        periods, counts = day.period_counts(cell_ordinals, ok)
        _, last_ord = trusted_extent(periods, gap, counts=counts)
        last = ordinal_to_start(np.array([last_ord]), period)[0]
    cycle_date = resolve_cycle_date(calendar.cycle_date, last, period, str(source))
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])

    # plausible dates: inside the window around the cycle date, not cut off from the rest of the history
    lowest = cycle_date - pd.Timedelta(days=round(plausible.years_before_cycle * 365.2425))
    highest = cycle_date + pd.Timedelta(days=round(plausible.years_after_cycle * 365.2425))
    values = pd.Series(day.value)
    mark(day.take((values < lowest).to_numpy() | (day.outside < 0)), "date_before_window")
    mark(day.take((values >= highest).to_numpy() | (day.outside > 0)), "date_after_window")
    history = free & (ordinals < cycle_ord) & has_date
    if history.any():
        first_ord = first_period
        if first_period is None:  # the history's lines per period, counted per distinct date cell
            periods, counts = day.period_counts(cell_ordinals, history)
            first_ord = trusted_extent(periods, gap, trim_end=False, counts=counts)[0]
        mark(history & (ordinals < first_ord), "isolated_date")
    mark(has_date & (ordinals >= cycle_ord), "on_or_after_cycle_date")
    ok = free
    ordinals[~ok] = np.iinfo(np.int32).max  # in place (this function's own): a rejected line's period is no period
    if starts is None:  # no runs: each used line a run of its own, a code per line
        run_start = np.flatnonzero(ok)
        run_length = run_used = np.ones(len(run_start), dtype=np.int64)
        leaf_of_run = pd.factorize(run_code[ok])[0].astype(np.int64)
    else:  # numbered by first appearance among the used lines = among the runs holding one, coded per run
        per_run = np.add.reduceat(ok, starts, dtype=np.int64) if len(starts) else np.zeros(0, dtype=np.int64)
        used_runs = np.flatnonzero(per_run)
        leaf_of_run = pd.factorize(run_code[used_runs])[0].astype(np.int64)
        run_start, run_length, run_used = starts[used_runs], lengths[used_runs], per_run[used_runs]
    first_used = run_start[first_appearances(leaf_of_run)]  # each leaf's first run: its first used line
    for i in np.flatnonzero(~ok[first_used]).tolist():  # a run whose first lines were rejected (rare)
        first_used[i] += int(np.argmax(ok[first_used[i] :]))
    leaves = raw.iloc[first_used][LEAF].reset_index(drop=True) if len(first_used) else raw[LEAF].iloc[0:0]
    whole = len(raw) >= 1024 and all(raw[c].dtype == object for c in LEAF)  # `_key_runs` = `leaf_runs(raw)`'s runs
    raw_runs = (None if starts is None or keyed.isna().any().any() else (starts, keyed)) if whole else RUNS_UNSEEN
    used = UsedLines(leaves.reset_index(drop=True), ordinals, qty_code, qty_values, ok, run_start, run_length,
                     run_used, leaf_of_run, raw_runs)
    rejected = raw.loc[~ok].drop(columns=["read_error"], errors="ignore").copy()
    rejected["reason"] = np.array([None, *reasons], dtype=object)[reason[~ok]]
    return used, rejected.reset_index(drop=True), cycle_date


def _key_runs(raw: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray | None]:
    """(key cells to code, run starts): the leaf key columns of the first line of each run of lines sharing
    their key objects and the runs' first lines, when the runs are few (at most 1/RUNS_SHARE of the lines);
    else the lines themselves and None. Cells of one object are one text, so a rule judged per run is the
    rule judged per line."""
    columns = [raw[c].to_numpy() for c in LEAF]
    if len(raw) >= 1024 and all(values.dtype == object for values in columns):  # 1024: as `raw_runs` above
        starts = run_starts(columns)
        if len(starts) * RUNS_SHARE <= len(raw):
            return pd.DataFrame({c: v[starts] for c, v in zip(LEAF, columns, strict=True)}), starts
    return raw, None  # the lines' own columns (not copied)


def _repeated_in_earlier_file(
    raw: pd.DataFrame, line_code, same_value: tuple[np.ndarray, np.ndarray, np.ndarray],
    candidate: np.ndarray,
) -> np.ndarray:
    """True for a line whose keys, date and quantity (parsed) are those of a line of an earlier file.

    Files come in the order they were read (sorted by name); repeats inside one
    file are separate shipments and stay. Only `candidate` lines are compared;
    `line_code(rows)` (the key code of those lines) is equal exactly where two
    lines' keys are, `same_value` (date code per line; quantity cell per line
    and the code of each cell's parsed quantity) exactly where their parsed
    date and quantity are.
    """
    out = np.zeros(len(raw), dtype=bool)
    if "source_file" not in raw.columns or not candidate.any():
        return out
    file_code, files = codes_of(raw["source_file"])
    if len(files) < 2:  # as `nunique`: a missing file name is not a file
        return out
    # a repeat has the date of a line of an earlier file: only the candidate lines of such dates are grouped,
    # the dates two file codes or more hold (a missing file name, code -1, is one: the earliest)
    day = same_value[0]
    n_days, slots = int(day.max(initial=0)) + 1, len(files) + 1
    if slots * n_days <= 4 * len(raw) + 1_000_000:  # a file x date table of counts, a spare cell for the others
        cell = file_code + 1  # (file_code + 1) * n_days + day, or the spare cell: one array, made in place
        cell *= n_days
        cell += day
        cell[~candidate] = slots * n_days
        held = np.bincount(cell, minlength=slots * n_days + 1)[:-1].reshape(slots, n_days) > 0
        shared_day = held.sum(axis=0) > 1
        at = np.flatnonzero(candidate & shared_day[day])
    else:
        at = np.flatnonzero(candidate)
        earliest = np.full(n_days, np.iinfo(np.int64).max, dtype=np.int64)
        np.minimum.at(earliest, day[at], file_code[at])
        shared_day = np.zeros(n_days, dtype=bool)
        shared_day[day[at][file_code[at] > earliest[day[at]]]] = True
        at = at[shared_day[day[at]]]
    if not len(at):
        return out
    parts = [line_code(at), same_value[0][at], same_value[2][same_value[1][at]]]
    file = file_code[at]
    group = pack_codes(parts, [int(part.max()) + 1 for part in parts])
    if group is not None:
        group = pd.factorize(group)[0]
    else:
        group = pd.DataFrame(dict(enumerate(parts))).groupby([0, 1, 2], sort=False).ngroup().to_numpy()
    first = np.full(int(group.max()) + 1, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(first, group, file)  # each group's earliest file (files numbered in the order read)
    out[at[file > first[group]]] = True
    return out


def _read_errors(cells: pd.Series):
    """(reason, mask of lines) per distinct reader error (the cell as text, `astype(str)`; blank: none)."""
    code, distinct = codes_of(cells)
    text = pd.Series(distinct, dtype=object).astype(str).to_numpy(dtype=object)
    missing = np.flatnonzero(code < 0)  # a missing cell as text ("None", "nan"), read alone
    missing_text = cells.iloc[missing].astype(str).to_numpy(dtype=object)
    for why in pd.unique(np.concatenate([text, missing_text])):
        if why != "":
            mask = np.isin(code, np.flatnonzero(text == why))
            mask[missing[missing_text == why]] = True
            yield why, mask


def _joint_leaf_codes(key_codes: dict, spans: pd.DataFrame) -> tuple[np.ndarray, np.ndarray] | None:
    """`keys.joint_codes(raw, spans, LEAF)` from the lines' coded key columns (`key_codes`: codes and distinct
    cells of each column): each column's distinct cells coded together with the spans' cells."""
    lines, of_spans, sizes = [], [], []
    for c in LEAF:
        k, cells = key_codes[c]
        both, u = pd.factorize(pd.concat([pd.Series(cells, dtype=object), spans[c]], ignore_index=True),
                               use_na_sentinel=False)
        lines.append(both[: len(cells)][k])
        of_spans.append(both[len(cells) :])
        sizes.append(len(u))
    combined = pack_codes(lines, sizes)
    return None if combined is None else (combined, pack_codes(of_spans, sizes))


def sorted_corrections(pieces: list[pd.DataFrame], leaves: pd.DataFrame, first_ord: int, period: str) -> pd.DataFrame:
    """The correction rows of `correction_rows` with their keys and period, sorted by key.

    The sort is stable on the key only: the rules of one period stay in the order they ran.
    """
    empty = np.zeros((0, 0))
    corr = pd.concat(pieces or [correction_rows(empty.astype(bool), empty, empty, "hampel_cap", {})], ignore_index=True)
    corr = pd.concat([leaves.iloc[corr.pop("leaf").to_numpy()].reset_index(drop=True), corr], axis=1)
    corr.insert(3, "period_start", ordinal_to_start(corr.pop("col").to_numpy() + first_ord, period))
    return corr.sort_values(LEAF + ["period_start"], kind="stable").reset_index(drop=True)


def correction_rows(
    mask: np.ndarray,
    before: np.ndarray,
    after: np.ndarray,
    rule: str,
    params: dict,
    leaf_index: np.ndarray | None = None,
    figures: dict[str, np.ndarray] | None = None,
    adjusted: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per True cell of `mask`: before, after, delta and the parameters as JSON.

    `leaf_index` maps the rows of `mask` to leaf codes (default: the identity);
    `figures` are per-cell numbers added to each row's parameters (NaN left out);
    `adjusted` per row of `mask` says whether the series was seasonally adjusted.
    """
    i, j = np.nonzero(mask)
    b, a = before[i, j], after[i, j]
    if figures or adjusted is not None:
        picked = {k: v[i, j] for k, v in (figures or {}).items()}
        parameters = _parameter_texts(params, picked, None if adjusted is None else adjusted[i])
    else:
        parameters = json.dumps(params)
    leaf = i if leaf_index is None else np.asarray(leaf_index)[i]
    return pd.DataFrame(
        {"leaf": leaf, "col": j, "rule": rule, "before": b, "after": a, "delta": a - b, "parameters": parameters}
    )


def _parameter_texts(params: dict, picked: dict[str, np.ndarray], adjusted: np.ndarray | None) -> list[str]:
    """Per row: `json.dumps(params | figures | {"seasonal_adjusted": ...})`, the figures rounded to 6 places and
    NaN ones left out. Written a column at a time: json.dumps writes a float as its `repr`, a bool as true/false,
    and `params` (the rule's) comes first, so the text is the same; a key of `picked` also in `params`, or an
    infinite figure, is left to json.dumps row by row."""
    n = len(next(iter(picked.values()))) if picked else 0 if adjusted is None else len(adjusted)
    if set(picked) & set(params) or "seasonal_adjusted" in params or any(np.isinf(v).any() for v in picked.values()):
        extra = [{k: round(float(v[r]), 6) for k, v in picked.items() if not np.isnan(v[r])} for r in range(n)]
        if adjusted is not None:
            for r, e in enumerate(extra):
                e["seasonal_adjusted"] = bool(adjusted[r])
        return [json.dumps(params | e) for e in extra]
    head = json.dumps(params)[:-1]  # without its closing brace
    members = []  # per member: its text per row, ", " first ("" where the figure is NaN)
    for k, v in picked.items():
        has = ~np.isnan(v)
        name = ", " + json.dumps(k) + ": "
        # each distinct figure written once (distinct by its bits: 0.0 and -0.0 are written apart)
        bits, at = np.unique(np.ascontiguousarray(v[has], dtype=np.float64).view(np.int64), return_inverse=True)
        written = np.array([name + repr(round(float(x), 6)) for x in bits.view(np.float64)], dtype=object)
        if has.all():
            members.append(written[at])
        else:
            column = np.full(n, "", dtype=object)
            column[has] = written[at]
            members.append(column)
    if adjusted is not None:
        flags = np.array([', "seasonal_adjusted": false', ', "seasonal_adjusted": true'], dtype=object)
        members.append(flags[np.asarray(adjusted, dtype=bool).astype(np.intp)])
    if not members:
        return [head + "}"] * n
    skip = 0 if params else 2  # no parameters: the first member written goes without its ", "
    return [head + "".join(row)[skip:] + "}" for row in zip(*members, strict=True)]  # one text per row, made once


def line_accounting(raw_lines: int, cleaned: pd.DataFrame, rejected: pd.DataFrame) -> dict[str, int]:
    """Raw lines against used (summed into cleaned periods) plus rejected lines."""
    used = int(cleaned["lines"].sum())
    return {
        "raw_lines": raw_lines,
        "used_lines": used,
        "rejected_lines": len(rejected),
        "unaccounted": raw_lines - used - len(rejected),
    }


def cycle_calendar(
    cleaned: pd.DataFrame, calendar, cycle_date: pd.Timestamp, first_period: int | None = None
) -> pd.DataFrame:
    """One row describing the cycle: its date, period kind, horizon and history range (`calendar`: the config's;
    `first_period`: a shard's class's first trusted period, which starts the history range in place of its own)."""
    period = calendar.period
    horizon = horizon_starts(cycle_date, calendar.horizon, period)
    start = cleaned["period_start"].min() if len(cleaned) else pd.NaT
    if first_period is not None:
        start = ordinal_to_start(np.array([first_period]), period)[0]
    periods = (
        int(
            period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0]
            - period_ordinal(pd.DatetimeIndex([start]), period)[0]
        )
        if pd.notna(start)
        else 0
    )
    return pd.DataFrame(
        {
            "cycle_date": [cycle_date],
            "period": [period],
            "horizon": [calendar.horizon],
            "horizon_end": [horizon[-1]],
            "history_start": [start],
            "history_periods": [periods],
        }
    )
