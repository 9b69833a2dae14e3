"""Compiled window sums (``plan.window_sums``): per entity, running sums over the days
of each block of ``length`` days - from the block's end backwards (suffix) and from its
start forwards (prefix) - on a small grid that stays in cache; a window is one suffix
plus one prefix.

The order of the additions is fixed by the days alone (a day with no bucket adds
nothing), so a window's sums do not depend - to the last bit - on which other days were
loaded: an incremental refresh reproduces a full one.  The same order as the numpy
version this replaced (``np.cumsum`` adds in sequence), so its figures are unchanged.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def _entity_windows(rows, day, linked, sums, wins, first, end, d0, length, out, grid, suffix):
    """The windows ``wins`` (indices into ``first``/``end``/``out``) of one entity whose
    bucket rows are ``rows`` (indices into ``day``/``linked``/``sums``)."""
    part = sums.shape[1]
    width = 2 * part
    lo_b = (first[wins[0]] - d0) // length
    hi_b = lo_b
    for w in wins:
        b0 = (first[w] - d0) // length
        b1 = (end[w] - d0) // length
        lo_b = min(lo_b, b0)
        hi_b = max(hi_b, b1)
    nblk = hi_b - lo_b + 1
    g = grid[:nblk]
    s = suffix[:nblk]
    g[:] = 0.0
    for r in rows:
        off = day[r] - d0
        blk = off // length - lo_b
        if blk < 0 or blk >= nblk:
            continue
        k = off % length
        c0 = part if linked[r] else 0
        for j in range(part):
            g[blk, k, c0 + j] = sums[r, j]
    for blk in range(nblk):
        # suffix[k] = g[L-1] + g[L-2] + ... + g[k], added in that order
        for j in range(width):
            s[blk, length - 1, j] = g[blk, length - 1, j]
        for k in range(length - 2, -1, -1):
            for j in range(width):
                s[blk, k, j] = s[blk, k + 1, j] + g[blk, k, j]
        # prefix, in place: g[k] = g[0] + g[1] + ... + g[k]
        for k in range(1, length):
            for j in range(width):
                g[blk, k, j] = g[blk, k - 1, j] + g[blk, k, j]
    for w in wins:
        f_off = first[w] - d0
        e_off = end[w] - d0
        bf = f_off // length - lo_b
        be = e_off // length - lo_b
        kf = f_off % length
        ke = e_off % length
        if be != bf:  # not block-aligned: the tail of one block, the head of the next
            for j in range(width):
                out[w, j] = s[bf, kf, j] + g[be, ke, j]
        else:
            for j in range(width):
                out[w, j] = s[bf, kf, j]


@njit(cache=True, inline="always")
def _run_end(key, order, i):
    """The end of the run of equal ``key[order[.]]`` that starts at ``order[i]``."""
    j = i
    while j < len(order) and key[order[j]] == key[order[i]]:
        j += 1
    return j


@njit(cache=True, nogil=True)
def window_sums_sorted(
    row_ent, row_order, day, linked, sums, win_ent, win_order, first, end, d0, length, max_blocks
):
    """Every window's sums: rows and windows each grouped by entity (``row_order`` /
    ``win_order`` sort them by ``row_ent`` / ``win_ent``)."""
    m = len(win_order)
    width = 2 * sums.shape[1]
    out = np.zeros((len(win_ent), width))
    grid = np.empty((max_blocks, length, width))
    suffix = np.empty((max_blocks, length, width))
    n = len(row_order)
    r = 0
    i = 0
    while i < m:
        e = win_ent[win_order[i]]
        j = _run_end(win_ent, win_order, i)
        while r < n and row_ent[row_order[r]] < e:
            r += 1
        r1 = r
        while r1 < n and row_ent[row_order[r1]] == e:
            r1 += 1
        if r1 > r:
            _entity_windows(row_order[r:r1], day, linked, sums, win_order[i:j], first, end, d0,
                            length, out, grid, suffix)  # fmt: skip
        r = r1
        i = j
    return out


@njit(cache=True, nogil=True)
def pooled_moments(n, mean, comoment, order, group, n_groups):
    """``moments.group_sums`` compiled (the team and all windows): the same two-pass
    formula with the same operations, each group's members added in ``order`` (members
    sorted by ``group``, stable), without its (m, p, p) temporaries."""
    p = mean.shape[1]
    out_n = np.zeros(n_groups)
    out_mean = np.zeros((n_groups, p))
    out_m = np.zeros((n_groups, p, p))
    weighted = np.zeros(p)
    d = np.empty(p)
    size = len(order)
    i = 0
    while i < size:
        g = group[order[i]]
        j = _run_end(group, order, i)
        anchor = mean[order[i]]  # the first member's mean
        total = 0.0
        weighted[:] = 0.0
        for t in range(i, j):
            r = order[t]
            total += n[r]
            for a in range(p):
                weighted[a] += (mean[r, a] - anchor[a]) * n[r]
        out_n[g] = total
        if total > 0:
            for a in range(p):
                out_mean[g, a] = anchor[a] + weighted[a] / total
        acc = out_m[g]
        for t in range(i, j):
            r = order[t]
            nr = n[r]
            for a in range(p):
                d[a] = mean[r, a] - out_mean[g, a]
            for a in range(p):
                for b in range(p):
                    acc[a, b] += d[a] * (d[b] * nr) + comoment[r, a, b]
        i = j
    return out_n, out_mean, out_m
