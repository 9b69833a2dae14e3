"""Mergeable sufficient statistics of judgment rows: pure numpy, no I/O.

Sufficient statistics for a set of rows z (one row per judgment, columns
``z = (x_1 .. x_k, Ys[, Ye])``) are the count ``n``, the mean vector and the
centred co-moment matrix ``M = sum_i (z_i - mean)(z_i - mean)^T``.  They merge
exactly with the pairwise update of Chan, Golub & LeVeque (1979) (``merge``), or, for
many sets at once, with the two-pass pooling formula (``group_sums``).  The stored
per-day buckets use the shifted-sum form of the same statistics (``moments_sql``).
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


def remove(whole: Moments, part: Moments) -> Moments:
    """The rows of ``whole`` that are not in ``part`` (a subset of them), element by element:
    the pairwise update run backwards.

    n = n_w - n_p;  mean = (n_w mean_w - n_p mean_p) / n;
    M = M_w - M_p - delta delta^T * n n_p / n_w,  delta = mean_p - mean.
    Where nothing is left (n <= 0) the result is the empty set.  Digits are lost as the
    part's share of the whole grows (a difference of nearly equal sums), so a part that is
    almost all of the whole leaves a remainder with few good digits.
    """
    n = whole.n - part.n
    left = n > 0
    safe = np.where(left, n, 1.0)
    mean = (whole.mean * whole.n[:, None] - part.mean * part.n[:, None]) / safe[:, None]
    delta = part.mean - mean
    w = (safe * part.n / np.where(whole.n > 0, whole.n, 1.0))[:, None, None]
    comoment = whole.comoment - part.comoment - w * (delta[:, :, None] * delta[:, None, :])
    return Moments(
        np.where(left, n, 0.0),
        np.where(left[:, None], mean, 0.0),
        np.where(left[:, None, None], comoment, 0.0),
    )


def group_sums(bucket: Moments, group: np.ndarray, n_groups: int) -> Moments:
    """Merged moments per group: result ``g`` merges every bucket with ``group == g``
    (any order; a group without members gives n = 0).

    The exact two-pass form of the pooled co-moment, vectorised over all groups:
    mean = c + sum n_i (mean_i - c) / n with c one member's mean, then
    M = sum M_i + sum n_i (mean_i - mean)(mean_i - mean)^T.  Only centred statistics
    and differences of nearby means are added, so the digits do not depend on the size
    of the means; an error e in the pooled mean enters M only as n e e^T because
    sum n_i (mean_i - mean) = 0.  The sums run over each group's members in their
    given order (``np.add.reduceat`` after a stable sort), so they do not depend on
    how many groups there are.  Memory: two (B, p, p) temporaries.
    """
    group = np.asarray(group, dtype=np.int64)
    size, p = bucket.size, bucket.width
    if not size:
        return empty_moments(n_groups, p)
    order = np.argsort(group, kind="stable")
    present, starts = np.unique(group[order], return_index=True)

    def total(values: np.ndarray) -> np.ndarray:
        """Per-group sums of ``values`` (rows in bucket order), zero for empty groups."""
        out = np.zeros((n_groups, *values.shape[1:]))
        out[present] = np.add.reduceat(values[order], starts, axis=0)
        return out

    n = total(bucket.n)
    safe = np.where(n > 0, n, 1.0)
    first = np.zeros(n_groups, dtype=np.int64)
    first[group[::-1]] = np.arange(size)[::-1]  # the first member of each group
    anchor = bucket.mean[first]
    weighted = (bucket.mean - anchor[group]) * bucket.n[:, None]
    mean = np.where((n > 0)[:, None], anchor + total(weighted) / safe[:, None], 0.0)
    d = bucket.mean - mean[group]
    spread = d[:, :, None] * (d * bucket.n[:, None])[:, None, :]
    spread += bucket.comoment
    return Moments(n, mean, total(spread))
