"""Rules 2-6 of the cleansing in one compiled pass per leaf row (numba), for a large history.

`cleansing_blocks` runs the rules on dense leaf x period matrices of a block of
leaves, one numpy pass per rule, and gathers the kept cells at the end. For a
class matrix larger than one numpy chunk the outlier judgement is already a
compiled pass per row (`rolling_order.judge_rows`). Here the whole row is: a
leaf's lines are summed into its periods (in the order they were read, as
`np.bincount` sums them), its fill range kept, a negative net set to zero, its
shortage periods flagged from its parent's, the class's Hampel or Tukey rule
judged (`rolling_order._sweep_row` and `judge_cell`, as `judge_rows` does) and its kept
cells written straight into the output columns, the period start included. No
dense matrix, no mask and no index of the kept cells is made; the correction
rows leave as a few short arrays, their figures and texts made by
`cleansing.correction_rows`' arithmetic at the corrected cells only.

It takes the classes judged without seasonal adjustment under the shortage
rule `exclude` (`takes`); the rest stays on the block path. Both paths give the
same tables bit for bit (`tests/test_cleansing_rows.py`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit

from pipelines.engines.cleansing import _parameter_texts
from pipelines.engines.outliers import MAD_SCALE, rule_parameters, tukey_fences
from pipelines.engines.rolling_order import _sweep_hampel, _sweep_row, judge_cell

NEGATIVE, OUTLIER = 0, 1  # the rule of a correction row: negative net to zero, the class's outlier cap


@njit(cache=True)
def clean_rows(
    leaf_runs, run_start, run_length, used, line_ordinal, first_ord, qty_code, qty_values, t, start, end,
    parent, short_by_parent, rule_of_leaf, kinds, windows, scales, both,
    to_median, period_ns, out_period, out_qty, out_raw, out_lines, out_filled, out_corrected, out_short, at,
    kept, flagged, corr_leaf, corr_col, corr_rule, corr_before, corr_after, corr_stats, leaf_offset,
):
    """Rules 2-6 on the leaves of one block, each in one pass over its row.

    Leaf r of the block (global code leaf_offset + r) has the runs leaf_runs[r] .. leaf_runs[r + 1] - 1 of
    lines (`run_start`, `run_length`: raw lines, of which the `used` ones count, in the order read; grid
    column line_ordinal - first_ord, quantity qty_values[qty_code]), its fill range start[r] .. end[r], its
    parent's row of `short_by_parent` and the outlier rule rule_of_leaf[r] (an index into kinds / windows /
    scales / both / to_median; kind -1: no rule, 0: Hampel with scale k * 1.4826, 1: Tukey with the fence as
    scale). Its kept cells are written from `at` on into the out_ columns (period_start as int64 ns from
    `period_ns`); kept[r] counts them, `flagged` counts the children flagged per parent and column.
    Correction rows go to the corr_ arrays (rule NEGATIVE or OUTLIER, before, after, and for OUTLIER the
    window statistics: Hampel median and MAD, Tukey Q1, median and Q3). Returns (cells written, correction
    rows written)."""
    n_rows = len(leaf_runs) - 1
    net = np.zeros(t)
    count = np.zeros(t, dtype=np.int64)
    x = np.empty(t)
    judged = np.empty(t)
    short = np.zeros(t, dtype=np.bool_)
    fixed = np.zeros(t, dtype=np.bool_)
    first = np.empty(t)
    second = np.empty(t)
    third = np.empty(t)
    largest = 1
    for w in windows:
        largest = max(largest, w)
    buf = np.empty(largest)
    dev = np.empty(largest)
    k = 0
    for r in range(n_rows):
        net[:] = 0.0
        count[:] = 0
        for j in range(leaf_runs[r], leaf_runs[r + 1]):  # summed in the order read, as np.bincount does
            lo = run_start[j]
            for i in range(lo, lo + run_length[j]):
                if used[i]:
                    c = line_ordinal[i] - first_ord
                    net[c] += qty_values[qty_code[i]]
                    count[c] += 1
        p = parent[r]
        for c in range(t):
            keep = count[c] > 0 or (c >= start[r] and c <= end[r])
            fixed[c] = False
            short[c] = keep and short_by_parent[p, c]
            if short[c]:
                flagged[p, c] += 1
            if not keep:
                x[c] = np.nan
            elif count[c] > 0 and net[c] < 0:
                corr_leaf[k] = leaf_offset + r
                corr_col[k] = c
                corr_rule[k] = NEGATIVE
                corr_before[k] = net[c]
                corr_after[k] = 0.0
                k += 1
                x[c] = 0.0
                fixed[c] = True
            else:
                x[c] = net[c]
        rule = rule_of_leaf[r]
        kind = kinds[rule]
        if kind >= 0:  # judged on x - 0.0, NaN where skipped (a shortage) or not kept: `judge_rows`' arithmetic
            for c in range(t):
                judged[c] = np.nan if short[c] else x[c] - 0.0
            scale = scales[rule]
            if kind == 0 and scale >= 0:  # the MAD only where a value can be flagged
                _sweep_hampel(judged, windows[rule], both[rule], buf, dev, first, second)
            else:
                _sweep_row(judged, windows[rule], kind, buf, dev, first, second, third)
            for c in range(t):
                v = judged[c]
                if np.isnan(v):
                    continue
                hit, after = judge_cell(v, 0.0, kind, scale, both[rule], to_median[rule], first[c], second[c],
                                        third[c])
                if hit:
                    corr_leaf[k] = leaf_offset + r
                    corr_col[k] = c
                    corr_rule[k] = OUTLIER
                    corr_before[k] = x[c]
                    corr_after[k] = after
                    corr_stats[k, 0] = first[c]
                    corr_stats[k, 1] = second[c]
                    corr_stats[k, 2] = third[c]
                    k += 1
                    x[c] = after
                    fixed[c] = True
        n = 0
        for c in range(t):
            if count[c] > 0 or (c >= start[r] and c <= end[r]):
                out_period[at] = period_ns[c]
                out_qty[at] = x[c]
                out_raw[at] = net[c]
                out_lines[at] = count[c]
                out_filled[at] = count[c] == 0
                out_corrected[at] = fixed[c]
                out_short[at] = short[c]
                at += 1
                n += 1
        kept[r] = n
    return at, k


def takes(leaf_class: np.ndarray, settings) -> bool:
    """Whether every class of `leaf_class` is one this pass cleans: the shortage rule `exclude`, and each
    class's outlier rule Hampel, Tukey or none, judged without seasonal adjustment."""
    if settings.cleansing.shortages != "exclude":
        return False
    for name in pd.unique(leaf_class):
        pc = settings.product_class(name)
        rule = pc.outlier_rule(settings.cleansing)
        if rule.rule not in ("hampel", "tukey", "none") or (rule.seasonal_adjust == "auto" and pc.models.seasonal):
            return False
    return True


