"""The descent problem as a cone program with data affine in the parameters.

    minimise    c'x + d
    subject to  A x = b
                G x + s = h,   s in K = R+^l x Q^q1 x ... x Q^qk

Every nonzero of (c, d, A, b, G, h) is an affine function of the flat
parameter vector p of :data:`codegen.model.problem.PARAMETERS` (in that order):
``values = map @ [p; 1]``. The sparsity patterns are fixed (explicit zeros
kept), so code generated from a :class:`ConeProgram` can apply the map with
plain loops over constant index arrays.

The data come from CVXPY's own DPP canonicalisation (the same reduction chain
the reference solve uses), so the generated solvers and the reference solve
provably the same program; ``tests/test_canonical.py`` checks it instance by
instance.
"""

from __future__ import annotations

from dataclasses import dataclass

import cvxpy as cp
import numpy as np
import scipy.sparse as sp

from codegen.model import library_options
from codegen.model.problem import DescentProblem

#: Clarabel settings for the reference solve, and for any
#: tool that solves this cone program with Clarabel directly to compare with
#: it (codegen.backends.native.measure, .sweep): tighter than Clarabel's
#: defaults (1e-8), so that the reference sits a decade inside the 1e-8 the
#: generated solvers are asked for.
CLARABEL_TIGHT = library_options.clarabel(1e-9, iterations=200)



@dataclass(frozen=True)
class AffineSparse:
    """A sparse matrix (CSC pattern) whose values are affine in p.

    ``map`` has one row per stored nonzero and ``n_params + 1`` columns; the
    last column is the constant term.
    """

    shape: tuple
    indptr: np.ndarray
    indices: np.ndarray
    map: sp.csr_matrix

    @property
    def nnz(self) -> int:
        return int(self.indptr[-1])

    def values(self, p: np.ndarray) -> np.ndarray:
        return self.map @ np.append(p, 1.0)

    def matrix(self, p: np.ndarray) -> sp.csc_matrix:
        return sp.csc_matrix((self.values(p), self.indices, self.indptr), shape=self.shape)

    def dense_vector(self, p: np.ndarray) -> np.ndarray:
        """For an (n, 1) vector: the dense values."""
        return self.matrix(p).toarray().ravel()

    @property
    def is_constant(self) -> bool:
        return self.map[:, :-1].nnz == 0


@dataclass(frozen=True)
class ConeProgram:
    """min c'x + d  s.t.  A x = b,  G x + s = h,  s in R+^l x SOC(q1) x ..."""

    n_params: int
    n: int
    c: AffineSparse          # (n, 1)
    d: AffineSparse          # (1, 1) objective constant
    A: AffineSparse          # (p, n)
    b: AffineSparse          # (p, 1)
    G: AffineSparse          # (m, n)
    h: AffineSparse          # (m, 1)
    nonneg: int              # l
    soc: tuple               # (q1, ..., qk)
    variables: dict          # name -> (offset in x, shape, order 'F')

    @property
    def p(self) -> int:
        return self.A.shape[0]

    @property
    def m(self) -> int:
        return self.G.shape[0]

    def evaluate(self, p: np.ndarray) -> dict:
        """Numeric data at parameter vector p (scipy CSC matrices, dense vectors)."""
        return {
            "c": self.c.dense_vector(p), "d": float(self.d.dense_vector(p)[0]),
            "A": self.A.matrix(p), "b": self.b.dense_vector(p),
            "G": self.G.matrix(p), "h": self.h.dense_vector(p),
        }

    def unpack(self, x: np.ndarray) -> dict:
        """Split a solution vector into the problem's named variables."""
        out = {}
        for name, (off, shape) in self.variables.items():
            size = int(np.prod(shape))
            out[name] = np.asarray(x[off:off + size]).reshape(shape, order="F")
        return out


def flat_parameters(dp: DescentProblem, values: dict) -> np.ndarray:
    """The flat parameter vector p, in the order of the parameter layout."""
    out = np.zeros(sum(size for _, _, size in dp.parameter_layout))
    for name, off, size in dp.parameter_layout:
        out[off:off + size] = np.asarray(values[name], float).ravel()
    return out


