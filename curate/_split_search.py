"""The optimiser behind every curate splitter: whole groups to splits, classes balanced.

Problem: ``G`` groups, each with a vector of class counts (one block of classes
per stratification column) and a size in images, go to ``S`` splits with
target fractions ``t``. The objective is

    J = sum over blocks b of (1 / C_b) sum over classes c in b, splits s of
            (A[s, c] / n[c] - t[s]) ** 2
        + overall_weight * sum over splits s of (N[s] / N - t[s]) ** 2

where ``A[s, c]`` counts the images of class ``c`` in split ``s``, ``n[c]`` the
images of class ``c``, ``N[s]`` the images in split ``s``.

Search: greedy by group size (largest first; ties by a seeded rank) puts each
group where the objective grows least, which is the split with the largest
remaining deficit over the group's classes. Then local search sweeps the
groups in the same order, moving a group to another split, or swapping it with
a group of its dominant class in another split, whenever that lowers ``J``,
or with a group of similar size (within ``window`` places in the processing
order), until a sweep changes nothing (or ``max_sweeps``). Then a few restarts
perturb the best assignment (a small share of groups moved at random) and search
again, keeping any improvement. Locked groups never move.

The inner loops are compiled with numba; everything here works on arrays.
"""

from __future__ import annotations

import numpy as np
from numba import njit

_IMPROVEMENT = 1e-13  # a move or swap must lower J by more than this


@njit(cache=True)
def _move_delta(g, s_from, s_to, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W):
    d = 0.0
    for p in range(indptr[g], indptr[g + 1]):
        c = indices[p]
        v = data[p]
        n = n_c[c]
        if s_from >= 0:
            a = A[s_from, c] / n - t[s_from]
            b = (A[s_from, c] - v) / n - t[s_from]
            d += w_c[c] * (b * b - a * a)
        a = A[s_to, c] / n - t[s_to]
        b = (A[s_to, c] + v) / n - t[s_to]
        d += w_c[c] * (b * b - a * a)
    v = sizes[g]
    if s_from >= 0:
        a = Ns[s_from] / N - t[s_from]
        b = (Ns[s_from] - v) / N - t[s_from]
        d += W * (b * b - a * a)
    a = Ns[s_to] / N - t[s_to]
    b = (Ns[s_to] + v) / N - t[s_to]
    d += W * (b * b - a * a)
    return d


@njit(cache=True)
def _swap_delta(g, h, s0, s1, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W):
    """Change of J when g goes s0 -> s1 and h goes s1 -> s0 (row indices sorted)."""
    d = 0.0
    p, pe = indptr[g], indptr[g + 1]
    q, qe = indptr[h], indptr[h + 1]
    while p < pe or q < qe:
        if q >= qe or (p < pe and indices[p] < indices[q]):
            c = indices[p]
            x = data[p]
            p += 1
        elif p >= pe or indices[q] < indices[p]:
            c = indices[q]
            x = -data[q]
            q += 1
        else:
            c = indices[p]
            x = data[p] - data[q]
            p += 1
            q += 1
        n = n_c[c]
        a0 = A[s0, c] / n - t[s0]
        b0 = (A[s0, c] - x) / n - t[s0]
        a1 = A[s1, c] / n - t[s1]
        b1 = (A[s1, c] + x) / n - t[s1]
        d += w_c[c] * (b0 * b0 - a0 * a0 + b1 * b1 - a1 * a1)
    x = sizes[g] - sizes[h]
    a0 = Ns[s0] / N - t[s0]
    b0 = (Ns[s0] - x) / N - t[s0]
    a1 = Ns[s1] / N - t[s1]
    b1 = (Ns[s1] + x) / N - t[s1]
    d += W * (b0 * b0 - a0 * a0 + b1 * b1 - a1 * a1)
    return d


@njit(cache=True)
def _place(g, s, sign, indptr, indices, data, A, sizes, Ns):
    for p in range(indptr[g], indptr[g + 1]):
        A[s, indices[p]] += sign * data[p]
    Ns[s] += sign * sizes[g]