def class_rules(leaf_class: np.ndarray, settings):
    """(the classes in sorted order, their rules, the rule index per leaf and the kernel's rule arrays)."""
    names = sorted(pd.unique(leaf_class))
    rules = [settings.product_class(name).outlier_rule(settings.cleansing) for name in names]
    rule_of_leaf = np.searchsorted(np.array(names, dtype=object), leaf_class).astype(np.int64)
    kinds = np.array([{"hampel": 0, "tukey": 1}.get(r.rule, -1) for r in rules], dtype=np.int64)
    windows = np.array([int(r.window) for r in rules], dtype=np.int64)
    scales = np.array([r.k * MAD_SCALE if r.rule == "hampel" else float(r.fence) for r in rules])
    both = np.array([r.sides == "both" for r in rules])
    to_median = np.array([r.replace_with == "median" for r in rules])
    return names, rules, rule_of_leaf, (kinds, windows, scales, both, to_median)


def correction_frame(leaf, col, rule_code, before, after, stats, rule_of_leaf, names, rules) -> pd.DataFrame:
    """The correction rows of `clean_rows` as `cleansing.correction_rows` writes them: the negative nets, then
    each class's outlier caps, their parameters as JSON (figures rounded to 6 places, `seasonal_adjusted`)."""
    pieces = []
    negative = np.flatnonzero(rule_code == NEGATIVE)
    columns = ("leaf", "col", "rule", "before", "after", "delta", "parameters")

    def piece(rows, rule_name, parameters):
        b, a = before[rows], after[rows]
        values = (leaf[rows], col[rows].astype(np.int64), rule_name, b, a, a - b, parameters)
        return pd.DataFrame(dict(zip(columns, values, strict=True)))

    if len(negative):
        pieces.append(piece(negative, "negative_net_to_zero", '{"rule": "net_then_zero"}'))
    outlier = rule_code == OUTLIER
    leaf_rule = rule_of_leaf[leaf]
    for index, rule in enumerate(rules):
        rows = np.flatnonzero(outlier & (leaf_rule == index))
        if not len(rows) or rule.rule not in ("hampel", "tukey"):
            continue
        one, two, three = stats[rows, 0], stats[rows, 1], stats[rows, 2]
        if rule.rule == "hampel":
            figures = {"median": one, "limit_scale": rule.k * MAD_SCALE * two}
        else:
            lower, upper = tukey_fences(one, three, rule.fence)
            figures = {"q1": one, "median": two, "q3": three, "lower": lower, "upper": upper}
        texts = _parameter_texts(rule_parameters(rule), figures, np.zeros(len(rows), dtype=bool))
        pieces.append(piece(rows, f"{rule.rule}_cap", texts))
    return pieces


