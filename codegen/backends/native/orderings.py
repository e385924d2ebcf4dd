"""Fill-reducing orderings of a symmetric pattern (its adjacency lists).

Our own plain implementations of minimum degree and minimum local fill
(exact degrees, lazy heap, ties broken by index), and reverse Cuthill-McKee
from scipy.sparse.csgraph. :mod:`codegen.backends.native.symbolic` tries them
all; :mod:`codegen.backends.native.periodic` orders one stage with minimum
fill. Both import this module, which imports neither.
"""

from __future__ import annotations

import heapq

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee


def minimum_degree(dim: int, adj: list) -> np.ndarray:
    """Plain minimum-degree ordering on the elimination graph (no recursion)."""
    g = [set(a) for a in adj]
    alive = [True] * dim
    heap = [(len(g[v]), v) for v in range(dim)]
    heapq.heapify(heap)
    order = []
    while heap:
        deg, v = heapq.heappop(heap)
        if not alive[v] or deg != len(g[v]):
            continue
        alive[v] = False
        order.append(v)
        nbrs = g[v]
        for u in nbrs:
            g[u].discard(v)
        nl = list(nbrs)
        for u in nl:
            g[u].update(nbrs)
            g[u].discard(u)
            heapq.heappush(heap, (len(g[u]), u))
        g[v] = set()
    return np.asarray(order, dtype=np.int64)


def minimum_fill(dim: int, adj: list, classes=None) -> np.ndarray:
    """Minimum local fill (deficiency) ordering, ties by degree then index.
    With ``classes`` (an int per node), every node of a lower class is
    eliminated before any node of a higher one (constrained ordering)."""
    g = [set(a) for a in adj]
    cls = list(classes) if classes is not None else [0] * dim

    def deficiency(v):
        nb = list(g[v])
        missing = 0
        for i, a in enumerate(nb):
            ga = g[a]
            for b in nb[i + 1:]:
                if b not in ga:
                    missing += 1
        return missing

    alive = [True] * dim
    key = [(cls[v], deficiency(v), len(g[v])) for v in range(dim)]
    heap = [key[v] + (v,) for v in range(dim)]
    heapq.heapify(heap)
    order = []
    while heap:
        entry = heapq.heappop(heap)
        v = entry[3]
        if not alive[v] or entry[:3] != key[v]:
            continue
        alive[v] = False
        order.append(v)
        nbrs = g[v]
        for u in nbrs:
            g[u].discard(v)
        for u in nbrs:
            g[u].update(nbrs)
            g[u].discard(u)
        g[v] = set()
        touched = set(nbrs)
        for u in nbrs:
            touched |= g[u]
        for u in sorted(touched):
            if alive[u]:
                k = (cls[u], deficiency(u), len(g[u]))
                if k != key[u]:
                    key[u] = k
                    heapq.heappush(heap, k + (u,))
    return np.asarray(order, dtype=np.int64)


def rcm(dim: int, adj: list) -> np.ndarray:
    rows, cols = [], []
    for i, a in enumerate(adj):
        for j in a:
            rows.append(i)
            cols.append(j)
    mat = sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(dim, dim))
    return np.asarray(reverse_cuthill_mckee(mat, symmetric_mode=True), dtype=np.int64)
