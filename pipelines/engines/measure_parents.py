"""A measure's children grouped by parent: sums of (children x horizon) cells per parent, parent rows per child."""

from __future__ import annotations

import numpy as np


def parent_sum(cells: np.ndarray, parent_of_child: np.ndarray, n_parents: int) -> np.ndarray:
    """(n_parents, H) sums of the (n, H) cells per parent (`Parents.sum`)."""
    return Parents(parent_of_child, n_parents).sum(cells)


class Parents:
    """The children's parents: sums of (n, H) cells per parent, and per-parent (n_parents, H) values spread
    back to the children (`x[parent_of_child]`).

    Children sorted by parent (as `plan_measures` keeps them) are summed block by block with `np.add.reduceat`,
    several times faster than `np.add.at`, and spread by repeating each parent's row over its children.
    """

    def __init__(self, parent_of_child: np.ndarray, n_parents: int):
        self.code, self.n = parent_of_child, n_parents
        step = np.diff(parent_of_child)
        self.sorted = bool(len(parent_of_child)) and bool((step >= 0).all())
        if self.sorted:
            self.first = np.flatnonzero(np.r_[True, step > 0])
            self.counts = np.bincount(parent_of_child, minlength=n_parents)

    def sum(self, cells: np.ndarray) -> np.ndarray:
        """(n_parents, H) float sums; a bool matrix is counted as 0/1 floats (cast as it is read, no float copy)."""
        cells = np.asarray(cells)
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