def clean_leaf_rows(used, first_ord: int, grid, settings, out, block_cells: int) -> None:
    """`cleansing_blocks.clean_blocks` by `clean_rows`, a block of leaves at a time (the correction rows' buffers
    bounded by the block): the kept cells into `out`'s columns, the correction rows and figures into `out`."""
    n, t = len(grid.start), grid.t
    names, rules, rule_of_leaf, rule_arrays = class_rules(grid.leaf_class, settings)
    step = max(1, block_cells // max(t, 1))
    size = min(n, step) * t
    found = [np.empty(2 * size, dtype=dtype) for dtype in (np.int64, np.int32, np.int8, np.float64, np.float64)]
    stats = np.empty((2 * size, 3))
    flagged = np.zeros(grid.short_by_parent.shape, dtype=np.int64)
    cells = out.columns
    parts = [[] for _ in range(6)]
    period_ns = np.ascontiguousarray(grid.period_ns, dtype=np.int64)
    outputs = [cells["period_start"].view(np.int64)] + [
        cells[c] for c in ("quantity", "raw_quantity", "lines", "filled", "corrected", "shortage")
    ]
    order = np.argsort(used.leaf_of_run, kind="stable")  # the runs grouped by leaf, each leaf's in the order read
    run_start, run_length = used.run_start[order], used.run_length[order]
    leaf_runs = np.searchsorted(used.leaf_of_run[order], np.arange(n + 1))
    lines = (run_start, run_length, used.used, used.line_ordinal, np.int32(first_ord), used.qty_code, used.qty_values)
    for a in range(0, n, step):  # a loop over blocks of leaves, not over series
        b = min(n, a + step)
        out.size, k = clean_rows(
            leaf_runs[a : b + 1], *lines, t, grid.start[a:b], grid.end[a:b], grid.parent[a:b], grid.short_by_parent,
            rule_of_leaf[a:b], *rule_arrays, period_ns, *outputs, out.size, out.kept[a:b], flagged, *found, stats, a,
        )
        for part, values in zip(parts, [*found, stats], strict=True):
            part.append(values[:k].copy())
    leaf, col, code, before, after, figures = (np.concatenate(p) for p in parts)
    out.corrections.extend(correction_frame(leaf, col, code, before, after, figures, rule_of_leaf, names, rules))
    for name in names:
        out.seasonal_series[name] = 0
    out.flagged = flagged
