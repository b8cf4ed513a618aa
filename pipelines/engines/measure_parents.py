"""A measure's children grouped by parent: sums of (children x horizon) cells per parent, parent rows per child."""

from __future__ import annotations

import numpy as np
from numba import njit

PAIRWISE_BLOCK = 128  # numpy's PW_BLOCKSIZE: pairwise summation splits blocks above it


def parent_sum(cells: np.ndarray, parent_of_child: np.ndarray, n_parents: int) -> np.ndarray:
    """(n_parents, H) sums of the (n, H) cells per parent (`Parents.sum`)."""
    return Parents(parent_of_child, n_parents).sum(cells)


class Parents:
    """The children's parents: sums of (n, H) cells per parent, and per-parent (n_parents, H) values spread
    back to the children (`x[parent_of_child]`).

    Children sorted by parent (as `plan_measures` keeps them) are summed block by block by a compiled pass
    (`block_sums`) that adds in `np.add.reduceat`'s order, so the same sums to the bit without reduceat's
    strided walk, and spread by repeating each parent's row over its children.
    """

    def __init__(self, parent_of_child: np.ndarray, n_parents: int):
        self.code, self.n = parent_of_child, n_parents
        step = np.diff(parent_of_child)
        self.sorted = bool(len(parent_of_child)) and bool((step >= 0).all())
        if self.sorted:
            self.first = np.flatnonzero(np.r_[True, step > 0])
            self.counts = np.bincount(parent_of_child, minlength=n_parents)

    def sum(self, cells: np.ndarray) -> np.ndarray:
        """(n_parents, H) float sums; a bool matrix is counted as 0/1 floats (read as it is, no float copy)."""
        cells = np.asarray(cells)
        if self.sorted and cells.ndim == 2 and cells.dtype in (np.float64, np.bool_):
            return block_sums(np.ascontiguousarray(cells), self.first, self.code[self.first], self.n)
        out = np.zeros((self.n, cells.shape[1]))
        if self.sorted:
            kind = None if cells.dtype == np.float64 else float
            out[self.code[self.first]] = np.add.reduceat(cells, self.first, axis=0, dtype=kind)
            return out
        np.add.at(out, self.code, np.asarray(cells, dtype=float))
        return out

    def spread(self, values: np.ndarray) -> np.ndarray:
        """(n, ...) each child's row of the per-parent `values` (n_parents, ...)."""
        return np.repeat(values, self.counts, axis=0) if self.sorted else values[self.code]


@njit(cache=True)
def block_sums(cells, first, block_parent, n_parents):
    """(n_parents, H): row block_parent[b] holds the column sums of the rows first[b] .. first[b + 1] - 1 (the
    last block to the end), 0.0 for a parent without a block; each in `np.add.reduceat(cells, first, axis=0)`'s
    order: the block's first row plus numpy's pairwise sum (`_pairwise`) of the rows after it."""
    n, h = cells.shape
    out = np.zeros((n_parents, h))
    column = np.empty(n)
    for b in range(len(first)):
        lo = first[b]
        hi = first[b + 1] if b + 1 < len(first) else n
        p = block_parent[b]
        for t in range(h):
            for i in range(lo + 1, hi):
                column[i - lo - 1] = cells[i, t]
            out[p, t] = cells[lo, t] + _pairwise(column, 0, hi - lo - 1)
    return out


@njit(cache=True)
def _pairwise(a, lo, n):
    """numpy's pairwise sum of a[lo:lo + n] (its `pairwise_sum`, the order `np.add.reduce` adds floats in): a
    stretch of up to PAIRWISE_BLOCK values as `_block` adds it; a longer one as its two halves (the first a
    multiple of 8 long) summed apart, then added; worked with a stack (no recursion in a cached kernel)."""
    if n <= PAIRWISE_BLOCK:
        return _block(a, lo, n)
    todo_lo = np.empty(192, dtype=np.int64)
    todo_n = np.empty(192, dtype=np.int64)
    todo_join = np.empty(192, dtype=np.bool_)
    values = np.empty(96)
    top, held = 0, 0
    todo_lo[0], todo_n[0], todo_join[0] = lo, n, False
    top = 1
    while top:
        top -= 1
        at, m, join = todo_lo[top], todo_n[top], todo_join[top]
        if join:  # both halves done: left below right
            held -= 1
            values[held - 1] = values[held - 1] + values[held]
        elif m <= PAIRWISE_BLOCK:
            values[held] = _block(a, at, m)
            held += 1
        else:
            half = m // 2
            half -= half % 8
            todo_lo[top], todo_n[top], todo_join[top] = at, m, True
            todo_lo[top + 1], todo_n[top + 1], todo_join[top + 1] = at + half, m - half, False
            todo_lo[top + 2], todo_n[top + 2], todo_join[top + 2] = at, half, False
            top += 3
    return values[0]


@njit(cache=True)
def _block(a, lo, n):
    """numpy's pairwise sum of at most PAIRWISE_BLOCK values: below 8 one after the other from -0.0, else eight
    running sums added as a tree, then the rest one after the other."""
    if n < 8:
        res = -0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = 8
    while i < n - n % 8:
        j = lo + i
        r0 += a[j]
        r1 += a[j + 1]
        r2 += a[j + 2]
        r3 += a[j + 3]
        r4 += a[j + 4]
        r5 += a[j + 5]
        r6 += a[j + 6]
        r7 += a[j + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[lo + i]
        i += 1
    return res
