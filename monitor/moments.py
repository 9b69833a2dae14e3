"""Mergeable sufficient statistics of judgment rows: pure numpy, no I/O.

Sufficient statistics for a set of rows z (one row per judgment, columns
``z = (x_1 .. x_k, Ys[, Ye])``) are the count ``n``, the mean vector and the
centred co-moment matrix ``M = sum_i (z_i - mean)(z_i - mean)^T``.  They merge
exactly with the pairwise update of Chan, Golub & LeVeque (1979), which is what lets
a window's statistics be assembled from per-day buckets (``window_sums``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Moments:
    """A stack of ``m`` sufficient-statistic sets over ``p`` variables.

    n:        (m,)      row counts (float64; 0 for an empty set)
    mean:     (m, p)    column means (0 where n == 0)
    comoment: (m, p, p) centred cross-product sums
    """

    n: np.ndarray
    mean: np.ndarray
    comoment: np.ndarray

    @property
    def size(self) -> int:
        return int(self.n.shape[0])

    @property
    def width(self) -> int:
        return int(self.mean.shape[1])

    def take(self, index: np.ndarray | slice) -> Moments:
        return Moments(self.n[index], self.mean[index], self.comoment[index])

    def select(self, columns: np.ndarray | list[int]) -> Moments:
        """The same rows restricted to a subset (or reordering) of the variables."""
        cols = np.asarray(columns, dtype=int)
        return Moments(self.n, self.mean[:, cols], self.comoment[:, cols][:, :, cols])


def empty_moments(m: int, p: int) -> Moments:
    return Moments(np.zeros(m), np.zeros((m, p)), np.zeros((m, p, p)))


def moments_from_rows(z: np.ndarray) -> Moments:
    """Sufficient statistics of one set of rows, as a stack of size 1.

    z: (n, p) array.  An empty array gives n = 0 with zero mean and co-moment.
    """
    z = np.asarray(z, dtype=float)
    if z.ndim != 2:
        raise ValueError("z must be a 2-D array (rows x variables)")
    n, p = z.shape
    if n == 0:
        return empty_moments(1, p)
    mean = z.mean(axis=0)
    d = z - mean
    return Moments(np.array([float(n)]), mean[None, :], (d.T @ d)[None, :, :])


def merge(a: Moments, b: Moments) -> Moments:
    """Pairwise (Chan et al.) merge of two stacks of equal shape, element by element.

    n = n_a + n_b;  mean = mean_a + delta * n_b / n;
    M = M_a + M_b + delta delta^T * n_a n_b / n,  delta = mean_b - mean_a.
    Empty sets (n == 0) merge as the identity.
    """
    n = a.n + b.n
    safe = np.where(n > 0, n, 1.0)
    delta = b.mean - a.mean
    mean = a.mean + delta * (b.n / safe)[:, None]
    w = (a.n * b.n / safe)[:, None, None]
    comoment = a.comoment + b.comoment + w * (delta[:, :, None] * delta[:, None, :])
    mean = np.where((n > 0)[:, None], mean, 0.0)
    return Moments(n, mean, comoment)


def window_sums(bucket: Moments, starts: np.ndarray, stops: np.ndarray) -> Moments:
    """Merged moments of the buckets ``[starts[w], stops[w])`` for every range ``w``.

    bucket: a stack of B bucket statistics (ordered e.g. by decision-maker, day);
    starts, stops: (m,) integer index ranges, half-open; an empty range gives n = 0.

    Why this keeps the digits: raw power sums (sum x, sum x x^T) of cues with a large
    mean cancel catastrophically when turned back into a centred co-moment (a cue with
    mean 1e4 and sd 1 loses about eight digits).  Here nothing but centred statistics
    is ever added: a segment tree whose nodes are Chan merges of their two children is
    built once, and each range is the Chan merge of the O(log B) nodes covering it.
    Every step adds centred co-moments plus a ``delta delta^T`` term whose ``delta`` is
    a difference of nearby means, so the rounding error stays a few ulps of the
    centred co-moment times log2(B), independent of the size of the means.
    Memory: two copies of the bucket stack.
    """
    starts = np.asarray(starts, dtype=np.int64)
    stops = np.asarray(stops, dtype=np.int64)
    size, p = bucket.size, bucket.width
    # Iterative bottom-up segment tree (leaves at [size, 2 size)); valid for any size
    # because the merge is commutative.
    n = np.zeros(2 * size)
    mean = np.zeros((2 * size, p))
    com = np.zeros((2 * size, p, p))
    n[size:], mean[size:], com[size:] = bucket.n, bucket.mean, bucket.comoment
    hi = size
    while hi > 1:
        lo = (hi + 1) // 2  # children 2i, 2i+1 of every node in [lo, hi) are built
        left = Moments(n[2 * lo : 2 * hi : 2], mean[2 * lo : 2 * hi : 2], com[2 * lo : 2 * hi : 2])
        right = Moments(
            n[2 * lo + 1 : 2 * hi : 2], mean[2 * lo + 1 : 2 * hi : 2], com[2 * lo + 1 : 2 * hi : 2]
        )
        node = merge(left, right)
        n[lo:hi], mean[lo:hi], com[lo:hi] = node.n, node.mean, node.comoment
        hi = lo
    tree = Moments(n, mean, com)
    acc = empty_moments(starts.shape[0], p)
    lft, rgt = starts + size, np.maximum(stops, starts) + size
    while np.any(lft < rgt):
        live = lft < rgt
        use = live & (lft % 2 == 1)
        acc = merge(acc, _masked_take(tree, lft, use))
        lft = lft + use
        use = live & (rgt % 2 == 1)
        rgt = rgt - use
        acc = merge(acc, _masked_take(tree, rgt, use))
        lft, rgt = lft // 2, rgt // 2
    return acc


def _masked_take(tree: Moments, index: np.ndarray, use: np.ndarray) -> Moments:
    """Nodes ``tree[index]`` where ``use``, empty sets (the merge identity) elsewhere."""
    part = tree.take(np.where(use, index, 0))
    keep = use.astype(float)
    return Moments(part.n * keep, part.mean * keep[:, None], part.comoment * keep[:, None, None])


def _masked(stack: Moments, index: np.ndarray, use: np.ndarray) -> Moments:
    """``stack[index]`` where ``use``, the merge identity (an empty set) elsewhere."""
    part = stack.take(np.where(use, index, 0))
    return Moments(
        np.where(use, part.n, 0.0),
        np.where(use[:, None], part.mean, 0.0),
        np.where(use[:, None, None], part.comoment, 0.0),
    )


def _segmented_scan(bucket: Moments, seg_start: np.ndarray, reverse: bool) -> Moments:
    """Running merges within consecutive segments: element i holds the merge of its
    segment's elements from the segment start up to i (or from i to the segment end
    when ``reverse``).  One vectorised merge per position in the longest segment."""
    size = bucket.size
    idx = np.arange(size)
    starts = np.flatnonzero(seg_start)
    stops = np.append(starts[1:], size)
    seg = np.cumsum(seg_start) - 1
    pos = (stops[seg] - 1 - idx) if reverse else (idx - starts[seg])
    out = Moments(bucket.n.copy(), bucket.mean.copy(), bucket.comoment.copy())
    step = 1 if reverse else -1  # where the running merge so far sits
    order = np.argsort(pos, kind="stable")
    bounds = np.searchsorted(pos[order], np.arange(1, int(pos.max(initial=0)) + 2))
    for j in range(len(bounds) - 1):
        here = order[bounds[j] : bounds[j + 1]]
        if not len(here):
            continue
        acc = merge(out.take(here + step), bucket.take(here))
        out.n[here], out.mean[here], out.comoment[here] = acc.n, acc.mean, acc.comoment
    return out


def group_sums(bucket: Moments, group: np.ndarray, n_groups: int) -> Moments:
    """Merged moments per group: result ``g`` merges every bucket with ``group == g``
    (any order; a group without members gives n = 0).

    The exact two-pass form of the pooled co-moment, vectorised over all groups:
    mean = c + sum n_i (mean_i - c) / n with c one member's mean, then
    M = sum M_i + sum n_i (mean_i - mean)(mean_i - mean)^T.  Only centred statistics
    and differences of nearby means are added, so the digits do not depend on the size
    of the means; an error e in the pooled mean enters M only as n e e^T because
    sum n_i (mean_i - mean) = 0.  The sums are one sparse (groups x buckets) product,
    in a fixed order, so no reordered copy of the stack is made.
    Memory: one (B, p, p) temporary.
    """
    from scipy import sparse

    group = np.asarray(group, dtype=np.int64)
    size, p = bucket.size, bucket.width
    if not size:
        return empty_moments(n_groups, p)
    member = sparse.csr_matrix((np.ones(size), (group, np.arange(size))), shape=(n_groups, size))
    n = member @ bucket.n
    safe = np.where(n > 0, n, 1.0)
    first = np.zeros(n_groups, dtype=np.int64)
    first[group[::-1]] = np.arange(size)[::-1]  # the first member of each group
    anchor = bucket.mean[first]
    weighted = (bucket.mean - anchor[group]) * bucket.n[:, None]
    mean = np.where((n > 0)[:, None], anchor + (member @ weighted) / safe[:, None], 0.0)
    d = bucket.mean - mean[group]
    spread = d[:, :, None] * (d * bucket.n[:, None])[:, None, :]
    spread += bucket.comoment
    comoment = (member @ spread.reshape(size, p * p)).reshape(n_groups, p, p)
    return Moments(n, mean, comoment)


def segment_sums(bucket: Moments, seg_start: np.ndarray) -> Moments:
    """Merged moments of consecutive segments (``seg_start`` True at each segment's
    first element); one result per segment, in order (``group_sums``)."""
    seg_start = np.asarray(seg_start, dtype=bool)
    if not bucket.size:
        return bucket
    seg = np.cumsum(seg_start) - 1
    return group_sums(bucket, seg, int(seg[-1]) + 1)


def fixed_window_sums(
    bucket: Moments,
    group: np.ndarray,
    day: np.ndarray,
    win_group: np.ndarray,
    win_end: np.ndarray,
    length: int,
) -> Moments:
    """Merged moments of fixed-length day windows ``[end - length + 1, end]``.

    bucket: B statistics sorted by (group, day), at most one per (group, day), with
    their integer ``group`` and ``day`` (e.g. days since 1970); win_group, win_end:
    (m,) the windows.  An empty window gives n = 0.

    Why it is fast: days are cut into blocks of ``length`` days (``day // length``), so a
    window covers the tail of one block and the head of the next (or exactly one
    block).  Running merges from each block's start (prefix) and to its end (suffix)
    take one vectorised pass per day of a block; then each window is one Chan merge
    of a suffix and a prefix.  Only centred statistics are ever added, as in
    ``window_sums``.  Each suffix and prefix used runs over buckets inside the window
    only, so a window's figures (to the last bit) do not depend on which other days
    were loaded: an incremental refresh reproduces a full one.
    """
    group = np.asarray(group, dtype=np.int64)
    day = np.asarray(day, dtype=np.int64)
    win_group = np.asarray(win_group, dtype=np.int64)
    win_end = np.asarray(win_end, dtype=np.int64)
    m = win_end.shape[0]
    if not bucket.size or not m:
        return empty_moments(m, bucket.width)
    big = np.int64(1) << 40
    block = day // length
    key = group * big + block
    seg_start = np.ones(bucket.size, dtype=bool)
    seg_start[1:] = key[1:] != key[:-1]
    prefix = _segmented_scan(bucket, seg_start, reverse=False)
    suffix = _segmented_scan(bucket, seg_start, reverse=True)
    composite = group * big + day  # sorted, as the buckets are
    first = win_end - length + 1
    b_first, b_end = first // length, win_end // length
    i0 = np.searchsorted(composite, win_group * big + first, side="left")
    i0c = np.minimum(i0, bucket.size - 1)
    left_ok = (i0 < bucket.size) & (key[i0c] == win_group * big + b_first)
    # Aligned windows are one whole block: the suffix from its first day.
    left_ok &= composite[i0c] <= win_group * big + win_end
    i1 = np.searchsorted(composite, win_group * big + win_end, side="right") - 1
    i1c = np.maximum(i1, 0)
    right_ok = (i1 >= 0) & (b_end != b_first) & (key[i1c] == win_group * big + b_end)
    return merge(_masked(suffix, i0c, left_ok), _masked(prefix, i1c, right_ok))
