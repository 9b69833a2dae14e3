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
