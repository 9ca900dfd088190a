"""Per-bin sums the database has already made, kept so that the event analysis, which reads
the same four days of a zone's air every few minutes, asks the database only for what changed.

A window holds whole bins (k covers [k bin_s, (k + 1) bin_s)) as the database summed them:
a bin is known from the query that returned it (empty bins included) until a write may have
touched it. Readings forgets a bin on every insert into it, and every window when anything
else may have changed the rows (a rollback, retention, another connection's commit), so a
cached answer is the database's answer. (The service's own connection writes readings only
through Readings; a write to reading_rows beside it on that connection would not be seen.)
"""

from __future__ import annotations

import numpy as np

#: (bin numbers, sums, counts) of the bins holding readings, in bin order.
BinArrays = tuple[np.ndarray, np.ndarray, np.ndarray]


def as_arrays(rows: list[tuple]) -> BinArrays:
    """A query's (k, sum, count) rows as BinArrays."""
    if not rows:
        return np.empty(0, dtype=np.int64), np.empty(0), np.empty(0, dtype=np.int64)
    k, sums, counts = zip(*rows)
    return np.array(k, dtype=np.int64), np.array(sums, dtype=float), np.array(counts, dtype=np.int64)


class BinWindow:
    """Known bins among the `size` bins before the newest asked for."""

    def __init__(self, size: int):
        self.size = size
        self.k0: int | None = None
        self.sums = np.zeros(size)
        self.counts = np.zeros(size, dtype=np.int64)
        self.known = np.zeros(size, dtype=bool)

    def slide(self, k_end: int) -> None:
        """Make the window end at bin k_end (exclusive) if that is later; older bins go."""
        if self.k0 is None or k_end - self.size >= self.k0 + self.size:
            self.k0 = k_end - self.size
            self.known[:] = False
            return
        shift = k_end - self.size - self.k0
        if shift <= 0:
            return
        for a in (self.sums, self.counts, self.known):
            a[:-shift] = a[shift:]
        self.known[-shift:] = False
        self.k0 += shift

    def forget(self, k: int) -> None:
        if self.k0 is not None and 0 <= k - self.k0 < self.size:
            self.known[k - self.k0] = False

    def first_unknown(self, k_lo: int, k_hi: int) -> int:
        """The first bin in [k_lo, k_hi) not known (k_lo when it lies before the window)."""
        if self.k0 is None or k_lo < self.k0 or k_hi > self.k0 + self.size:
            return k_lo
        gaps = np.flatnonzero(~self.known[k_lo - self.k0 : k_hi - self.k0])
        return k_lo + int(gaps[0]) if gaps.size else k_hi

    def store(self, rows: list[tuple], k_lo: int, k_hi: int) -> None:
        """Remember bins [k_lo, k_hi) from a query that covered all of them (rows: (k, sum,
        count) of the bins holding readings; the others are empty)."""
        if self.k0 is None:
            return
        lo, hi = max(k_lo, self.k0), min(k_hi, self.k0 + self.size)
        if lo >= hi:
            return
        self.sums[lo - self.k0 : hi - self.k0] = 0.0
        self.counts[lo - self.k0 : hi - self.k0] = 0
        for k, s, n in rows:
            if lo <= k < hi:
                self.sums[k - self.k0], self.counts[k - self.k0] = s, n
        self.known[lo - self.k0 : hi - self.k0] = True

    def arrays(self, k_lo: int, k_hi: int) -> BinArrays:
        """The known bins [k_lo, k_hi) that hold readings, as the database gave them."""
        i = np.arange(k_lo - self.k0, k_hi - self.k0)
        i = i[self.counts[i] > 0]
        return i + self.k0, self.sums[i], self.counts[i]
