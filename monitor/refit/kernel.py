"""Compiled bucket sums of the full refit: one pass over the decisions as they stream
out of DuckDB, accumulating every (decision-maker, day) bucket's shifted sums.

The full refit used to let DuckDB form the 78 + 91 products of every row in SQL
(``buckets.full_sql``), write them, and read them back.  Here the rows come out as Arrow
record batches (zero copy into numpy), and ``_accumulate`` - compiled by numba, cached
on disk (``cache=True``) - adds each row's shifted values and the upper triangle of
their products to its bucket's two sets (``StatLayout``: all rows; outcome-linked rows)
in registers, one pass, no sort.

Reference (shift) of a decision-maker: the medians of their first ``SHIFT_ROWS`` rows
in the stream (every cue column and the judgment; each cut to 20 significant bits as in
``buckets.shift_select``), and for the criterion the median of every stored outcome.
Rows are held back in a small per-decision-maker buffer until the reference is known,
then summed.  A median of a few hundred rows is as robust to one absurd value as the
median of all of them, and any reference near the data keeps the digits
(``buckets`` module docstring); computing exact medians over every row in SQL took
longer (1.4 s at 5M rows) than all the sums.

``buckets.full_sql`` stays the reference implementation (tests compare the two).  A
nightly refit sums the buckets a correction leaves again with this kernel too, around
the stored references (``known_shift``; ``full.resum_buckets``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

# Rows per decision-maker whose medians make the reference (odd: a true middle value).
SHIFT_ROWS = 255
# Bucket rows allocated before the first batch (grown by doubling beyond).
MAX_START_BUCKETS = 1 << 20
# 2^33 + 1: Veltkamp's split, as ``buckets._SPLIT``.
_SPLIT = 8589934593.0


@njit(cache=True)
def _cut(m):
    a = m * _SPLIT
    return a - (a - m)


@njit(cache=True, inline="always")
def _add_row(acc, b, vals, crit, sh, p, half, u):
    """Add one row (shifted values ``vals - sh``, criterion ``crit``: NaN when the row
    has no current outcome) to bucket row ``b`` of ``acc``: to its first half when the
    row has no outcome (the criterion's entries stay 0), else to its second half with
    the criterion.  ``u`` (p,) is scratch.  (The all-rows set is the sum of the two
    halves, ``BucketAccumulator.result``: a row with an outcome is multiplied out once,
    not once per set.)"""
    for i in range(p - 1):
        u[i] = vals[i] - sh[i]
    q = p - 1  # variables of the row: the criterion too when it has one
    if crit == crit:
        u[p - 1] = crit - sh[p - 1]
        q = p
        row = acc[b, half:]
    else:
        row = acc[b, :half]
    # Slices and loop counters from range(): indices LLVM knows are not negative, so
    # it drops numba's wrap-around test and vectorises the inner loops (1.6x faster).
    row[0] += 1.0
    at = 1 + p
    for i in range(q):
        row[1 + i] += u[i]
        ui = u[i]
        seg = row[at : at + q - i]
        tail = u[i:q]
        for j in range(q - i):
            seg[j] += ui * tail[j]
        at += p - i


@njit(cache=True, inline="always")
def _bucket_of(e, d, bmap, span, d0, b_ent, b_day, b_team, nb):
    key = e * span + (d - d0)
    b = bmap[key]
    if b < 0:
        b = nb[0]
        bmap[key] = b
        b_ent[b] = e
        b_day[b] = d
        b_team[b, 0] = -1
        b_team[b, 1] = -1
        nb[0] += 1
    return b


@njit(cache=True)
def _settle(e, shift, has_shift, crit_shift, buf_v, buf_c, buf_day, buf_team, buf_n, acc,
            bmap, span, d0, b_ent, b_day, b_team, nb, p, half):  # fmt: skip
    """Fix decision-maker ``e``'s reference from their buffered rows, then sum those."""
    n = buf_n[e]
    for i in range(p - 1):
        shift[e, i] = _cut(np.median(buf_v[e, :n, i].copy()))
    shift[e, p - 1] = crit_shift
    has_shift[e] = True
    u = np.empty(p)
    for r in range(n):
        b = _bucket_of(e, buf_day[e, r], bmap, span, d0, b_ent, b_day, b_team, nb)
        t = buf_team[e, r]
        if t > b_team[b, 0]:
            b_team[b, 0] = t
        c = buf_c[e, r]
        if c == c and t > b_team[b, 1]:
            b_team[b, 1] = t
        _add_row(acc, b, buf_v[e, r], c, shift[e], p, half, u)
    buf_n[e] = 0


# Rows gathered from the column arrays into one row-major block at a time.
_BLOCK = 256


@njit(cache=True)
def _accumulate(ent, day, team, cols, crit, start, shift, has_shift, crit_shift, buf_v, buf_c,
                buf_day, buf_team, buf_n, acc, bmap, span, d0, b_ent, b_day, b_team, nb):  # fmt: skip
    """Sum rows ``start..`` of one batch into their buckets.  Returns the number of rows
    done: less than the batch when ``acc`` may run out of rows (the caller grows it and
    calls again from there)."""
    p = len(cols) + 1
    half = acc.shape[1] // 2
    cap = acc.shape[0]
    hold = buf_v.shape[1]
    block = np.empty((_BLOCK, p - 1))
    u = np.empty(p)
    n = len(ent)
    for b0 in range(start, n, _BLOCK):
        b1 = min(b0 + _BLOCK, n)
        # Worst case of the block: every row a new bucket, plus one buffer settled.
        if nb[0] + (b1 - b0) + hold + 1 > cap:
            return b0
        for i in range(p - 1):  # one column at a time: the tuple is indexed once
            col = cols[i]
            for r in range(b0, b1):
                block[r - b0, i] = col[r]
        for r in range(b0, b1):
            e = np.int64(ent[r])
            d = np.int64(day[r])
            t = np.int64(team[r]) - 1
            if not has_shift[e]:
                k = buf_n[e]
                for i in range(p - 1):
                    buf_v[e, k, i] = block[r - b0, i]
                buf_c[e, k] = crit[r]
                buf_day[e, k] = d
                buf_team[e, k] = t
                buf_n[e] = k + 1
                if k + 1 == hold:
                    _settle(e, shift, has_shift, crit_shift, buf_v, buf_c, buf_day, buf_team,
                            buf_n, acc, bmap, span, d0, b_ent, b_day, b_team, nb, p, half)  # fmt: skip
                continue
            b = _bucket_of(e, d, bmap, span, d0, b_ent, b_day, b_team, nb)
            if t > b_team[b, 0]:
                b_team[b, 0] = t
            c = crit[r]
            if c == c and t > b_team[b, 1]:
                b_team[b, 1] = t
            _add_row(acc, b, block[r - b0], c, shift[e], p, half, u)
    return n


@njit(cache=True)
def _finish(shift, has_shift, crit_shift, buf_v, buf_c, buf_day, buf_team, buf_n, acc, bmap,
            span, d0, b_ent, b_day, b_team, nb):  # fmt: skip
    """Settle every decision-maker still holding rows (fewer than ``SHIFT_ROWS``).
    Returns the first not settled (the caller grows ``acc`` and calls again), or -1."""
    p = shift.shape[1]
    half = acc.shape[1] // 2
    hold = buf_v.shape[1]
    for e in range(len(buf_n)):
        if buf_n[e] > 0:
            if nb[0] + hold + 1 > acc.shape[0]:
                return e
            _settle(e, shift, has_shift, crit_shift, buf_v, buf_c, buf_day, buf_team, buf_n,
                    acc, bmap, span, d0, b_ent, b_day, b_team, nb, p, half)  # fmt: skip
    return -1


@njit(cache=True)
def _merge_halves(sums, entries):
    """Add each row's second half (rows with an outcome) to its first (rows without),
    on the entries not about the criterion: the first half becomes the all-rows set."""
    half = sums.shape[1] // 2
    for b in range(sums.shape[0]):
        for k in entries:
            sums[b, k] += sums[b, half + k]


@njit(cache=True)
def _permute_rows(rows, order):
    """rows[:] = rows[order] in place (following the permutation's cycles with one row
    of scratch), so a 200 MB stack is reordered without a second one."""
    done = np.zeros(len(order), dtype=np.bool_)
    tmp = np.empty(rows.shape[1])
    for i in range(len(order)):
        if done[i] or order[i] == i:
            continue
        tmp[:] = rows[i]
        j = i
        while True:
            done[j] = True
            k = order[j]
            if k == i:
                rows[j] = tmp
                break
            rows[j] = rows[k]
            j = k


@dataclass
class BucketSums:
    """The kernel's result: per decision-maker number their reference (``shift``, NaN
    rows for one without rows) and per bucket (``ent``, ``day``; in day, then
    decision-maker order) the team codes of its two sets (-1: none) and ``sums``
    (nb, 2 * set_width): the all-rows set, then the linked set (count 0 when no row
    has an outcome)."""

    shift: np.ndarray
    has_shift: np.ndarray
    ent: np.ndarray
    day: np.ndarray
    team: np.ndarray
    sums: np.ndarray


class BucketAccumulator:
    """Feeds record batches to the compiled kernel and grows its arrays as needed.

    ``n_keys`` decision-makers (numbered 0..), ``p`` = design columns + 2, days in
    [first_day, last_day] (day numbers), ``crit_shift`` the criterion's reference,
    ``max_rows`` at most this many rows will come.  ``known_shift`` (n_keys, p): every
    decision-maker's reference, already stored (a nightly refit's re-sum); then no row
    is held back and ``crit_shift`` is not used."""

    def __init__(
        self,
        n_keys: int,
        p: int,
        first_day: int,
        last_day: int,
        crit_shift: float,
        max_rows: int,
        known_shift: np.ndarray | None = None,
    ):
        width = 1 + p + p * (p + 1) // 2
        self.p = p
        self.d0 = int(first_day)
        self.span = int(last_day) - int(first_day) + 1
        self.crit_shift = float(_cut_py(crit_shift))
        self.shift = np.full((n_keys, p), np.nan)
        self.has_shift = np.zeros(n_keys, dtype=np.bool_)
        hold = SHIFT_ROWS
        if known_shift is not None:
            self.shift = np.array(known_shift, dtype=np.float64).reshape(n_keys, p)
            self.has_shift[:] = True
            hold = 1  # never used: every reference is known
        self.buf_v = np.empty((n_keys, hold, p - 1))
        self.buf_c = np.empty((n_keys, hold))
        self.buf_day = np.empty((n_keys, hold), dtype=np.int64)
        self.buf_team = np.empty((n_keys, hold), dtype=np.int64)
        self.buf_n = np.zeros(n_keys, dtype=np.int64)
        self.bmap = np.full(n_keys * self.span, -1, dtype=np.int64)
        # Room for every bucket there can be, up to MAX_START_BUCKETS (np.zeros: pages
        # not written are not resident), so that it seldom grows.
        cap = min(n_keys * self.span, max_rows, MAX_START_BUCKETS) + 2 * (_BLOCK + hold + 1)
        self.acc = np.zeros((cap, 2 * width))
        self.b_ent = np.empty(cap, dtype=np.int64)
        self.b_day = np.empty(cap, dtype=np.int64)
        self.b_team = np.empty((cap, 2), dtype=np.int64)
        self.nb = np.zeros(1, dtype=np.int64)

    def _grow(self) -> None:
        cap = 2 * self.acc.shape[0]
        acc = np.zeros((cap, self.acc.shape[1]))  # rare: see MAX_START_BUCKETS
        acc[: self.acc.shape[0]] = self.acc
        self.acc = acc
        self.b_ent = np.resize(self.b_ent, cap)
        self.b_day = np.resize(self.b_day, cap)
        self.b_team = np.resize(self.b_team, (cap, 2))

    def _state(self) -> tuple:
        return (self.shift, self.has_shift, self.crit_shift, self.buf_v, self.buf_c,
                self.buf_day, self.buf_team, self.buf_n, self.acc, self.bmap, self.span,
                self.d0, self.b_ent, self.b_day, self.b_team, self.nb)  # fmt: skip

    def add(self, ent, day, team, cols: tuple, crit) -> None:
        """Sum one batch: (n,) decision-maker numbers, day numbers and team codes (0:
        none, c: the team of rank c - 1), any integer types (ENUM indices as they come),
        ``cols`` p - 1 read-only float64 arrays (design columns, judgment) and the
        criterion (read-only; NaN: no current outcome)."""
        at = 0
        while at < len(ent):
            at = _accumulate(ent, day, team, cols, crit, at, *self._state())
            if at < len(ent):
                self._grow()

    def result(self) -> BucketSums:
        while _finish(*self._state()) >= 0:
            self._grow()
        nb = int(self.nb[0])
        self.buf_v = self.buf_c = None  # release the buffers
        sums = self.acc[:nb]
        _merge_halves(sums, _all_entries(self.p))  # all rows = without + with outcome
        # In (day, decision-maker) order, the order the store keeps them in.
        order = np.lexsort((self.b_ent[:nb], self.b_day[:nb]))
        _permute_rows(sums, order)
        return BucketSums(
            self.shift,
            self.has_shift,
            self.b_ent[order],
            self.b_day[order],
            self.b_team[order],
            sums,
        )


def _all_entries(p: int) -> np.ndarray:
    """Positions in one set's row of the entries not about the criterion (the last
    variable): count, sums and products of the other p - 1."""
    pairs = [(i, j) for i in range(p) for j in range(i, p)]
    tri = [1 + p + at for at, (i, j) in enumerate(pairs) if j < p - 1]
    return np.array([0, *range(1, p), *tri], dtype=np.intp)


def _cut_py(m: float) -> float:
    a = m * _SPLIT
    return a - (a - m)
