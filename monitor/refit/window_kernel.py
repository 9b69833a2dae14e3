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
        j = i
        while j < m and win_ent[win_order[j]] == e:
            j += 1
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