@njit(cache=True)
def _search(indptr, indices, data, sizes, n_c, w_c, t, W, order, assign, locked, cand_ptr, cand_idx,
            dominant, offsets, max_sweeps, max_candidates, window):
    S = t.shape[0]
    C = n_c.shape[0]
    G = sizes.shape[0]
    N = sizes.sum()
    A = np.zeros((S, C))
    Ns = np.zeros(S)
    position = np.empty(G, dtype=np.int64)
    for i in range(G):
        position[order[i]] = i
    for g in range(G):
        if assign[g] >= 0:
            _place(g, assign[g], 1.0, indptr, indices, data, A, sizes, Ns)
    for g in order:
        if assign[g] >= 0:
            continue
        best_s = 0
        best_d = np.inf
        for s in range(S):
            d = _move_delta(g, -1, s, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W)
            if d < best_d:
                best_d = d
                best_s = s
        assign[g] = best_s
        _place(g, best_s, 1.0, indptr, indices, data, A, sizes, Ns)
    sweeps = 0
    for sweep in range(max_sweeps):
        sweeps += 1
        changed = False
        for g in order:
            if locked[g]:
                continue
            s0 = assign[g]
            best_d = -_IMPROVEMENT
            best_s = -1
            for s in range(S):
                if s != s0:
                    d = _move_delta(g, s0, s, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W)
                    if d < best_d:
                        best_d = d
                        best_s = s
            best_h = -1
            c = dominant[g]
            start = cand_ptr[c]
            m = cand_ptr[c + 1] - start
            if m > 1:
                off = (offsets[g] + sweep * 7919) % m
                for j in range(min(m, max_candidates)):
                    h = cand_idx[start + (off + j) % m]
                    s1 = assign[h]
                    if h == g or locked[h] or s1 == s0:
                        continue
                    d = _swap_delta(g, h, s0, s1, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W)
                    if d < best_d:
                        best_d = d
                        best_h = h
            # and groups of similar size (neighbours in the processing order)
            for j in range(-window, window + 1):
                q = position[g] + j
                if j == 0 or q < 0 or q >= G:
                    continue
                h = order[q]
                s1 = assign[h]
                if locked[h] or s1 == s0:
                    continue
                d = _swap_delta(g, h, s0, s1, indptr, indices, data, A, n_c, w_c, t, sizes, Ns, N, W)
                if d < best_d:
                    best_d = d
                    best_h = h
            if best_h >= 0:
                s1 = assign[best_h]
                _place(g, s0, -1.0, indptr, indices, data, A, sizes, Ns)
                _place(best_h, s1, -1.0, indptr, indices, data, A, sizes, Ns)
                _place(g, s1, 1.0, indptr, indices, data, A, sizes, Ns)
                _place(best_h, s0, 1.0, indptr, indices, data, A, sizes, Ns)
                assign[g] = s1
                assign[best_h] = s0
                changed = True
            elif best_s >= 0:
                _place(g, s0, -1.0, indptr, indices, data, A, sizes, Ns)
                _place(g, best_s, 1.0, indptr, indices, data, A, sizes, Ns)
                assign[g] = best_s
                changed = True
        if not changed:
            break
    return sweeps


@njit(cache=True)
def _objective(indptr, indices, data, sizes, n_c, w_c, t, W, assign):
    S = t.shape[0]
    A = np.zeros((S, n_c.shape[0]))
    Ns = np.zeros(S)
    for g in range(sizes.shape[0]):
        _place(g, assign[g], 1.0, indptr, indices, data, A, sizes, Ns)
    total = 0.0
    for s in range(S):
        for c in range(n_c.shape[0]):
            x = A[s, c] / n_c[c] - t[s]
            total += w_c[c] * x * x
        x = Ns[s] / sizes.sum() - t[s]
        total += W * x * x
    return total