def _split_columns(mat: sp.csc_matrix, pmap: sp.csr_matrix, col_lo: int, col_hi: int,
                   row_lo: int, row_hi: int, sign: float) -> AffineSparse:
    """Sub-block [row_lo:row_hi, col_lo:col_hi] of a pattern whose nonzero k has
    values pmap[k] @ [p; 1]; keeps explicit zeros so the pattern is fixed."""
    indptr, indices = mat.indptr, mat.indices
    keep, new_indptr, new_indices = [], [0], []
    for j in range(col_lo, col_hi):
        for k in range(indptr[j], indptr[j + 1]):
            i = indices[k]
            if row_lo <= i < row_hi:
                keep.append(k)
                new_indices.append(i - row_lo)
        new_indptr.append(len(keep))
    sub = pmap[keep, :] * sign if keep else sp.csr_matrix((0, pmap.shape[1]))
    return AffineSparse(shape=(row_hi - row_lo, col_hi - col_lo),
                        indptr=np.asarray(new_indptr, dtype=np.int64),
                        indices=np.asarray(new_indices, dtype=np.int64),
                        map=sp.csr_matrix(sub))


def extract(dp: DescentProblem) -> ConeProgram:
    """Canonicalise ``dp`` once and return its parametric cone program."""
    # Any valid parameter values will do: DPP canonicalisation is symbolic.
    dp.set_parameters(dp.values(dp.vehicle.envelope.position_max_m,
                                dp.vehicle.envelope.velocity_min_mps,
                                dp.vehicle.mass_wet_kg, 60.0, (0.0, 0.0, 0.0), "merit"))
    data, _, _ = dp.problem.get_problem_data(cp.CLARABEL)
    pp = data[cp.settings.PARAM_PROB]
    n = int(pp.x.size)
    n_ours = sum(size for _, _, size in dp.parameter_layout)

    # Column map: CVXPY's parameter columns -> our flat layout (+ constant last).
    offsets = {name: off for name, off, _ in dp.parameter_layout}
    col_map = np.empty(pp.total_param_size + 1, dtype=np.int64)
    for param in pp.parameters:
        start = pp.param_id_to_col[param.id]
        col_map[start:start + param.size] = offsets[param.name()] + np.arange(param.size)
    col_map[pp.total_param_size] = n_ours
    perm = sp.csr_matrix((np.ones(len(col_map)), (np.arange(len(col_map)), col_map)),
                         shape=(len(col_map), n_ours + 1))

    ra = pp.reduced_A
    ra.cache(keep_zeros=True)
    indices, indptr, shape = ra.problem_data_index
    a_pat = sp.csc_matrix((np.zeros(len(indices)), indices, indptr), shape=shape)
    a_map = sp.csr_matrix(ra.reduced_mat) @ perm
    rows = shape[0]
    dims = pp.cone_dims
    if getattr(dims, "exp", 0) or getattr(dims, "psd", []) or getattr(dims, "p3d", []):
        raise ValueError("descent problem produced cones other than zero, nonneg and SOC")
    n_eq = int(dims.zero)
    # CVXPY stores  A_cvx x + b_cvx in K;  solver form is  -A_cvx x + s = b_cvx.
    A = _split_columns(a_pat, a_map, 0, n, 0, n_eq, -1.0)
    b = _split_columns(a_pat, a_map, n, n + 1, 0, n_eq, 1.0)
    G = _split_columns(a_pat, a_map, 0, n, n_eq, rows, -1.0)
    h = _split_columns(a_pat, a_map, n, n + 1, n_eq, rows, 1.0)

    q = sp.csc_matrix(pp.q)                 # ((n+1) x (np+1)): rows = c then d
    q_rows = sp.csr_matrix(q @ perm)
    c_idx = np.arange(n)
    c = AffineSparse(shape=(n, 1), indptr=np.array([0, n]), indices=c_idx,
                     map=sp.csr_matrix(q_rows[:n, :]))
    d = AffineSparse(shape=(1, 1), indptr=np.array([0, 1]), indices=np.array([0]),
                     map=sp.csr_matrix(q_rows[n:n + 1, :]))

    variables = {}
    by_id = {v.id: v for v in pp.variables}
    for name, var in dp.vars.items():
        if var.id in pp.var_id_to_col:
            variables[name] = (int(pp.var_id_to_col[var.id]), tuple(var.shape) or (1,))
        else:
            raise ValueError(f"variable {name} was eliminated by canonicalisation")
    del by_id
    return ConeProgram(n_params=n_ours, n=n, c=c, d=d, A=A, b=b, G=G, h=h,
                       nonneg=int(dims.nonneg), soc=tuple(int(k) for k in dims.soc),
                       variables=variables)