def objective(counts, sizes, assign, targets, weights, overall_weight) -> float:
    """The objective J of an assignment (numpy; for reports and tests).

    ``counts`` is a (groups x classes) scipy sparse matrix, ``weights`` the
    per-class weight ``1 / C_b``.
    """
    S = len(targets)
    n_c = np.asarray(counts.sum(axis=0)).ravel()
    onehot = np.zeros((len(assign), S))
    onehot[np.arange(len(assign)), assign] = 1.0
    A = np.asarray((counts.T @ onehot).T)  # S x C
    per_class = ((A / n_c - targets[:, None]) ** 2 * weights[None, :]).sum()
    Ns = onehot.T @ sizes
    return float(per_class + overall_weight * ((Ns / sizes.sum() - targets) ** 2).sum())


def search(counts, sizes, targets, weights, *, order, locked, offsets, overall_weight=1.0,
           max_sweeps=100, max_candidates=128, window=16,
           restarts=None, kick_fraction=0.05):
    """Assign groups (rows of ``counts``) to splits; returns (assignment, sweeps).

    Parameters
    ----------
    counts : scipy.sparse matrix, shape (G, C)
        Images per group and class (one block of classes per stratification column).
    sizes : ndarray, shape (G,)
        Images per group.
    targets : ndarray, shape (S,)
        Target fraction per split, summing to 1.
    weights : ndarray, shape (C,)
        Weight per class.
    order : ndarray of int
        Processing order of the groups (largest first, ties by a seeded rank).
    locked : ndarray of int, shape (G,)
        Split index a group is locked to, or -1.
    offsets : ndarray of int, shape (G,)
        Seeded start offsets into each group's swap candidates (the first four
        also seed the restarts).
    restarts : int, optional
        Default ``min(24, max(2, 200_000 // G))`` (many for small problems, few
        for large ones, where they gain little). After the first search, this many times: move ``kick_fraction`` of the
        free groups to random splits, search again, keep the result if ``J`` fell.
    """
    csr = counts.tocsr().astype(np.float64)
    csr.sum_duplicates()
    csr.sort_indices()
    csc = csr.tocsc()
    csc.sort_indices()
    n_c = np.asarray(csr.sum(axis=0), dtype=np.float64).ravel()
    dominant = np.zeros(csr.shape[0], dtype=np.int64)
    nonempty = np.diff(csr.indptr) > 0
    if nonempty.any():
        dominant[nonempty] = np.asarray(csr[nonempty].argmax(axis=1)).ravel()
    locked = np.asarray(locked, dtype=np.int64)
    args = (csr.indptr.astype(np.int64), csr.indices.astype(np.int64), csr.data,
            np.asarray(sizes, dtype=np.float64), n_c, np.asarray(weights, dtype=np.float64),
            np.asarray(targets, dtype=np.float64), float(overall_weight))
    tail = (csc.indptr.astype(np.int64), csc.indices.astype(np.int64), dominant,
            np.asarray(offsets, dtype=np.int64), int(max_sweeps), int(max_candidates), int(window))
    order = np.asarray(order, dtype=np.int64)
    is_locked = locked >= 0
    best = locked.copy()
    sweeps = _search(*args, order, best, is_locked, *tail)
    best_j = _objective(*args, best)
    free = np.flatnonzero(~is_locked)
    rng = np.random.default_rng(np.asarray(offsets[:4], dtype=np.int64) if len(offsets) else 0)
    n_kick = max(2, int(round(kick_fraction * len(free))))
    if restarts is None:
        restarts = min(24, max(2, 200_000 // max(len(free), 1)))
    for _ in range(restarts if len(free) > 1 else 0):
        trial = best.copy()
        kicked = rng.choice(free, size=min(n_kick, len(free)), replace=False)
        trial[kicked] = rng.integers(0, len(targets), size=len(kicked))
        sweeps += _search(*args, order, trial, is_locked, *tail)
        j = _objective(*args, trial)
        if j < best_j - 1e-13:
            best, best_j = trial, j
    return best, int(sweeps)
